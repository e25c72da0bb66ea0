"""Per-patient eGFR slopes by ordinary least squares, from group-by sums.

For each patient x equation the usable values (see :mod:`kidneycohort.value_filter`) inside the
rule's time window are regressed on years from index. The fit is the closed form of
simple linear regression from the sums :math:`n, \\sum x, \\sum y, \\sum x^2,
\\sum xy, \\sum y^2` of one polars group-by, so it is the same on any partition of
patients and needs no loop:

.. math::

    \\bar x = \\tfrac1n\\sum x_i,\\quad \\bar y = \\tfrac1n\\sum y_i,\\quad
    S_{xx} = \\sum x_i^2 - n\\bar x^2,\\quad S_{xy} = \\sum x_i y_i - n\\bar x\\bar y,

    \\hat\\beta = S_{xy}/S_{xx},\\quad \\hat\\alpha = \\bar y - \\hat\\beta \\bar x,\\quad
    \\operatorname{se}(\\hat\\beta) = \\sqrt{\\frac{S_{yy} - S_{xy}^2/S_{xx}}{(n-2)\\,S_{xx}}}.

The log slope is the same fit of :math:`\\ln y`, reported as a percentage change per year,
:math:`100\\,(e^{\\hat\\beta_{\\ln}} - 1)`.

Eligibility (:class:`SlopeRule`, default at least 3 values spanning at least 1 year) is
stated per patient in ``eligible`` / ``ineligible_reason`` (:data:`SLOPE_REASONS`);
slopes are still computed for ineligible patients when at least two distinct times
exist, so that a user can see them, but ``rapid_decline`` is only set for eligible ones.
``rapid_decline`` is ``slope_per_year < -rapid_decline_per_year``: KDIGO 2012 (chapter
2.1) calls a sustained decline in eGFR of more than 5 mL/min/1.73 m2/yr rapid
progression; a least-squares slope over at least a year of values stands for
"sustained" (common practice).

References
----------
.. [1] KDIGO 2012 Clinical Practice Guideline for the Evaluation and Management of
   Chronic Kidney Disease. Kidney Int Suppl 2013;3:1-150, recommendation 2.1.3.
.. [2] Grams ME et al. Evaluating glomerular filtration rate slope as a surrogate end
   point for ESKD in clinical trials. J Am Soc Nephrol 2019;30:1746-1755.
"""

from __future__ import annotations

import logging
from typing import Final

import polars as pl
from pydantic import Field, model_validator

from kidneycohort import schemas
from kidneycohort._frames import FrameLike, conform, follows_input
from kidneycohort._rules import RuleModel
from kidneycohort.errors import ConfigError
from kidneycohort.value_filter import ValueFilterRule, usable_egfr

__all__ = ["SLOPE_REASONS", "SlopeRule", "egfr_slopes"]

logger = logging.getLogger(__name__)

SLOPE_REASONS: Final[dict[str, str]] = {
    "no_index_date": "no index date, so no time from index for any value",
    "no_values": "no usable eGFR value in the slope window",
    "fewer_than_min_values": "fewer usable values than min_values",
    "span_below_min_years": "values span less than min_span_years",
}
"""Codes written to ``ineligible_reason``."""


class SlopeRule(RuleModel):
    """Which patients get an eGFR slope and which slopes are rapid (config key ``slopes``)."""

    min_values: int = Field(
        default=3, ge=2, description="Fewest usable values for an eligible slope."
    )
    min_span_years: float = Field(
        default=1.0, ge=0, description="Shortest time from first to last value (years)."
    )
    rapid_decline_per_year: float = Field(
        default=5.0,
        gt=0,
        description="A slope below minus this (mL/min/1.73m2 per year) is rapid decline (KDIGO 2012: 5).",
    )
    from_years: float | None = Field(
        default=None,
        description="Use values from this many years after index (e.g. 0.25 for a chronic slope); none: all.",
    )
    to_years: float | None = Field(
        default=None, description="Use values up to this many years after index; none: all."
    )

    @model_validator(mode="after")
    def _window_in_order(self) -> SlopeRule:
        if (
            self.from_years is not None
            and self.to_years is not None
            and self.from_years > self.to_years
        ):
            raise ConfigError(
                f"slopes: from_years={self.from_years} is after to_years={self.to_years}; swap them"
            )
        return self


def _ols_aggs(x: pl.Expr, y: pl.Expr, prefix: str) -> list[pl.Expr]:
    """Group-context sums: the sufficient statistics of a simple linear regression."""
    return [
        x.sum().alias(f"{prefix}sx"),
        y.sum().alias(f"{prefix}sy"),
        (x * x).sum().alias(f"{prefix}sxx"),
        (x * y).sum().alias(f"{prefix}sxy"),
        (y * y).sum().alias(f"{prefix}syy"),
    ]


def _centred(prefix: str, n: pl.Expr) -> list[pl.Expr]:
    """Means and centred sums of squares and products from the raw sums."""
    sx, sy = pl.col(f"{prefix}sx"), pl.col(f"{prefix}sy")
    return [
        (sx / n).alias(f"{prefix}mx"),
        (sy / n).alias(f"{prefix}my"),
        (pl.col(f"{prefix}sxx") - sx * sx / n).alias(f"{prefix}sxx"),
        (pl.col(f"{prefix}sxy") - sx * sy / n).alias(f"{prefix}sxy"),
        (pl.col(f"{prefix}syy") - sy * sy / n).alias(f"{prefix}syy"),
    ]


@follows_input
def egfr_slopes(
    egfr: FrameLike,
    rule: SlopeRule | None = None,
    value_filter: ValueFilterRule | None = None,
) -> pl.DataFrame:
    """OLS slope of eGFR on years from index, per patient and equation.

    Parameters
    ----------
    egfr : polars or pandas DataFrame
        ``schemas.EGFR`` layout (``patient_id``, ``equation``, ``years_from_index``,
        ``egfr``).
    rule : SlopeRule, optional
        Eligibility, rapid-decline threshold and time window; defaults to
        ``SlopeRule()``.
    value_filter : ValueFilterRule, optional
        Results it excludes are not used (an ``excluded`` column already present is
        honoured either way).

    Returns
    -------
    polars.DataFrame
        ``schemas.SLOPES`` layout, one row per patient x equation of the input.
        ``slope_per_year`` and ``intercept`` (eGFR at index, mL/min/1.73 m2) are null
        with fewer than two distinct times; ``slope_se`` is null with fewer than three
        values; ``log_slope_pct_per_year`` is null when a value is not positive.

    Notes
    -----
    The module docstring gives the closed form; it equals ``numpy.polyfit(x, y, 1)``
    and statsmodels OLS (checked in the tests to 1e-9).
    """
    rule = rule or SlopeRule()
    df = usable_egfr(egfr, value_filter)
    use = pl.col("_finite") & ~pl.col("excluded") & pl.col("years_from_index").is_not_null()
    if rule.from_years is not None:
        use = use & (pl.col("years_from_index") >= rule.from_years)
    if rule.to_years is not None:
        use = use & (pl.col("years_from_index") <= rule.to_years)
    # values not used are masked to null (sums and extremes skip them), so one group-by
    # over every row gives each patient x equation of the input in first-seen order
    df = df.with_columns(
        _x=pl.when(use).then(pl.col("years_from_index")), _y=pl.when(use).then(pl.col("egfr"))
    )
    x, y = pl.col("_x"), pl.col("_y")
    positive = (y > 0).all()
    # a patient with a non-positive value gets no log slope (_positive); 0.0 only keeps
    # the sums finite
    ly = pl.when(y > 0).then(y.log()).when(y.is_not_null()).then(0.0)
    fits = df.group_by("patient_id", "equation", maintain_order=True).agg(
        y.count().cast(pl.Int32).alias("n_values"),
        (x.max() - x.min()).alias("span_years"),
        positive.alias("_positive"),
        pl.col("years_from_index").is_null().all().alias("_no_index"),
        *_ols_aggs(x, y, "_"),
        *_ols_aggs(x, ly, "_l"),
    )
    n = pl.col("n_values")
    fits = fits.with_columns(*_centred("_", n), *_centred("_l", n))
    sxx = pl.col("_sxx")
    # distinct times (span > 0) rather than S_xx > 0: raw sums leave S_xx ~1e-15 otherwise
    has_slope = (n >= 2) & (pl.col("span_years") > 0)
    slope = pl.when(has_slope).then(pl.col("_sxy") / sxx)
    rss = pl.max_horizontal(pl.col("_syy") - pl.col("_sxy") ** 2 / sxx, pl.lit(0.0))
    log_slope = pl.when(has_slope & pl.col("_positive")).then(pl.col("_lsxy") / pl.col("_lsxx"))
    fits = fits.with_columns(
        slope_per_year=slope,
        intercept=pl.when(has_slope).then(pl.col("_my") - slope * pl.col("_mx")),
        slope_se=pl.when(has_slope & (n >= 3)).then((rss / ((n - 2) * sxx)).sqrt()),
        log_slope_pct_per_year=(log_slope.exp() - 1.0) * 100.0,
    )
    # a span a hair under the threshold from the years round trip still counts
    reason = (
        pl.when(pl.col("_no_index"))
        .then(pl.lit("no_index_date"))
        .when(n == 0)
        .then(pl.lit("no_values"))
        .when(n < rule.min_values)
        .then(pl.lit("fewer_than_min_values"))
        .when(pl.col("span_years") < rule.min_span_years - 1e-9)
        .then(pl.lit("span_below_min_years"))
    )
    out = fits.with_columns(ineligible_reason=reason).with_columns(
        eligible=pl.col("ineligible_reason").is_null()
    )
    out = out.with_columns(
        rapid_decline=pl.when(pl.col("eligible")).then(
            pl.col("slope_per_year") < -rule.rapid_decline_per_year
        )
    )
    logger.info(
        "slopes: %d of %d patient-equations eligible", int(out["eligible"].sum()), out.height
    )
    return conform(out, schemas.SLOPES)
