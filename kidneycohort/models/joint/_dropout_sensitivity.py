r"""Sensitivity of the eGFR slope difference to missing-not-at-random dropout.

**Delta adjustment (tipping point).** eGFR values at planned visits after dropout are
multiply imputed from the observed-data mixed model (missing at random), then the
imputed values of the non-reference arm are shifted by :math:`\delta` mL/min/1.73 m²
per year since dropout, :math:`y^{(m)}_{it} + \delta\,(t - T_i)`, so :math:`\delta < 0`
says those who dropped out in that arm declined faster than the model predicts
(Carpenter & Kenward 2013, chapter 10; Carpenter, Roger & Kenward 2013). Each
imputation draws the longitudinal parameters from the normal approximation of their
likelihood, :math:`\theta^{(m)} \sim N(\hat\theta, \hat I^{-1})`, then each patient's
random effects from their posterior given the observed values, :math:`b_i \mid y_i`
(vectorised over patients), then the values. Every completed data set is refitted by
the observed-data mixed model (maximum likelihood) and the slope differences combined by
Rubin's rules (Rubin 1987):

.. math::

    \bar Q = \frac1M\sum_m \hat Q_m, \quad
    T = \bar U + (1 + \tfrac1M) B, \quad
    \nu = (M - 1)\Bigl(1 + \frac{\bar U}{(1 + 1/M) B}\Bigr)^2,

with :math:`\bar U` the mean within-imputation variance and :math:`B` the variance of
the :math:`\hat Q_m`; p from :math:`t_\nu`. The tipping point is the :math:`\delta` at
which the p value crosses :math:`\alpha`, found by bisection between the grid values
that bracket it. The draws are fixed across :math:`\delta` (common random numbers),
so :math:`\delta` moves the result smoothly.

**Stated value at kidney failure.** An eGFR value of ``value`` (default 10) is added
at the time of kidney failure for every patient who reached it, and the slope model is
refitted (common practice in CKD trials: kidney failure as a low eGFR value).

References
----------
.. [1] Rubin DB. Multiple Imputation for Nonresponse in Surveys. Wiley, 1987.
.. [2] Carpenter JR, Kenward MG. Multiple Imputation and its Application. Wiley, 2013.
.. [3] Carpenter JR, Roger JH, Kenward MG. Analysis of longitudinal trials with protocol
   deviation: a framework for relevance-based multiple imputation via reference-based
   imputation. J Biopharm Stat 2013;23:1352-1371. doi:10.1080/10543406.2013.834911
"""

from __future__ import annotations

import itertools
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import polars as pl
from scipy import stats

from kidneycohort._frames import FrameLike
from kidneycohort.errors import ConvergenceError, InputDataError, StatisticalWarning
from kidneycohort.models.joint._data import JointData, dropout_times, time_design, with_values
from kidneycohort.models.joint._model import JointSlopeModel, fit_separate_mixed_model

__all__ = [
    "DeltaAdjustedResult",
    "StatedValueResult",
    "delta_adjusted_slopes",
    "stated_value_at_kidney_failure",
]

_BISECTION_STEPS = 7  # the bracket shrinks 128-fold
# Newton decrement per value (deviance units) at which a completed-data refit counts as
# converged: 1e-8 leaves a log-likelihood gap of at most 0.5e-8 per value, far below
# what moves a slope difference; the engine's default 1e-10 refused near-flat optima
# next to the covariance boundary on small completed data sets
_REFIT_TOLERANCE = 1e-8
# doublings of the extreme delta when the whole grid agrees
_EXTENSIONS = 4
# completed-data refits (not) at the covariance boundary since the last reset
_BOUNDARY_FITS = {False: 0, True: 0}


def _boundary_note() -> str:
    """A note on refits at the boundary since the last call (and reset the count)."""
    at, total = _BOUNDARY_FITS[True], _BOUNDARY_FITS[True] + _BOUNDARY_FITS[False]
    _BOUNDARY_FITS[False] = _BOUNDARY_FITS[True] = 0
    if not at:
        return ""
    return (
        f"{at} of {total} refits ended at the boundary of the random-effects covariance "
        "(a variance at zero or a correlation at +/-1); their fixed effects are valid"
    )


_TABLE_COLUMNS = ("delta", "step", "estimate", "se", "lower", "upper", "p", "df", "significant")


def _slope_fit(
    model: JointSlopeModel, patient: np.ndarray, years: np.ndarray, response: np.ndarray
) -> tuple[float, float]:
    """Slope difference (first non-reference - reference; chronic with a knot) and its
    variance from the observed-data mixed model (ML, the dropout model left out) refitted
    to these values by the exact engine (closed-form profiled likelihood, no quadrature:
    the eGFR model alone is Gaussian)."""
    data = model.data_
    with warnings.catch_warnings():
        # a boundary covariance leaves the fixed effects valid; it is counted in the
        # result's note (``boundary_fits``) instead of one warning per completed data set
        warnings.simplefilter("ignore", StatisticalWarning)
        fit = fit_separate_mixed_model(
            with_values(data, patient, years, response),
            model.slope_terms_,
            tolerance=_REFIT_TOLERANCE,
        )
    _BOUNDARY_FITS[bool(fit.convergence.boundary)] += 1
    if not fit.convergence.converged:
        raise ConvergenceError(
            f"delta-adjusted analysis: a completed data set could not be fitted ({fit.describe()})"
        )
    q = 1 + len(model.slope_terms_)
    contrast = np.zeros(fit.fixed_effects.size)
    contrast[2 * q - 1], contrast[q - 1] = 1.0, -1.0
    return float(contrast @ fit.fixed_effects), float(contrast @ fit.fixed_covariance @ contrast)


def rubin(estimates: np.ndarray, variances: np.ndarray) -> tuple[float, float, float, float]:
    """Rubin's rules: pooled estimate, total variance, degrees of freedom, two-sided p."""
    m = estimates.size
    mean, within = float(estimates.mean()), float(variances.mean())
    between = float(estimates.var(ddof=1)) if m > 1 else 0.0
    total = within + (1.0 + 1.0 / m) * between
    df = np.inf if between <= 0 else (m - 1) * (1.0 + within / ((1.0 + 1.0 / m) * between)) ** 2
    p = float(2.0 * stats.t.sf(abs(mean) / np.sqrt(total), df))
    return mean, total, float(df), p


@dataclass(frozen=True)
class _Imputations:
    """Completed values without the shift, and the shift per year of delta."""

    patient: np.ndarray
    years: np.ndarray
    base: list[np.ndarray]
    shift: np.ndarray


def _planned_years(data: JointData, planned: Sequence[float] | None) -> np.ndarray:
    if planned is not None:
        return np.sort(np.asarray(planned, dtype=float))
    years, counts = np.unique(np.round(data.row_years, 6), return_counts=True)
    return years[counts >= 0.05 * data.n_patients]


def _draw(model: JointSlopeModel, planned: np.ndarray, imputations: int, seed: int) -> _Imputations:
    """Impute values at planned visits after dropout (patients with a dropout event)."""
    data, lay, mixed = model.data_, model.layout_, model.mixed_
    assert mixed is not None and mixed.covariance is not None
    rng = np.random.default_rng(seed)
    after = (planned[None, :] > data.time[:, None]) & (data.event[:, None] > 0)
    who, visit = np.nonzero(after)
    years = planned[visit]
    design = time_design(years, data.knot)
    long = slice(lay.beta.start, lay.chol.stop)
    block = mixed.covariance[long, long]
    root = np.linalg.cholesky(block + 1e-12 * np.eye(block.shape[0]))
    likelihood = model.likelihood(1, longitudinal_only=True)
    base = []
    for _ in range(imputations):  # a loop over imputations, each vectorised over patients
        x = mixed.x.copy()
        x[long] += root @ rng.standard_normal(block.shape[0])
        grid = likelihood.grid(x)  # one node: the posterior mean of v given y
        mean = grid.nodes[:, 0, :]
        factor = lay.factor(x)
        sigma = float(np.exp(x[lay.log_sigma]))
        precision = np.einsum("ab,nbc,cd->nad", factor.T, data.cross, factor) / sigma**2
        root_post = np.linalg.cholesky(np.linalg.inv(precision + np.eye(lay.q)))
        v = mean + np.einsum("nab,nb->na", root_post, rng.standard_normal(mean.shape))
        theta = x[lay.beta].reshape(lay.n_groups, lay.q)[data.group_code] + v @ factor.T
        values = (design * theta[who]).sum(axis=1) + sigma * rng.standard_normal(who.size)
        base.append(values)
    shift = (data.group_code[who] > 0) * (years - data.time[who])
    return _Imputations(who, years, base, shift)


def _pooled(
    model: JointSlopeModel, imputed: _Imputations, delta: float
) -> tuple[float, float, float, float]:
    data = model.data_
    patient = np.concatenate([data.row_patient, imputed.patient])
    years = np.concatenate([data.row_years, imputed.years])
    fits = [
        _slope_fit(
            model, patient, years, np.concatenate([data.row_response, base + delta * imputed.shift])
        )
        for base in imputed.base
    ]
    estimates, variances = (np.array(v) for v in zip(*fits, strict=True))
    return rubin(estimates, variances)


@dataclass(frozen=True)
class DeltaAdjustedResult:
    """Result of :func:`delta_adjusted_slopes`.

    ``table``: ``delta, step, estimate, se, lower, upper, p, df, significant`` (one row
    per delta evaluated, sorted; ``step`` says whether the delta is from the ``grid``, an
    ``extension`` beyond it or a ``bisection`` step); ``tipping_point``: the delta at
    which p crosses alpha (``None`` when the conclusion does not change over the grid);
    ``contrast`` and ``quantity`` name the difference.
    """

    table: pl.DataFrame
    tipping_point: float | None
    contrast: str
    quantity: str
    alpha: float
    imputations: int
    imputed_values: int
    note: str

    def methods_text(self) -> str:
        point = (
            f"the conclusion changed at delta = {self.tipping_point:.2f} mL/min/1.73 m² per year"
            if self.tipping_point is not None
            else "the conclusion did not change over the deltas examined"
        )
        return (
            "As a sensitivity analysis for dropout not at random, eGFR values at planned "
            "visits after dropout were multiply imputed "
            f"({self.imputations} imputations) from the observed-data mixed model, the "
            "imputed values of the non-reference arm were shifted by delta mL/min/1.73 m² "
            "per year since dropout, each completed data set was analysed by the slope "
            "mixed model and the results combined by Rubin's rules (Rubin 1987; Carpenter "
            f"& Kenward 2013). For the {self.quantity.replace('_', ' ')} difference "
            f"{self.contrast}, {point} (two-sided alpha {self.alpha:g}; the extreme delta "
            "doubled up to four times when the grid agreed; bisection between the deltas "
            "that bracket the change)."
        )


def _observed_model(
    egfr: FrameLike, patients: FrameLike | None, endpoints: FrameLike, options: dict[str, Any]
) -> JointSlopeModel:
    model = JointSlopeModel(**options).fit_observed(egfr, patients, endpoints)
    if model.reasons_["mixed"] is not None:
        raise ConvergenceError(
            f"dropout sensitivity: the observed-data mixed model is not estimable "
            f"({model.reasons_['mixed']}); no imputation is possible"
        )
    if len(model.groups_) < 2:
        raise InputDataError("dropout sensitivity: needs two groups (an arm and a reference)")
    return model


def delta_adjusted_slopes(
    egfr: FrameLike,
    patients: FrameLike | None,
    endpoints: FrameLike,
    *,
    deltas: Sequence[float] = (0.0, -0.5, -1.0, -2.0, -3.0, -5.0),
    imputations: int = 20,
    seed: int = 0,
    alpha: float = 0.05,
    planned_years: Sequence[float] | None = None,
    **options: Any,
) -> DeltaAdjustedResult:
    """Delta-adjusted multiple imputation of eGFR after dropout and its tipping point.

    ``options`` are fields of :class:`~kidneycohort.models.joint.JointSlopeRule`
    (``knot_years``, ``reference_group``, ``dropout_endpoints``, ...). Planned visits
    default to the visit times held by at least 5 % of patients.
    """
    if imputations < 2:
        raise InputDataError("delta_adjusted_slopes: imputations must be at least 2")
    _boundary_note()  # reset the count
    model = _observed_model(egfr, patients, endpoints, options)
    data = model.data_
    imputed = _draw(model, _planned_years(data, planned_years), imputations, seed)
    results = {float(d): _pooled(model, imputed, float(d)) for d in sorted(set(deltas))}
    grid = set(results)
    extended = _extend_grid(results, model, imputed, alpha)
    tipping = _tipping_point(results, model, imputed, alpha)
    rows = sorted(results.items())
    z = stats.t.ppf(1 - alpha / 2, [r[2] for _, r in rows])
    table = pl.DataFrame(
        {
            "delta": [d for d, _ in rows],
            "estimate": [r[0] for _, r in rows],
            "se": [np.sqrt(r[1]) for _, r in rows],
            "lower": [r[0] - zz * np.sqrt(r[1]) for (_, r), zz in zip(rows, z, strict=True)],
            "upper": [r[0] + zz * np.sqrt(r[1]) for (_, r), zz in zip(rows, z, strict=True)],
            "p": [r[3] for _, r in rows],
            "df": [r[2] for _, r in rows],
            "significant": [r[3] < alpha for _, r in rows],
            "step": [
                "grid" if d in grid else "extension" if d in extended else "bisection"
                for d, _ in rows
            ],
        }
    ).select(_TABLE_COLUMNS)
    quantity = "chronic_slope" if data.knot is not None else "slope"
    notes = [
        "" if tipping is not None else "no change of conclusion over the deltas examined",
        _boundary_note(),
    ]
    note = "; ".join(n for n in notes if n)
    return DeltaAdjustedResult(
        table,
        tipping,
        f"{data.groups[1]} - {data.groups[0]}",
        quantity,
        alpha,
        imputations,
        int(imputed.patient.size),
        note,
    )


def _extend_grid(
    results: dict[float, tuple[float, float, float, float]],
    model: JointSlopeModel,
    imputed: _Imputations,
    alpha: float,
) -> set[float]:
    """When the whole grid agrees, double the extreme delta on the side where p is
    largest (towards a changed conclusion) up to :data:`_EXTENSIONS` times, so that a
    tipping point beyond the grid is still found; the added deltas (returned) join the table."""
    conclusions = {results[d][3] < alpha for d in results}
    added: set[float] = set()
    if len(conclusions) > 1:
        return added
    (grid_conclusion,) = conclusions
    low, high = min(results), max(results)
    edge = low if results[low][3] >= results[high][3] else high
    if edge == 0.0:  # a grid of zero alone: shift towards no difference
        edge = -1.0 if results[edge][0] > 0 else 1.0
    for _ in range(_EXTENSIONS):
        edge *= 2.0
        results[edge] = _pooled(model, imputed, edge)
        added.add(edge)
        if (results[edge][3] < alpha) != grid_conclusion:
            break
    return added


def _tipping_point(
    results: dict[float, tuple[float, float, float, float]],
    model: JointSlopeModel,
    imputed: _Imputations,
    alpha: float,
) -> float | None:
    grid = sorted(results)
    for low, high in itertools.pairwise(grid):
        if (results[low][3] < alpha) == (results[high][3] < alpha):
            continue
        low_side = results[low][3] < alpha
        for _ in range(_BISECTION_STEPS):
            middle = (low + high) / 2.0
            results[middle] = _pooled(model, imputed, middle)
            if (results[middle][3] < alpha) == low_side:
                low = middle
            else:
                high = middle
        return (low + high) / 2.0
    return None


@dataclass(frozen=True)
class StatedValueResult:
    """Result of :func:`stated_value_at_kidney_failure`.

    ``table``: ``analysis`` (``observed`` or ``stated_value``), ``contrast, quantity,
    estimate, se, lower, upper, p``; ``added_values`` is the number of values set.
    """

    table: pl.DataFrame
    value: float
    endpoint: str
    added_values: int
    note: str = ""

    def methods_text(self, count_text: Callable[[int], str] = str) -> str:
        """The methods paragraph; ``count_text`` prints the count of patients (e.g.
        :func:`kidneycohort.disclosure.small_count_text` for a public release)."""
        return (
            f"As an alternative analysis, an eGFR value of {self.value:g} mL/min/1.73 m² was "
            f"added at the time of {self.endpoint.replace('_', ' ')} for the "
            f"{count_text(self.added_values)} patients who reached it, and the slope mixed model was "
            "refitted (maximum likelihood), so that kidney failure counts as the low eGFR it "
            "stands for."
        )


def stated_value_at_kidney_failure(
    egfr: FrameLike,
    patients: FrameLike | None,
    endpoints: FrameLike,
    *,
    value: float = 10.0,
    failure_endpoint: str = "kidney_failure",
    confidence: float = 0.95,
    **options: Any,
) -> StatedValueResult:
    """The slope difference with eGFR set to ``value`` at kidney failure, beside the
    observed-data analysis; ``options`` as in :func:`delta_adjusted_slopes`."""
    options.setdefault("dropout_endpoints", (failure_endpoint,))
    model = _observed_model(egfr, patients, endpoints, options)
    data = model.data_
    if failure_endpoint not in model.rule.dropout_endpoints:
        raise InputDataError(
            f"stated_value_at_kidney_failure: '{failure_endpoint}' must be one of "
            f"dropout_endpoints {list(model.rule.dropout_endpoints)}"
        )
    failure = dropout_times(endpoints, (failure_endpoint,))
    failed = failure.filter(pl.col("dropout") > 0)
    index = np.searchsorted(data.patient_ids, failed["patient_id"].to_numpy())
    index = np.clip(index, 0, max(data.n_patients - 1, 0))
    known = data.patient_ids[index] == failed["patient_id"].to_numpy()
    who = index[known]
    when = failed["dropout_years"].to_numpy()[known]
    z = float(stats.norm.ppf(0.5 + confidence / 2.0))
    _boundary_note()  # reset the count
    rows = []
    for analysis, patient, years, response in (
        ("observed", data.row_patient, data.row_years, data.row_response),
        (
            "stated_value",
            np.concatenate([data.row_patient, who]),
            np.concatenate([data.row_years, when]),
            np.concatenate([data.row_response, np.full(who.size, float(value))]),
        ),
    ):
        estimate, variance = _slope_fit(model, patient, years, response)
        se = float(np.sqrt(variance))
        rows.append(
            {
                "analysis": analysis,
                "contrast": f"{data.groups[1]} - {data.groups[0]}",
                "quantity": "chronic_slope" if data.knot is not None else "slope",
                "estimate": estimate,
                "se": se,
                "lower": estimate - z * se,
                "upper": estimate + z * se,
                "p": float(2.0 * stats.norm.sf(abs(estimate) / se)),
            }
        )
    return StatedValueResult(
        pl.DataFrame(rows), float(value), failure_endpoint, int(who.size), _boundary_note()
    )
