"""Result layout shared by the competing-risks models, and the checks before a fit.

Every model reports :data:`HAZARD_COLUMNS`: one row per model, cause and term with
``estimable`` and, when no number can be given, a one-line ``reason`` and nulls in
place of the estimates.
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import polars as pl
from scipy import stats

from kidneycohort.models.competing._data import CompetingRows, subset_rows

logger = logging.getLogger(__name__)

__all__ = [
    "HAZARD_COLUMNS",
    "ModelOutcome",
    "check_levels_have_events",
    "fit_checked",
    "hazard_rows",
]

HAZARD_COLUMNS: dict[str, pl.DataType] = {
    "model": pl.String(),  # "subdistribution" (Fine–Gray) or "cause_specific" (Cox)
    "cause": pl.String(),  # event modelled: the event of interest or the competing event
    "term": pl.String(),
    "hr": pl.Float64(),
    "hr_lower": pl.Float64(),
    "hr_upper": pl.Float64(),
    "p": pl.Float64(),
    "log_hr": pl.Float64(),
    "se": pl.Float64(),
    "n_patients": pl.Int64(),
    "n_events": pl.Int64(),
    "estimable": pl.Boolean(),
    "reason": pl.String(),  # null when estimable; else one line saying why not
}


@dataclass(frozen=True)
class EventCheck:
    """Result of :func:`check_levels_have_events` for one modelled cause."""

    keep: np.ndarray
    dropped_terms: dict[int, str]
    fatal: str | None


def check_levels_have_events(rows: CompetingRows, cause: int, cause_label: str) -> EventCheck:
    """Levels of group and text covariates without events of ``cause``.

    A non-reference level without events has no finite hazard ratio: its patients are
    left out of this model and its term is reported as not estimable. A reference level
    without events leaves no hazard ratio of its column estimable (``fatal``).
    """
    events = rows.cause == cause
    keep = np.ones(rows.n_patients, dtype=bool)
    dropped: dict[int, str] = {}
    for family in rows.families:
        block = rows.design[:, family.terms] != 0
        reference = ~block.any(axis=1)
        if not np.any(events & reference):
            return EventCheck(
                keep,
                {},
                f"no {cause_label} events in the reference level {family.column}="
                f"{family.reference}; hazard ratios against it cannot be estimated",
            )
        for position, term in enumerate(family.terms):
            members = block[:, position]
            if not np.any(events & members):
                dropped[term] = (
                    f"no {cause_label} events among the {int(members.sum())} patients with "
                    f"{rows.terms[term]}; they are left out of this model"
                )
                keep &= ~members
    return EventCheck(keep, dropped, None)


def _hazard_ratio(estimate: tuple[float, float] | None, z: float) -> dict[str, float | None]:
    """Hazard ratio, its interval, p, log hazard ratio and its SE from ``(log HR, SE)``."""
    if estimate is None:
        return dict.fromkeys(("hr", "hr_lower", "hr_upper", "p", "log_hr", "se"))
    b, s = estimate
    return {
        "hr": float(np.exp(b)),
        "hr_lower": float(np.exp(b - z * s)),
        "hr_upper": float(np.exp(b + z * s)),
        "p": float(2.0 * stats.norm.sf(abs(b / s))),
        "log_hr": b,
        "se": s,
    }


def hazard_rows(
    *,
    model: str,
    cause: str,
    terms: Sequence[str],
    beta: np.ndarray | None,
    se: np.ndarray | None,
    confidence: float,
    n_patients: int,
    n_events: int,
    reasons: dict[str, str] | None = None,
) -> pl.DataFrame:
    """Rows of :data:`HAZARD_COLUMNS`; ``beta is None`` or a term in ``reasons`` gives an
    ``estimable = False`` row with nulls and its reason."""
    reasons = reasons or {}
    z = stats.norm.ppf(0.5 + confidence / 2.0)
    records = []
    for i, term in enumerate(terms):
        reason = reasons.get(term)
        estimate: tuple[float, float] | None = None
        if beta is not None and se is not None and reason is None:
            b, s = float(beta[i]), float(se[i])
            if np.isfinite(b) and np.isfinite(s) and s > 0:
                estimate = (b, s)
            else:
                reason = "standard error not finite; the estimate is not reported"
        records.append(
            {
                "model": model,
                "cause": cause,
                "term": term,
                **_hazard_ratio(estimate, z),
                "n_patients": n_patients,
                "n_events": n_events,
                "estimable": estimate is not None,
                "reason": None if estimate is not None else reason,
            }
        )
    return pl.DataFrame(records, schema=HAZARD_COLUMNS)


@dataclass(frozen=True)
class ModelOutcome:
    """A fit of one cause after the checks: the fit (None when none could be made), the
    rows and terms it used, per-term reasons and the reason no term is estimable."""

    cause_label: str
    n_events: int
    fit: Any | None
    used: CompetingRows | None
    term_reasons: dict[str, str]
    model_reason: str | None

    def statements(self) -> list[str]:
        """The one-line facts to show beside the table."""
        found = list(self.term_reasons.values())
        return [self.model_reason, *found] if self.model_reason else found

    def rows(
        self, all_terms: Sequence[str], *, model: str, confidence: float, n: int
    ) -> pl.DataFrame:
        """Hazard-ratio rows over ``all_terms`` (terms left out carry their reason)."""
        beta = se = None
        if self.fit is not None and self.used is not None and self.model_reason is None:
            where = {t: i for i, t in enumerate(self.used.terms)}
            beta = np.array([self.fit.beta[where[t]] if t in where else np.nan for t in all_terms])
            se = np.array([self.fit.se[where[t]] if t in where else np.nan for t in all_terms])
        reasons = dict(self.term_reasons)
        if self.model_reason is not None:
            reasons = dict.fromkeys(all_terms, self.model_reason)
        return hazard_rows(
            model=model,
            cause=self.cause_label,
            terms=all_terms,
            beta=beta,
            se=se,
            confidence=confidence,
            n_patients=n,
            n_events=self.n_events,
            reasons=reasons,
        )


def fit_checked(
    rows: CompetingRows,
    cause: int,
    cause_label: str,
    fitter: Callable[[CompetingRows], Any],
    what: str,
) -> ModelOutcome:
    """Run ``fitter`` on the rows that can inform a hazard ratio of ``cause``.

    No events of the cause, a reference level without events or a fit that does not
    converge give a ``model_reason`` (one line); a level without events is left out
    with a per-term reason. ``fitter`` returns an object with ``beta``, ``se``,
    ``converged`` and ``message``.
    """
    n_events = rows.count(cause)
    if n_events == 0:
        reason = f"no {cause_label} events among {rows.n_patients} patients; no hazard ratio"
        return ModelOutcome(cause_label, 0, None, None, {}, reason)
    check = check_levels_have_events(rows, cause, cause_label)
    if check.fatal is not None:
        return ModelOutcome(cause_label, n_events, None, None, {}, check.fatal)
    reasons = {rows.terms[i]: r for i, r in check.dropped_terms.items()}
    kept = [i for i in range(len(rows.terms)) if i not in check.dropped_terms]
    if not kept:  # every term left out (e.g. the only compared group has no events)
        reason = "; ".join(dict.fromkeys(reasons.values()))
        return ModelOutcome(cause_label, n_events, None, None, reasons, reason)
    used = subset_rows(rows, check.keep, kept)
    fit = fitter(used)
    if not fit.converged:
        reason = (
            f"the {what} fit did not converge ({fit.message}); check for collinear covariates "
            "or covariate levels with few events"
        )
        logger.warning("%s (%s): %s", what, cause_label, reason)
        return ModelOutcome(cause_label, n_events, fit, used, reasons, reason)
    return ModelOutcome(cause_label, n_events, fit, used, reasons, None)
