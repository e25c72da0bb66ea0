"""Kidney Failure Risk Equation (KFRE), 4-variable form, 2- and 5-year risk.

.. math::

    \\text{risk}(t) = 1 - S_0(t)^{\\exp(\\eta)},\\qquad
    \\eta = -0.2201\\,(\\tfrac{\\text{age}}{10} - 7.036)
           + 0.2467\\,(\\text{male} - 0.5642)
           - 0.5567\\,(\\tfrac{\\text{eGFR}}{5} - 7.222)
           + 0.4510\\,(\\ln \\text{UACR}_{\\text{mg/g}} - 5.137)

Coefficients and centring values are those of the 4-variable model of Tangri et al.
(2011) [1]_; the baseline survivals :math:`S_0(t)` are the regional recalibration of
Tangri et al. (2016) [2]_:

============================ ========== ==========
region                       S0(2 yr)   S0(5 yr)
============================ ========== ==========
``north_american``           0.9750     0.9240
``non_north_american``       0.9832     0.9365
============================ ========== ==========

The numbers above are the module constants :data:`COEFFICIENTS`, :data:`CENTRES`,
:data:`BASELINE_SURVIVAL` and the applicability limits; their publication, table and
whether each was re-read or recalled are recorded in :mod:`kidneycohort.provenance`
(ids ``kfre.*``; ``kidneycohort equations --sources`` lists them and counts the recalled
ones, which must be checked against [1]_ and [2]_ before publication use).

Applicability (enforced): the equation was developed and validated in adults with CKD
G3-G5 (eGFR < 60 mL/min/1.73 m2) not yet on kidney replacement therapy. A row outside
that population gets null risks and a reason in ``kfre_reason``
(:data:`KFRE_REASONS`). Whether a patient already receives dialysis or has a transplant
is not visible here; do not pass such patients.

References
----------
.. [1] Tangri N, Stevens LA, Griffith J, et al. A predictive model for progression of
   chronic kidney disease to kidney failure. JAMA 2011;305(15):1553-1559.
   doi:10.1001/jama.2011.451
.. [2] Tangri N, Grams ME, Levey AS, et al. Multinational assessment of accuracy of
   equations for predicting risk of kidney failure: a meta-analysis. JAMA
   2016;315(2):164-174. doi:10.1001/jama.2015.18202
"""

from __future__ import annotations

import logging
from typing import Final, Literal

import numpy as np
import numpy.typing as npt
import polars as pl

from kidneycohort._frames import FrameLike, require_columns, to_polars
from kidneycohort.aki import ValueFilter, usable_egfr
from kidneycohort.baseline import uacr_timeline
from kidneycohort.errors import ConfigError, InputDataError, did_you_mean
from kidneycohort.schemas import DAYS_PER_YEAR

logger = logging.getLogger(__name__)

Region = Literal["north_american", "non_north_american"]

# per 10 years of age, male sex, per 5 mL/min/1.73 m2 of eGFR, per natural-log unit of
# UACR in mg/g (Tangri 2011, 4-variable model)
COEFFICIENTS: Final[dict[str, float]] = {
    "age_per_10y": -0.2201,
    "male": 0.2467,
    "egfr_per_5": -0.5567,
    "log_uacr": 0.4510,
}
# the centring values (development-cohort means of the scaled variables)
CENTRES: Final[dict[str, float]] = {
    "age_per_10y": 7.036,
    "male": 0.5642,
    "egfr_per_5": 7.222,
    "log_uacr": 5.137,
}
# Tangri 2016 regional recalibration
BASELINE_SURVIVAL: Final[dict[str, dict[int, float]]] = {
    "north_american": {2: 0.9750, 5: 0.9240},
    "non_north_american": {2: 0.9832, 5: 0.9365},
}
# the population the equation was developed in: adults with CKD G3-G5
MIN_AGE_YEARS: Final = 18.0
EGFR_BELOW: Final = 60.0

KFRE_REASONS: Final[dict[str, str]] = {
    "missing_input": "age, sex, eGFR or UACR missing",
    "not_adult": "age below 18 years: the equation is for adults",
    "egfr_not_below_60": "eGFR >= 60: the equation is for CKD G3-G5",
    "uacr_not_positive": "UACR <= 0 has no logarithm",
    "sex_unknown": "sex is not 'female' or 'male'",
}
"""Codes written to ``kfre_reason`` when no risk is given."""


def _check_region(region: str) -> dict[int, float]:
    if region not in BASELINE_SURVIVAL:
        raise ConfigError(
            f"kfre: region={region!r} is not one of {', '.join(BASELINE_SURVIVAL)}"
            f"{did_you_mean(region, BASELINE_SURVIVAL)}"
        )
    return BASELINE_SURVIVAL[region]


def kfre_risk(
    age_years: npt.ArrayLike,
    male: npt.ArrayLike,
    egfr: npt.ArrayLike,
    uacr_mg_g: npt.ArrayLike,
    horizon_years: Literal[2, 5] = 2,
    region: Region = "north_american",
) -> npt.NDArray[np.float64]:
    """KFRE 4-variable risk of kidney failure within ``horizon_years`` (arrays or scalars).

    Applies the module-level formula to any values, without the applicability check
    (use :func:`kfre` on a table for that). UACR must be positive.

    Parameters
    ----------
    age_years, male, egfr, uacr_mg_g : array-like
        Age in years, 1 for male / 0 for female, eGFR in mL/min/1.73 m2, UACR in mg/g.
    horizon_years : {2, 5}
    region : {"north_american", "non_north_american"}

    Returns
    -------
    numpy.ndarray
        Risk in [0, 1].

    Examples
    --------
    >>> round(float(kfre_risk(70, 1, 30, 300, 2)), 4)
    0.0699
    """
    survival = _check_region(region)
    if horizon_years not in survival:
        raise ConfigError(f"kfre: horizon_years={horizon_years!r} must be 2 or 5")
    age = np.asarray(age_years, dtype=np.float64)
    sex = np.asarray(male, dtype=np.float64)
    gfr = np.asarray(egfr, dtype=np.float64)
    acr = np.asarray(uacr_mg_g, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        eta = (
            COEFFICIENTS["age_per_10y"] * (age / 10.0 - CENTRES["age_per_10y"])
            + COEFFICIENTS["male"] * (sex - CENTRES["male"])
            + COEFFICIENTS["egfr_per_5"] * (gfr / 5.0 - CENTRES["egfr_per_5"])
            + COEFFICIENTS["log_uacr"] * (np.log(acr) - CENTRES["log_uacr"])
        )
    return 1.0 - survival[horizon_years] ** np.exp(eta)


def kfre(inputs: FrameLike, region: Region = "north_american") -> pl.DataFrame:
    """Add 2- and 5-year KFRE risks to a table of inputs, enforcing applicability.

    Parameters
    ----------
    inputs : polars or pandas DataFrame
        ``age_years``, ``sex`` (``"female"``/``"male"``), ``egfr`` (mL/min/1.73 m2) and
        ``uacr_mg_g``; other columns are kept. :func:`kfre_inputs` builds such a table.
    region : {"north_american", "non_north_american"}
        Baseline survival set of the 2016 recalibration.

    Returns
    -------
    polars.DataFrame
        The input with ``kfre_2y``, ``kfre_5y`` (null when not applicable),
        ``kfre_region`` and ``kfre_reason`` (:data:`KFRE_REASONS`, null when computed).
    """
    survival = _check_region(region)
    df = to_polars(inputs, "kfre inputs")
    require_columns(df, ("age_years", "sex", "egfr", "uacr_mg_g"), "kfre inputs")
    age = pl.col("age_years").cast(pl.Float64)
    gfr = pl.col("egfr").cast(pl.Float64).fill_nan(None)
    acr = pl.col("uacr_mg_g").cast(pl.Float64).fill_nan(None)
    sex = pl.col("sex").cast(pl.String).str.strip_chars().str.to_lowercase()
    reason = (
        pl.when(age.is_null() | gfr.is_null() | acr.is_null() | pl.col("sex").is_null())
        .then(pl.lit("missing_input"))
        .when(age < MIN_AGE_YEARS)
        .then(pl.lit("not_adult"))
        .when(gfr >= EGFR_BELOW)
        .then(pl.lit("egfr_not_below_60"))
        .when(acr <= 0)
        .then(pl.lit("uacr_not_positive"))
        .when(~sex.is_in(["female", "male"]))
        .then(pl.lit("sex_unknown"))
    )
    df = df.with_columns(kfre_reason=reason)
    ok = pl.col("kfre_reason").is_null()
    eta = (
        COEFFICIENTS["age_per_10y"] * (age / 10.0 - CENTRES["age_per_10y"])
        + COEFFICIENTS["male"] * ((sex == "male").cast(pl.Float64) - CENTRES["male"])
        + COEFFICIENTS["egfr_per_5"] * (gfr / 5.0 - CENTRES["egfr_per_5"])
        + COEFFICIENTS["log_uacr"] * (pl.when(ok).then(acr).log() - CENTRES["log_uacr"])
    )
    df = df.with_columns(
        kfre_2y=pl.when(ok).then(1.0 - pl.lit(survival[2]).pow(eta.exp())),
        kfre_5y=pl.when(ok).then(1.0 - pl.lit(survival[5]).pow(eta.exp())),
        kfre_region=pl.lit(region),
    )
    logger.info(
        "KFRE: %d of %d rows outside the equation's population",
        int(df["kfre_reason"].is_not_null().sum()),
        df.height,
    )
    return df


def kfre_inputs(
    egfr: FrameLike,
    labs: FrameLike,
    patients: FrameLike,
    equation: str,
    at_years: float | FrameLike = 0.0,
    lookback_days: float = 365.0,
    value_filter: ValueFilter | None = None,
) -> pl.DataFrame:
    """The KFRE inputs of each patient at a chosen time: the latest values before it.

    For each patient the latest usable eGFR (of ``equation``) and the latest UACR in
    ``[at - lookback_days, at]`` are taken; age is the age at ``at``.

    Parameters
    ----------
    egfr : polars or pandas DataFrame
        ``schemas.EGFR`` rows.
    labs : polars or pandas DataFrame
        Harmonised labs with UACR rows (see :func:`kidneycohort.baseline.uacr_timeline`).
    patients : polars or pandas DataFrame
        ``patient_id``, ``sex`` and ``age_at_index`` or (``birth_date``, ``index_date``).
    equation : str
        The eGFR equation id to use (KFRE was developed with CKD-EPI/MDRD creatinine eGFR).
    at_years : float or DataFrame
        Years from index of the assessment (0: at index); or a table of ``patient_id``,
        ``at_years`` giving one time per patient.
    lookback_days : float
        How far back a value may be.
    value_filter : ValueFilter, optional
        eGFR results it excludes are not used.

    Returns
    -------
    polars.DataFrame
        ``patient_id``, ``at_years``, ``age_years``, ``sex``, ``egfr``, ``egfr_years``,
        ``uacr_mg_g``, ``uacr_years``: one row per patient of ``patients``.
    """
    pts = to_polars(patients, "patients")
    require_columns(pts, ("patient_id", "sex"), "patients")
    pts = pts.with_columns(pl.col("patient_id").cast(pl.String))
    if isinstance(at_years, int | float):
        at = pts.select("patient_id", at_years=pl.lit(float(at_years)))
    else:
        at = to_polars(at_years, "at_years")
        require_columns(at, ("patient_id", "at_years"), "at_years")
        at = at.select(pl.col("patient_id").cast(pl.String), pl.col("at_years").cast(pl.Float64))
    if "age_at_index" in pts.columns:
        age_at_index = pl.col("age_at_index").cast(pl.Float64)
    elif "birth_date" in pts.columns and "index_date" in pts.columns:
        age_at_index = (
            pl.col("index_date").cast(pl.Date) - pl.col("birth_date").cast(pl.Date)
        ).dt.total_days() / DAYS_PER_YEAR
    else:
        raise InputDataError(
            "patients: missing column 'age_at_index' (or 'birth_date' with 'index_date') "
            "needed for the KFRE age"
        )
    out = at.join(
        pts.select("patient_id", "sex", _age0=age_at_index), on="patient_id", how="left"
    ).with_columns(age_years=pl.col("_age0") + pl.col("at_years"))
    lookback = lookback_days / DAYS_PER_YEAR
    eg = usable_egfr(egfr, value_filter)
    known = eg["equation"].unique().to_list()
    if equation not in known:
        raise InputDataError(
            f"egfr: no rows for equation {equation!r}{did_you_mean(equation, known)}"
        )
    eg = eg.filter((pl.col("equation") == equation) & pl.col("_finite") & ~pl.col("excluded"))
    eg = eg.select("patient_id", "years_from_index", pl.col("egfr").alias("_v"))
    ua = uacr_timeline(labs, patients).filter(
        pl.col("uacr_mg_g").is_not_null() & pl.col("years_from_index").is_not_null()
    )
    ua = ua.select("patient_id", "years_from_index", pl.col("uacr_mg_g").alias("_v"))
    for name, values in (("egfr", eg), ("uacr_mg_g", ua)):
        latest = (
            values.join(at, on="patient_id")
            .filter(
                (pl.col("years_from_index") <= pl.col("at_years") + 1e-9)
                & (pl.col("years_from_index") >= pl.col("at_years") - lookback - 1e-9)
            )
            .sort("patient_id", "years_from_index", "_v")
            .group_by("patient_id")
            .agg(pl.col("_v").last().alias(name), pl.col("years_from_index").last().alias("_t"))
        )
        out = out.join(latest, on="patient_id", how="left", maintain_order="left").rename(
            {"_t": "egfr_years" if name == "egfr" else "uacr_years"}
        )
    return out.select(
        "patient_id",
        "at_years",
        "age_years",
        "sex",
        "egfr",
        "egfr_years",
        "uacr_mg_g",
        "uacr_years",
    )
