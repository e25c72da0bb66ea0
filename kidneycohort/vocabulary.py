"""The codes kidneycohort accepts wherever a table or an argument carries them.

Sex is one vocabulary for every public function (harmonise, cohort eGFR, the equation
library, KFRE): ``female`` and ``male`` and the spellings below, after trimming, lower
casing and folding runs of spaces, underscores and hyphens. Site codes (``1``/``2``,
``W``/``H``) are mapped in the source or harmonise options; an unrecognised code is an
error that names it, never a silent missing value.
"""

from __future__ import annotations

import re
from collections.abc import Iterable
from typing import Final

import polars as pl

from kidneycohort.errors import InputDataError

__all__ = ["SEX_CODES", "fold_code", "fold_code_expr", "sex_expr", "unknown_sex_error"]

SEX_CODES: Final[dict[str, str]] = {
    "female": "female",
    "f": "female",
    "woman": "female",
    "male": "male",
    "m": "male",
    "man": "male",
}
"""Folded sex spellings -> ``female`` / ``male``."""


def fold_code_expr(expr: pl.Expr) -> pl.Expr:
    """Fold a code for lookup: strip, lower case, runs of space/underscore/hyphen -> ' '."""
    return (
        expr.cast(pl.String).str.strip_chars().str.to_lowercase().str.replace_all(r"[\s_\-]+", " ")
    )


def fold_code(code: str) -> str:
    """Python twin of :func:`fold_code_expr`, for map keys given in a config.

    >>> fold_code("  Haemo_Dialysis ")
    'haemo dialysis'
    """
    return re.sub(r"[\s_\-]+", " ", str(code).strip().lower())


def sex_expr(expr: pl.Expr, codes: dict[str, str] | None = None) -> pl.Expr:
    """``female`` / ``male`` from any accepted spelling (and ``codes``, folded keys);
    null for a missing or empty value and for a code not in the vocabulary."""
    table = {**SEX_CODES, **{fold_code(k): v for k, v in (codes or {}).items()}}
    return fold_code_expr(expr).replace_strict(table, default=None, return_dtype=pl.String)


def unknown_sex_error(where: str, codes: Iterable[object]) -> InputDataError:
    """The one-line error for sex codes outside the vocabulary (up to five named)."""
    shown = sorted({str(c) for c in codes})
    listed = ", ".join(repr(c) for c in shown[:5]) + (" ..." if len(shown) > 5 else "")
    return InputDataError(
        f"{where}: sex code(s) {listed} not recognised; use female/male (or f/m, woman/man), "
        "or map your codes to them (harmonize.sex_codes, or the source's value map)"
    )
