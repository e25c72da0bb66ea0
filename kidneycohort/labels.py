"""Display labels: how codes (endpoint names, groups, equation ids) read in figures and text."""

from __future__ import annotations

import re

__all__ = ["display_label"]


def display_label(code: str) -> str:
    """``egfr_decline_40`` -> ``eGFR decline 40``: underscores become spaces and "egfr" is
    written "eGFR", so codes stay recognisable.

    >>> display_label("egfr_below_15")
    'eGFR below 15'
    """
    return re.sub(r"\begfr\b", "eGFR", str(code).replace("_", " "), flags=re.IGNORECASE)
