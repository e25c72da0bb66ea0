"""Baseline eGFR and baseline UACR per patient.

A baseline is a value (or an average of values) taken in a window of days around the
patient's index date. Studies name the rule in their config (:class:`BaselineRule`):

``last_in_window``
    the latest eligible value in ``[window_start_days, window_end_days]`` (cohorts
    commonly look back one year: -365 to 0);
``mean_in_window`` / ``median_in_window``
    the mean / median of all eligible values in the window;
``mean_last_n``
    the mean of the latest ``n`` eligible values in the window (trials commonly average
    the screening and randomisation values, ``n = 2``, because a single value regresses
    to the mean).

``mean_type="geometric"`` makes the means geometric (``exp(mean(log x))``), the usual
average for albuminuria, whose distribution is right-skewed.

Every patient x equation in the input appears in the output; when no value qualifies,
``baseline_egfr`` is null and ``baseline_reason`` says why (:data:`BASELINE_REASONS`).
Ties in time are broken by value (highest last) so that the result does not depend on
row order. Days from index are ``years_from_index * 365.25`` (``schemas.DAYS_PER_YEAR``).
"""

from __future__ import annotations

import logging
from typing import Final, Literal

import polars as pl
from pydantic import Field, model_validator

from kidneycohort import schemas
from kidneycohort._frames import FrameLike, conform, follows_input, to_polars
from kidneycohort._rules import RuleModel
from kidneycohort.errors import ConfigError
from kidneycohort.schemas import UACR_BASELINE
from kidneycohort.uacr import uacr_timeline
from kidneycohort.value_filter import ValueFilterRule, apply_value_filter, usable_egfr

__all__ = ["BASELINE_REASONS", "BaselineRule", "egfr_baseline", "uacr_baseline"]

logger = logging.getLogger(__name__)

BASELINE_REASONS: Final[dict[str, str]] = {
    "no_computable_value": "the patient has no computable value at all",
    "no_value_in_window": "values exist, none inside the baseline window",
    "all_in_window_excluded": "values in the window were all excluded by the value filter",
    "fewer_than_n_values": "fewer than n eligible values in the window (require_n)",
    "nonpositive_value_for_geometric_mean": "a value <= 0 makes a geometric mean undefined",
    "no_index_date": "the patient has no index date, so no window can be placed",
}
"""Reason codes written to ``baseline_reason`` when no baseline is found."""


class BaselineRule(RuleModel):
    """How a patient's baseline is chosen (config key ``baseline``)."""

    method: Literal["last_in_window", "mean_in_window", "median_in_window", "mean_last_n"] = Field(
        default="last_in_window", description="Which value(s) in the window make the baseline."
    )
    window_start_days: float = Field(
        default=-365.0, description="Window start, days from the index date (inclusive)."
    )
    window_end_days: float = Field(
        default=0.0, description="Window end, days from the index date (inclusive)."
    )
    n: int = Field(default=2, ge=1, description="Number of latest values averaged by mean_last_n.")
    require_n: bool = Field(
        default=False,
        description="mean_last_n only: with fewer than n values give no baseline (else average those found).",
    )
    mean_type: Literal["arithmetic", "geometric"] = Field(
        default="arithmetic", description="Arithmetic or geometric mean for the mean methods."
    )

    @model_validator(mode="after")
    def _window_in_order(self) -> BaselineRule:
        if self.window_start_days > self.window_end_days:
            raise ConfigError(
                f"baseline: window_start_days={self.window_start_days} is after "
                f"window_end_days={self.window_end_days}; swap them"
            )
        return self

    def describe(self) -> str:
        """One-line description written to ``baseline_method``."""
        window = f"days {self.window_start_days:g} to {self.window_end_days:g}"
        if self.method == "mean_last_n":
            return f"{self.mean_type} mean of last {self.n} values, {window}"
        if self.method == "mean_in_window":
            return f"{self.mean_type} mean in window, {window}"
        if self.method == "median_in_window":
            return f"median in window, {window}"
        return f"last value in window, {window}"


def _baseline_core(
    df: pl.DataFrame, keys: pl.DataFrame | None, key_cols: list[str], rule: BaselineRule
) -> pl.DataFrame:
    """Baseline per key from a frame with ``_days``, ``_value``, ``_finite``, ``excluded``.

    Returns ``key_cols`` + ``_baseline``, ``baseline_date``, ``baseline_n_values``,
    ``baseline_reason`` for every row of ``keys``, or with ``keys=None`` for every key of
    ``df`` in first-seen order. Only the columns the rule reads are sorted.
    """
    in_window = pl.col("_days").is_between(rule.window_start_days, rule.window_end_days)
    eligible = pl.col("_finite") & in_window & ~pl.col("excluded")
    status = df.group_by(key_cols, maintain_order=keys is None).agg(
        _any_finite=pl.col("_finite").any(),
        _any_in_window=(pl.col("_finite") & in_window).any(),
        _n_used=eligible.sum(),
    )
    dated = "sample_date" in df.columns
    used = (
        df.filter(eligible)
        .select(*key_cols, "_days", "_value", *(["sample_date"] if dated else []))
        .sort([*key_cols, "_days", "_value"])
    )
    if rule.method == "mean_last_n":
        used = used.group_by(key_cols, maintain_order=True).tail(rule.n)
    value = pl.col("_value")
    geometric = rule.mean_type == "geometric" and rule.method in ("mean_in_window", "mean_last_n")
    if rule.method == "last_in_window":
        agg = value.last()
    elif rule.method == "median_in_window":
        agg = value.median()
    elif geometric:
        agg = pl.when((value > 0).all()).then(value.log().mean().exp())
    else:
        agg = value.mean()
    n_used = pl.len() if rule.method != "last_in_window" else pl.lit(1)
    date = pl.col("sample_date").last() if dated else pl.lit(None)
    found = used.group_by(key_cols).agg(
        _baseline=agg,
        baseline_date=date.cast(pl.Date),
        baseline_n_values=n_used.cast(pl.Int32),
        _nonpositive=(value <= 0).any(),
    )
    reason = (
        pl.when(~pl.col("_any_finite").fill_null(False))
        .then(pl.lit("no_computable_value"))
        .when(~pl.col("_any_in_window"))
        .then(pl.lit("no_value_in_window"))
        .when(pl.col("_n_used") == 0)
        .then(pl.lit("all_in_window_excluded"))
        .when(
            pl.lit(rule.method == "mean_last_n" and rule.require_n) & (pl.col("_n_used") < rule.n)
        )
        .then(pl.lit("fewer_than_n_values"))
        .when(pl.lit(geometric) & pl.col("_nonpositive"))
        .then(pl.lit("nonpositive_value_for_geometric_mean"))
    )
    if keys is not None:
        status = keys.join(status, on=key_cols, how="left", maintain_order="left")
    out = status.join(found, on=key_cols, how="left", maintain_order="left")
    out = out.with_columns(baseline_reason=reason)
    no_value = pl.col("baseline_reason").is_not_null()
    return out.with_columns(
        _baseline=pl.when(no_value).then(None).otherwise(pl.col("_baseline")),
        baseline_date=pl.when(no_value).then(None).otherwise(pl.col("baseline_date")),
        baseline_n_values=pl.when(no_value)
        .then(pl.lit(0, dtype=pl.Int32))
        .otherwise(pl.col("baseline_n_values")),
    )


@follows_input
def egfr_baseline(
    egfr: FrameLike,
    rule: BaselineRule | None = None,
    value_filter: ValueFilterRule | None = None,
) -> pl.DataFrame:
    """Baseline eGFR per patient and equation.

    .. math::

        \\text{baseline} =
        \\begin{cases}
        y_{(m)} & \\text{last\\_in\\_window} \\\\
        \\tfrac{1}{k}\\sum_{j=m-k+1}^{m} y_{(j)}, \\; k=\\min(n, m) & \\text{mean\\_last\\_n} \\\\
        \\operatorname{mean} / \\operatorname{median}\\{y_{(1)},\\dots,y_{(m)}\\} & \\text{in window}
        \\end{cases}

    where :math:`y_{(1)},\\dots,y_{(m)}` are the patient's eligible values in the window
    ordered by time.

    Parameters
    ----------
    egfr : polars or pandas DataFrame
        ``schemas.EGFR`` layout (needs ``patient_id``, ``equation``,
        ``years_from_index``, ``egfr``; ``sample_date`` gives ``baseline_date``).
    rule : BaselineRule, optional
        Defaults to the last value from 365 days before index to index.
    value_filter : ValueFilterRule, optional
        When given, results it excludes are not eligible (an ``excluded`` column already
        in ``egfr`` is honoured either way).

    Returns
    -------
    polars.DataFrame
        ``schemas.BASELINE`` layout, one row per patient x equation of the input.

    References
    ----------
    .. [1] Levey AS et al. Change in albuminuria and GFR as end points for clinical
       trials in early stages of CKD. Am J Kidney Dis 2020;75:84-104 (baselines from
       averaged pre-randomisation values).
    """
    rule = rule or BaselineRule()
    df = usable_egfr(egfr, value_filter).rename({"egfr": "_value"})
    out = _baseline_core(df, None, ["patient_id", "equation"], rule)
    out = out.with_columns(
        baseline_egfr=pl.col("_baseline"), baseline_method=pl.lit(rule.describe())
    )
    logger.info(
        "baseline: %d of %d patient-equations without a baseline",
        int(out["baseline_reason"].is_not_null().sum()),
        out.height,
    )
    return conform(out, schemas.BASELINE)


@follows_input
def uacr_baseline(
    labs: FrameLike,
    patients: FrameLike | None = None,
    rule: BaselineRule | None = None,
    value_filter: ValueFilterRule | None = None,
) -> pl.DataFrame:
    """Baseline urine albumin/creatinine ratio (mg/g) per patient.

    Same rules as :func:`egfr_baseline`; the default is the geometric mean of the values in
    the year before index, because UACR varies widely from day to day and is
    right-skewed (KDIGO 2012 recommends confirming albuminuria on repeat samples).

    .. math:: \\text{baseline} = \\exp\\Big(\\tfrac{1}{m}\\sum_j \\ln u_j\\Big)

    Parameters
    ----------
    labs : polars or pandas DataFrame
        Harmonised ``schemas.LABS`` rows (see :func:`uacr_timeline`).
    patients : polars or pandas DataFrame, optional
        ``patient_id`` and ``index_date``; every patient listed appears in the output.
    rule : BaselineRule, optional
        Defaults to ``BaselineRule(method="mean_in_window", mean_type="geometric")``.
    value_filter : ValueFilterRule, optional
        Only ``exclude_settings`` applies to UACR (AKI flags concern creatinine).

    Returns
    -------
    polars.DataFrame
        :data:`UACR_BASELINE` layout.

    Raises
    ------
    InputDataError
        When a needed column is missing.
    """
    rule = rule or BaselineRule(method="mean_in_window", mean_type="geometric")
    df = uacr_timeline(labs, patients)
    if value_filter is not None and value_filter.exclude_settings:
        df = apply_value_filter(df, value_filter.model_copy(update={"exclude_aki": False}))
    else:
        df = df.with_columns(excluded=pl.lit(False))
    df = df.rename({"uacr_mg_g": "_value"}).with_columns(
        _days=(pl.col("years_from_index") * schemas.DAYS_PER_YEAR).round(6),
        _finite=pl.col("_value").is_not_null() & pl.col("_value").is_finite(),
    )
    keys = df.select("patient_id").unique(maintain_order=True)
    no_index = pl.lit(False)
    if patients is not None:
        listed = to_polars(patients, "patients").select(pl.col("patient_id").cast(pl.String))
        listed = listed.unique(maintain_order=True)
        keys = pl.concat([listed, keys.join(listed, on="patient_id", how="anti")])
    if "years_from_index" not in to_polars(labs, "labs").columns and patients is not None:
        pts = to_polars(patients, "patients").select(
            pl.col("patient_id").cast(pl.String), pl.col("index_date").cast(pl.Date)
        )
        keys = keys.join(
            pts.unique("patient_id"), on="patient_id", how="left", maintain_order="left"
        )
        no_index = pl.col("index_date").is_null()
    out = _baseline_core(df, keys, ["patient_id"], rule)
    out = out.with_columns(
        baseline_reason=pl.when(no_index)
        .then(pl.lit("no_index_date"))
        .otherwise(pl.col("baseline_reason")),
    ).with_columns(
        baseline_uacr_mg_g=pl.when(pl.col("baseline_reason").is_null()).then(pl.col("_baseline")),
        baseline_method=pl.lit(rule.describe()),
    )
    return conform(out, UACR_BASELINE)
