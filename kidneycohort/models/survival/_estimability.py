"""When a hazard ratio is estimable: one rule for every table, figure and report line.

A Cox fit returns a number even when the data cannot support one: with one event in a
group and none in the other, the partial likelihood has no maximum and the optimiser
stops at some huge coefficient (a "hazard ratio" of 9,916,232 with limits 0 to inf).
Such a number must never be printed as an estimate. The rule, applied to each term of a
fit (common practice; e.g. monotone likelihood in Heinze & Schemper, Biometrics 2001,
57:114-119):

1. the fit converged (lifelines reports no convergence problem);
2. for a group term, the group and the reference group each have at least
   ``min_events_per_group`` events (default 1: with none in one of them the partial
   likelihood is monotone and the ratio is 0 or infinite);
3. the estimate and both limits are finite and positive, and the standard error of the
   log hazard ratio is at most ``MAX_LOG_HR_SE`` (a wider interval means the likelihood
   is flat: separation or near-collinearity).

A term that fails is kept with ``estimable = false`` and the reason code below; its
estimate and limits are set to null so that no consumer can print them by mistake.
"""

from __future__ import annotations

from typing import Final

import polars as pl

__all__ = [
    "MAX_LOG_HR_SE",
    "NOT_ESTIMABLE_REASONS",
    "estimability_note",
    "with_estimability",
]

MAX_LOG_HR_SE: Final = 5.0
"""Largest standard error of a log hazard ratio reported as an estimate (common practice:
an interval wider than a factor of exp(2 x 1.96 x 5) ~ 3e8 carries no information)."""

NOT_ESTIMABLE_REASONS: Final[dict[str, str]] = {
    "no_events": "no events in the compared patients",
    "too_few_events_in_group": "too few events in the group or in the reference group",
    "did_not_converge": "the Cox fit did not converge",
    "unbounded_interval": "the confidence interval is unbounded (separation or collinearity)",
}
"""Reason codes of a hazard ratio that is not estimable, with their footnote text."""


def with_estimability(
    summary: pl.DataFrame, *, converged: bool, min_events_per_group: int = 1
) -> pl.DataFrame:
    """Add ``estimable`` and ``reason`` to a Cox summary and null what is not estimable.

    ``summary`` holds ``term, hr, hr_lower, hr_upper, p, se`` and, for group terms,
    ``events`` (events in the term's group) and ``reference_events`` (null for other
    terms). The rule is the module's: convergence, events per compared group, finite
    limits and a bounded standard error of the log hazard ratio.
    """
    events_short = (pl.col("events") < min_events_per_group) | (
        pl.col("reference_events") < min_events_per_group
    )
    finite = (
        pl.col("hr").is_finite()
        & pl.col("hr_lower").is_finite()
        & pl.col("hr_upper").is_finite()
        & (pl.col("hr_lower") > 0)
        & pl.col("se").is_finite()
        & (pl.col("se") <= MAX_LOG_HR_SE)
    ).fill_null(False)
    reason = (
        pl.when(((pl.col("events") == 0) & (pl.col("reference_events") == 0)).fill_null(False))
        .then(pl.lit("no_events"))
        .when(events_short.fill_null(False))
        .then(pl.lit("too_few_events_in_group"))
        .when(pl.lit(not converged))
        .then(pl.lit("did_not_converge"))
        .when(~finite)
        .then(pl.lit("unbounded_interval"))
        .otherwise(pl.lit(None, dtype=pl.String))
    )
    out = summary.with_columns(reason.alias("reason")).with_columns(
        pl.col("reason").is_null().alias("estimable")
    )
    hide = ["hr", "hr_lower", "hr_upper", "p", "log_hr", "se"]
    return out.with_columns(
        pl.when(pl.col("estimable")).then(pl.col(c)).otherwise(None).alias(c)
        for c in hide
        if c in out.columns
    )


def estimability_note(reason: str | None, *, marker: str = "NE") -> str:
    """The footnote of a non-estimable hazard ratio: ``"NE: <reason text>."``."""
    if reason is None:
        return ""
    return f"{marker}: hazard ratio not estimable - {NOT_ESTIMABLE_REASONS.get(reason, reason)}."
