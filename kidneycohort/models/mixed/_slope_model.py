"""The eGFR slope model: design, fit with a stated fallback chain, contrasts and trajectories."""

from __future__ import annotations

import logging
from typing import Any, Self

import numpy as np
import polars as pl
from scipy import stats

from kidneycohort._frames import FrameLike, require_columns, to_polars
from kidneycohort._rules import resolve_rules
from kidneycohort.errors import (
    InputDataError,
    did_you_mean,
)
from kidneycohort.models._design import encode_covariates, one_equation
from kidneycohort.models.mixed._fitters import fit_exact, fit_statsmodels
from kidneycohort.models.mixed._rule import TRAJECTORY_COLUMNS, SlopeModelRule
from kidneycohort.schemas import SLOPE_MODEL_FIT
from kidneycohort.value_filter import FILTER_COLUMNS, ValueFilterRule, value_filter_reasons

__all__ = ["SlopeModel"]

logger = logging.getLogger(__name__)


class SlopeModel:
    r"""Linear mixed model of eGFR over time by group (REML by default).

    Fitted by the package's exact per-patient-block engine
    (:func:`~kidneycohort.models.mixed.fit_mixed_model`; ``engine="statsmodels"`` keeps
    statsmodels ``MixedLM`` for cross-checks).

    With ``knot_years`` :math:`k`, time enters as a linear spline,
    :math:`t_1 = \min(t, k)` and :math:`t_2 = \max(t - k, 0)`, and for patient
    :math:`i` in group :math:`g`

    .. math::

        \text{eGFR}_{ij} = (\beta_{0g} + b_{0i}) + (\beta_{1g} + b_{1i})\, t_{1ij}
            + (\beta_{2g} + b_{2i})\, t_{2ij} + \gamma^\top z_i + \varepsilon_{ij},
        \quad b_i \sim N(0, G),\ \varepsilon_{ij} \sim N(0, \sigma^2)

    with centred covariates :math:`z_i`. Reported per group:

    .. math::

        \text{acute change} = k\,\beta_{1g}, \qquad
        \text{chronic slope} = \beta_{2g}, \qquad
        \text{total slope}(T) = \frac{k\,\beta_{1g} + (T - k)\,\beta_{2g}}{T}

    and each as a difference against the reference group; every quantity is a linear
    contrast :math:`c^\top\beta`, so its standard error is
    :math:`\sqrt{c^\top \hat V c}` (delta method, exact for linear contrasts), with Wald
    95 % limits and a two-sided normal p value. Without a knot the model has one slope
    :math:`\beta_{1g}` (quantity ``slope``) and random intercept and slope.

    Parameters
    ----------
    rule : SlopeModelRule, optional
        The model's options; keyword ``options`` (any field of :class:`SlopeModelRule`,
        e.g. ``knot_years=None`` for one slope) override it. Validated at once: a bad
        value raises :class:`~kidneycohort.errors.ConfigError`.

    Attributes
    ----------
    result_ : statsmodels MixedLMResults or None
        The accepted statsmodels fit (``engine="statsmodels"`` only; ``None`` with the
        exact engine, whose fit is ``fit_.exact``).
    random_effects_structure_ : str
        Structure of the accepted fit (``unstructured`` unless a fallback was needed).
    fit_messages_ : list of str
        Convergence messages of every attempt, in order.
    fixed_effects_ : polars.DataFrame
        ``term, estimate, se, lower, upper, p``.
    variance_components_ : polars.DataFrame
        ``component, estimate`` (random-effects variances/covariances, residual variance).
    trajectories_ : polars.DataFrame
        ``group, years, mean, lower, upper``: model-based mean eGFR at mean covariates.
    n_patients_, n_observations_ : int
    group_sizes_ : polars.DataFrame
        ``group, n_patients, n_observations`` of the values used.
    excluded_ : polars.DataFrame
        ``reason, n_rows, n_patients`` of eGFR rows not used (``egfr_missing``,
        ``years_missing``, ``before_index``, ``after_max_years``, ``group_missing``,
        ``missing_<covariate>``, and the value filter's ``setting_<setting>``, ``aki``,
        ``aki_recovery``, ``qualified_value``); ``excluded_rows_`` lists them row by row.

    Raises
    ------
    ConvergenceError
        When no structure of the fallback sequence converges; the message says what to try.

    Notes
    -----
    **Where to put the knot.** The acute segment is a straight line from index to the
    knot, so ``acute_change`` estimates the mean change from index to the knot only when
    the mean path really is straight there. A haemodynamic dip that completes *before*
    the knot, with visits inside the ramp, breaks this. Under weighted least squares the
    fitted mean at the knot stays close to the true mean at the knot, but the line is
    tilted so that it passes near the early on-treatment visits. The dipping arm's
    fitted intercept therefore falls below its true baseline, and :math:`k\beta_1` is
    pulled towards zero. The ``total_slope`` quantities inherit the bias divided by
    :math:`T`. The chronic slope is unaffected because its segment starts after the dip.

    Example from the synthetic two-arm trial scenario (dip of 3 reached linearly over
    28 days, visits at weeks 2, 4 and 12, 800 patients, no measurement noise): with
    ``knot_years=0.25`` the active - placebo acute change is -1.99 (SE 0.06). The true
    mean difference at the knot is -2.80. The active arm's fitted intercept is 47.3,
    against a true mean of 48.3 at index, while its fitted mean at the knot is 44.5
    against a true 44.5. Dropping the week-2 and week-4 values, or putting the knot
    at the end of the dip (28 days), removes the bias (see
    ``tests/test_mixed_synthetic.py``). So place the knot where the acute effect is
    expected to be complete (common practice: the first on-treatment visit after it).
    With a 3-month knot and visits inside the dip, read ``acute_change`` as a
    model-weighted summary of the early change, not as the change to month 3.

    **Direction of the differences.** Differences are ``<group> - <reference>``, and
    the default reference is the first group in sorted order. For arms named
    ``active`` and ``placebo`` that is ``active``, so pass ``reference_group="placebo"``
    to get active - placebo.

    References
    ----------
    .. [1] Laird NM, Ware JH. Random-effects models for longitudinal data. Biometrics
       1982;38:963-974. doi:10.2307/2529876
    .. [2] Vonesh E, Tighiouart H, Ying J, et al. Mixed-effects models for slope-based
       endpoints in clinical trials of chronic kidney disease. Stat Med 2019;38:4218-4239.
       doi:10.1002/sim.8282
    .. [3] Greene T, Ying J, Vonesh EF, et al. Performance of GFR slope as a surrogate end
       point for kidney disease progression in clinical trials. J Am Soc Nephrol
       2019;30:1756-1769. doi:10.1681/ASN.2019010009
    """

    def __init__(self, rule: SlopeModelRule | None = None, /, **options: Any) -> None:
        self.rule = resolve_rules(SlopeModelRule, rule, options, "SlopeModel")

    # ---- data -------------------------------------------------------------------------

    def _rows(
        self,
        egfr: FrameLike,
        patients: FrameLike | None,
        spec: SlopeModelRule,
        value_filter: ValueFilterRule | None,
    ) -> pl.DataFrame:
        table = to_polars(egfr, "egfr")
        # only the columns the model reads: the filter and sort below copy every column
        # they are given (a million patients' eGFR table has 27 M rows of 13 columns)
        wanted = (*_KEYS, "equation", spec.group_column, *spec.covariates, *FILTER_COLUMNS)
        table = one_equation(table.select(c for c in table.columns if c in wanted), spec.equation)
        values = table.select(c for c in table.columns if c not in FILTER_COLUMNS).with_columns(
            value_filter_reasons(table, value_filter).alias("_value_filter")
        )
        del table
        rows = _with_patient_columns(values, patients, spec)
        group = (
            pl.col(spec.group_column).cast(pl.String)
            if spec.group_column is not None
            else pl.lit(WHOLE_COHORT, dtype=pl.String)
        )
        reason = _exclusion_reason(rows, spec)
        rows = rows.with_columns(
            pl.col("egfr").cast(pl.Float64),
            pl.col("years_from_index").cast(pl.Float64),
            group.alias("_group"),
        ).with_columns(reason.alias("_reason"))
        dropped = rows.filter(pl.col("_reason").is_not_null())
        self.excluded_rows_ = dropped.select(
            pl.col("patient_id").cast(pl.String),
            "years_from_index",
            pl.col("_reason").alias("reason"),
        )
        self.excluded_ = (
            self.excluded_rows_.group_by("reason")
            .agg(
                pl.len().cast(pl.Int64).alias("n_rows"),
                pl.col("patient_id").n_unique().cast(pl.Int64).alias("n_patients"),
            )
            .sort("reason")
        )
        if dropped.height:
            logger.info(
                "SlopeModel: %d eGFR rows not used (%s)",
                dropped.height,
                ", ".join(f"{r}: {n}" for r, n in self.excluded_.select("reason", "n_rows").rows()),
            )
        used = (
            rows.filter(pl.col("_reason").is_null())
            .drop("_reason", "_value_filter", "equation", strict=False)
            .sort("patient_id", "years_from_index")
        )
        if used.height == 0:
            raise InputDataError(
                "egfr: no usable eGFR values left (see .excluded_ for the reasons)"
            )
        return used

    # ---- fit --------------------------------------------------------------------------

    def fit(
        self,
        egfr: FrameLike,
        patients: FrameLike | None = None,
        *,
        value_filter: ValueFilterRule | None = None,
    ) -> Self:
        """Fit the model to ``egfr`` (``schemas.EGFR`` layout) with groups and covariates
        from ``patients``; returns ``self``.

        ``value_filter`` leaves out the values the baseline, slope and category stages
        leave out (care settings, acute kidney injury, qualified results; reasons as in
        :func:`kidneycohort.value_filter.apply_value_filter`). Without it an ``excluded``
        column already in ``egfr`` is honoured, and a qualified result ("<20") is still
        never used as a value.
        """
        spec = self.rule
        rows = self._rows(egfr, patients, spec, value_filter)
        groups = sorted(rows["_group"].unique().to_list())
        reference = spec.reference_group if spec.reference_group is not None else groups[0]
        if reference not in groups:
            raise InputDataError(
                f"reference_group: '{reference}' is not a value of '{spec.group_column}' "
                f"(values: {groups}){did_you_mean(reference, groups)}"
            )
        self.groups_ = [reference, *[g for g in groups if g != reference]]
        self.reference_group_ = reference

        time = rows["years_from_index"].to_numpy()
        pieces = self._time_pieces(time, spec.knot_years)
        self.slope_terms_ = (
            ["acute_slope", "chronic_slope"] if spec.knot_years is not None else ["slope"]
        )
        group_values = rows["_group"].to_numpy()
        columns, names = [], []
        for group in self.groups_:
            indicator = (group_values == group).astype(float)
            columns.append(indicator)
            names.append(f"{group}: intercept")
            for term, piece in zip(self.slope_terms_, pieces, strict=True):
                columns.append(indicator * piece)
                names.append(f"{group}: {term}")
        patient_level = rows.unique("patient_id", keep="first", maintain_order=True)
        encoded, covariate_names = encode_covariates(patient_level, spec.covariates, "patients")
        if encoded.width:
            means = encoded.mean()
            encoded_rows, _ = encode_covariates(rows, spec.covariates, "patients")
            for name in covariate_names:
                columns.append(encoded_rows[name].to_numpy() - float(means[name][0]))
                names.append(name)
        exog = np.column_stack(columns)
        del columns  # the stacked copy is the one used
        self.fixed_effect_names_ = names
        self.group_sizes_ = (
            rows.group_by("_group")
            .agg(
                pl.col("patient_id").n_unique().cast(pl.Int64).alias("n_patients"),
                pl.len().cast(pl.Int64).alias("n_observations"),
            )
            .rename({"_group": "group"})
            .sort(pl.col("group").replace_strict({g: i for i, g in enumerate(self.groups_)}))
        )
        self.n_observations_ = rows.height
        self.n_patients_ = patient_level.height
        endog = rows["egfr"].to_numpy()
        # the exact engine codes the ids in polars: no array of millions of Python strings
        patient_ids = rows["patient_id"].cast(pl.String)

        if spec.engine == "exact":
            fit = fit_exact(
                endog,
                exog,
                patient_ids,
                pieces,
                names,
                self.slope_terms_,
                spec.random_effects,
                spec.confidence,
            )
        else:
            fit = fit_statsmodels(
                endog, exog, patient_ids.to_numpy(), pieces, self.slope_terms_, spec.random_effects
            )
        self.fit_ = fit
        self.engine_ = fit.engine
        self.result_ = fit.statsmodels_result
        self.fit_messages_ = fit.messages
        self.random_effects_structure_ = fit.structure
        self.converged_ = True
        self._patient_groups = patient_level.select(pl.col("patient_id").cast(pl.String), "_group")
        self._collect(spec, time)
        return self

    @staticmethod
    def _time_pieces(time: np.ndarray, knot: float | None) -> list[np.ndarray]:
        if knot is None:
            return [time]
        return [np.minimum(time, knot), np.maximum(time - knot, 0.0)]

    # ---- results ----------------------------------------------------------------------

    def _collect(self, spec: SlopeModelRule, time: np.ndarray) -> None:
        fit = self.fit_
        beta, covariance = fit.beta, fit.fixed_covariance
        self._beta, self._covariance = beta, covariance
        z = stats.norm.ppf(0.5 + spec.confidence / 2)
        se = np.sqrt(np.diag(covariance))
        with np.errstate(divide="ignore", invalid="ignore"):
            p = 2 * stats.norm.sf(np.abs(beta / se))
        self.fixed_effects_ = pl.DataFrame(
            {
                "term": self.fixed_effect_names_,
                "estimate": beta,
                "se": se,
                "lower": beta - z * se,
                "upper": beta + z * se,
                "p": p,
            }
        )
        names = fit.random_names
        components, estimates = [], []
        for i, a in enumerate(names):
            for j in range(i + 1):
                components.append(f"var({a})" if i == j else f"cov({names[j]}, {a})")
                estimates.append(float(fit.random_covariance[i, j]))
        components.append("var(residual)")
        estimates.append(fit.residual_variance)
        self.variance_components_ = pl.DataFrame({"component": components, "estimate": estimates})

        self._contrasts = self._quantity_contrasts(spec)
        self._summary = self._summarise(spec, z)
        self.trajectories_ = self._trajectories(spec, time, z)

    def _index(self, group: str, term: str) -> int:
        return self.fixed_effect_names_.index(f"{group}: {term}")

    def _quantity_contrasts(self, spec: SlopeModelRule) -> dict[tuple[str, str], np.ndarray]:
        k_fe = len(self.fixed_effect_names_)
        contrasts: dict[tuple[str, str], np.ndarray] = {}
        for group in self.groups_:

            def vector(weights: dict[str, float], group: str = group) -> np.ndarray:
                c = np.zeros(k_fe)
                for term, weight in weights.items():
                    c[self._index(group, term)] = weight
                return c

            if spec.knot_years is None:
                contrasts[(group, "slope")] = vector({"slope": 1.0})
            else:
                knot = spec.knot_years
                contrasts[(group, "acute_change")] = vector({"acute_slope": knot})
                contrasts[(group, "chronic_slope")] = vector({"chronic_slope": 1.0})
                for horizon in spec.horizons_years:
                    contrasts[(group, f"total_slope_{_format_years(horizon)}y")] = vector(
                        {"acute_slope": knot / horizon, "chronic_slope": (horizon - knot) / horizon}
                    )
        return contrasts

    def _summarise(self, spec: SlopeModelRule, z: float) -> pl.DataFrame:
        labels, quantities, vectors = [], [], []
        quantity_names = list(dict.fromkeys(q for _, q in self._contrasts))
        for group in self.groups_:
            for quantity in quantity_names:
                labels.append(group)
                quantities.append(quantity)
                vectors.append(self._contrasts[(group, quantity)])
        for group in self.groups_[1:]:
            for quantity in quantity_names:
                labels.append(f"{group} - {self.reference_group_}")
                quantities.append(quantity)
                vectors.append(
                    self._contrasts[(group, quantity)]
                    - self._contrasts[(self.reference_group_, quantity)]
                )
        matrix = np.vstack(vectors)
        estimate = matrix @ self._beta
        se = np.sqrt(np.einsum("ij,jk,ik->i", matrix, self._covariance, matrix))
        with np.errstate(divide="ignore", invalid="ignore"):
            p = 2 * stats.norm.sf(np.abs(estimate / se))
        return pl.DataFrame(
            {
                "contrast": labels,
                "quantity": quantities,
                "estimate": estimate,
                "se": se,
                "lower": estimate - z * se,
                "upper": estimate + z * se,
                "p": p,
            }
        )

    def _trajectories(self, spec: SlopeModelRule, time: np.ndarray, z: float) -> pl.DataFrame:
        end = (
            max([float(np.max(time)), *spec.horizons_years])
            if spec.knot_years
            else float(np.max(time))
        )
        if spec.max_years is not None:
            end = min(end, spec.max_years)
        grid = np.arange(0.0, end + 1e-9, spec.trajectory_step_years)
        if spec.knot_years is not None:
            grid = np.unique(np.concatenate([grid, [spec.knot_years]]))
        pieces = self._time_pieces(grid, spec.knot_years)
        frames = []
        k_fe = len(self.fixed_effect_names_)
        for group in self.groups_:
            design = np.zeros((grid.size, k_fe))
            design[:, self._index(group, "intercept")] = 1.0
            for term, piece in zip(self.slope_terms_, pieces, strict=True):
                design[:, self._index(group, term)] = piece
            mean = design @ self._beta
            se = np.sqrt(np.einsum("ij,jk,ik->i", design, self._covariance, design))
            frames.append(
                pl.DataFrame(
                    {
                        "group": [group] * grid.size,
                        "years": grid,
                        "mean": mean,
                        "lower": mean - z * se,
                        "upper": mean + z * se,
                    },
                    schema_overrides={"group": pl.String},
                )
            )
        return pl.concat(frames).select(TRAJECTORY_COLUMNS)

    def patient_slopes(self) -> pl.DataFrame:
        r"""Per-patient model-based eGFR slopes (the chronic slope with a knot), shrunken
        towards the group mean, with their prediction-error SE.

        .. math:: \tilde s_i = \hat\beta_{g(i)} + \hat b_i, \qquad
            \operatorname{SE}(\tilde s_i) \text{ from Henderson's mixed-model equations}

        (the SE counts the uncertainty of :math:`\hat\beta`; Henderson 1975,
        doi:10.2307/2529430). Needs ``engine="exact"``.

        Returns
        -------
        polars.DataFrame
            ``patient_id, group, quantity, estimate, se, lower, upper`` (``quantity`` is
            ``chronic_slope`` or ``slope``; mL/min/1.73 m² per year).
        """
        if not hasattr(self, "fit_"):
            raise InputDataError("SlopeModel: call .fit(egfr, patients) first")
        exact = self.fit_.exact
        if exact is None:
            raise InputDataError(
                "SlopeModel: per-patient model slopes need engine='exact' (the statsmodels "
                "engine is kept for cross-checks of the fixed effects)"
            )
        term = self.slope_terms_[-1]
        order = exact.random_effects.select(pl.col("patient_id").cast(pl.String)).join(
            self._patient_groups, on="patient_id", how="left", maintain_order="left"
        )
        fixed = np.zeros((order.height, len(self.fixed_effect_names_)))
        for group in self.groups_:
            fixed[(order["_group"] == group).to_numpy(), self._index(group, term)] = 1.0
        # with one random slope on time (a fallback), it shifts every slope term alike
        table = exact.patient_contrast(fixed, {term: 1.0, "slope": 1.0})
        return table.select(
            "patient_id",
            order["_group"].alias("group"),
            pl.lit(term).alias("quantity"),
            "estimate",
            "se",
            "lower",
            "upper",
        )

    def describe(self) -> str:
        """One sentence for the methods text: what was fitted, by which engine, how it ended."""
        if not hasattr(self, "fit_"):
            raise InputDataError("SlopeModel: call .fit(egfr, patients) first")
        if self.fit_.exact is not None:
            return self.fit_.exact.describe()
        return (
            f"Linear mixed model fitted by REML with statsmodels MixedLM, "
            f"{self.random_effects_structure_} random effects per patient; "
            f"{self.n_patients_} patients, {self.n_observations_} values."
        )

    def fit_record(self, model: str) -> pl.DataFrame:
        """One row (``schemas.SLOPE_MODEL_FIT``) saying how the model was fitted."""
        if not hasattr(self, "fit_"):
            raise InputDataError("SlopeModel: call .fit(egfr, patients) first")
        exact = self.fit_.exact
        return pl.DataFrame(
            {
                "model": [model],
                "engine": [self.engine_],
                "structure": [self.random_effects_structure_],
                "converged": [exact.convergence.converged if exact is not None else True],
                "iterations": [exact.convergence.iterations if exact is not None else None],
                "gradient_norm": [exact.convergence.gradient_norm if exact is not None else None],
                "log_likelihood": [self.fit_.log_likelihood],
                "n_patients": [self.n_patients_],
                "n_values": [self.n_observations_],
                "description": [self.describe()],
            },
            schema=SLOPE_MODEL_FIT,
        )

    def summary(self) -> pl.DataFrame:
        """One row per group (and per difference ``<group> - <reference>``) and quantity:
        ``contrast, quantity, estimate, se, lower, upper, p``. Quantities are
        ``acute_change`` (mL/min/1.73 m² from 0 to the knot), ``chronic_slope`` and
        ``total_slope_<T>y`` (mL/min/1.73 m² per year), or ``slope`` without a knot."""
        if not hasattr(self, "_summary"):
            raise InputDataError("SlopeModel: call .fit(egfr, patients) first")
        return self._summary


def _format_years(value: float) -> str:
    return f"{value:g}"


_KEYS = ("patient_id", "years_from_index", "egfr")

WHOLE_COHORT = "all"
"""The one group of a model fitted without a group column."""


def _with_patient_columns(
    values: pl.DataFrame, patients: FrameLike | None, spec: SlopeModelRule
) -> pl.DataFrame:
    """eGFR rows with the group and covariates, from ``patients`` when not already there."""
    wanted = [c for c in (spec.group_column, *spec.covariates) if c is not None]
    if all(c in values.columns for c in wanted) and not spec.covariates:
        return values
    if patients is None:
        raise InputDataError(
            f"patients: needed for columns {wanted} but not given; pass the patients table"
        )
    people = to_polars(patients, "patients")
    require_columns(people, ("patient_id", *wanted), "patients")
    duplicated = people.filter(pl.col("patient_id").is_duplicated())
    if duplicated.height:
        raise InputDataError(
            f"patients: patient_id '{duplicated['patient_id'][0]}' appears more than "
            "once; give one row per patient"
        )
    return values.drop([c for c in wanted if c in values.columns]).join(
        people.select(pl.col("patient_id").cast(values.schema["patient_id"]), *wanted),
        on="patient_id",
        how="left",
    )


def _exclusion_reason(rows: pl.DataFrame, spec: SlopeModelRule) -> pl.Expr:
    """Why an eGFR row is not used (null when it is), the first reason that applies."""
    years = pl.col("years_from_index")
    reason = (
        pl.when(pl.col("egfr").is_null() | pl.col("egfr").is_nan())
        .then(pl.lit("egfr_missing"))
        .when(years.is_null() | years.is_nan())
        .then(pl.lit("years_missing"))
        .when(years < 0)
        .then(pl.lit("before_index"))
    )
    if spec.max_years is not None:
        reason = reason.when(years > spec.max_years).then(pl.lit("after_max_years"))
    reason = reason.when(pl.col("_value_filter").is_not_null()).then(pl.col("_value_filter"))
    if spec.group_column is not None:
        reason = reason.when(pl.col(spec.group_column).is_null()).then(pl.lit("group_missing"))
    for name in spec.covariates:
        missing = pl.col(name).is_null()
        if rows.schema[name].is_float():
            missing = missing | pl.col(name).is_nan()
        reason = reason.when(missing).then(pl.lit(f"missing_{name}"))
    return reason.otherwise(None)
