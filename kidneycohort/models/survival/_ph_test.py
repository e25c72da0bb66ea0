r"""The Grambsch–Therneau proportional-hazards test, vectorised.

The test of Grambsch and Therneau (1994) regresses the scaled Schoenfeld residuals of a
Cox fit on a transform :math:`g(t)` of the event times. With :math:`s_k` the Schoenfeld
residual (a row of length :math:`p`) of the :math:`k`-th of :math:`d` events,
:math:`V` the variance matrix of :math:`\hat\beta` and :math:`\bar g` the mean of
:math:`g` over the event times, the scaled residuals are :math:`s^*_k = d\,V s_k`
(the approximation :math:`V_k^{-1} \approx d\,V` of the paper, section 4) and

.. math::

    T_j = \frac{\left(\sum_k (g_k - \bar g)\, s^*_{kj}\right)^2}
               {d\, V_{jj} \sum_k (g_k - \bar g)^2} \sim \chi^2_1,
    \qquad
    T_{\text{global}} = \frac{d\; u^\top V u}{\sum_k (g_k - \bar g)^2} \sim \chi^2_p,
    \quad u = \sum_k (g_k - \bar g)\, s_k .

These are the statistics of R ``survival``'s ``cox.zph`` before version 3.0 (2019) and
of lifelines' ``proportional_hazard_test``; survival 3.0 replaced the approximation by
the full per-time information matrices, so current ``cox.zph`` differs slightly.

Ties follow lifelines' ``CoxPHFitter`` (Efron): at a time with :math:`m` tied events,
the risk-set mean of :math:`x` is the average over :math:`l = 0..m-1` of
:math:`(S_1 - \tfrac{l}{m} D_1) / (S_0 - \tfrac{l}{m} D_0)`, with :math:`S` the sums
over the risk set and :math:`D` the sums over the tied events. Rows are sorted once
(stratum, time, event, input order: lifelines' order); the risk-set sums are reverse
cumulative sums within each stratum, so the cost is one sort plus linear passes:
:math:`O(n \log n + n p)`, where lifelines' residuals loop in Python over rows and
grow the result row by row (quadratic).

Time transforms (lifelines' definitions, so the statistics agree to rounding):

- ``"rank"``: the running count of events in the sorted rows (``cumsum(event)``);
- ``"km"``: :math:`1 - \hat S(t)`, the Kaplan–Meier estimate of all rows at the time
  (right-continuous; R's old ``cox.zph`` used the left-continuous value);
- ``"identity"``: :math:`t`; ``"log"``: :math:`\log t`;
- or a function ``(durations, events) -> values`` of the sorted rows.

References
----------
.. [1] Grambsch PM, Therneau TM. Proportional hazards tests and diagnostics based on
   weighted residuals. Biometrika 1994;81:515-526. doi:10.1093/biomet/81.3.515
.. [2] Schoenfeld D. Partial residuals for the proportional hazards regression model.
   Biometrika 1982;69:239-241. doi:10.1093/biomet/69.1.239
"""

from __future__ import annotations

import itertools
from collections.abc import Callable, Sequence
from typing import Literal

import numpy as np
import polars as pl
from scipy.stats import chi2

from kidneycohort.errors import InputDataError

__all__ = ["TIME_TRANSFORMS", "proportional_hazards_test", "schoenfeld_residuals"]

TimeTransform = Literal["rank", "km", "identity", "log"]
TransformFunction = Callable[[np.ndarray, np.ndarray], np.ndarray]


def _kaplan_meier_complement(durations: np.ndarray, events: np.ndarray) -> np.ndarray:
    """``1 - KM(t)`` at each row's time (right-continuous), over all rows (all strata)."""
    order = np.argsort(durations, kind="stable")
    times, first = np.unique(durations[order], return_index=True)
    deaths = np.add.reduceat(np.asarray(events, dtype=float)[order], first)
    at_risk = durations.size - first
    survival = np.cumprod(1.0 - deaths / at_risk)
    return 1.0 - survival[np.searchsorted(times, durations)]


TIME_TRANSFORMS: dict[str, TransformFunction] = {
    "rank": lambda t, e: np.cumsum(e, dtype=float),
    "km": _kaplan_meier_complement,
    "identity": lambda t, e: t.astype(float),
    "log": lambda t, e: np.log(t),
}


def _strata_codes(strata: Sequence[np.ndarray] | None) -> list[np.ndarray]:
    """One integer code per stratum column, ordered as the values sort."""
    if not strata:
        return []
    return [np.unique(np.asarray(column), return_inverse=True)[1].ravel() for column in strata]


def _sort_order(durations: np.ndarray, events: np.ndarray, codes: list[np.ndarray]) -> np.ndarray:
    """Stratum, time, event (censored first), then input order: lifelines' row order."""
    keys = [np.arange(durations.size), events, durations, *reversed(codes)]
    return np.lexsort(keys)


def _efron_means(
    x: np.ndarray, phi: np.ndarray, times: np.ndarray, events: np.ndarray
) -> np.ndarray:
    """Efron risk-set mean of ``x`` at each event row of one stratum (rows sorted by time)."""
    n = times.size
    # risk-set sums: everyone with time >= t; accumulated from the latest time backwards
    s0 = np.cumsum(phi[::-1])[::-1]
    s1 = np.cumsum((phi[:, None] * x)[::-1], axis=0)[::-1]
    new_time = np.empty(n, dtype=bool)
    new_time[0] = True
    np.not_equal(times[1:], times[:-1], out=new_time[1:])
    group = np.cumsum(new_time) - 1
    group_start = np.flatnonzero(new_time)
    dead = np.flatnonzero(events)
    dead_group = group[dead]
    # deaths of one time are contiguous (sorted censored-first within a time)
    first = np.empty(dead.size, dtype=bool)
    first[:1] = True
    np.not_equal(dead_group[1:], dead_group[:-1], out=first[1:])
    run_start = np.flatnonzero(first)
    m = np.diff(np.append(run_start, dead.size))
    run_of = np.cumsum(first) - 1
    d0 = np.add.reduceat(phi[dead], run_start)
    d1 = np.add.reduceat(phi[dead, None] * x[dead], run_start, axis=0)
    position = np.arange(dead.size) - run_start[run_of]
    frac = (position / m[run_of])[:, None]
    start_row = group_start[dead_group]
    part = (
        (s1[start_row] - frac * d1[run_of])
        / (s0[start_row, None] - frac * d0[run_of, None])
        / m[run_of, None]
    )
    means = np.add.reduceat(part, run_start, axis=0)
    return means[run_of]


def schoenfeld_residuals(
    durations: np.ndarray,
    events: np.ndarray,
    covariates: np.ndarray,
    coefficients: np.ndarray,
    strata: Sequence[np.ndarray] | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Schoenfeld residuals (Efron ties) of a fitted Cox model, vectorised.

    Parameters
    ----------
    durations, events : numpy.ndarray
        Follow-up time and event indicator (0/1) per row.
    covariates : numpy.ndarray
        The ``n x p`` design matrix the model was fitted on.
    coefficients : numpy.ndarray
        The fitted :math:`\\hat\\beta` (length ``p``).
    strata : sequence of numpy.ndarray, optional
        Stratum columns; risk sets are taken within each stratum.

    Returns
    -------
    (residuals, order)
        ``d x p`` residuals of the event rows, in the sorted row order, and the sort
        order of all rows (``order[events[order] == 1]`` are the event rows).
    """
    t = np.asarray(durations, dtype=float)
    e = np.asarray(events).astype(bool)
    x = np.asarray(covariates, dtype=float)
    if x.ndim != 2 or x.shape[0] != t.size or e.size != t.size:
        raise InputDataError(
            f"proportional_hazards_test: covariates {x.shape} do not match "
            f"{t.size} durations and {e.size} events"
        )
    codes = _strata_codes(strata)
    order = _sort_order(t, e, codes)
    t, e, x = t[order], e[order], x[order]
    # centring changes neither the risk-set means' differences nor the residuals,
    # and keeps exp() in range
    x_centred = x - x.mean(axis=0)
    phi = np.exp(x_centred @ np.asarray(coefficients, dtype=float))
    boundaries = [0, t.size]
    if codes:
        sorted_codes = np.column_stack([c[order] for c in codes])
        change = np.any(sorted_codes[1:] != sorted_codes[:-1], axis=1)
        boundaries = [0, *(np.flatnonzero(change) + 1).tolist(), t.size]
    residuals = []
    for a, b in itertools.pairwise(boundaries):
        if not e[a:b].any():
            continue
        means = _efron_means(x_centred[a:b], phi[a:b], t[a:b], e[a:b])
        residuals.append(x_centred[a:b][e[a:b]] - means)
    p = x.shape[1]
    return (np.concatenate(residuals) if residuals else np.empty((0, p))), order


def proportional_hazards_test(
    durations: np.ndarray,
    events: np.ndarray,
    covariates: np.ndarray,
    coefficients: np.ndarray,
    variance: np.ndarray,
    *,
    strata: Sequence[np.ndarray] | None = None,
    time_transform: TimeTransform | TransformFunction = "km",
    names: Sequence[str] | None = None,
) -> pl.DataFrame:
    """Grambsch–Therneau test of proportional hazards, per term and global.

    Parameters
    ----------
    durations, events, covariates, coefficients, strata
        As for :func:`schoenfeld_residuals`: the rows and the fit being tested.
    variance : numpy.ndarray
        The ``p x p`` variance matrix of the coefficients.
    time_transform : {"km", "rank", "identity", "log"} or callable
        :math:`g(t)`; a callable receives the sorted ``(durations, events)`` of all rows
        and returns one value per row.
    names : sequence of str, optional
        Term names (default ``x0, x1, ...``).

    Returns
    -------
    polars.DataFrame
        ``term, test_statistic, df, p``: one row per term (1 df) and a last row
        ``GLOBAL`` (``p`` df).
    """
    residuals, order = schoenfeld_residuals(durations, events, covariates, coefficients, strata)
    v = np.atleast_2d(np.asarray(variance, dtype=float))
    p = v.shape[0]
    labels = list(names) if names is not None else [f"x{i}" for i in range(p)]
    if isinstance(time_transform, str):
        if time_transform not in TIME_TRANSFORMS:
            raise InputDataError(
                f"time_transform: got {time_transform!r}; choose one of {', '.join(TIME_TRANSFORMS)}"
            )
        transform = TIME_TRANSFORMS[time_transform]
    else:
        transform = time_transform
    t_sorted = np.asarray(durations, dtype=float)[order]
    e_sorted = np.asarray(events).astype(bool)[order]
    g = np.asarray(transform(t_sorted, e_sorted.astype(float)), dtype=float)[e_sorted]
    d = residuals.shape[0]
    centred = g - g.mean()
    ss = float(centred @ centred)
    u = centred @ residuals  # time-weighted column sums of the raw residuals
    scaled_sum = d * (u @ v)  # = centred @ (d * residuals @ V)
    scale = d * np.diag(v) * ss
    if ss <= 0 or not np.all(scale > 0):
        # one distinct event time (or no information): nothing to correlate the residuals
        # with, so the test is not defined; NaN says so instead of a number
        per_term = np.full(p, np.nan)
        overall = float("nan")
    else:
        per_term = scaled_sum**2 / scale
        overall = float(d * (u @ v @ u) / ss)
    return pl.DataFrame(
        {
            "term": [*labels, "GLOBAL"],
            "test_statistic": [*per_term.tolist(), overall],
            "df": [1] * p + [p],
            "p": [*chi2.sf(per_term, 1).tolist(), float(chi2.sf(overall, p))],
        }
    )
