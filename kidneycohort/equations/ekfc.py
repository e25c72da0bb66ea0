"""European Kidney Function Consortium (EKFC) equations, creatinine and cystatin C.

Both use the full-age-spectrum form: the serum value is scaled by Q, the median value
of healthy people of that age and sex (creatinine) or age (cystatin C), and a two-slope
power with the knot at :math:`S/Q = 1`.

References
----------
.. [1] Pottel H, Björk J, Courbebaisse M, et al. Development and validation of a modified
   full age spectrum creatinine-based equation to estimate glomerular filtration rate:
   a cross-sectional analysis of pooled data. Ann Intern Med. 2021;174(2):183-191.
   doi:10.7326/M20-4366
.. [2] Pottel H, Björk J, Rule AD, et al. Cystatin C-based equation to estimate GFR
   without the inclusion of race and sex. N Engl J Med. 2023;388(4):333-343.
   doi:10.1056/NEJMoa2203769

The coefficients, Q values and age limits are the module constants below; their
publication, table and whether each was re-read or recalled are recorded in
:mod:`kidneycohort.provenance` (ids ``ekfc.*``; ``kidneycohort equations --sources``
lists them).
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
    "ADULT_Q_FROM_AGE",
    "ADULT_Q_UMOL_FEMALE",
    "ADULT_Q_UMOL_MALE",
    "AGE_FACTOR",
    "AGE_TERM_FROM",
    "CHILD_LOG_Q_FEMALE",
    "CHILD_LOG_Q_MALE",
    "CONSTANT",
    "CYSTATIN_Q",
    "CYSTATIN_Q_FLAT_UNTIL",
    "CYSTATIN_Q_SLOPE",
    "EKFC_CR",
    "EKFC_CYS",
    "EXPONENT_ABOVE",
    "EXPONENT_BELOW",
    "INDEXED",
    "SPECS",
    "LogQPolynomial",
    "creatinine_q_mg_dl",
    "cystatin_q_mg_l",
    "ekfc_cr",
    "ekfc_cys",
]

INDEXED = "mL/min/1.73 m2"
CONSTANT: Final = 107.3
EXPONENT_BELOW: Final = -0.322
EXPONENT_ABOVE: Final = -1.132
AGE_FACTOR: Final = 0.990  # per year above AGE_TERM_FROM
AGE_TERM_FROM: Final = 40.0  # years
ADULT_Q_FROM_AGE: Final = 25.0  # years; the paediatric Q applies below
ADULT_Q_UMOL_FEMALE: Final = 62.0  # umol/L
ADULT_Q_UMOL_MALE: Final = 80.0
CYSTATIN_Q: Final = 0.83  # mg/L up to CYSTATIN_Q_FLAT_UNTIL
CYSTATIN_Q_FLAT_UNTIL: Final = 50.0  # years
CYSTATIN_Q_SLOPE: Final = 0.005  # mg/L per year above CYSTATIN_Q_FLAT_UNTIL


class LogQPolynomial(NamedTuple):
    """Coefficients of ln Q (Q in umol/L) as a polynomial in age :math:`a` and ln a."""

    intercept: float
    age: float
    log_age: float
    age_squared: float
    age_cubed: float

    def __call__(self, a: FloatArray, log_a: FloatArray) -> FloatArray:
        return (
            self.intercept
            + self.age * a
            + self.log_age * log_a
            + self.age_squared * a**2
            + self.age_cubed * a**3
        )


CHILD_LOG_Q_MALE: Final = LogQPolynomial(3.200, 0.259, -0.543, -0.00763, 0.0000790)
CHILD_LOG_Q_FEMALE: Final = LogQPolynomial(3.080, 0.177, -0.223, -0.00596, 0.0000686)


def creatinine_q_mg_dl(age: ArrayLike, female: ArrayLike) -> FloatArray:
    r"""Q for creatinine (mg/dL): the EKFC healthy median by age and sex (ref. [1]).

    Ages 25 and over: 62 µmol/L (female), 80 µmol/L (male). Ages 2 to 25, in µmol/L:

    .. math::
        \ln Q_{male} = 3.200 + 0.259\,a - 0.543 \ln a - 0.00763\,a^2 + 0.0000790\,a^3

        \ln Q_{female} = 3.080 + 0.177\,a - 0.223 \ln a - 0.00596\,a^2 + 0.0000686\,a^3

    The polynomials (:data:`CHILD_LOG_Q_MALE`, :data:`CHILD_LOG_Q_FEMALE`) meet the
    adult values at 25 to within 1.5 %. Converted to mg/dL with 88.4 µmol/L per mg/dL.
    """
    a = np.asarray(age, dtype=np.float64)
    f = np.asarray(female, dtype=bool)
    with np.errstate(all="ignore"):
        log_a = np.log(a)
        child_log_q = np.where(f, CHILD_LOG_Q_FEMALE(a, log_a), CHILD_LOG_Q_MALE(a, log_a))
        child = np.exp(child_log_q)
    adult = np.where(f, ADULT_Q_UMOL_FEMALE, ADULT_Q_UMOL_MALE)
    return np.where(a < ADULT_Q_FROM_AGE, child, adult) / CREATININE_UMOL_PER_MG_DL


def cystatin_q_mg_l(age: ArrayLike) -> FloatArray:
    r"""Q for cystatin C (mg/L), sex-independent (ref. [2]).

    .. math::
        Q = 0.83 \ (age \le 50), \qquad Q = 0.83 + 0.005\,(age - 50) \ (age > 50)
    """
    a = np.asarray(age, dtype=np.float64)
    return CYSTATIN_Q + CYSTATIN_Q_SLOPE * np.maximum(a - CYSTATIN_Q_FLAT_UNTIL, 0.0)


def _ekfc(log_ratio: FloatArray, age: FloatArray) -> FloatArray:
    log_egfr = (
        math.log(CONSTANT)
        + log_ratio * np.where(log_ratio < 0, EXPONENT_BELOW, EXPONENT_ABOVE)
        + np.maximum(age - AGE_TERM_FROM, 0.0) * math.log(AGE_FACTOR)
    )
    return np.exp(log_egfr)


def _kernel_cr(*, creatinine_mg_dl: FloatArray, age: FloatArray, female: BoolArray) -> FloatArray:
    return _ekfc(np.log(creatinine_mg_dl / creatinine_q_mg_dl(age, female)), age)


def _kernel_cys(*, cystatin_c_mg_l: FloatArray, age: FloatArray) -> FloatArray:
    return _ekfc(np.log(cystatin_c_mg_l / cystatin_q_mg_l(age)), age)


def ekfc_cr(creatinine_mg_dl: ArrayLike, age: ArrayLike, sex: ArrayLike) -> FloatArray | float:
    r"""EKFC creatinine equation (Pottel et al., Ann Intern Med 2021 [1]).

    .. math::
        eGFR = 107.3 \times (S_{cr}/Q)^{\alpha} \times 0.990^{\max(age - 40,\,0)},
        \qquad \alpha = -0.322\ (S_{cr}/Q < 1),\ -1.132\ (S_{cr}/Q \ge 1)

    Q from :func:`creatinine_q_mg_dl` (age- and sex-dependent below 25).
    Validated from age 2.

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
    return call_formula(EKFC_CR, creatinine_mg_dl=creatinine_mg_dl, age=age, sex=sex)


def ekfc_cys(cystatin_c_mg_l: ArrayLike, age: ArrayLike) -> FloatArray | float:
    r"""EKFC cystatin C equation (Pottel et al., NEJM 2023 [2]); no sex or race term.

    .. math::
        eGFR = 107.3 \times (S_{cys}/Q)^{\alpha} \times 0.990^{\max(age - 40,\,0)},
        \qquad \alpha = -0.322\ (S_{cys}/Q < 1),\ -1.132\ (S_{cys}/Q \ge 1)

    Q from :func:`cystatin_q_mg_l`.

    Parameters
    ----------
    cystatin_c_mg_l : array-like
        Serum cystatin C, standardised, mg/L.
    age : array-like
        Age in years.

    Returns
    -------
    numpy.ndarray or float
        eGFR in mL/min/1.73 m²; NaN where an input is missing or invalid.
    """
    return call_formula(EKFC_CYS, cystatin_c_mg_l=cystatin_c_mg_l, age=age)


def _shape_cr(*, age: FloatArray, female: BoolArray, **_: Any) -> tuple[Any, Any, Any]:
    return creatinine_q_mg_dl(age, female), EXPONENT_BELOW, EXPONENT_ABOVE


def _shape_cys(*, age: FloatArray, **_: Any) -> tuple[Any, Any, Any]:
    return cystatin_q_mg_l(age), EXPONENT_BELOW, EXPONENT_ABOVE


EKFC_CR = EquationSpec(
    id="ekfc_cr",
    label="EKFC creatinine",
    function=ekfc_cr,
    kernel=_kernel_cr,
    inputs=("creatinine_mg_dl", "age", "sex"),
    output_unit=INDEXED,
    min_age=2,
    max_age=None,
    population="Children (2+) and adults, European (mostly White) development cohorts; "
    "age- and sex-specific Q below age 25",
    reference="Pottel H, Björk J, Courbebaisse M, et al. Ann Intern Med. 2021;174(2):183-191",
    doi="10.7326/M20-4366",
    kind="creatinine",
    creatinine_shape=_shape_cr,
)

EKFC_CYS = EquationSpec(
    id="ekfc_cys",
    label="EKFC cystatin C",
    function=ekfc_cys,
    kernel=_kernel_cys,
    inputs=("cystatin_c_mg_l", "age"),
    output_unit=INDEXED,
    # Q is defined from childhood; the validated range is kept to adults here because
    # the paediatric validation could not be re-read (from memory).
    min_age=18,
    max_age=None,
    population="Adults, European, US and African validation cohorts; no sex or race term",
    reference="Pottel H, Björk J, Rule AD, et al. N Engl J Med. 2023;388(4):333-343",
    doi="10.1056/NEJMoa2203769",
    kind="cystatin_c",
    cystatin_shape=_shape_cys,
)

SPECS = (EKFC_CR, EKFC_CYS)
