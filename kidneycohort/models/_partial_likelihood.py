r"""Weighted Cox partial likelihood by sorted cumulative sums, fitted by Newton–Raphson.

One engine serves the cause-specific Cox model and the Fine–Gray subdistribution model.
Rows are sorted by time once; every risk-set sum is a reverse cumulative sum read at the
first row of each distinct failure time (``searchsorted``), so one evaluation costs
:math:`O(n p^2)` without a Python loop over rows or failure times.

The risk set at a failure time :math:`u` holds every row with :math:`T_j \ge u` (weight
1) and, for the Fine–Gray model, every *carried* row (a competing event before
:math:`u`) with weight :math:`G(u-)\,/\,G(T_j-)`:

.. math::

    S_r(u) = \sum_{j: T_j \ge u} e^{\beta^\top x_j} x_j^{\otimes r}
           + G(u-) \sum_{j \in C: T_j < u} \frac{e^{\beta^\top x_j}}{G(T_j-)} x_j^{\otimes r},
    \qquad r = 0, 1, 2.

Ties among failures follow Breslow or Efron. With :math:`d_k` failures at :math:`u_k`,
Efron's :math:`l`-th denominator is :math:`S_0(u_k) - \tfrac{l}{d_k} E_0(u_k)`
(:math:`E_0` the failing rows' own sum); Breslow keeps :math:`l = 0`.

References
----------
.. [1] Cox DR. Regression models and life-tables. J R Stat Soc B 1972;34:187-220.
   doi:10.1111/j.2517-6161.1972.tb00899.x
.. [2] Efron B. The efficiency of Cox's likelihood function for censored data. J Am Stat
   Assoc 1977;72:557-565. doi:10.1080/01621459.1977.10480613
.. [3] Fine JP, Gray RJ. A proportional hazards model for the subdistribution of a
   competing risk. J Am Stat Assoc 1999;94:496-509. doi:10.1080/01621459.1999.10474144
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np

__all__ = ["Evaluation", "NewtonResult", "RiskSets", "evaluate", "newton_raphson"]

Ties = Literal["breslow", "efron"]


@dataclass(frozen=True)
class RiskSets:
    """Rows sorted by time and the indexes every evaluation reuses.

    Build with :meth:`build`; ``covariates`` are centred on their means so that the
    exponentials stay finite (coefficients are unchanged by centring).
    """

    time: np.ndarray
    failing: np.ndarray
    covariates: np.ndarray
    centre: np.ndarray
    failure_times: np.ndarray
    failure_rows: np.ndarray
    failure_slot: np.ndarray
    tie_fraction: np.ndarray
    tie_count: np.ndarray
    first_row_at: np.ndarray
    failures_through: np.ndarray
    carried_rows: np.ndarray
    carried_scale: np.ndarray
    carried_before: np.ndarray
    carry_factor: np.ndarray

    @classmethod
    def build(
        cls,
        time: np.ndarray,
        failing: np.ndarray,
        covariates: np.ndarray,
        *,
        carried: np.ndarray | None = None,
        carried_scale: np.ndarray | None = None,
        carry_factor: np.ndarray | None = None,
        ties: Ties = "breslow",
    ) -> RiskSets:
        """Sort and index the rows.

        Parameters
        ----------
        time, failing : numpy.ndarray
            Follow-up time and whether the row ends in the modelled failure, any order.
        covariates : numpy.ndarray
            ``(n, p)`` design matrix.
        carried, carried_scale : numpy.ndarray, optional
            Rows kept in later risk sets (Fine–Gray: competing events) and their
            :math:`1 / G(T_j-)`.
        carry_factor : numpy.ndarray, optional
            :math:`G(u-)` at each distinct failure time (ascending); required with
            ``carried``.
        ties : {"breslow", "efron"}
        """
        order = np.argsort(time, kind="stable")
        t = np.asarray(time, dtype=float)[order]
        fail = np.asarray(failing, dtype=bool)[order]
        x = np.asarray(covariates, dtype=float)[order]
        centre = x.mean(axis=0) if x.shape[0] else np.zeros(x.shape[1])
        x = x - centre
        failure_rows = np.flatnonzero(fail)
        failure_times, slot, counts = np.unique(
            t[failure_rows], return_inverse=True, return_counts=True
        )
        if ties == "efron":
            # rank of each failure within its tie (rows of one time are contiguous)
            start = np.searchsorted(t[failure_rows], failure_times, side="left")
            rank = np.arange(failure_rows.size) - start[slot]
            fraction = rank / counts[slot]
        else:
            fraction = np.zeros(failure_rows.size)
        if carried is None:
            carried_rows = np.zeros(0, dtype=np.int64)
            scale = np.zeros(0)
            before = np.zeros(failure_times.size, dtype=np.int64)
            factor = np.zeros(failure_times.size)
        else:
            keep = np.asarray(carried, dtype=bool)[order]
            carried_rows = np.flatnonzero(keep)
            scale = np.asarray(carried_scale, dtype=float)[order][carried_rows]
            before = np.searchsorted(t[carried_rows], failure_times, side="left")
            factor = np.asarray(carry_factor, dtype=float)
        return cls(
            time=t,
            failing=fail,
            covariates=x,
            centre=centre,
            failure_times=failure_times,
            failure_rows=failure_rows,
            failure_slot=slot,
            tie_fraction=fraction,
            tie_count=counts,
            first_row_at=np.searchsorted(t, failure_times, side="left"),
            failures_through=np.searchsorted(failure_times, t, side="right"),
            carried_rows=carried_rows,
            carried_scale=scale,
            carried_before=before,
            carry_factor=factor,
        )

    @property
    def n_parameters(self) -> int:
        return int(self.covariates.shape[1])


@dataclass(frozen=True)
class Evaluation:
    r"""Log partial likelihood, score and information at ``beta`` with the risk-set
    sums the variance and the baseline hazard reuse. Risk scores are
    :math:`\exp(\beta^\top x - \text{shift})` (shift = the largest linear predictor) so
    that no exponential overflows; ratios and the likelihood do not depend on it."""

    beta: np.ndarray
    log_likelihood: float
    score: np.ndarray
    information: np.ndarray
    risk: np.ndarray
    s0: np.ndarray
    denominator: np.ndarray
    mean_at_failure: np.ndarray
    hazard_step: np.ndarray
    weighted_mean_step: np.ndarray
    shift: float

    @property
    def baseline_hazard_step(self) -> np.ndarray:
        """Breslow (or Efron) jumps of the baseline cumulative hazard at the covariate
        means: ``hazard_step`` undoes the scaling of the risk scores by ``exp(-shift)``."""
        return self.hazard_step * np.exp(-self.shift)


def _reverse_cumsum(values: np.ndarray) -> np.ndarray:
    """Sums from each row to the end, with a trailing zero row."""
    total = np.cumsum(values[::-1], axis=0)[::-1]
    pad = np.zeros((1, *values.shape[1:]))
    return np.concatenate([total, pad])


def _per_slot(values: np.ndarray, slot: np.ndarray, size: int) -> np.ndarray:
    """Sums of ``values`` (1-d or 2-d) per failure-time slot."""
    if values.ndim == 1:
        return np.bincount(slot, weights=values, minlength=size)
    return np.stack(
        [np.bincount(slot, weights=values[:, c], minlength=size) for c in range(values.shape[1])],
        axis=1,
    ).reshape(size, values.shape[1])


def evaluate(sets: RiskSets, beta: np.ndarray) -> Evaluation:
    r"""Log partial likelihood, score and observed information at ``beta``.

    .. math::

        \ell(\beta) = \sum_{i \in F} \Big[\beta^\top x_i - \log D_i\Big],\qquad
        D_i = S_0(T_i) - \tfrac{l_i}{d(T_i)} E_0(T_i),

        U(\beta) = \sum_{i \in F} (x_i - \bar x_i),\qquad
        I(\beta) = \sum_{i \in F} \Big[\frac{S_2 - \tfrac{l_i}{d}E_2}{D_i}
        - \bar x_i \bar x_i^\top\Big].

    The :math:`S_2` sums are never formed per failure time: their total is
    :math:`\sum_j e_j c_j x_j x_j^\top` with each row's summed inverse denominators
    :math:`c_j` (cumulative sums over failure times), one matrix product.
    """
    x = sets.covariates
    n_times = sets.failure_times.size
    linear = x @ beta
    shift = float(linear.max()) if linear.size else 0.0
    risk = np.exp(linear - shift)
    at_risk0 = _reverse_cumsum(risk)[sets.first_row_at]
    at_risk1 = _reverse_cumsum(risk[:, None] * x)[sets.first_row_at]
    if sets.carried_rows.size:
        carried_risk = risk[sets.carried_rows] * sets.carried_scale
        carry0 = np.concatenate([[0.0], np.cumsum(carried_risk)])[sets.carried_before]
        carry1 = np.concatenate(
            [np.zeros((1, x.shape[1])), np.cumsum(carried_risk[:, None] * x[sets.carried_rows], 0)]
        )[sets.carried_before]
        at_risk0 = at_risk0 + sets.carry_factor * carry0
        at_risk1 = at_risk1 + sets.carry_factor[:, None] * carry1
    rows, slot, fraction = sets.failure_rows, sets.failure_slot, sets.tie_fraction
    tie0 = _per_slot(risk[rows], slot, n_times)
    tie1 = _per_slot(risk[rows, None] * x[rows], slot, n_times)
    denominator = at_risk0[slot] - fraction * tie0[slot]
    mean = (at_risk1[slot] - fraction[:, None] * tie1[slot]) / denominator[:, None]
    inverse = 1.0 / denominator
    hazard_step = np.bincount(slot, weights=inverse, minlength=n_times)
    efron_step = np.bincount(slot, weights=fraction * inverse, minlength=n_times)
    # c_j: summed 1/D over failure times where row j is in the risk set
    through = np.concatenate([[0.0], np.cumsum(hazard_step)])[sets.failures_through]
    row_weight = through
    if sets.carried_rows.size:
        later = np.concatenate([[0.0], np.cumsum(sets.carry_factor * hazard_step)])
        after = later[-1] - later[sets.failures_through[sets.carried_rows]]
        row_weight = row_weight.copy()
        row_weight[sets.carried_rows] += sets.carried_scale * after
    second = (x * (risk * row_weight)[:, None]).T @ x
    tie_second = (x[rows] * (risk[rows] * efron_step[slot])[:, None]).T @ x[rows]
    information = second - tie_second - mean.T @ mean
    log_likelihood = float(np.sum(linear[rows] - shift) - np.sum(np.log(denominator)))
    score = x[rows].sum(axis=0) - mean.sum(axis=0)
    return Evaluation(
        beta=beta,
        log_likelihood=log_likelihood,
        score=score,
        information=information,
        risk=risk,
        s0=at_risk0,
        denominator=denominator,
        mean_at_failure=mean,
        hazard_step=hazard_step,
        weighted_mean_step=_per_slot(mean * inverse[:, None], slot, n_times),
        shift=shift,
    )


@dataclass(frozen=True)
class NewtonResult:
    """Outcome of :func:`newton_raphson`; ``message`` says why it stopped."""

    evaluation: Evaluation
    iterations: int
    converged: bool
    message: str

    @property
    def beta(self) -> np.ndarray:
        return self.evaluation.beta


def _newton_step(evaluation: Evaluation) -> np.ndarray | None:
    """Newton direction, or None when the information is not positive definite."""
    try:
        factor = np.linalg.cholesky(evaluation.information)
    except np.linalg.LinAlgError:
        return None
    half = np.linalg.solve(factor, evaluation.score)
    return np.linalg.solve(factor.T, half)


def newton_raphson(
    sets: RiskSets, *, max_iterations: int = 50, tolerance: float = 1e-9
) -> NewtonResult:
    r"""Maximise the partial likelihood from :math:`\beta = 0` with step halving.

    Stops when the largest step is below ``tolerance`` (relative to
    :math:`\max(1, |\beta|)`). An estimate running to infinity (monotone likelihood)
    keeps steps of about one unit and so never meets the rule. Non-convergence (a
    singular information matrix, no step raising the likelihood, ``max_iterations``)
    is returned with ``converged=False`` and a reason, never raised.
    """
    current = evaluate(sets, np.zeros(sets.n_parameters))
    if sets.n_parameters == 0:
        return NewtonResult(current, 0, True, "no covariates")
    for iteration in range(1, max_iterations + 1):
        step = _newton_step(current)
        if step is None or not np.all(np.isfinite(step)):
            return NewtonResult(current, iteration, False, "the information matrix is singular")
        floor = current.log_likelihood - 1e-12 * max(1.0, abs(current.log_likelihood))
        for _ in range(40):
            candidate = evaluate(sets, current.beta + step)
            if np.isfinite(candidate.log_likelihood) and candidate.log_likelihood >= floor:
                break
            step = step / 2.0
        else:
            return NewtonResult(
                current, iteration, False, "step halving did not raise the likelihood"
            )
        current = candidate
        if np.max(np.abs(step) / np.maximum(1.0, np.abs(current.beta))) < tolerance:
            return NewtonResult(current, iteration, True, "converged")
    return NewtonResult(
        current, max_iterations, False, f"no convergence in {max_iterations} iterations"
    )
