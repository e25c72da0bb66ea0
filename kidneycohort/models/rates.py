"""Incidence rates per 100 person-years with exact Poisson limits, and group contrasts.

Rates come from the time-to-event table (``schemas.ENDPOINTS``): events are rows with
``event == 1``, person-time is the sum of ``years``. Limits and contrasts are computed
by statsmodels (``statsmodels.stats.rates``) and scipy; this module only aggregates the
table (polars group-by) and lays the results out.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence

import numpy as np
import polars as pl
from scipy import stats
from statsmodels.stats.rates import confint_poisson, confint_poisson_2indep, test_poisson_2indep

from kidneycohort._frames import FrameLike, follows_input, require_columns, to_polars
from kidneycohort.errors import InputDataError, did_you_mean
from kidneycohort.models._design import with_group

logger = logging.getLogger(__name__)

__all__ = [
    "exact_poisson_interval",
    "incidence_rates",
    "rate_difference",
    "rate_ratio",
]

RATE_COLUMNS = ("group", "events", "person_years", "rate_per_100py", "lower", "upper")
"""Columns of :func:`incidence_rates` after ``endpoint`` (the figure/table contract)."""


def exact_poisson_interval(
    events: int | Sequence[int] | np.ndarray,
    person_years: float | Sequence[float] | np.ndarray,
    *,
    per: float = 100.0,
    confidence: float = 0.95,
) -> tuple[np.ndarray, np.ndarray]:
    r"""Exact (Garwood) confidence limits of a Poisson rate, per ``per`` person-years.

    .. math::

        L = \frac{\chi^2_{\alpha/2}(2d)}{2\,PY}, \qquad
        U = \frac{\chi^2_{1-\alpha/2}(2d + 2)}{2\,PY}

    with :math:`d` events in :math:`PY` person-years (:math:`L = 0` when :math:`d = 0`).
    Computed by ``statsmodels.stats.rates.confint_poisson(method="exact-c")``.

    Parameters
    ----------
    events : int or array of int
        Number of events (non-negative).
    person_years : float or array of float
        Person-time at risk in years (positive).
    per : float, default 100
        Scale of the rate (100 gives rates per 100 person-years).
    confidence : float, default 0.95
        Two-sided confidence level.

    Returns
    -------
    lower, upper : numpy.ndarray
        Limits of the rate per ``per`` person-years.

    Raises
    ------
    InputDataError
        On negative events, non-positive person-years or a confidence level outside (0, 1).

    References
    ----------
    .. [1] Garwood F. Fiducial limits for the Poisson distribution. Biometrika
       1936;28:437-442. doi:10.1093/biomet/28.3-4.437
    """
    d = np.atleast_1d(np.asarray(events, dtype=float))
    py = np.atleast_1d(np.asarray(person_years, dtype=float))
    if not 0.0 < confidence < 1.0:
        raise InputDataError(
            f"confidence: expected a level between 0 and 1, got {confidence}; use e.g. 0.95"
        )
    if np.any(d < 0) or np.any(~np.isfinite(d)):
        raise InputDataError(
            f"events: expected non-negative counts, got {d[(d < 0) | ~np.isfinite(d)][0]}"
        )
    if np.any(~(py > 0)):
        raise InputDataError(
            f"person_years: expected positive person-time, got {py[~(py > 0)][0]}; "
            "a group without follow-up has no rate"
        )
    lower, upper = confint_poisson(d, py, method="exact-c", alpha=1.0 - confidence)
    lower = np.where(d == 0, 0.0, np.asarray(lower, dtype=float))
    return lower * per, np.asarray(upper, dtype=float) * per


@follows_input
def incidence_rates(
    endpoints: FrameLike,
    patients: FrameLike | None = None,
    *,
    group_column: str = "group",
    endpoint: str | Sequence[str] | None = None,
    per: float = 100.0,
    confidence: float = 0.95,
) -> pl.DataFrame:
    r"""Events, person-years and incidence rate per 100 person-years by endpoint and group.

    .. math::

        \text{rate} = 100 \times \frac{\sum_i \delta_i}{\sum_i t_i}

    with event indicator :math:`\delta_i` and follow-up :math:`t_i` (``years``) of each
    patient's row; limits by :func:`exact_poisson_interval`.

    Parameters
    ----------
    endpoints : polars or pandas DataFrame
        Time-to-event rows in the ``schemas.ENDPOINTS`` layout (``patient_id``,
        ``endpoint``, ``years``, ``event``).
    patients : DataFrame, optional
        One row per patient with ``group_column``; not needed when ``endpoints`` already
        carries ``group_column``. Without either, every row is in group ``"all"``.
    group_column : str, default "group"
        Column naming the arm or exposure group.
    endpoint : str or list of str, optional
        Endpoints to keep (default: all in the table).
    per, confidence : float
        Rate scale and confidence level.

    Returns
    -------
    polars.DataFrame
        ``endpoint, group, events, person_years, rate_per_100py, lower, upper``, one row
        per endpoint and group (``rate_per_100py`` is per ``per`` person-years).

    Raises
    ------
    InputDataError
        Missing columns, unknown endpoints, missing or negative ``years``/``event`` values,
        or patients without a group.
    """
    frame = with_group(endpoints, patients, group_column)
    frame = _select_endpoints(frame, endpoint)
    rates = (
        frame.group_by("endpoint", "group")
        .agg(
            pl.col("event").cast(pl.Int64).sum().alias("events"),
            # summed in sorted order: the same bits whatever order the rows came in
            pl.col("years").sort().sum().alias("person_years"),
        )
        .sort("endpoint", "group")
    )
    events = rates["events"].to_numpy()
    person_years = rates["person_years"].to_numpy()
    lower, upper = exact_poisson_interval(events, person_years, per=per, confidence=confidence)
    return rates.with_columns(
        (pl.col("events") / pl.col("person_years") * per).alias("rate_per_100py"),
        pl.Series("lower", lower),
        pl.Series("upper", upper),
    ).select("endpoint", *RATE_COLUMNS)


@follows_input
def rate_difference(
    rates: FrameLike,
    *,
    reference_group: str,
    per: float = 100.0,
    confidence: float = 0.95,
) -> pl.DataFrame:
    r"""Rate difference of every group versus ``reference_group`` (Wald interval).

    .. math::

        RD = \frac{d_1}{PY_1} - \frac{d_0}{PY_0}, \qquad
        \widehat{\mathrm{se}}(RD) = \sqrt{\frac{d_1}{PY_1^2} + \frac{d_0}{PY_0^2}}

    computed by ``statsmodels.stats.rates.confint_poisson_2indep(compare="diff",
    method="wald")`` with the matching Wald test for ``p``.

    Parameters
    ----------
    rates : DataFrame
        Output of :func:`incidence_rates`.
    reference_group : str
        Group subtracted from every other group.
    per, confidence : float
        Rate scale (must match ``rates``) and confidence level.

    Returns
    -------
    polars.DataFrame
        ``endpoint, group, reference_group, rate_difference_per_100py, lower, upper, p``.

    References
    ----------
    .. [1] Rothman KJ, Greenland S, Lash TL. Modern Epidemiology, 3rd ed. 2008, ch. 14.
    """
    return _contrast(rates, reference_group, "diff", per, confidence)


@follows_input
def rate_ratio(
    rates: FrameLike,
    *,
    reference_group: str,
    confidence: float = 0.95,
) -> pl.DataFrame:
    r"""Rate ratio of every group versus ``reference_group`` (exact conditional interval).

    Conditional on the total :math:`d_1 + d_0`, :math:`d_1` is binomial with
    :math:`\pi = RR\,PY_1 / (RR\,PY_1 + PY_0)`; the Clopper–Pearson limits of
    :math:`\pi` (scipy ``binomtest``) transform to limits of

    .. math::

        RR = \frac{d_1 / PY_1}{d_0 / PY_0}, \qquad
        RR_{L,U} = \frac{\pi_{L,U}}{1 - \pi_{L,U}} \cdot \frac{PY_0}{PY_1}

    and ``p`` is the exact conditional test of statsmodels
    (``test_poisson_2indep(method="exact-cond")``).

    Returns
    -------
    polars.DataFrame
        ``endpoint, group, reference_group, rate_ratio, lower, upper, p``.

    References
    ----------
    .. [1] Breslow NE, Day NE. Statistical Methods in Cancer Research, vol. II. IARC
       1987, section 2.3 (exact conditional limits of a rate ratio).
    """
    return _contrast(rates, reference_group, "ratio", 100.0, confidence)


def _contrast(
    rates: FrameLike, reference_group: str, compare: str, per: float, confidence: float
) -> pl.DataFrame:
    frame = to_polars(rates, "rates")
    require_columns(frame, ("endpoint", "group", "events", "person_years"), "rates")
    groups = frame["group"].unique().to_list()
    if reference_group not in groups:
        raise InputDataError(
            f"rates: reference_group '{reference_group}' is not a group of the table "
            f"(groups: {sorted(map(str, groups))}){did_you_mean(reference_group, map(str, groups))}"
        )
    reference = frame.filter(pl.col("group") == reference_group).select(
        "endpoint",
        pl.col("events").alias("reference_events"),
        pl.col("person_years").alias("reference_person_years"),
    )
    paired = (
        frame.filter(pl.col("group") != reference_group)
        .join(reference, on="endpoint", how="inner")
        .sort("endpoint", "group")
    )
    d1 = paired["events"].to_numpy().astype(float)
    py1 = paired["person_years"].to_numpy().astype(float)
    d0 = paired["reference_events"].to_numpy().astype(float)
    py0 = paired["reference_person_years"].to_numpy().astype(float)
    alpha = 1.0 - confidence
    n = len(paired)
    estimate = np.full(n, np.nan)
    lower = np.full(n, np.nan)
    upper = np.full(n, np.nan)
    p = np.full(n, np.nan)
    # A handful of groups x endpoints: one statsmodels call per contrast.
    for i in range(n):
        if compare == "diff":
            estimate[i] = (d1[i] / py1[i] - d0[i] / py0[i]) * per
            if d1[i] + d0[i] > 0:
                low, upp = confint_poisson_2indep(
                    d1[i], py1[i], d0[i], py0[i], method="wald", compare="diff", alpha=alpha
                )
                lower[i], upper[i] = float(low) * per, float(upp) * per
                p[i] = test_poisson_2indep(
                    d1[i], py1[i], d0[i], py0[i], method="wald", compare="diff"
                ).pvalue
        else:
            total = int(d1[i] + d0[i])
            with np.errstate(divide="ignore", invalid="ignore"):
                estimate[i] = (d1[i] / py1[i]) / (d0[i] / py0[i])
            if total > 0:
                ci = stats.binomtest(int(d1[i]), total).proportion_ci(
                    confidence_level=confidence, method="exact"
                )
                with np.errstate(divide="ignore"):
                    lower[i] = ci.low / (1.0 - ci.low) * py0[i] / py1[i]
                    upper[i] = (
                        np.inf if ci.high >= 1.0 else ci.high / (1.0 - ci.high) * py0[i] / py1[i]
                    )
                p[i] = test_poisson_2indep(
                    int(d1[i]), py1[i], int(d0[i]), py0[i], method="exact-cond", compare="ratio"
                ).pvalue
    name = "rate_difference_per_100py" if compare == "diff" else "rate_ratio"
    if n and np.isnan(p).any():
        logger.info(
            "rate %s: no events in either group for some endpoints; limits left null", compare
        )
    return pl.DataFrame(
        {
            "endpoint": paired["endpoint"],
            "group": paired["group"],
            "reference_group": [reference_group] * n,
            name: estimate,
            "lower": lower,
            "upper": upper,
            "p": p,
        },
        schema_overrides={"reference_group": pl.String},
    ).with_columns(pl.col(name, "lower", "upper", "p").fill_nan(None))


def _select_endpoints(frame: pl.DataFrame, endpoint: str | Sequence[str] | None) -> pl.DataFrame:
    if endpoint is None:
        return frame
    wanted = [endpoint] if isinstance(endpoint, str) else list(endpoint)
    have = frame["endpoint"].unique().to_list()
    for name in wanted:
        if name not in have:
            raise InputDataError(
                f"endpoints: endpoint '{name}' is not in the table (endpoints: "
                f"{sorted(map(str, have))}){did_you_mean(name, map(str, have))}"
            )
    return frame.filter(pl.col("endpoint").is_in(wanted))
