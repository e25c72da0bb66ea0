"""The cautions printed by the command line and the report (one wording everywhere)."""

from __future__ import annotations

from typing import Final

__all__ = ["CAUTIONS", "SHORT_CAUTION"]

CAUTIONS: Final = (
    "Research estimates only: eGFR values, categories, endpoints and model results from "
    "kidneycohort are for cohort and trial research, not for individual clinical decisions "
    "or drug dosing without clinical judgement.",
    "Every equation was developed and validated in particular populations and age ranges; "
    "outside them its estimates may be biased.",
    "Local guidelines and licensed clinical practice take precedence over anything this "
    "software computes.",
)

SHORT_CAUTION: Final = (
    "Research estimates - not for individual clinical decisions or drug dosing without "
    "clinical judgement; local guidelines take precedence."
)
