"""What a survival panel shows besides its curves: the probability axis fitted to the data,
the display scale (event-free or cumulative), censoring marks and the hazard ratio text.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Final, Literal

import polars as pl

from kidneycohort._frames import FrameLike, require_columns, to_polars
from kidneycohort.labels import display_label
from kidneycohort.models.survival import NOT_ESTIMABLE_REASONS

__all__ = [
    "SurvivalScale",
    "censor_marks",
    "display_scale",
    "hazard_ratio_lines",
    "probability_axis",
    "term_text",
]

SurvivalScale = Literal["as_estimated", "event_free", "cumulative"]

_STEPS: Final = (0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.25)
_MIN_SPAN: Final = 0.02
_MAX_BREAKS: Final = 6


def probability_axis(low: float, high: float, *, falling: bool) -> tuple[float, float, list[float]]:
    """The probability axis of a panel: from a round number below ``low`` to 1 (falling
    curves) or from 0 to a round number above ``high`` (rising curves), at least 0.02
    wide, with at most six breaks at a round step.

    >>> probability_axis(0.81, 1.0, falling=True)
    (0.8, 1.0, [0.8, 0.85, 0.9, 0.95, 1.0])
    >>> probability_axis(0.0, 0.37, falling=False)
    (0.0, 0.4, [0.0, 0.1, 0.2, 0.3, 0.4])
    """
    low = min(max(low, 0.0), 1.0) if math.isfinite(low) else 0.0
    high = min(max(high, 0.0), 1.0) if math.isfinite(high) else 1.0
    span = max((1.0 - low) if falling else high, _MIN_SPAN)
    step = next((s for s in _STEPS if span / s <= _MAX_BREAKS - 1), 0.25)
    if falling:
        lo = max(0.0, math.floor(round((1.0 - span) / step, 9)) * step)
        hi = 1.0
    else:
        lo = 0.0
        hi = min(1.0, math.ceil(round(span / step, 9)) * step)
    count = round((hi - lo) / step)
    breaks = [round(lo + i * step, 6) for i in range(count + 1)]
    return round(lo, 6), round(hi, 6), breaks


def display_scale(measure: str, scale: SurvivalScale) -> tuple[bool, str]:
    """Whether a curve of ``measure`` is flipped (1 - estimate) for ``scale``, and the
    y-axis label of the result."""
    cumulative = measure == "cumulative_incidence"
    flip = (scale == "event_free" and cumulative) or (scale == "cumulative" and not cumulative)
    if not flip:
        return False, (
            "Cumulative incidence (Aalen–Johansen)"
            if cumulative
            else "Event-free probability (Kaplan–Meier)"
        )
    return True, (
        "1 − cumulative incidence (Aalen–Johansen)"
        if cumulative
        else "Cumulative probability of the event (1 − Kaplan–Meier)"
    )


def censor_marks(
    endpoints: FrameLike, *, endpoint: str | None = None, competing_is_event: bool = False
) -> pl.DataFrame:
    """Distinct censoring times per group (``group``, ``years``) of one endpoint.

    A patient is censored when the endpoint did not happen; under a competing-risks
    analysis (``competing_is_event``) a competing death ends follow-up as an event of
    its own and is not a censoring.
    """
    df = to_polars(endpoints, "endpoints")
    require_columns(df, ("years", "event"), "endpoints")
    if endpoint is not None and "endpoint" in df.columns:
        df = df.filter(pl.col("endpoint") == endpoint)
    censored = pl.col("event").cast(pl.Int64).fill_null(0) == 0
    if competing_is_event and "competing" in df.columns:
        censored = censored & (pl.col("competing").cast(pl.Int64).fill_null(0) == 0)
    group = pl.col("group").cast(pl.String) if "group" in df.columns else pl.lit(None, pl.String)
    return (
        df.filter(censored & pl.col("years").is_not_null())
        .select(group.alias("group"), pl.col("years").cast(pl.Float64))
        .unique()
        .sort("group", "years")
    )


def term_text(
    term: str, labels: Mapping[str, str] | None = None, reference: str | None = None
) -> str:
    """A model term as a reader says it: ``group=active`` -> ``Active drug vs Placebo``."""
    _, sep, value = str(term).partition("=")
    if not sep:
        return display_label(str(term), labels)
    shown = display_label(value, labels)
    return f"{shown} vs {display_label(reference, labels)}" if reference else shown


def _number(value: float) -> str:
    return f"{value:.2f}"


def hazard_ratio_lines(
    hazard_ratios: FrameLike | None,
    endpoint: str,
    *,
    labels: Mapping[str, str] | None = None,
    reference: str | None = None,
) -> list[str]:
    """``HR <comparison> 0.75 (95% CI 0.46–1.22)`` per group term of ``endpoint`` (the
    overall estimate, not subgroups); a term without an estimate says why."""
    if hazard_ratios is None:
        return []
    df = to_polars(hazard_ratios, "hazard_ratios")
    if not {"endpoint", "term", "hr", "hr_lower", "hr_upper"} <= set(df.columns):
        return []
    df = df.filter(pl.col("endpoint") == endpoint)
    if "subgroup" in df.columns:
        df = df.filter(pl.col("subgroup").is_null())
    lines = []
    for row in df.to_dicts():
        name = f"HR {term_text(row['term'], labels, reference)}"
        values = [
            float(v) if v is not None else math.nan
            for v in (row.get("hr"), row.get("hr_lower"), row.get("hr_upper"))
        ]
        ok = row.get("estimable", True) is not False and all(
            math.isfinite(v) and v > 0 for v in values
        )
        if ok:
            hr, lo, hi = values
            lines.append(f"{name}: {_number(hr)} (95% CI {_number(lo)}–{_number(hi)})")
        else:
            reason = row.get("reason")
            why = NOT_ESTIMABLE_REASONS.get(str(reason), str(reason)) if reason else ""
            lines.append(f"{name}: not estimable" + (f" ({why})" if why else ""))
    return lines
