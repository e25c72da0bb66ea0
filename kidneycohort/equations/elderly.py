"""Creatinine equations developed in older and Scandinavian populations: BIS1 and the
revised Lund–Malmö equation.

References
----------
.. [1] Schaeffner ES, Ebert N, Delanaye P, et al. Two novel equations to estimate kidney
   function in persons aged 70 years or older. Ann Intern Med. 2012;157(7):471-481.
   doi:10.7326/0003-4819-157-7-201210020-00003
.. [2] Björk J, Grubb A, Sterner G, Nyman U. Revised equations for estimating glomerular
   filtration rate based on the Lund-Malmö Study cohort. Scand J Clin Lab Invest.
   2011;71(3):232-239. doi:10.3109/00365513.2011.557086

The coefficients are the module constants below; their publication, table and whether
each was re-read or recalled are recorded in :mod:`kidneycohort.provenance` (ids
``bis1.*`` and ``lmr.*``; ``kidneycohort equations --sources`` lists them).
"""

from __future__ import annotations

import math
from typing import Any, Final, NamedTuple

import numpy as np

from kidneycohort.equations._core import (
    ArrayLike,
    BoolArray,
    EquationSpec,
    FloatArray,
    call_formula,
)
from kidneycohort.units import CREATININE_UMOL_PER_MG_DL

__all__ = [
    "BIS1_AGE_EXPONENT",
    "BIS1_CONSTANT",
    "BIS1_CR",
    "BIS1_CREATININE_EXPONENT",
    "BIS1_FEMALE_FACTOR",
    "INDEXED",
    "LMR_AGE_COEFFICIENT",
    "LMR_CR",
    "LMR_FEMALE",
    "LMR_LOG_AGE_COEFFICIENT",
    "LMR_LOG_SLOPE",
    "LMR_MALE",
    "SPECS",
    "LundMalmoSex",
    "bis1_cr",
    "lmr_cr",
]

INDEXED = "mL/min/1.73 m2"

BIS1_CONSTANT: Final = 3736.0
BIS1_CREATININE_EXPONENT: Final = -0.87
BIS1_AGE_EXPONENT: Final = -0.95
BIS1_FEMALE_FACTOR: Final = 0.82


class LundMalmoSex(NamedTuple):
    """The sex-specific part of the revised Lund-Malmö X term (creatinine in umol/L)."""

    knot_umol: float
    base: float
    linear_slope: float


LMR_FEMALE: Final = LundMalmoSex(knot_umol=150.0, base=2.50, linear_slope=0.0121)
LMR_MALE: Final = LundMalmoSex(knot_umol=180.0, base=2.56, linear_slope=0.00968)
LMR_LOG_SLOPE: Final = -0.926  # coefficient of ln(p / knot) at or above the knot
LMR_AGE_COEFFICIENT: Final = -0.0158
LMR_LOG_AGE_COEFFICIENT: Final = 0.438


def _kernel_bis1(*, creatinine_mg_dl: FloatArray, age: FloatArray, female: BoolArray) -> FloatArray:
    log_egfr = (
        math.log(BIS1_CONSTANT)
        + BIS1_CREATININE_EXPONENT * np.log(creatinine_mg_dl)
        + BIS1_AGE_EXPONENT * np.log(age)
        + np.where(female, math.log(BIS1_FEMALE_FACTOR), 0.0)
    )
    return np.exp(log_egfr)


def bis1_cr(creatinine_mg_dl: ArrayLike, age: ArrayLike, sex: ArrayLike) -> FloatArray | float:
    r"""Berlin Initiative Study 1 creatinine equation (Schaeffner et al., 2012 [1]).

    .. math::
        eGFR = 3736 \times S_{cr}^{-0.87} \times age^{-0.95} \times 0.82\,[female]

    Validated for ages 70 and over.

    Parameters
    ----------
    creatinine_mg_dl : array-like
        Serum creatinine, IDMS-traceable, mg/dL.
    age : array-like
        Age in years.
    sex : array-like of str
        ``"female"`` or ``"male"``.

    Returns
    -------
    numpy.ndarray or float
        eGFR in mL/min/1.73 m²; NaN where an input is missing or invalid.
    """
    return call_formula(BIS1_CR, creatinine_mg_dl=creatinine_mg_dl, age=age, sex=sex)


def _shape_bis1(**_: Any) -> tuple[Any, Any, Any]:
    return 1.0, BIS1_CREATININE_EXPONENT, BIS1_CREATININE_EXPONENT


def _kernel_lmr(*, creatinine_mg_dl: FloatArray, age: FloatArray, female: BoolArray) -> FloatArray:
    p_cr = creatinine_mg_dl * CREATININE_UMOL_PER_MG_DL
    knot = np.where(female, LMR_FEMALE.knot_umol, LMR_MALE.knot_umol)
    base = np.where(female, LMR_FEMALE.base, LMR_MALE.base)
    linear_slope = np.where(female, LMR_FEMALE.linear_slope, LMR_MALE.linear_slope)
    x = np.where(
        p_cr < knot,
        base + linear_slope * (knot - p_cr),
        base + LMR_LOG_SLOPE * np.log(p_cr / knot),
    )
    return np.exp(x + LMR_AGE_COEFFICIENT * age + LMR_LOG_AGE_COEFFICIENT * np.log(age))


def lmr_cr(creatinine_mg_dl: ArrayLike, age: ArrayLike, sex: ArrayLike) -> FloatArray | float:
    r"""Revised Lund–Malmö creatinine equation (Björk et al., 2011 [2]).

    .. math::
        eGFR = e^{X - 0.0158\,age + 0.438 \ln(age)}

    with :math:`p` the plasma creatinine in µmol/L:

    * female, :math:`p < 150`: :math:`X = 2.50 + 0.0121\,(150 - p)`
    * female, :math:`p \ge 150`: :math:`X = 2.50 - 0.926 \ln(p/150)`
    * male, :math:`p < 180`: :math:`X = 2.56 + 0.00968\,(180 - p)`
    * male, :math:`p \ge 180`: :math:`X = 2.56 - 0.926 \ln(p/180)`

    Adults (18+).

    Parameters
    ----------
    creatinine_mg_dl : array-like
        Serum creatinine, IDMS-traceable, mg/dL (converted with 88.4 µmol/L per mg/dL).
    age : array-like
        Age in years.
    sex : array-like of str
        ``"female"`` or ``"male"``.

    Returns
    -------
    numpy.ndarray or float
        eGFR in mL/min/1.73 m²; NaN where an input is missing or invalid.
    """
    return call_formula(LMR_CR, creatinine_mg_dl=creatinine_mg_dl, age=age, sex=sex)


BIS1_CR = EquationSpec(
    id="bis1_cr",
    label="Berlin Initiative Study 1 (creatinine)",
    function=bis1_cr,
    kernel=_kernel_bis1,
    inputs=("creatinine_mg_dl", "age", "sex"),
    output_unit=INDEXED,
    min_age=70,
    max_age=None,
    population="Community-dwelling adults aged 70+ in Berlin (White, German)",
    reference="Schaeffner ES, Ebert N, Delanaye P, et al. Ann Intern Med. 2012;157(7):471-481",
    doi="10.7326/0003-4819-157-7-201210020-00003",
    kind="creatinine",
    creatinine_shape=_shape_bis1,
)

LMR_CR = EquationSpec(
    id="lmr_cr",
    label="Revised Lund-Malmö (creatinine)",
    function=lmr_cr,
    kernel=_kernel_lmr,
    inputs=("creatinine_mg_dl", "age", "sex"),
    output_unit=INDEXED,
    min_age=18,
    max_age=None,
    population="Adults referred for GFR measurement in southern Sweden (Lund-Malmö cohort)",
    reference="Björk J, Grubb A, Sterner G, Nyman U. Scand J Clin Lab Invest. 2011;71(3):232-239",
    doi="10.3109/00365513.2011.557086",
    kind="creatinine",
)

SPECS = (BIS1_CR, LMR_CR)
