r"""Fine–Gray subdistribution hazards regression with inverse-probability-of-censoring weights.

The subdistribution hazard of the event of interest (cause 1) is modelled as

.. math::

    \lambda_1(t \mid x) = \lambda_{10}(t) \exp(\beta^\top x),
    \qquad F_1(t \mid x) = 1 - \exp\{-\Lambda_{10}(t) e^{\beta^\top x}\}.

Patients with a competing event (cause 2) stay in the risk set after their event with
weight :math:`w_j(t) = G(t-)/G(T_j-)`, :math:`G` the Kaplan–Meier estimate of the
censoring distribution. The weighted partial likelihood (Breslow ties) is maximised by
the Newton–Raphson engine of :mod:`kidneycohort.models._partial_likelihood`.

**Ties** (as in cmprsk ``crr``): the censoring Kaplan–Meier counts a censoring at time
:math:`t` among the patients still followed at :math:`t` (:math:`T \ge t`), and every
weight reads :math:`G` just *before* a time, so a censoring tied with an event or a
competing event is taken to happen after it. :math:`G(0-) = 1`.

**Variance.** ``se`` is the robust sandwich of Fine & Gray (1999, section 3),
:math:`\hat\Omega^{-1} \sum_i (\eta_i + \psi_i)^{\otimes 2} \hat\Omega^{-1}`, where
:math:`\eta_i` is patient :math:`i`'s weighted score residual and :math:`\psi_i` the
correction for estimating :math:`G`,

.. math::

    \psi_i = \int \frac{q(u)}{\pi(u)}\, dM^c_i(u),\quad
    q(u) = \sum_{k: u_k \ge u} \frac{G(u_k-)}{S_0(u_k)}
        \sum_{j \in C: T_j < u} \frac{e^{\beta^\top x_j}}{G(T_j-)} (x_j - \bar x(u_k)),

with :math:`\pi(u)` the number followed at :math:`u` and :math:`M^c_i` the censoring
martingale; this is the variance cmprsk ``crr`` reports. ``se_fixed_weights`` drops
:math:`\psi_i` (the robust variance of a weighted Cox fit that treats the weights as
known, as on the expanded data set of Geskus 2011); ``se_model_based`` is the naive
inverse information, labelled as such and not used for inference.

References
----------
.. [1] Fine JP, Gray RJ. A proportional hazards model for the subdistribution of a
   competing risk. J Am Stat Assoc 1999;94:496-509. doi:10.1080/01621459.1999.10474144
.. [2] Geskus RB. Cause-specific cumulative incidence estimation and the Fine and Gray
   model under both left truncation and right censoring. Biometrics 2011;67:39-49.
   doi:10.1111/j.1541-0420.2010.01420.x
.. [3] Austin PC, Lee DS, Fine JP. Introduction to the analysis of survival data in the
   presence of competing risks. Circulation 2016;133:601-609.
   doi:10.1161/CIRCULATIONAHA.115.017719
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from typing import Any

import numpy as np
import polars as pl

from kidneycohort._frames import FrameLike
from kidneycohort.errors import InputDataError
from kidneycohort.models._partial_likelihood import Evaluation, RiskSets, evaluate, newton_raphson
from kidneycohort.models.competing._data import (
    COMPETING,
    EVENT,
    CompetingRisksRule,
    CompetingRows,
    prepare_competing_rows,
    resolve_rule,
)
from kidneycohort.models.competing._results import fit_checked

logger = logging.getLogger(__name__)

__all__ = ["FineGray", "FineGrayFit", "censoring_survival", "fine_gray_arrays"]

PREDICTED_MEASURE = "cumulative_incidence_fine_gray"


def censoring_survival(time: np.ndarray, censored: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    r"""Kaplan–Meier estimate of the censoring distribution.

    .. math:: \hat G(t) = \prod_{s \le t} \Big(1 - \frac{c(s)}{\pi(s)}\Big)

    with :math:`c(s)` censorings at :math:`s` and :math:`\pi(s)` patients with
    :math:`T \ge s` (events and competing events at :math:`s` are still followed).

    Returns
    -------
    times, survival : numpy.ndarray
        Distinct times (ascending) and :math:`\hat G` just after each.
    """
    times, inverse, counts = np.unique(time, return_inverse=True, return_counts=True)
    followed = time.size - np.concatenate([[0], np.cumsum(counts)[:-1]])
    censorings = np.bincount(inverse, weights=np.asarray(censored, dtype=float))
    return times, np.cumprod(1.0 - censorings / followed)


def survival_before(times: np.ndarray, survival: np.ndarray, query: np.ndarray) -> np.ndarray:
    """Step function ``survival`` just before each ``query`` time (1 before the first)."""
    position = np.searchsorted(times, query, side="left")
    return np.concatenate([[1.0], survival])[position]


@dataclass(frozen=True)
class FineGrayFit:
    """Array-level result of :func:`fine_gray_arrays`."""

    beta: np.ndarray
    covariance: np.ndarray
    covariance_fixed_weights: np.ndarray
    covariance_model_based: np.ndarray
    log_likelihood: float
    log_likelihood_null: float
    converged: bool
    iterations: int
    message: str
    failure_times: np.ndarray
    baseline_cumulative_hazard: np.ndarray
    centre: np.ndarray

    @property
    def se(self) -> np.ndarray:
        """Robust standard errors (Fine & Gray 1999; as cmprsk ``crr``)."""
        return np.sqrt(np.diag(self.covariance))

    @property
    def se_fixed_weights(self) -> np.ndarray:
        """Robust standard errors treating the censoring weights as known."""
        return np.sqrt(np.diag(self.covariance_fixed_weights))

    @property
    def se_model_based(self) -> np.ndarray:
        """Naive inverse-information standard errors (not for inference)."""
        return np.sqrt(np.diag(self.covariance_model_based))

    def cumulative_incidence(self, profile: np.ndarray) -> np.ndarray:
        r""":math:`1 - \exp\{-\hat\Lambda_{10}(t) e^{\hat\beta^\top x}\}` at ``failure_times``
        for the covariate vector ``profile``."""
        linear = float((np.asarray(profile, dtype=float) - self.centre) @ self.beta)
        return -np.expm1(-self.baseline_cumulative_hazard * np.exp(linear))


def _score_residuals(sets: RiskSets, fit: Evaluation) -> np.ndarray:
    r"""Each row's :math:`\eta_i` (sorted order): failure term minus compensator."""
    x, risk = sets.covariates, fit.risk
    step, mean_step = fit.hazard_step, fit.weighted_mean_step
    through = sets.failures_through
    cum = np.concatenate([[0.0], np.cumsum(step)])
    cum_mean = np.concatenate([np.zeros((1, x.shape[1])), np.cumsum(mean_step, axis=0)])
    residual = -risk[:, None] * (x * cum[through][:, None] - cum_mean[through])
    if sets.carried_rows.size:
        rows = sets.carried_rows
        later = np.concatenate([[0.0], np.cumsum(sets.carry_factor * step)])
        later_mean = np.concatenate(
            [np.zeros((1, x.shape[1])), np.cumsum(sets.carry_factor[:, None] * mean_step, 0)]
        )
        after = later[-1] - later[through[rows]]
        after_mean = later_mean[-1] - later_mean[through[rows]]
        scale = risk[rows] * sets.carried_scale
        residual[rows] -= scale[:, None] * (x[rows] * after[:, None] - after_mean)
    residual[sets.failure_rows] += x[sets.failure_rows] - fit.mean_at_failure
    return residual


def _censoring_residuals(sets: RiskSets, fit: Evaluation, censored: np.ndarray) -> np.ndarray:
    r"""Each row's :math:`\psi_i` (sorted order), the term for the estimated :math:`G`."""
    x, t = sets.covariates, sets.time
    p = x.shape[1]
    if not sets.carried_rows.size or not censored.any():
        return np.zeros_like(x)
    times, inverse, counts = np.unique(t, return_inverse=True, return_counts=True)
    followed = t.size - np.concatenate([[0], np.cumsum(counts)[:-1]])
    censorings = np.bincount(inverse, weights=censored.astype(float))
    has = censorings > 0
    cens_times, cens_count, cens_followed = times[has], censorings[has], followed[has]
    rows = sets.carried_rows
    scale = fit.risk[rows] * sets.carried_scale
    before = np.searchsorted(t[rows], cens_times, side="left")
    c0 = np.concatenate([[0.0], np.cumsum(scale)])[before]
    c1 = np.concatenate([np.zeros((1, p)), np.cumsum(scale[:, None] * x[rows], 0)])[before]
    weighted = sets.carry_factor * fit.hazard_step
    weighted_mean = sets.carry_factor[:, None] * fit.weighted_mean_step
    tail = np.concatenate([np.cumsum(weighted[::-1])[::-1], [0.0]])
    tail_mean = np.concatenate([np.cumsum(weighted_mean[::-1], 0)[::-1], np.zeros((1, p))])
    from_u = np.searchsorted(sets.failure_times, cens_times, side="left")
    q = c1 * tail[from_u][:, None] - c0[:, None] * tail_mean[from_u]
    compensator = np.concatenate(
        [np.zeros((1, p)), np.cumsum(q * (cens_count / cens_followed**2)[:, None], 0)]
    )
    residual = -compensator[np.searchsorted(cens_times, t, side="right")]
    mine = np.searchsorted(cens_times, t[censored], side="left")
    residual[censored] += q[mine] / cens_followed[mine][:, None]
    return residual


def _sandwich(bread: np.ndarray, residual: np.ndarray) -> np.ndarray:
    return bread @ (residual.T @ residual) @ bread


def fine_gray_arrays(
    time: np.ndarray,
    cause: np.ndarray,
    covariates: np.ndarray,
    *,
    max_iterations: int = 50,
    tolerance: float = 1e-9,
) -> FineGrayFit:
    """Fit the Fine–Gray model to arrays (any row order).

    Parameters
    ----------
    time : numpy.ndarray
        Follow-up time per patient.
    cause : numpy.ndarray
        0 censored, 1 event of interest, 2 competing event.
    covariates : numpy.ndarray
        ``(n, p)`` design matrix.
    max_iterations, tolerance
        Newton–Raphson limits (see :func:`~._partial_likelihood.newton_raphson`).

    Returns
    -------
    FineGrayFit
        Coefficients, the three covariance matrices, the Breslow-type baseline
        cumulative subdistribution hazard at the covariate means, and convergence facts.
    """
    order = np.argsort(time, kind="stable")
    t = np.asarray(time, dtype=float)[order]
    c = np.asarray(cause)[order]
    x = np.asarray(covariates, dtype=float).reshape(t.size, -1)[order]
    censored = c == 0
    g_times, g_values = censoring_survival(t, censored)
    competing = c == COMPETING
    failure_times = np.unique(t[c == EVENT])
    sets = RiskSets.build(
        t,
        c == EVENT,
        x,
        carried=competing,
        carried_scale=1.0 / survival_before(g_times, g_values, t),
        carry_factor=survival_before(g_times, g_values, failure_times),
        ties="breslow",
    )
    result = newton_raphson(sets, max_iterations=max_iterations, tolerance=tolerance)
    fit = result.evaluation
    p = x.shape[1]
    try:
        bread = np.linalg.inv(fit.information) if p else np.zeros((0, 0))
    except np.linalg.LinAlgError:
        bread = np.full((p, p), np.nan)
    score_part = _score_residuals(sets, fit)
    total = score_part + _censoring_residuals(sets, fit, censored)
    return FineGrayFit(
        beta=fit.beta,
        covariance=_sandwich(bread, total),
        covariance_fixed_weights=_sandwich(bread, score_part),
        covariance_model_based=bread,
        log_likelihood=fit.log_likelihood,
        log_likelihood_null=evaluate(sets, np.zeros(p)).log_likelihood,
        converged=result.converged,
        iterations=result.iterations,
        message=result.message,
        failure_times=sets.failure_times,
        baseline_cumulative_hazard=np.cumsum(fit.baseline_hazard_step),
        centre=sets.centre,
    )


class FineGray:
    r"""Fine–Gray regression of the event of interest with competing events.

    Configure with a :class:`CompetingRisksRule` and/or its fields as keywords, then
    ``fit(endpoints, patients)``. The group enters as indicators against the reference
    group (terms ``<group_column>=<level>``); text covariates likewise, booleans as 0/1.

    Attributes
    ----------
    outcome_ : ModelOutcome
        The fit (``outcome_.fit`` a :class:`FineGrayFit`, or None), the rows used and
        the reasons for terms or a model that cannot be estimated.
    coefficients_ : polars.DataFrame
        ``term, log_hr, se, se_fixed_weights, se_model_based`` of the fitted terms (the
        last is the naive variance, shown for comparison only).
    cumulative_incidence_ : polars.DataFrame
        Predicted :math:`F_1(t)` per group with the other covariates at their means:
        ``group, years, estimate, lower, upper, measure`` (limits null: not provided).
    horizon_estimates_ : polars.DataFrame
        ``group, years, estimate`` at ``horizons_years`` (null beyond a group's follow-up).
    statements_ : list of str
        One line per fact a reader must know (no competing events, levels left out...).
    excluded_ : polars.DataFrame
        ``patient_id, reason`` of rows not used.

    References
    ----------
    See the module docstring (Fine & Gray 1999; Geskus 2011; Austin, Lee & Fine 2016).
    """

    def __init__(self, rule: CompetingRisksRule | None = None, /, **options: Any) -> None:
        self.rule = resolve_rule(rule, options, type(self).__name__)

    def fit(self, endpoints: FrameLike, patients: FrameLike | None = None) -> FineGray:
        """Fit the model; returns ``self``."""
        return self.fit_rows(prepare_competing_rows(endpoints, patients, self.rule))

    def fit_rows(self, rows: CompetingRows) -> FineGray:
        """Fit prepared rows (see :func:`prepare_competing_rows`); returns ``self``."""
        if not rows.terms:
            raise InputDataError(
                "FineGray: nothing to model; give a group_column with two or more groups or "
                "covariates"
            )
        self.rows_, self.endpoint_, self.excluded_ = rows, rows.event_label, rows.excluded
        self.n_patients_, self.n_events_ = rows.n_patients, rows.count(EVENT)
        self.n_competing_ = rows.count(COMPETING)
        limit = self.rule.max_iterations
        self.outcome_ = fit_checked(
            rows,
            EVENT,
            rows.event_label,
            lambda used: fine_gray_arrays(used.time, used.cause, used.design, max_iterations=limit),
            "Fine–Gray",
        )
        self.statements_ = self.outcome_.statements()
        self._same_as_cause_specific: str | None = None
        if self.n_competing_ == 0 and self.outcome_.model_reason is None:
            self._same_as_cause_specific = (
                f"no competing events ({rows.competing_label}): the subdistribution hazard "
                "equals the cause-specific hazard; see the cause-specific model"
            )
            self.statements_.append(self._same_as_cause_specific)
        fit, used = self.outcome_.fit, self.outcome_.used
        if fit is not None and used is not None and self.outcome_.model_reason is None:
            self.coefficients_ = pl.DataFrame(
                {
                    "term": used.terms,
                    "log_hr": fit.beta,
                    "se": fit.se,
                    "se_fixed_weights": fit.se_fixed_weights,
                    "se_model_based": fit.se_model_based,
                }
            )
            self._predict(used, fit)
        return self

    @property
    def fit_(self) -> FineGrayFit | None:
        """The array-level fit, or None when none could be made."""
        return self.outcome_.fit if self.outcome_.model_reason is None else None

    def _predict(self, used: CompetingRows, fit: FineGrayFit) -> None:
        means = used.design.mean(axis=0)
        names = np.array(used.terms)
        prefix = f"{used.group_column}="
        is_group = np.char.startswith(names.astype(str), prefix) if used.group_column else None
        years = np.concatenate([[0.0], fit.failure_times])
        curves, last = [], {}
        for group in sorted(set(used.group.tolist())):
            profile = means.copy()
            if is_group is not None and is_group.any():
                profile[is_group] = names[is_group] == f"{prefix}{group}"
            estimate = np.concatenate([[0.0], fit.cumulative_incidence(profile)])
            curves.append(pl.DataFrame({"group": group, "years": years, "estimate": estimate}))
            last[group] = float(used.time[used.group == group].max())
        null = pl.lit(None, dtype=pl.Float64)
        self.cumulative_incidence_ = (
            pl.concat(curves)
            .unique(["group", "years"], keep="last", maintain_order=True)
            .with_columns(
                null.alias("lower"), null.alias("upper"), pl.lit(PREDICTED_MEASURE).alias("measure")
            )
        )
        self.horizon_estimates_ = _at_horizons(
            self.cumulative_incidence_, self.rule.horizons_years, last
        )

    def summary(self) -> pl.DataFrame:
        """Hazard-ratio rows (:data:`HAZARD_COLUMNS`, ``model = "subdistribution"``); with
        no competing events every row says the model equals the cause-specific one."""
        if not hasattr(self, "outcome_"):
            raise InputDataError("FineGray: call .fit(endpoints, patients) first")
        table = self.outcome_.rows(
            self.rows_.terms,
            model="subdistribution",
            confidence=self.rule.confidence,
            n=self.n_patients_,
        )
        if self._same_as_cause_specific is None:
            return table
        null = pl.lit(None, dtype=pl.Float64)
        return table.with_columns(
            *(null.alias(c) for c in ("hr", "hr_lower", "hr_upper", "p", "log_hr", "se")),
            pl.lit(False).alias("estimable"),
            pl.lit(self._same_as_cause_specific).alias("reason"),
        )


def _at_horizons(
    curves: pl.DataFrame, horizons: list[float], last_follow_up: dict[str, float]
) -> pl.DataFrame:
    """Step-function value at each horizon per group, null beyond the group's follow-up."""
    grid = pl.DataFrame({"group": list(last_follow_up)}).join(
        pl.DataFrame({"years": [float(h) for h in horizons]}, schema={"years": pl.Float64}),
        how="cross",
    )
    found = grid.sort("years").join_asof(
        curves.select("group", "years", "estimate").sort("years"),
        on="years",
        by="group",
        strategy="backward",
        check_sortedness=False,
    )
    limit = pl.col("group").replace_strict(last_follow_up, return_dtype=pl.Float64)
    return found.with_columns(
        pl.when(pl.col("years") > limit).then(None).otherwise(pl.col("estimate")).alias("estimate")
    ).sort("group", "years")
