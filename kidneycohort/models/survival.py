"""Survival analysis of kidney endpoints: Kaplan–Meier, Cox, Aalen–Johansen.

Every model reads the time-to-event table (``schemas.ENDPOINTS``: one row per patient
and endpoint with ``years``, ``event`` and ``competing``) and, for the group and
covariates, the patients table. The estimators are lifelines'; this module selects the
rows, converts only the needed columns at the boundary, and lays the results out as
polars tables with the column names the figures and tables read:

- curves: ``group, years, estimate, lower, upper, measure``
- numbers at risk: ``group, years, n_at_risk``
- Cox: ``term, hr, hr_lower, hr_upper, p`` and the proportional-hazards check
  ``term, test_statistic, p``.
"""

from __future__ import annotations

import logging
import warnings
from collections.abc import Sequence
from typing import Self

import numpy as np
import pandas as pd
import polars as pl
from lifelines import AalenJohansenFitter, CoxPHFitter, KaplanMeierFitter
from lifelines.exceptions import ConvergenceError as LifelinesConvergenceError
from lifelines.statistics import multivariate_logrank_test, proportional_hazard_test
from lifelines.utils import median_survival_times
from pydantic import ConfigDict, Field

from kidneycohort._frames import FrameLike, to_polars
from kidneycohort._rules import RuleModel
from kidneycohort.errors import ConvergenceError, InputDataError, StatisticalWarning, did_you_mean
from kidneycohort.models._design import capture_warnings, encode_covariates, split_complete_cases
from kidneycohort.models.rates import _with_group

logger = logging.getLogger(__name__)

__all__ = [
    "CoxModel",
    "CumulativeIncidence",
    "KaplanMeier",
    "SurvivalRule",
    "numbers_at_risk",
]

CURVE_COLUMNS = ("group", "years", "estimate", "lower", "upper", "measure")
AT_RISK_COLUMNS = ("group", "years", "n_at_risk")


class SurvivalRule(RuleModel):
    """Options of the survival analyses of one study (config key ``survival``)."""

    model_config = ConfigDict(frozen=False)

    group_column: str = Field(
        "group", description="Patients column naming the arm or exposure group."
    )
    reference_group: str | None = Field(
        None, description="Group every hazard ratio is relative to (default: first group, sorted)."
    )
    covariates: list[str] = Field(
        default_factory=list, description="Patients columns adjusted for in the Cox model."
    )
    strata: list[str] = Field(
        default_factory=list,
        description="Patients columns stratifying the Cox baseline hazard (e.g. randomisation strata).",
    )
    horizons_years: list[float] = Field(
        default_factory=lambda: [1.0, 2.0, 3.0],
        description="Times (years) at which survival / cumulative incidence is reported.",
    )
    at_risk_years: list[float] = Field(
        default_factory=lambda: [0.0, 1.0, 2.0, 3.0, 4.0, 5.0],
        description="Times (years) of the numbers-at-risk table under the curves.",
    )
    confidence: float = Field(0.95, gt=0, lt=1, description="Confidence level of intervals.")
    subgroups: list[str] = Field(
        default_factory=list,
        description="Patients columns whose levels each get their own Cox hazard ratios "
        "(subgroup analysis shown in the forest plot); the overall estimate is always kept.",
    )


# ---- shared preparation ----------------------------------------------------------------


def _prepare(
    endpoints: FrameLike,
    patients: FrameLike | None,
    *,
    endpoint: str | None,
    group_column: str,
    extra_columns: Sequence[str] = (),
) -> tuple[pl.DataFrame, pl.DataFrame, str]:
    """One endpoint's rows with ``group`` (and ``extra_columns`` from patients), complete
    cases only; returns (rows, excluded rows with reason codes, endpoint name)."""
    frame = to_polars(endpoints, "endpoints")
    if "endpoint" not in frame.columns:
        raise InputDataError("endpoints: missing required column 'endpoint'")
    names = sorted(frame["endpoint"].drop_nulls().unique().to_list())
    if endpoint is None:
        if len(names) != 1:
            raise InputDataError(
                f"endpoints: the table holds {len(names)} endpoints {names}; pass endpoint=... "
                "to choose one"
            )
        endpoint = names[0]
    elif endpoint not in names:
        raise InputDataError(
            f"endpoints: endpoint '{endpoint}' is not in the table (endpoints: {names})"
            f"{did_you_mean(endpoint, names)}"
        )
    frame = frame.filter(pl.col("endpoint") == endpoint)
    duplicated = frame.filter(pl.col("patient_id").is_duplicated())
    if duplicated.height:
        raise InputDataError(
            f"endpoints: patient '{duplicated['patient_id'][0]}' has more than one '{endpoint}' "
            "row; give one time-to-event row per patient and endpoint"
        )
    wanted = [c for c in extra_columns if c not in frame.columns]
    if wanted:
        if patients is None:
            raise InputDataError(
                f"patients: needed for columns {wanted} but not given; pass the patients table"
            )
        people = to_polars(patients, "patients")
        for name in wanted:
            if name not in people.columns:
                raise InputDataError(
                    f"patients: missing column '{name}'{did_you_mean(name, people.columns)}"
                )
        frame = frame.join(
            people.select(pl.col("patient_id").cast(frame.schema["patient_id"]), *wanted),
            on="patient_id",
            how="left",
        )
    frame = _with_group(frame, patients, group_column)
    kept, excluded = split_complete_cases(frame, list(extra_columns))
    if excluded.height:
        logger.warning(
            "%s: %d patients left out of the model for missing covariates (see .excluded_)",
            endpoint,
            excluded.height,
        )
    return kept, excluded, endpoint


def numbers_at_risk(
    durations: pl.DataFrame, times: Sequence[float], *, groups: Sequence[str] | None = None
) -> pl.DataFrame:
    """Patients still at risk (follow-up ``years >= t``) at each of ``times`` per group.

    ``durations`` needs ``group`` and ``years``; the convention is the usual one under
    survival curves (a patient censored or with an event at ``t`` counts at ``t``).
    Returns ``group, years, n_at_risk`` with zeros where nobody is left.
    """
    grid = pl.DataFrame({"years": [float(t) for t in times]})
    present = sorted(durations["group"].unique().to_list()) if groups is None else list(groups)
    keys = pl.DataFrame({"group": present}, schema={"group": pl.String}).join(grid, how="cross")
    counted = (
        durations.select("group", pl.col("years").alias("follow_up"))
        .join(grid, how="cross")
        .group_by("group", "years")
        .agg((pl.col("follow_up") >= pl.col("years")).sum().cast(pl.Int64).alias("n_at_risk"))
    )
    return (
        keys.join(counted, on=["group", "years"], how="left")
        .with_columns(pl.col("n_at_risk").fill_null(0))
        .sort("group", "years")
        .select(AT_RISK_COLUMNS)
    )


def _estimates_at(
    curves: pl.DataFrame, horizons: Sequence[float], follow_up: pl.DataFrame
) -> pl.DataFrame:
    """Step-function value of each curve at ``horizons`` (null beyond a group's follow-up)."""
    grid = (
        pl.DataFrame({"group": sorted(curves["group"].unique().to_list())})
        .join(pl.DataFrame({"years": [float(h) for h in horizons]}), how="cross")
        .sort("years")
    )
    looked_up = grid.join_asof(
        curves.sort("group", "years"),
        on="years",
        by="group",
        strategy="backward",
        check_sortedness=False,
    ).join(follow_up, on="group", how="left")
    beyond = pl.col("years") > pl.col("max_years")
    return (
        looked_up.with_columns(
            [
                pl.when(beyond).then(None).otherwise(pl.col(c)).alias(c)
                for c in ("estimate", "lower", "upper")
            ]
        )
        .select("group", "years", "estimate", "lower", "upper", "measure")
        .sort("group", "years")
    )


def _curve_frame(
    group: str, timeline: np.ndarray, estimate: np.ndarray, bounds: pd.DataFrame, measure: str
) -> pl.DataFrame:
    # lifelines' Aalen–Johansen labels its two limits the wrong way round; order them
    limits = bounds.to_numpy(dtype=float)
    with np.errstate(invalid="ignore"):
        lower, upper = np.fmin(limits[:, 0], limits[:, 1]), np.fmax(limits[:, 0], limits[:, 1])
    return pl.DataFrame(
        {
            "group": [group] * len(timeline),
            "years": np.asarray(timeline, dtype=float),
            "estimate": np.asarray(estimate, dtype=float),
            "lower": lower,
            "upper": upper,
            "measure": [measure] * len(timeline),
        },
        schema_overrides={"group": pl.String, "measure": pl.String},
    )


class _CurveModel:
    """Shared configuration of the curve estimators."""

    _measure = ""

    def __init__(
        self,
        *,
        endpoint: str | None = None,
        group_column: str = "group",
        horizons_years: Sequence[float] = (1.0, 2.0, 3.0),
        at_risk_years: Sequence[float] = (0.0, 1.0, 2.0, 3.0, 4.0, 5.0),
        confidence: float = 0.95,
    ) -> None:
        self.endpoint = endpoint
        self.group_column = group_column
        self.horizons_years = tuple(horizons_years)
        self.at_risk_years = tuple(at_risk_years)
        self.confidence = confidence

    @classmethod
    def from_spec(cls, spec: SurvivalRule, *, endpoint: str | None = None) -> Self:
        """Build the estimator from a :class:`SurvivalRule`."""
        return cls(
            endpoint=endpoint,
            group_column=spec.group_column,
            horizons_years=spec.horizons_years,
            at_risk_years=spec.at_risk_years,
            confidence=spec.confidence,
        )

    def _check_fitted(self) -> None:
        if not hasattr(self, "curves_"):
            raise InputDataError(f"{type(self).__name__}: call .fit(endpoints, patients) first")

    def _finish(self, rows: pl.DataFrame, curves: list[pl.DataFrame]) -> None:
        self.curves_ = pl.concat(curves).select(CURVE_COLUMNS)
        groups = sorted(rows["group"].unique().to_list())
        self.at_risk_ = numbers_at_risk(rows, self.at_risk_years, groups=groups)
        follow_up = rows.group_by("group").agg(pl.col("years").max().alias("max_years"))
        self.horizon_estimates_ = _estimates_at(self.curves_, self.horizons_years, follow_up)
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
            endpoints, patients, endpoint=self.endpoint, group_column=self.group_column
        )
        self.excluded_ = excluded
        alpha = 1.0 - self.confidence
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


class CumulativeIncidence(_CurveModel):
    r"""Cumulative incidence of the endpoint with death as a competing event (Aalen–Johansen).

    .. math::

        \hat F_1(t) = \sum_{t_j \le t} \hat S(t_{j-1}) \frac{d_{1j}}{n_j}

    where :math:`\hat S` is the Kaplan–Meier estimate of being free of *any* event and
    :math:`d_{1j}` the endpoint events at :math:`t_j`; limits from the delta-method
    variance on the log(-log) scale (lifelines ``AalenJohansenFitter``). A row is the
    competing event when ``competing == 1`` and ``event == 0``; a null ``competing`` is
    read as 0 (no competing event recorded).

    Ties between an endpoint event and a competing event at the same time are ordered
    endpoint first, then competing event, then censoring, by offsets of 1e-9 years
    removed again from the output times (all times move up by at least one offset, so
    events at time zero are counted). This reproduces the Aalen–Johansen estimate with
    ties exactly (lifelines would otherwise move tied times at random). All times move
    up by at least one offset, because lifelines sets the incidence at its first time
    point to zero, which would drop endpoint events recorded at time zero.

    Parameters and attributes are those of :class:`KaplanMeier` (``measure =
    "cumulative_incidence"``), without the log-rank test (Gray's test is not provided).

    References
    ----------
    .. [1] Aalen OO, Johansen S. An empirical transition matrix for non-homogeneous Markov
       chains based on censored observations. Scand J Stat 1978;5:141-150.
    .. [2] Putter H, Fiocco M, Geskus RB. Tutorial in biostatistics: competing risks and
       multi-state models. Stat Med 2007;26:2389-2430. doi:10.1002/sim.2712
    """

    _measure = "cumulative_incidence"
    _tie_offset_years = 1e-9

    def fit(self, endpoints: FrameLike, patients: FrameLike | None = None) -> CumulativeIncidence:
        """Fit one cumulative-incidence curve per group; returns ``self``."""
        rows, excluded, self.endpoint_ = _prepare(
            endpoints, patients, endpoint=self.endpoint, group_column=self.group_column
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
        alpha = 1.0 - self.confidence
        curves = []
        for group in sorted(rows["group"].unique().to_list()):
            part = rows.filter(pl.col("group") == group)
            years = part["years"].to_numpy().astype(float)
            state = part["state"].to_numpy()
            # every time moves up by 1-3 offsets: lifelines sets the incidence at its first
            # time point to zero, which would drop endpoint events recorded at time zero
            order = np.where(state == 1, 1.0, np.where(state == 2, 2.0, 3.0))
            shifted = years + order * self._tie_offset_years
            fitter = AalenJohansenFitter(alpha=alpha, calculate_variance=True)
            with capture_warnings() as captured:
                fitter.fit(shifted, state, event_of_interest=1, label="aj")
            _warn_all(captured.convergence, f"Aalen–Johansen ({group})")
            timeline = fitter.cumulative_density_.index.to_numpy().astype(float)
            curve = _curve_frame(
                group,
                timeline,
                fitter.cumulative_density_.iloc[:, 0].to_numpy(),
                fitter.confidence_interval_,
                self._measure,
            )
            # back to the recorded times: the state after all events tied at a time
            recorded = pl.DataFrame(
                {
                    "years": np.concatenate([[0.0], shifted]),
                    "_recorded": np.concatenate([[0.0], years]),
                }
            ).unique("years")
            curve = (
                curve.join(recorded, on="years", how="left")
                .with_columns(pl.col("_recorded").fill_null(pl.col("years")).alias("years"))
                .drop("_recorded")
                .group_by("years", maintain_order=True)
                .last()
                .with_columns(pl.col("lower", "upper").fill_nan(None))
            )
            # before any event the incidence is 0 with no uncertainty
            curve = curve.with_columns(
                pl.when((pl.col("years") == 0) & (pl.col("estimate") == 0))
                .then(0.0)
                .otherwise(pl.col(c))
                .alias(c)
                for c in ("lower", "upper")
            )
            curves.append(curve.select(CURVE_COLUMNS))
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


class CoxModel:
    r"""Cox proportional-hazards model of one endpoint: group, covariates and strata.

    .. math::

        h_i(t) = h_{0,s(i)}(t) \exp(\beta^\top x_i)

    with a baseline hazard per stratum :math:`s(i)`, Efron's handling of ties (lifelines
    ``CoxPHFitter``). The group enters as indicators of each group against
    ``reference_group`` (terms ``<group_column>=<level>``); text covariates likewise.
    Beside the fit, the proportional-hazards assumption is checked per term by the
    scaled-Schoenfeld-residual test with Kaplan–Meier time transform (lifelines
    ``proportional_hazard_test(time_transform="km")``).

    Parameters
    ----------
    endpoint : str, optional
        Endpoint to model; needed when the table holds several.
    group_column : str, default "group"
        Arm / exposure column; ``None`` fits covariates only.
    reference_group : str, optional
        Reference level of the group (default: first, sorted).
    covariates, strata : sequence of str
        Patients columns adjusted for / stratified on.
    confidence : float, default 0.95
        Confidence level of the hazard-ratio limits.

    Attributes
    ----------
    fitter_ : lifelines.CoxPHFitter
    ph_test_ : polars.DataFrame
        ``term, test_statistic, p``.
    n_patients_, n_events_ : int
    excluded_ : polars.DataFrame
        ``patient_id, reason`` of rows left out (missing covariate or stratum).

    Raises
    ------
    ConvergenceError
        When the partial likelihood cannot be maximised (e.g. a group without events);
        the message says what to try.

    References
    ----------
    .. [1] Cox DR. Regression models and life-tables. J R Stat Soc B 1972;34:187-220.
    .. [2] Grambsch PM, Therneau TM. Proportional hazards tests and diagnostics based on
       weighted residuals. Biometrika 1994;81:515-526. doi:10.1093/biomet/81.3.515
    """

    def __init__(
        self,
        *,
        endpoint: str | None = None,
        group_column: str | None = "group",
        reference_group: str | None = None,
        covariates: Sequence[str] = (),
        strata: Sequence[str] = (),
        confidence: float = 0.95,
    ) -> None:
        self.endpoint = endpoint
        self.group_column = group_column
        self.reference_group = reference_group
        self.covariates = tuple(covariates)
        self.strata = tuple(strata)
        self.confidence = confidence

    @classmethod
    def from_spec(cls, spec: SurvivalRule, *, endpoint: str | None = None) -> CoxModel:
        """Build the model from a :class:`SurvivalRule`."""
        return cls(
            endpoint=endpoint,
            group_column=spec.group_column,
            reference_group=spec.reference_group,
            covariates=spec.covariates,
            strata=spec.strata,
            confidence=spec.confidence,
        )

    def fit(self, endpoints: FrameLike, patients: FrameLike | None = None) -> CoxModel:
        """Fit the model; returns ``self``."""
        group_column = self.group_column or "group"
        rows, excluded, self.endpoint_ = _prepare(
            endpoints,
            patients,
            endpoint=self.endpoint,
            group_column=group_column,
            extra_columns=[*self.covariates, *self.strata],
        )
        self.excluded_ = excluded
        terms_frame = []
        names: list[str] = []
        if self.group_column is not None:
            groups = sorted(rows["group"].unique().to_list())
            reference = self.reference_group if self.reference_group is not None else groups[0]
            if reference not in groups:
                raise InputDataError(
                    f"reference_group: '{reference}' is not a value of '{group_column}' "
                    f"(values: {groups}){did_you_mean(reference, groups)}"
                )
            self.reference_group_ = reference
            for level in groups:
                if level != reference:
                    name = f"{group_column}={level}"
                    terms_frame.append((rows["group"] == level).cast(pl.Float64).alias(name))
                    names.append(name)
        encoded, covariate_names = encode_covariates(rows, self.covariates, "patients")
        if encoded.width:
            terms_frame.extend(encoded.get_columns())
            names.extend(covariate_names)
        if not names:
            raise InputDataError(
                "CoxModel: nothing to model; give a group_column with two or more groups or covariates"
            )
        data = pl.DataFrame(terms_frame).with_columns(
            rows["years"].alias("_years"), rows["event"].cast(pl.Int64).alias("_event")
        )
        strata_names = [f"_stratum_{i}" for i in range(len(self.strata))]
        if self.strata:
            data = data.with_columns(
                rows[s].cast(pl.String).alias(n)
                for s, n in zip(self.strata, strata_names, strict=True)
            )
        frame = data.to_pandas()
        self.n_patients_ = rows.height
        self.n_events_ = int(rows["event"].cast(pl.Int64).sum())
        if self.n_events_ == 0:
            raise ConvergenceError(
                f"CoxModel ({self.endpoint_}): no events among {rows.height} patients; a hazard "
                "ratio cannot be estimated - report the event counts instead"
            )
        fitter = CoxPHFitter(alpha=1.0 - self.confidence)
        try:
            with capture_warnings() as captured:
                fitter.fit(
                    frame,
                    duration_col="_years",
                    event_col="_event",
                    strata=strata_names or None,
                )
        except LifelinesConvergenceError as error:
            raise ConvergenceError(
                f"CoxModel ({self.endpoint_}): the fit did not converge "
                f"({str(error).splitlines()[0]}); check for a group or covariate level without "
                "events, collinear covariates, or fewer covariates"
            ) from error
        _warn_all(
            captured.convergence,
            f"CoxModel ({self.endpoint_})",
            "check groups or covariate levels with few events and collinear covariates",
        )
        self.fitter_ = fitter
        self.terms_ = names
        summary = fitter.summary
        self._summary = pl.DataFrame(
            {
                "term": names,
                "hr": summary.loc[names, "exp(coef)"].to_numpy(dtype=float),
                "hr_lower": np.exp(
                    summary.loc[names].filter(like="coef lower").iloc[:, 0].to_numpy(dtype=float)
                ),
                "hr_upper": np.exp(
                    summary.loc[names].filter(like="coef upper").iloc[:, 0].to_numpy(dtype=float)
                ),
                "p": summary.loc[names, "p"].to_numpy(dtype=float),
                "log_hr": summary.loc[names, "coef"].to_numpy(dtype=float),
                "se": summary.loc[names, "se(coef)"].to_numpy(dtype=float),
            }
        )
        with capture_warnings() as captured:
            test = proportional_hazard_test(fitter, frame, time_transform="km")
        _warn_all(captured.convergence, f"proportional-hazards test ({self.endpoint_})")
        ph = test.summary
        self.ph_test_ = pl.DataFrame(
            {
                "term": [str(t) for t in ph.index],
                "test_statistic": ph["test_statistic"].to_numpy(dtype=float),
                "p": ph["p"].to_numpy(dtype=float),
            }
        )
        flagged = self.ph_test_.filter(pl.col("p") < 0.05)
        if flagged.height:
            logger.info(
                "%s: proportional-hazards test p < 0.05 for %s (see .ph_test_)",
                self.endpoint_,
                ", ".join(flagged["term"].to_list()),
            )
        return self

    def summary(self) -> pl.DataFrame:
        """``term, hr, hr_lower, hr_upper, p`` (+ ``log_hr, se``), one row per term."""
        if not hasattr(self, "_summary"):
            raise InputDataError("CoxModel: call .fit(endpoints, patients) first")
        return self._summary


def _finite(value: object) -> float | None:
    number = float(value)  # type: ignore[arg-type]
    return number if np.isfinite(number) else None


def _warn_all(
    messages: list[str], what: str, advice: str = "inspect the data of this group"
) -> None:
    for message in dict.fromkeys(messages):
        warnings.warn(f"{what}: {message}; {advice}", StatisticalWarning, stacklevel=3)
