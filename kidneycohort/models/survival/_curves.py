"""Kaplan–Meier survival and Aalen–Johansen cumulative incidence per group."""

from __future__ import annotations

from typing import Any

import numpy as np
import polars as pl
from lifelines import KaplanMeierFitter
from lifelines.statistics import multivariate_logrank_test
from lifelines.utils import median_survival_times
from scipy import stats

from kidneycohort._frames import FrameLike
from kidneycohort._rules import resolve_rules
from kidneycohort.errors import InputDataError
from kidneycohort.models._design import capture_warnings
from kidneycohort.models.survival._data import (
    _curve_frame,
    _estimates_at,
    _finite,
    _prepare,
    _warn_all,
    numbers_at_risk,
)
from kidneycohort.models.survival._rule import CURVE_COLUMNS, SurvivalRule

__all__ = ["CumulativeIncidence", "KaplanMeier"]


class _CurveModel:
    """Shared configuration of the curve estimators."""

    _measure = ""

    def __init__(
        self, rule: SurvivalRule | None = None, /, *, endpoint: str | None = None, **options: Any
    ) -> None:
        self.rule = resolve_rules(SurvivalRule, rule, options, type(self).__name__)
        self.endpoint = endpoint

    def _check_fitted(self) -> None:
        if not hasattr(self, "curves_"):
            raise InputDataError(f"{type(self).__name__}: call .fit(endpoints, patients) first")

    def _finish(self, rows: pl.DataFrame, curves: list[pl.DataFrame]) -> None:
        self.curves_ = pl.concat(curves).select(CURVE_COLUMNS)
        groups = sorted(rows["group"].unique().to_list())
        self.at_risk_ = numbers_at_risk(rows, self.rule.at_risk_years, groups=groups)
        follow_up = rows.group_by("group").agg(pl.col("years").max().alias("max_years"))
        self.horizon_estimates_ = _estimates_at(self.curves_, self.rule.horizons_years, follow_up)
        self.counts_ = (
            rows.group_by("group")
            .agg(
                pl.len().cast(pl.Int64).alias("n_patients"),
                pl.col("event").cast(pl.Int64).sum().alias("events"),
            )
            .sort("group")
        )


class KaplanMeier(_CurveModel):
    r"""Kaplan–Meier survival (free of the endpoint) per group, with a log-rank test.

    .. math::

        \hat S(t) = \prod_{t_j \le t} \left(1 - \frac{d_j}{n_j}\right)

    with :math:`d_j` events among :math:`n_j` at risk at event time :math:`t_j`;
    pointwise limits from Greenwood's variance on the log(-log) scale (lifelines
    ``KaplanMeierFitter``). Competing events (``competing == 1``) are censorings here;
    use :class:`CumulativeIncidence` to treat them as competing.

    Parameters
    ----------
    endpoint : str, optional
        Endpoint to analyse; needed when the table holds several.
    group_column : str, default "group"
        Arm / exposure column (from the endpoints table or the patients table).
    horizons_years, at_risk_years : sequence of float
        Times of the fixed-horizon estimates and of the numbers at risk.
    confidence : float, default 0.95
        Confidence level.

    Attributes
    ----------
    curves_ : polars.DataFrame
        ``group, years, estimate, lower, upper, measure`` (``measure = "survival"``).
    at_risk_ : polars.DataFrame
        ``group, years, n_at_risk`` at ``at_risk_years``.
    horizon_estimates_ : polars.DataFrame
        Survival and limits at ``horizons_years`` (null beyond a group's follow-up).
    medians_ : polars.DataFrame
        ``group, median_years, lower, upper`` (null when not reached).
    logrank_ : dict or None
        ``test_statistic``, ``df``, ``p`` of the log-rank test across groups.

    References
    ----------
    .. [1] Kaplan EL, Meier P. Nonparametric estimation from incomplete observations.
       J Am Stat Assoc 1958;53:457-481. doi:10.1080/01621459.1958.10501452
    .. [2] Peto R, Peto J. Asymptotically efficient rank invariant test procedures.
       J R Stat Soc A 1972;135:185-207. doi:10.2307/2344317
    """

    _measure = "survival"

    def fit(self, endpoints: FrameLike, patients: FrameLike | None = None) -> KaplanMeier:
        """Fit one curve per group; returns ``self``."""
        rows, excluded, self.endpoint_ = _prepare(
            endpoints, patients, endpoint=self.endpoint, group_column=self.rule.group_column
        )
        self.excluded_ = excluded
        alpha = 1.0 - self.rule.confidence
        curves, medians = [], []
        for group in sorted(rows["group"].unique().to_list()):
            part = rows.filter(pl.col("group") == group)
            fitter = KaplanMeierFitter(alpha=alpha)
            with capture_warnings() as captured:
                fitter.fit(part["years"].to_numpy(), part["event"].to_numpy(), label="km")
            _warn_all(captured.convergence, f"Kaplan–Meier ({group})")
            curves.append(
                _curve_frame(
                    group,
                    fitter.survival_function_.index.to_numpy(),
                    fitter.survival_function_.iloc[:, 0].to_numpy(),
                    fitter.confidence_interval_survival_function_,
                    self._measure,
                )
            )
            median_bounds = median_survival_times(fitter.confidence_interval_survival_function_)
            medians.append(
                {
                    "group": group,
                    "median_years": _finite(fitter.median_survival_time_),
                    "lower": _finite(median_bounds.iloc[0, 0]),
                    "upper": _finite(median_bounds.iloc[0, 1]),
                }
            )
        self._finish(rows, curves)
        self.medians_ = pl.DataFrame(
            medians,
            schema={
                "group": pl.String,
                "median_years": pl.Float64,
                "lower": pl.Float64,
                "upper": pl.Float64,
            },
        )
        self.logrank_ = None
        if rows["group"].n_unique() > 1:
            result = multivariate_logrank_test(
                rows["years"].to_numpy(), rows["group"].to_numpy(), rows["event"].to_numpy()
            )
            self.logrank_ = {
                "test_statistic": float(result.test_statistic),
                "df": int(result.degrees_of_freedom),
                "p": float(result.p_value),
            }
        return self

    def summary(self) -> pl.DataFrame:
        """Per group: ``group, n_patients, events, median_years, median_lower, median_upper``
        and, when there are several groups, the log-rank ``logrank_p`` (same on every row)."""
        self._check_fitted()
        table = self.counts_.join(
            self.medians_.rename({"lower": "median_lower", "upper": "median_upper"}),
            on="group",
            how="left",
        )
        p = None if self.logrank_ is None else self.logrank_["p"]
        return table.with_columns(pl.lit(p, dtype=pl.Float64).alias("logrank_p"))


def aalen_johansen(
    years: np.ndarray, state: np.ndarray, *, confidence: float = 0.95
) -> pl.DataFrame:
    r"""Aalen–Johansen cumulative incidence of state 1 with its delta-method variance.

    At the distinct times :math:`t_j` (with :math:`n_j` at risk, :math:`d_{1j}` endpoint
    events and :math:`d_j` events of either kind)

    .. math::

        \hat F(t) = \sum_{t_j \le t} \hat S(t_{j-1}) \frac{d_{1j}}{n_j},
        \qquad
        \widehat{\mathrm{Var}}\,\hat F(t) = \sum_{t_j \le t}
        \Big[ (\hat F(t) - \hat F(t_j))^2 \frac{d_j}{n_j (n_j - d_j)}
        + \hat S(t_{j-1})^2 \frac{d_{1j} (n_j - d_{1j})}{n_j^3}
        - 2 (\hat F(t) - \hat F(t_j)) \hat S(t_{j-1}) \frac{d_{1j}}{n_j^2} \Big]

    (Greenwood-type variance, Collett 2015 §12.2, as documented for lifelines'
    ``AalenJohansenFitter``), with limits on the log(-log) scale. Ties are handled as
    the estimator defines them (every event at :math:`t_j` counts at :math:`t_j`). The
    limits are 0 where the incidence is 0 (no uncertainty before the first endpoint
    event) and equal the estimate where the variance is 0. The sums are cumulative sums
    of the expanded squares, so the computation is linear in the number of times.

    Parameters
    ----------
    years : numpy.ndarray
        Follow-up times.
    state : numpy.ndarray
        1 endpoint event, 2 competing event, 0 censored.
    confidence : float, default 0.95
        Level of the pointwise limits.

    Returns
    -------
    polars.DataFrame
        ``years, estimate, variance, lower, upper``: time 0 and every distinct time.
    """
    frame = (
        pl.DataFrame({"years": np.asarray(years, float), "state": np.asarray(state, np.int64)})
        .group_by("years")
        .agg(
            (pl.col("state") == 1).sum().cast(pl.Float64).alias("d1"),
            (pl.col("state") != 0).sum().cast(pl.Float64).alias("d"),
            pl.len().cast(pl.Float64).alias("removed"),
        )
        .sort("years")
    )
    times = frame["years"].to_numpy()
    d1, d = frame["d1"].to_numpy(), frame["d"].to_numpy()
    removed = frame["removed"].to_numpy()
    n = removed[::-1].cumsum()[::-1]  # at risk: still followed at t_j
    survival = np.cumprod(1.0 - d / n)
    lagged = np.concatenate([[1.0], survival[:-1]])
    incidence = np.cumsum(lagged * d1 / n)
    with np.errstate(divide="ignore", invalid="ignore"):
        # n = d only at the last time anyone is followed, where F(t) - F(t_j) = 0
        a = np.where(n > d, d / (n * (n - d)), 0.0)
    b = lagged**2 * d1 * (n - d1) / n**3
    c = lagged * d1 / n**2
    variance = (
        incidence**2 * np.cumsum(a)
        - 2 * incidence * np.cumsum(a * incidence)
        + np.cumsum(a * incidence**2)
        + np.cumsum(b)
        - 2 * (incidence * np.cumsum(c) - np.cumsum(c * incidence))
    )
    variance = np.clip(variance, 0.0, None)  # rounding below zero
    if times.size == 0 or times[0] > 0:
        times, incidence, variance = (
            np.concatenate([[0.0], times]),
            np.concatenate([[0.0], incidence]),
            np.concatenate([[0.0], variance]),
        )
    lower, upper = _log_log_limits(incidence, variance, confidence)
    return pl.DataFrame(
        {
            "years": times,
            "estimate": incidence,
            "variance": variance,
            "lower": lower,
            "upper": upper,
        }
    )


def _log_log_limits(
    incidence: np.ndarray, variance: np.ndarray, confidence: float
) -> tuple[np.ndarray, np.ndarray]:
    """Pointwise limits of an incidence on the log(-log) scale (delta method)."""
    z = stats.norm.ppf(0.5 + confidence / 2)
    inner = (incidence > 0) & (incidence < 1) & (variance > 0)
    safe = np.where(inner, incidence, 0.5)
    se = np.sqrt(np.where(inner, variance, 0.0)) / (safe * np.abs(np.log(safe)))
    centre = np.log(-np.log(safe))
    lower = np.where(inner, np.exp(-np.exp(centre + z * se)), incidence)
    upper = np.where(inner, np.exp(-np.exp(centre - z * se)), incidence)
    return lower, upper


class CumulativeIncidence(_CurveModel):
    r"""Cumulative incidence of the endpoint with death as a competing event (Aalen–Johansen).

    .. math::

        \hat F_1(t) = \sum_{t_j \le t} \hat S(t_{j-1}) \frac{d_{1j}}{n_j}

    where :math:`\hat S` is the Kaplan–Meier estimate of being free of *any* event and
    :math:`d_{1j}` the endpoint events at :math:`t_j`; pointwise limits from the
    Greenwood-type delta-method variance on the log(-log) scale (:func:`aalen_johansen`).
    A row is the competing event when ``competing == 1`` and ``event == 0``; a null
    ``competing`` is read as 0 (no competing event recorded). Ties are handled as the
    estimator defines them: endpoint and competing events at the same time all count at
    that time. Before the first endpoint event the incidence and both limits are 0.

    Parameters and attributes are those of :class:`KaplanMeier` (``measure =
    "cumulative_incidence"``), without the log-rank test (Gray's test is not provided).

    References
    ----------
    .. [1] Aalen OO, Johansen S. An empirical transition matrix for non-homogeneous Markov
       chains based on censored observations. Scand J Stat 1978;5:141-150.
    .. [2] Putter H, Fiocco M, Geskus RB. Tutorial in biostatistics: competing risks and
       multi-state models. Stat Med 2007;26:2389-2430. doi:10.1002/sim.2712
    .. [3] Collett D. Modelling Survival Data in Medical Research, 3rd ed. CRC Press, 2015
       (variance of the cumulative incidence function).
    """

    _measure = "cumulative_incidence"

    def fit(self, endpoints: FrameLike, patients: FrameLike | None = None) -> CumulativeIncidence:
        """Fit one cumulative-incidence curve per group; returns ``self``."""
        rows, excluded, self.endpoint_ = _prepare(
            endpoints, patients, endpoint=self.endpoint, group_column=self.rule.group_column
        )
        if "competing" not in rows.columns:
            raise InputDataError(
                "endpoints: missing column 'competing' (1 when follow-up ended by death); "
                "use KaplanMeier when there is no competing event"
            )
        both = rows.filter((pl.col("event") == 1) & (pl.col("competing").fill_null(0) == 1))
        if both.height:
            raise InputDataError(
                f"endpoints: patient '{both['patient_id'][0]}' has event = 1 and competing = 1; "
                "a row ends in the endpoint or in the competing event, not both"
            )
        rows = rows.with_columns(
            pl.when(pl.col("event") == 1)
            .then(1)
            .when(pl.col("competing").fill_null(0) == 1)
            .then(2)
            .otherwise(0)
            .cast(pl.Int64)
            .alias("state"),
        )
        self.excluded_ = excluded
        curves = []
        for group in sorted(rows["group"].unique().to_list()):
            part = rows.filter(pl.col("group") == group)
            curve = aalen_johansen(
                part["years"].to_numpy(), part["state"].to_numpy(), confidence=self.rule.confidence
            )
            curves.append(
                curve.with_columns(
                    pl.lit(group, pl.String).alias("group"),
                    pl.lit(self._measure, pl.String).alias("measure"),
                ).select(CURVE_COLUMNS)
            )
        self._finish(rows, curves)
        self.counts_ = self.counts_.join(
            rows.group_by("group").agg(
                (pl.col("state") == 2).sum().cast(pl.Int64).alias("competing_events")
            ),
            on="group",
        )
        return self

    def summary(self) -> pl.DataFrame:
        """Per group and horizon: ``group, n_patients, events, competing_events, years,
        estimate, lower, upper``."""
        self._check_fitted()
        return self.counts_.join(
            self.horizon_estimates_.drop("measure"), on="group", how="left"
        ).sort("group", "years")
