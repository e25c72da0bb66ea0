"""The 4-variable Kidney Failure Risk Equation: coefficients, centring values, regional
baseline survivals and the risk on arrays or a table (Tangri 2011, 2016).
"""

from __future__ import annotations

import logging
from typing import Final, Literal

import numpy as np
import numpy.typing as npt
import polars as pl

from kidneycohort._frames import FrameLike, follows_input, require_columns, to_polars
from kidneycohort.errors import ConfigError, did_you_mean

__all__ = [
    "BASELINE_SURVIVAL",
    "CENTRES",
    "COEFFICIENTS",
    "EGFR_BELOW",
    "KFRE_REASONS",
    "MIN_AGE_YEARS",
    "Region",
    "add_kfre_risk",
    "kfre_risk",
]

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
    (use :func:`add_kfre_risk` on a table for that). UACR must be positive.

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


@follows_input
def add_kfre_risk(inputs: FrameLike, region: Region = "north_american") -> pl.DataFrame:
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
