"""The treatment hazard ratio of many small trials: Newton–Raphson on Efron's partial
likelihood, with the derivatives and the estimability rule of the study's Cox model.

A study fits one Cox model per endpoint with :class:`~kidneycohort.models.survival.
CoxModel` (lifelines' Newton steps around the package's vectorised
:func:`~kidneycohort.models.survival.efron_derivatives`). Its per-fit overhead (pandas
frames, the summary, the proportional-hazards test) is tens of milliseconds; a design
fits thousands of one-covariate models, so here the same derivatives are maximised
directly and the same estimability rule
(:mod:`kidneycohort.models.survival._estimability`, through ``with_estimability``) is
applied. ``tests/design`` checks the estimates against ``CoxModel``.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np
import polars as pl
from scipy import stats

from kidneycohort.models.survival import MAX_LOG_HR_SE, efron_derivatives

__all__ = ["TreatmentHazard", "hazards_by_trial", "treatment_hazard"]

_MAX_STEPS = 50
_TOLERANCE = 1e-9


@dataclass(frozen=True)
class TreatmentHazard:
    """Log hazard ratio of treatment vs control in one trial, or why there is none."""

    log_hr: float
    se: float
    p: float
    events_control: int
    events_treatment: int
    converged: bool
    reason: str | None  # a code of NOT_ESTIMABLE_REASONS; None when estimable


def treatment_hazard(
    years: np.ndarray, event: np.ndarray, treated: np.ndarray, min_events_per_group: int = 1
) -> TreatmentHazard:
    """Fit :math:`h(t) = h_0(t) \\exp(\\beta x)` with :math:`x` = 1 for treatment.

    Newton–Raphson from :math:`\\beta = 0` with step halving when the log partial
    likelihood falls (Efron ties); the standard error is :math:`(-H)^{-1/2}` at the
    maximum, the p value two-sided Wald. Not estimable (reason code, numbers NaN) under
    the study's rule: no events, too few events in a group, no convergence, or a
    standard error above ``MAX_LOG_HR_SE``.
    """
    order = np.argsort(years, kind="stable")
    t = years[order].astype(float)
    e = event[order].astype(bool)
    x = treated[order].astype(float)[:, None]
    w = np.ones(t.size)
    events_t = int(e[x[:, 0] == 1].sum())
    events_c = int(e.sum()) - events_t
    if events_t + events_c == 0:
        return _not_estimable(events_c, events_t, "no_events", converged=True)
    if min(events_t, events_c) < min_events_per_group:
        return _not_estimable(events_c, events_t, "too_few_events_in_group", converged=True)
    beta = np.zeros(1)
    hessian, gradient, loglik = efron_derivatives(x, t, e, w, beta)
    converged = False
    for _ in range(_MAX_STEPS):
        step = np.linalg.solve(-hessian, gradient)
        size = 1.0
        while True:
            trial = beta + size * step
            h_new, g_new, ll_new = efron_derivatives(x, t, e, w, trial)
            if ll_new >= loglik - 1e-12 or size < 1e-6:
                break
            size /= 2
        beta, hessian, gradient, old, loglik = trial, h_new, g_new, loglik, ll_new
        if np.max(np.abs(size * step)) < _TOLERANCE or abs(loglik - old) < 1e-13:
            converged = bool(np.all(np.isfinite(beta)))
            break
    if not converged:
        return _not_estimable(events_c, events_t, "did_not_converge", converged=False)
    se = float(np.sqrt(1.0 / -hessian[0, 0]))
    if not np.isfinite(se) or se > MAX_LOG_HR_SE:
        return _not_estimable(events_c, events_t, "unbounded_interval", converged=True)
    log_hr = float(beta[0])
    p = float(2 * stats.norm.sf(abs(log_hr / se)))
    return TreatmentHazard(log_hr, se, p, events_c, events_t, True, None)


def _not_estimable(
    events_c: int, events_t: int, reason: str, *, converged: bool
) -> TreatmentHazard:
    nan = float("nan")
    return TreatmentHazard(nan, nan, nan, events_c, events_t, converged, reason)


def hazards_by_trial(rows: pl.DataFrame, treated_label: str) -> pl.DataFrame:
    """One :func:`treatment_hazard` per ``(endpoint, trial)`` of evaluable endpoint rows
    (``endpoint, trial, group, years, event``), as a frame."""
    rows = rows.sort("endpoint", "trial")
    keys = rows.select("endpoint", "trial")
    change = np.flatnonzero(
        keys.select(
            (pl.col("endpoint") != pl.col("endpoint").shift(1))
            | (pl.col("trial") != pl.col("trial").shift(1))
        )
        .to_series()
        .fill_null(True)
        .to_numpy()
    )
    bounds = np.append(change, rows.height)
    years = rows["years"].to_numpy()
    event = rows["event"].to_numpy()
    treated = (rows["group"] == treated_label).to_numpy()
    out = []
    for lo, hi in itertools.pairwise(bounds):  # one small fit per trial
        fit = treatment_hazard(years[lo:hi], event[lo:hi], treated[lo:hi])
        out.append(
            (
                keys["endpoint"][int(lo)],
                keys["trial"][int(lo)],
                fit.log_hr,
                fit.se,
                fit.p,
                fit.events_control,
                fit.events_treatment,
                fit.reason,
            )
        )
    return pl.DataFrame(
        out,
        schema={
            "endpoint": pl.String,
            "trial": pl.Int64,
            "estimate": pl.Float64,
            "se": pl.Float64,
            "p": pl.Float64,
            "events_control": pl.Int64,
            "events_treatment": pl.Int64,
            "reason": pl.String,
        },
        orient="row",
    )
