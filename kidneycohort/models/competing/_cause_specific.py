r"""Cause-specific Cox models of the event of interest and of the competing event.

The cause-specific hazard of cause :math:`c` is

.. math::

    \lambda_c(t \mid x) = \lambda_{c0}(t) \exp(\beta_c^\top x),

fitted by an ordinary Cox partial likelihood in which follow-up ending in the *other*
cause is censored at its time. Beside the Fine–Gray model it answers a different
question: the cause-specific hazard ratio describes the rate of the event among those
still free of both events (aetiology); the subdistribution hazard ratio describes the
effect on the cumulative incidence (prognosis). Reports show both (Austin, Lee & Fine
2016; Latouche et al. 2013).

Fitted by the Newton–Raphson engine of :mod:`kidneycohort.models._partial_likelihood`
(Efron ties by default, as R's ``coxph`` and lifelines; Breslow on request), with the
model-based variance :math:`I(\hat\beta)^{-1}`.

References
----------
.. [1] Prentice RL, Kalbfleisch JD, Peterson AV, Flournoy N, Farewell VT, Breslow NE.
   The analysis of failure times in the presence of competing risks. Biometrics
   1978;34:541-554. doi:10.2307/2530374
.. [2] Austin PC, Lee DS, Fine JP. Introduction to the analysis of survival data in the
   presence of competing risks. Circulation 2016;133:601-609.
   doi:10.1161/CIRCULATIONAHA.115.017719
.. [3] Latouche A, Allignol A, Beyersmann J, Labopin M, Fine JP. A competing risks
   analysis should report results on all cause-specific hazards and cumulative incidence
   functions. J Clin Epidemiol 2013;66:648-653. doi:10.1016/j.jclinepi.2012.09.017
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import polars as pl

from kidneycohort._frames import FrameLike
from kidneycohort.errors import InputDataError
from kidneycohort.models._partial_likelihood import RiskSets, Ties, newton_raphson
from kidneycohort.models.competing._data import (
    COMPETING,
    EVENT,
    CompetingRisksRule,
    CompetingRows,
    prepare_competing_rows,
    resolve_rule,
)
from kidneycohort.models.competing._results import ModelOutcome, fit_checked

__all__ = ["CauseSpecificCox", "CoxFit", "cause_specific_arrays"]


@dataclass(frozen=True)
class CoxFit:
    """Array-level result of :func:`cause_specific_arrays`."""

    beta: np.ndarray
    covariance: np.ndarray
    log_likelihood: float
    converged: bool
    iterations: int
    message: str
    failure_times: np.ndarray
    baseline_cumulative_hazard: np.ndarray
    centre: np.ndarray

    @property
    def se(self) -> np.ndarray:
        """Model-based standard errors."""
        return np.sqrt(np.diag(self.covariance))


def cause_specific_arrays(
    time: np.ndarray,
    cause: np.ndarray,
    covariates: np.ndarray,
    *,
    of_cause: int = EVENT,
    ties: Ties = "efron",
    max_iterations: int = 50,
    tolerance: float = 1e-9,
) -> CoxFit:
    """Cox model of the hazard of ``of_cause``; every other outcome is censoring.

    Parameters
    ----------
    time, cause : numpy.ndarray
        Follow-up time and outcome code per patient (0 censored, 1, 2).
    covariates : numpy.ndarray
        ``(n, p)`` design matrix.
    of_cause : int, default 1
        Cause whose hazard is modelled.
    ties : {"efron", "breslow"}
    max_iterations, tolerance
        Newton–Raphson limits.

    Returns
    -------
    CoxFit
        Coefficients, model-based covariance, baseline cumulative hazard at the
        covariate means (Breslow, Efron-adjusted with Efron ties), convergence facts.
    """
    t = np.asarray(time, dtype=float)
    x = np.asarray(covariates, dtype=float).reshape(t.size, -1)
    sets = RiskSets.build(t, np.asarray(cause) == of_cause, x, ties=ties)
    result = newton_raphson(sets, max_iterations=max_iterations, tolerance=tolerance)
    fit = result.evaluation
    p = x.shape[1]
    try:
        covariance = np.linalg.inv(fit.information) if p else np.zeros((0, 0))
    except np.linalg.LinAlgError:
        covariance = np.full((p, p), np.nan)
    return CoxFit(
        beta=fit.beta,
        covariance=covariance,
        log_likelihood=fit.log_likelihood,
        converged=result.converged,
        iterations=result.iterations,
        message=result.message,
        failure_times=sets.failure_times,
        baseline_cumulative_hazard=np.cumsum(fit.baseline_hazard_step),
        centre=sets.centre,
    )


class CauseSpecificCox:
    r"""Cause-specific Cox models of the event of interest and of the competing event.

    Same options and input as :class:`~kidneycohort.models.competing._fine_gray.FineGray`; all
    competing events are pooled into one competing cause (named by their labels
    joined with ``+``). Each model censors the other cause.

    Attributes
    ----------
    outcomes_ : dict of str to ModelOutcome
        ``"event"`` and ``"competing"``: the fit (:class:`CoxFit`) or the reason none
        could be made.
    statements_ : list of str
        One line per fact a reader must know.
    excluded_ : polars.DataFrame
        ``patient_id, reason`` of rows not used.
    """

    def __init__(self, rule: CompetingRisksRule | None = None, /, **options: Any) -> None:
        self.rule = resolve_rule(rule, options, type(self).__name__)

    def fit(self, endpoints: FrameLike, patients: FrameLike | None = None) -> CauseSpecificCox:
        """Fit both models; returns ``self``."""
        return self.fit_rows(prepare_competing_rows(endpoints, patients, self.rule))

    def fit_rows(self, rows: CompetingRows) -> CauseSpecificCox:
        """Fit prepared rows (see :func:`prepare_competing_rows`); returns ``self``."""
        if not rows.terms:
            raise InputDataError(
                "CauseSpecificCox: nothing to model; give a group_column with two or more "
                "groups or covariates"
            )
        self.rows_, self.endpoint_, self.excluded_ = rows, rows.event_label, rows.excluded
        spec = self.rule

        def fitter(cause: int) -> Any:
            return lambda used: cause_specific_arrays(
                used.time,
                used.cause,
                used.design,
                of_cause=cause,
                ties=spec.cause_specific_ties,
                max_iterations=spec.max_iterations,
            )

        self.outcomes_: dict[str, ModelOutcome] = {
            "event": fit_checked(
                rows, EVENT, rows.event_label, fitter(EVENT), "cause-specific Cox"
            ),
            "competing": fit_checked(
                rows, COMPETING, rows.competing_label, fitter(COMPETING), "cause-specific Cox"
            ),
        }
        self.statements_ = [s for o in self.outcomes_.values() for s in o.statements()]
        return self

    def summary(self) -> pl.DataFrame:
        """Hazard-ratio rows (``HAZARD_COLUMNS``, ``model = "cause_specific"``) of the
        event of interest, then of the competing event."""
        if not hasattr(self, "outcomes_"):
            raise InputDataError("CauseSpecificCox: call .fit(endpoints, patients) first")
        return pl.concat(
            o.rows(
                self.rows_.terms,
                model="cause_specific",
                confidence=self.rule.confidence,
                n=self.rows_.n_patients,
            )
            for o in self.outcomes_.values()
        )
