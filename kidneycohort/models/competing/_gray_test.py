r"""Gray's K-sample test of cumulative incidence curves, and Aalen–Johansen curves per group.

Gray's test compares the cumulative incidence :math:`F_{1k}` of the event of interest
between :math:`K` groups through the subdistribution hazards. With
:math:`R_k(t) = n_k(t)\{1 - \hat F_{1k}(t-)\}/\hat S_k(t-)` (:math:`n_k` followed,
:math:`\hat S_k` the Kaplan–Meier estimate of being free of any event), the score of
group :math:`k` is

.. math::

    s_k = \int \{1 - \hat F_1(t-)\}^\rho \Big[ dN_{1k}(t)
        - \frac{R_k(t)}{\sum_r R_r(t)} \sum_r dN_{1r}(t) \Big],

and :math:`s^\top \hat V^{-1} s` over the first :math:`K - 1` groups is referred to a
:math:`\chi^2_{K-1}` distribution, :math:`\hat V` the asymptotic covariance of Gray
(1988, section 2). Stratified, scores and covariances are summed over strata. Every
sum is over distinct times as ``(times × groups)`` arrays (cumulative sums and
products), without a loop over patients or times; ``rho = 0`` is cmprsk's default.

References
----------
.. [1] Gray RJ. A class of K-sample tests for comparing the cumulative incidence of a
   competing risk. Ann Stat 1988;16:1141-1154. doi:10.1214/aos/1176350951
.. [2] Aalen OO, Johansen S. An empirical transition matrix for non-homogeneous Markov
   chains based on censored observations. Scand J Stat 1978;5:141-150.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import polars as pl
from scipy import stats

__all__ = ["GrayTestResult", "aalen_johansen_by_group", "gray_test"]


@dataclass(frozen=True)
class GrayTestResult:
    """Gray's test: ``statistic`` (chi-square, ``df``), ``p``, the scores and their
    covariance for the groups but the last; ``estimable`` False with a ``reason`` when
    no statistic can be given."""

    statistic: float | None
    df: int
    p: float | None
    groups: list[str]
    scores: np.ndarray
    covariance: np.ndarray
    estimable: bool
    reason: str | None

    def as_frame(self, cause: str) -> pl.DataFrame:
        """One row: ``cause, groups, test_statistic, df, p, estimable, reason``."""
        return pl.DataFrame(
            {
                "cause": [cause],
                "groups": [", ".join(self.groups)],
                "test_statistic": [self.statistic],
                "df": [self.df],
                "p": [self.p],
                "estimable": [self.estimable],
                "reason": [self.reason],
            },
            schema={
                "cause": pl.String,
                "groups": pl.String,
                "test_statistic": pl.Float64,
                "df": pl.Int64,
                "p": pl.Float64,
                "estimable": pl.Boolean,
                "reason": pl.String,
            },
        )


@dataclass(frozen=True)
class _Counts:
    """Per distinct time (rows) and group (columns): censored, event, competing counts
    and the number still followed just before the time."""

    times: np.ndarray
    censored: np.ndarray
    event: np.ndarray
    competing: np.ndarray
    followed: np.ndarray


def _counts(time: np.ndarray, cause: np.ndarray, group: np.ndarray, n_groups: int) -> _Counts:
    times, inverse = np.unique(time, return_inverse=True)
    kind = np.where(cause == 0, 0, np.where(cause == 1, 1, 2))
    flat = np.bincount(
        (inverse * 3 + kind) * n_groups + group, minlength=times.size * 3 * n_groups
    ).reshape(times.size, 3, n_groups)
    per_time = flat.sum(axis=1).astype(float)
    gone_before = np.cumsum(per_time, axis=0) - per_time
    followed = per_time.sum(axis=0) - gone_before
    return _Counts(
        times,
        flat[:, 0].astype(float),
        flat[:, 1].astype(float),
        flat[:, 2].astype(float),
        followed,
    )


def _survival_and_incidence(
    counts: _Counts,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Per group: event-free survival after / before each time and the two incidences
    after each time (Aalen–Johansen), on the rows of ``counts``."""
    rs, d1, d2 = counts.followed, counts.event, counts.competing
    present = rs > 0
    with np.errstate(divide="ignore", invalid="ignore"):
        factor = np.where(present, (rs - d1 - d2) / rs, 1.0)
        after = np.cumprod(factor, axis=0)
        before = np.vstack([np.ones((1, rs.shape[1])), after[:-1]])
        incidence1 = np.cumsum(np.where(present, before * d1 / rs, 0.0), axis=0)
        incidence2 = np.cumsum(np.where(present, before * d2 / rs, 0.0), axis=0)
    return after, before, incidence1, incidence2, present


def _stratum_scores(counts: _Counts, rho: float) -> tuple[np.ndarray, np.ndarray]:
    """Gray's scores and covariance (all ``K`` groups) within one stratum."""
    events = (counts.event + counts.competing).sum(axis=1) > 0
    counts = _Counts(*(getattr(counts, f)[events] for f in _Counts.__dataclass_fields__))
    rs, d1, d2 = counts.followed, counts.event, counts.competing
    k = rs.shape[1]
    skm, skmm, f1, _, present = _survival_and_incidence(counts)
    f1m = np.vstack([np.zeros((1, k)), f1[:-1]])
    with np.errstate(divide="ignore", invalid="ignore"):
        h = np.where(present, rs / skmm, 0.0)
        tr = h.sum(axis=1)
        r = np.where(present, rs * (1.0 - f1m) / skmm, 0.0)
        nd1 = d1.sum(axis=1)
        pooled = np.cumsum(nd1 / tr)
        pooled_m = np.concatenate([[0.0], pooled[:-1]])
        fb = (1.0 - pooled_m) ** rho
        a = fb[:, None, None] * (
            h[:, :, None] * np.eye(k)[None] - h[:, :, None] * h[:, None, :] / tr[:, None, None]
        )
        c_step = np.where(pooled_m < 1.0, nd1 / (tr * (1.0 - pooled_m)), 0.0)
        c = np.cumsum(a * c_step[:, None, None], axis=0)
        scores = (fb[:, None] * (d1 - nd1[:, None] * r / r.sum(axis=1)[:, None])).sum(axis=0)
        # variation from the events of interest
        t4 = np.where(skm > 0, 1.0 - (1.0 - pooled)[:, None] / skm, 1.0)
        t5 = np.where(
            nd1[:, None] > 1, 1.0 - (nd1[:, None] - 1.0) / (tr[:, None] * skmm - 1.0), 1.0
        )
        t3 = np.where(
            present & (nd1[:, None] > 0), t5 * skmm * nd1[:, None] / (tr[:, None] * rs), 0.0
        )
        # variation from the competing events
        hit = (skm > 0) & (d2 > 0)
        u4 = np.where(hit, (1.0 - pooled)[:, None] / skm, 0.0)
        u5 = np.where(d2 > 1, 1.0 - (d2 - 1.0) / (rs - 1.0), 1.0)
        u3 = np.where(hit, u5 * skmm**2 * d2 / rs**2, 0.0)
    t1 = a - t4[:, None, :] * c
    own = (t4**2 * t3).sum(axis=0) + (u4**2 * u3).sum(axis=0)
    cross = np.einsum("tik,tk->ik", t1, t4 * t3) - np.einsum("tik,tk->ik", c, u4**2 * u3)
    cov = np.einsum("tik,tjk,tk->ij", t1, t1, t3) + np.einsum("tik,tjk,tk->ij", c, c, u4**2 * u3)
    end = c[-1] if c.shape[0] else np.zeros((k, k))
    cov = cov + np.einsum("ik,jk,k->ij", end, end, own) + end @ cross.T + cross @ end.T
    return scores, cov


def gray_test(
    time: np.ndarray,
    cause: np.ndarray,
    group: np.ndarray,
    *,
    strata: np.ndarray | None = None,
    rho: float = 0.0,
) -> GrayTestResult:
    r"""Gray's test that the cumulative incidence of cause 1 is equal across groups.

    Parameters
    ----------
    time : numpy.ndarray
        Follow-up time per patient.
    cause : numpy.ndarray
        0 censored, 1 event of interest, any other value a competing event.
    group : numpy.ndarray
        Group label per patient (two or more groups).
    strata : numpy.ndarray, optional
        Stratum per patient; scores and covariances are summed over strata.
    rho : float, default 0
        Power of the weight :math:`\{1 - \hat F_1(t-)\}^\rho`.

    Returns
    -------
    GrayTestResult
        Not estimable (with the reason) for one group, no events of interest, or a
        singular covariance.
    """
    labels, index = np.unique(np.asarray(group).astype(str), return_inverse=True)
    groups = [str(v) for v in labels]
    k = len(groups)
    empty = np.zeros(max(k - 1, 0))
    cause = np.asarray(cause)

    def not_estimable(reason: str) -> GrayTestResult:
        return GrayTestResult(
            None, max(k - 1, 0), None, groups, empty, np.diag(empty), False, reason
        )

    if k < 2:
        return not_estimable("one group only; Gray's test compares two or more groups")
    if not np.any(cause == 1):
        return not_estimable("no events of interest; the cumulative incidence curves are all zero")
    layers = np.zeros(index.size, dtype=np.int64)
    if strata is not None:
        layers = np.unique(np.asarray(strata).astype(str), return_inverse=True)[1]
    scores, cov = np.zeros(k), np.zeros((k, k))
    t = np.asarray(time, dtype=float)
    for layer in range(int(layers.max()) + 1):  # a loop over strata, not over patients
        mine = layers == layer
        s, v = _stratum_scores(_counts(t[mine], cause[mine], index[mine], k), rho)
        scores, cov = scores + s, cov + v
    s, v = scores[:-1], cov[:-1, :-1]
    if not np.all(np.isfinite(v)) or np.linalg.matrix_rank(v) < k - 1:
        return not_estimable("the covariance of the scores is singular; no test statistic")
    statistic = float(s @ np.linalg.solve(v, s))
    return GrayTestResult(
        statistic, k - 1, float(stats.chi2.sf(statistic, k - 1)), groups, s, v, True, None
    )


def aalen_johansen_by_group(time: np.ndarray, cause: np.ndarray, group: np.ndarray) -> pl.DataFrame:
    r"""Aalen–Johansen cumulative incidence of both causes and event-free survival per group.

    .. math::

        \hat F_c(t) = \sum_{t_j \le t} \hat S(t_{j-1}) \frac{d_{cj}}{n_j}, \qquad
        \hat S(t) = \prod_{t_j \le t} \Big(1 - \frac{d_{1j} + d_{2j}}{n_j}\Big),

    so :math:`\hat F_1 + \hat F_2 + \hat S = 1` at every time.

    Returns
    -------
    polars.DataFrame
        ``group, years, event_incidence, competing_incidence, event_free`` at 0 and at
        each time with an event of either cause in the group.
    """
    labels, index = np.unique(np.asarray(group).astype(str), return_inverse=True)
    counts = _counts(np.asarray(time, dtype=float), np.asarray(cause), index, labels.size)
    after, _, incidence1, incidence2, _ = _survival_and_incidence(counts)
    has_event = (counts.event + counts.competing) > 0
    time_row, group_col = np.nonzero(has_event)
    order = np.lexsort((counts.times[time_row], group_col))
    time_row, group_col = time_row[order], group_col[order]
    frame = pl.DataFrame(
        {
            "group": labels[group_col],
            "years": counts.times[time_row],
            "event_incidence": incidence1[time_row, group_col],
            "competing_incidence": incidence2[time_row, group_col],
            "event_free": after[time_row, group_col],
        },
        schema_overrides={"group": pl.String},
    )
    start = pl.DataFrame(
        {
            "group": labels,
            "years": 0.0,
            "event_incidence": 0.0,
            "competing_incidence": 0.0,
            "event_free": 1.0,
        },
        schema_overrides={"group": pl.String},
    )
    start = start.join(frame.filter(pl.col("years") == 0.0), on="group", how="anti")
    return pl.concat([start, frame]).sort("group", "years")
