"""Height-based equations for children and young adults: bedside Schwartz and CKiD U25.

References
----------
.. [1] Schwartz GJ, Muñoz A, Schneider MF, et al. New equations to estimate GFR in
   children with CKD. J Am Soc Nephrol. 2009;20(3):629-637. doi:10.1681/ASN.2008030287
.. [2] Pierce CB, Muñoz A, Ng DK, Warady BA, Furth SL, Schwartz GJ. Age- and
   sex-dependent clinical equations to estimate glomerular filtration rates in children
   and young adults with chronic kidney disease. Kidney Int. 2021;99(4):948-956.
   doi:10.1016/j.kint.2020.10.047

The coefficients and age limits are the module constants below; their publication,
table and whether each was re-read or recalled are recorded in
:mod:`kidneycohort.provenance` (ids ``schwartz_bedside.*`` and ``ckid_u25.*``;
``kidneycohort equations --sources`` lists them).
"""

from __future__ import annotations

from typing import Any, Final, NamedTuple

import numpy as np

from kidneycohort.equations._core import (
    ArrayLike,
    BoolArray,
    EquationSpec,
    FloatArray,
    call_formula,
)

__all__ = [
    "BEDSIDE_K",
    "CKID_U25_CR",
    "CKID_U25_CYS",
    "INDEXED",
    "SCHWARTZ_BEDSIDE",
    "SPECS",
    "U25_ADULT_FROM_AGE",
    "U25_CREATININE_FEMALE",
    "U25_CREATININE_MALE",
    "U25_CYSTATIN_FEMALE",
    "U25_CYSTATIN_MALE",
    "U25Coefficient",
    "ckid_u25_cr",
    "ckid_u25_creatinine_k",
    "ckid_u25_cys",
    "ckid_u25_cystatin_k",
    "schwartz_bedside",
]

INDEXED = "mL/min/1.73 m2"
BEDSIDE_K: Final = 0.413  # with height in cm


class U25Coefficient(NamedTuple):
    r"""One sex's CKiD U25 K: :math:`base \times rate^{age - pivot}` below 18, ``adult`` after.

    ``rate_below`` applies below ``pivot_age``, ``rate_above`` from ``pivot_age`` to 18.
    """

    base: float
    pivot_age: float
    rate_below: float
    rate_above: float
    adult: float


U25_ADULT_FROM_AGE: Final = 18.0  # years: K is constant from here
U25_CREATININE_MALE: Final = U25Coefficient(39.0, 12.0, 1.008, 1.045, 50.8)
U25_CREATININE_FEMALE: Final = U25Coefficient(36.1, 12.0, 1.008, 1.023, 41.4)
U25_CYSTATIN_MALE: Final = U25Coefficient(87.2, 15.0, 1.011, 0.960, 77.1)
U25_CYSTATIN_FEMALE: Final = U25Coefficient(79.9, 12.0, 1.004, 0.974, 68.3)


def _u25_k(
    age: ArrayLike, female: ArrayLike, k_female: U25Coefficient, k_male: U25Coefficient
) -> FloatArray:
    a = np.asarray(age, dtype=np.float64)
    f = np.asarray(female, dtype=bool)
    pivot = np.where(f, k_female.pivot_age, k_male.pivot_age)
    base = np.where(f, k_female.base, k_male.base)
    rate = np.where(
        a < pivot,
        np.where(f, k_female.rate_below, k_male.rate_below),
        np.where(f, k_female.rate_above, k_male.rate_above),
    )
    with np.errstate(all="ignore"):
        k = base * rate ** (a - pivot)
    return np.where(a >= U25_ADULT_FROM_AGE, np.where(f, k_female.adult, k_male.adult), k)


def _kernel_bedside(
    *, creatinine_mg_dl: FloatArray, height_cm: FloatArray, **_: FloatArray
) -> FloatArray:
    # age only decides the validated range
    return BEDSIDE_K * height_cm / creatinine_mg_dl


def schwartz_bedside(
    creatinine_mg_dl: ArrayLike, height_cm: ArrayLike, age: ArrayLike
) -> FloatArray | float:
    r"""Bedside Schwartz equation for children (Schwartz et al., JASN 2009 [1]).

    .. math::
        eGFR = 0.413 \times \frac{height\ (cm)}{S_{cr}\ (mg/dL)}

    Developed in children 1-16 years with CKD (CKiD), enzymatic IDMS-traceable
    creatinine; the validated range here is 1 to <18 years. Age is used only for the
    range check.

    Parameters
    ----------
    creatinine_mg_dl : array-like
        Serum creatinine, enzymatic, IDMS-traceable, mg/dL.
    height_cm : array-like
        Height in cm.
    age : array-like
        Age in years.

    Returns
    -------
    numpy.ndarray or float
        eGFR in mL/min/1.73 m²; NaN where an input is missing or invalid.
    """
    return call_formula(
        SCHWARTZ_BEDSIDE, creatinine_mg_dl=creatinine_mg_dl, height_cm=height_cm, age=age
    )


def ckid_u25_creatinine_k(age: ArrayLike, female: ArrayLike) -> FloatArray:
    r"""The CKiD U25 creatinine coefficient K by age and sex (ref. [2]).

    .. math::
        K_{male} = \begin{cases} 39.0 \times 1.008^{age-12} & age < 12 \\
        39.0 \times 1.045^{age-12} & 12 \le age < 18 \\ 50.8 & age \ge 18 \end{cases}
        \qquad
        K_{female} = \begin{cases} 36.1 \times 1.008^{age-12} & age < 12 \\
        36.1 \times 1.023^{age-12} & 12 \le age < 18 \\ 41.4 & age \ge 18 \end{cases}
    """
    return _u25_k(age, female, U25_CREATININE_FEMALE, U25_CREATININE_MALE)


def ckid_u25_cystatin_k(age: ArrayLike, female: ArrayLike) -> FloatArray:
    r"""The CKiD U25 cystatin C coefficient K by age and sex (ref. [2]).

    .. math::
        K_{male} = \begin{cases} 87.2 \times 1.011^{age-15} & age < 15 \\
        87.2 \times 0.960^{age-15} & 15 \le age < 18 \\ 77.1 & age \ge 18 \end{cases}
        \qquad
        K_{female} = \begin{cases} 79.9 \times 1.004^{age-12} & age < 12 \\
        79.9 \times 0.974^{age-12} & 12 \le age < 18 \\ 68.3 & age \ge 18 \end{cases}
    """
    return _u25_k(age, female, U25_CYSTATIN_FEMALE, U25_CYSTATIN_MALE)


def _kernel_u25_cr(
    *, creatinine_mg_dl: FloatArray, height_cm: FloatArray, age: FloatArray, female: BoolArray
) -> FloatArray:
    return ckid_u25_creatinine_k(age, female) * (height_cm / 100.0) / creatinine_mg_dl


def _kernel_u25_cys(
    *, cystatin_c_mg_l: FloatArray, age: FloatArray, female: BoolArray
) -> FloatArray:
    return ckid_u25_cystatin_k(age, female) / cystatin_c_mg_l


def ckid_u25_cr(
    creatinine_mg_dl: ArrayLike, height_cm: ArrayLike, age: ArrayLike, sex: ArrayLike
) -> FloatArray | float:
    r"""CKiD under-25 creatinine equation (Pierce et al., Kidney Int 2021 [2]).

    .. math::
        eGFR = K \times \frac{height\ (m)}{S_{cr}\ (mg/dL)}

    with K from :func:`ckid_u25_creatinine_k`. Ages 1 to <25.

    Parameters
    ----------
    creatinine_mg_dl : array-like
        Serum creatinine, enzymatic, IDMS-traceable, mg/dL.
    height_cm : array-like
        Height in cm (the formula uses metres).
    age : array-like
        Age in years.
    sex : array-like of str
        ``"female"`` or ``"male"``.

    Returns
    -------
    numpy.ndarray or float
        eGFR in mL/min/1.73 m²; NaN where an input is missing or invalid.
    """
    return call_formula(
        CKID_U25_CR, creatinine_mg_dl=creatinine_mg_dl, height_cm=height_cm, age=age, sex=sex
    )


def ckid_u25_cys(cystatin_c_mg_l: ArrayLike, age: ArrayLike, sex: ArrayLike) -> FloatArray | float:
    r"""CKiD under-25 cystatin C equation (Pierce et al., Kidney Int 2021 [2]).

    .. math::
        eGFR = K \times \frac{1}{S_{cys}\ (mg/L)}

    with K from :func:`ckid_u25_cystatin_k`. Ages 1 to <25.

    Parameters
    ----------
    cystatin_c_mg_l : array-like
        Serum cystatin C, mg/L.
    age : array-like
        Age in years.
    sex : array-like of str
        ``"female"`` or ``"male"``.

    Returns
    -------
    numpy.ndarray or float
        eGFR in mL/min/1.73 m²; NaN where an input is missing or invalid.
    """
    return call_formula(CKID_U25_CYS, cystatin_c_mg_l=cystatin_c_mg_l, age=age, sex=sex)


def _shape_inverse(**_: Any) -> tuple[Any, Any, Any]:
    return 1.0, -1.0, -1.0


SCHWARTZ_BEDSIDE = EquationSpec(
    id="schwartz_bedside",
    label="Bedside Schwartz (children)",
    function=schwartz_bedside,
    kernel=_kernel_bedside,
    inputs=("creatinine_mg_dl", "height_cm", "age"),
    output_unit=INDEXED,
    min_age=1,
    max_age=18,
    population="Children with CKD (CKiD cohort, ages 1-16), enzymatic creatinine",
    reference="Schwartz GJ, Muñoz A, Schneider MF, et al. J Am Soc Nephrol. 2009;20(3):629-637",
    doi="10.1681/ASN.2008030287",
    kind="creatinine",
    creatinine_shape=_shape_inverse,
)

CKID_U25_CR = EquationSpec(
    id="ckid_u25_cr",
    label="CKiD under-25 creatinine",
    function=ckid_u25_cr,
    kernel=_kernel_u25_cr,
    inputs=("creatinine_mg_dl", "height_cm", "age", "sex"),
    output_unit=INDEXED,
    min_age=1,
    max_age=25,
    population="Children and young adults with CKD (CKiD cohort, ages 1-25)",
    reference="Pierce CB, Muñoz A, Ng DK, et al. Kidney Int. 2021;99(4):948-956",
    doi="10.1016/j.kint.2020.10.047",
    kind="creatinine",
    creatinine_shape=_shape_inverse,
)

CKID_U25_CYS = EquationSpec(
    id="ckid_u25_cys",
    label="CKiD under-25 cystatin C",
    function=ckid_u25_cys,
    kernel=_kernel_u25_cys,
    inputs=("cystatin_c_mg_l", "age", "sex"),
    output_unit=INDEXED,
    min_age=1,
    max_age=25,
    population="Children and young adults with CKD (CKiD cohort, ages 1-25)",
    reference="Pierce CB, Muñoz A, Ng DK, et al. Kidney Int. 2021;99(4):948-956",
    doi="10.1016/j.kint.2020.10.047",
    kind="cystatin_c",
    cystatin_shape=_shape_inverse,
)

SPECS = (SCHWARTZ_BEDSIDE, CKID_U25_CR, CKID_U25_CYS)
