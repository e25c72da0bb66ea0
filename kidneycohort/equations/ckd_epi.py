"""CKD-EPI equations: creatinine 2009 and 2021, cystatin C 2012, creatinine–cystatin C
2012 and 2021.

All share one form: a constant, a two-slope power of each serum marker with a knot
(creatinine at :math:`\\kappa` = 0.7 mg/dL in women and 0.9 mg/dL in men, cystatin C
at 0.8 mg/L), an exponential age term and a sex factor. The kernels compute it in log
space (one ``exp`` per element), which is the same number as the product form.

The coefficients are the module constants below (one :class:`CkdEpiCoefficients` per
equation); their publication, table and whether each was re-read or recalled are
recorded in :mod:`kidneycohort.provenance` (ids ``ckd_epi.*``; ``kidneycohort equations
--sources`` lists them).

References
----------
.. [1] Levey AS, Stevens LA, Schmid CH, et al. A new equation to estimate glomerular
   filtration rate. Ann Intern Med. 2009;150(9):604-612.
   doi:10.7326/0003-4819-150-9-200905050-00006
.. [2] Inker LA, Schmid CH, Tighiouart H, et al. Estimating glomerular filtration rate
   from serum creatinine and cystatin C. N Engl J Med. 2012;367(1):20-29.
   doi:10.1056/NEJMoa1114248
.. [3] Inker LA, Eneanya ND, Coresh J, et al. New creatinine- and cystatin C-based
   equations to estimate GFR without race. N Engl J Med. 2021;385(19):1737-1749.
   doi:10.1056/NEJMoa2102953
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Final

import numpy as np

from kidneycohort.equations._core import (
    ArrayLike,
    BoolArray,
    EquationSpec,
    FloatArray,
    call_formula,
)

__all__ = [
    "CKD_EPI_2009_CR",
    "CKD_EPI_2012_CRCYS",
    "CKD_EPI_2012_CYS",
    "CKD_EPI_2021_CR",
    "CKD_EPI_2021_CRCYS",
    "CRCYS_2012",
    "CRCYS_2021",
    "CR_2009",
    "CR_2021",
    "CYSTATIN_KNOT",
    "CYS_2012",
    "INDEXED",
    "KAPPA_FEMALE",
    "KAPPA_MALE",
    "SPECS",
    "CkdEpiCoefficients",
    "ckd_epi_2009_cr",
    "ckd_epi_2012_crcys",
    "ckd_epi_2012_cys",
    "ckd_epi_2021_cr",
    "ckd_epi_2021_crcys",
]

INDEXED = "mL/min/1.73 m2"
KAPPA_FEMALE: Final = 0.7  # creatinine knot, mg/dL
KAPPA_MALE: Final = 0.9
CYSTATIN_KNOT: Final = 0.8  # mg/L


@dataclass(frozen=True)
class CkdEpiCoefficients:
    """The coefficients of one CKD-EPI equation (None where the equation has no such term).

    ``age_factor`` is the factor per year of age, ``female_factor`` and ``black_factor``
    multiply the estimate; the creatinine exponents apply below (``alpha_*``) and at or
    above (``creatinine_above``) the knot :math:`\\kappa`, the cystatin C exponents below
    and at or above :data:`CYSTATIN_KNOT`.
    """

    constant: float
    age_factor: float
    female_factor: float
    alpha_female: float | None = None
    alpha_male: float | None = None
    creatinine_above: float | None = None
    cystatin_below: float | None = None
    cystatin_above: float | None = None
    black_factor: float | None = None


CR_2021: Final = CkdEpiCoefficients(
    constant=142.0,
    age_factor=0.9938,
    female_factor=1.012,
    alpha_female=-0.241,
    alpha_male=-0.302,
    creatinine_above=-1.200,
)
CRCYS_2021: Final = CkdEpiCoefficients(
    constant=135.0,
    age_factor=0.9961,
    female_factor=0.963,
    alpha_female=-0.219,
    alpha_male=-0.144,
    creatinine_above=-0.544,
    cystatin_below=-0.323,
    cystatin_above=-0.778,
)
CYS_2012: Final = CkdEpiCoefficients(
    constant=133.0,
    age_factor=0.996,
    female_factor=0.932,
    cystatin_below=-0.499,
    cystatin_above=-1.328,
)
CRCYS_2012: Final = CkdEpiCoefficients(
    constant=135.0,
    age_factor=0.995,
    female_factor=0.969,
    alpha_female=-0.248,
    alpha_male=-0.207,
    creatinine_above=-0.601,
    cystatin_below=-0.375,
    cystatin_above=-0.711,
    black_factor=1.08,
)
CR_2009: Final = CkdEpiCoefficients(
    constant=141.0,
    age_factor=0.993,
    female_factor=1.018,
    alpha_female=-0.329,
    alpha_male=-0.411,
    creatinine_above=-1.209,
    black_factor=1.159,
)


def _two_slope(log_ratio: FloatArray, below: Any, above: Any) -> FloatArray:
    """Exponent times log-ratio: ``below`` under the knot, ``above`` at or over it."""
    return log_ratio * np.where(log_ratio < 0, below, above)


def _alpha(c: CkdEpiCoefficients, female: BoolArray) -> FloatArray:
    """The creatinine exponent below the knot, by sex."""
    if c.alpha_female is None or c.alpha_male is None:
        raise TypeError("a CKD-EPI coefficient set without creatinine exponents")
    return np.where(female, c.alpha_female, c.alpha_male)


def _creatinine_term(
    c: CkdEpiCoefficients, creatinine_mg_dl: FloatArray, female: BoolArray
) -> FloatArray:
    kappa = np.where(female, KAPPA_FEMALE, KAPPA_MALE)
    log_ratio = np.log(creatinine_mg_dl / kappa)
    return _two_slope(log_ratio, _alpha(c, female), c.creatinine_above)


def _cystatin_term(c: CkdEpiCoefficients, cystatin_c_mg_l: FloatArray) -> FloatArray:
    return _two_slope(np.log(cystatin_c_mg_l / CYSTATIN_KNOT), c.cystatin_below, c.cystatin_above)


def _demographic_terms(
    c: CkdEpiCoefficients, age: FloatArray, female: BoolArray, black: BoolArray | None
) -> FloatArray:
    terms = (
        math.log(c.constant)
        + age * math.log(c.age_factor)
        + np.where(female, math.log(c.female_factor), 0.0)
    )
    if black is not None and c.black_factor is not None:
        terms = terms + np.where(black, math.log(c.black_factor), 0.0)
    return terms


def _creatinine_shape(c: CkdEpiCoefficients, female: BoolArray) -> tuple[Any, Any, Any]:
    kappa = np.where(female, KAPPA_FEMALE, KAPPA_MALE)
    return kappa, _alpha(c, female), c.creatinine_above


# ---------------------------------------------------------------- creatinine 2021 (race-free)


def _kernel_2021_cr(
    *, creatinine_mg_dl: FloatArray, age: FloatArray, female: BoolArray
) -> FloatArray:
    c = CR_2021
    return np.exp(
        _demographic_terms(c, age, female, None) + _creatinine_term(c, creatinine_mg_dl, female)
    )


def ckd_epi_2021_cr(
    creatinine_mg_dl: ArrayLike, age: ArrayLike, sex: ArrayLike
) -> FloatArray | float:
    r"""CKD-EPI 2021 creatinine equation, without race (Inker et al., NEJM 2021 [3]).

    .. math::
        eGFR = 142 \times \min(S_{cr}/\kappa, 1)^{\alpha} \times
        \max(S_{cr}/\kappa, 1)^{-1.200} \times 0.9938^{age} \times 1.012\,[female]

    :math:`\kappa` = 0.7 (female) / 0.9 (male) mg/dL; :math:`\alpha` = -0.241 (female) /
    -0.302 (male). Validated for adults (18+), see :func:`kidneycohort.equations.evaluate`.

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
    return call_formula(CKD_EPI_2021_CR, creatinine_mg_dl=creatinine_mg_dl, age=age, sex=sex)


def _shape_2021_cr(*, female: BoolArray, **_: Any) -> tuple[Any, Any, Any]:
    return _creatinine_shape(CR_2021, female)


CKD_EPI_2021_CR = EquationSpec(
    id="ckd_epi_2021_cr",
    label="CKD-EPI creatinine 2021 (race-free)",
    function=ckd_epi_2021_cr,
    kernel=_kernel_2021_cr,
    inputs=("creatinine_mg_dl", "age", "sex"),
    output_unit=INDEXED,
    min_age=18,
    max_age=None,
    population="Adults, US development cohorts (research studies and clinical populations), "
    "race-free refit; recommended by KDIGO 2024 for creatinine-based eGFR",
    reference="Inker LA, Eneanya ND, Coresh J, et al. N Engl J Med. 2021;385(19):1737-1749",
    doi="10.1056/NEJMoa2102953",
    kind="creatinine",
    creatinine_shape=_shape_2021_cr,
)


# ---------------------------------------------------------------- creatinine-cystatin C 2021


def _kernel_2021_crcys(
    *, creatinine_mg_dl: FloatArray, cystatin_c_mg_l: FloatArray, age: FloatArray, female: BoolArray
) -> FloatArray:
    c = CRCYS_2021
    return np.exp(
        _demographic_terms(c, age, female, None)
        + _creatinine_term(c, creatinine_mg_dl, female)
        + _cystatin_term(c, cystatin_c_mg_l)
    )


def ckd_epi_2021_crcys(
    creatinine_mg_dl: ArrayLike, cystatin_c_mg_l: ArrayLike, age: ArrayLike, sex: ArrayLike
) -> FloatArray | float:
    r"""CKD-EPI 2021 creatinine–cystatin C equation, without race (Inker et al., NEJM 2021 [3]).

    .. math::
        eGFR = 135 \times \min(S_{cr}/\kappa, 1)^{\alpha} \times
        \max(S_{cr}/\kappa, 1)^{-0.544} \times \min(S_{cys}/0.8, 1)^{-0.323} \times
        \max(S_{cys}/0.8, 1)^{-0.778} \times 0.9961^{age} \times 0.963\,[female]

    :math:`\kappa` = 0.7 / 0.9 mg/dL, :math:`\alpha` = -0.219 (female) / -0.144 (male).

    Parameters
    ----------
    creatinine_mg_dl, cystatin_c_mg_l : array-like
        Serum creatinine (mg/dL, IDMS-traceable) and cystatin C (mg/L, standardised).
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
        CKD_EPI_2021_CRCYS,
        creatinine_mg_dl=creatinine_mg_dl,
        cystatin_c_mg_l=cystatin_c_mg_l,
        age=age,
        sex=sex,
    )


def _shape_2021_crcys_cr(*, female: BoolArray, **_: Any) -> tuple[Any, Any, Any]:
    return _creatinine_shape(CRCYS_2021, female)


def _shape_2021_crcys_cys(**_: Any) -> tuple[Any, Any, Any]:
    return CYSTATIN_KNOT, CRCYS_2021.cystatin_below, CRCYS_2021.cystatin_above


CKD_EPI_2021_CRCYS = EquationSpec(
    id="ckd_epi_2021_crcys",
    label="CKD-EPI creatinine-cystatin C 2021 (race-free)",
    function=ckd_epi_2021_crcys,
    kernel=_kernel_2021_crcys,
    inputs=("creatinine_mg_dl", "cystatin_c_mg_l", "age", "sex"),
    output_unit=INDEXED,
    min_age=18,
    max_age=None,
    population="Adults, US development cohorts, race-free refit; the most accurate of the "
    "CKD-EPI equations (KDIGO 2024 suggests it for confirmation)",
    reference="Inker LA, Eneanya ND, Coresh J, et al. N Engl J Med. 2021;385(19):1737-1749",
    doi="10.1056/NEJMoa2102953",
    kind="combined",
    creatinine_shape=_shape_2021_crcys_cr,
    cystatin_shape=_shape_2021_crcys_cys,
)


# ---------------------------------------------------------------- cystatin C 2012


def _kernel_2012_cys(
    *, cystatin_c_mg_l: FloatArray, age: FloatArray, female: BoolArray
) -> FloatArray:
    c = CYS_2012
    return np.exp(_demographic_terms(c, age, female, None) + _cystatin_term(c, cystatin_c_mg_l))


def ckd_epi_2012_cys(
    cystatin_c_mg_l: ArrayLike, age: ArrayLike, sex: ArrayLike
) -> FloatArray | float:
    r"""CKD-EPI 2012 cystatin C equation (Inker et al., NEJM 2012 [2]).

    .. math::
        eGFR = 133 \times \min(S_{cys}/0.8, 1)^{-0.499} \times
        \max(S_{cys}/0.8, 1)^{-1.328} \times 0.996^{age} \times 0.932\,[female]

    No race term. Adults (18+).

    Parameters
    ----------
    cystatin_c_mg_l : array-like
        Serum cystatin C, standardised (ERM-DA471/IFCC), mg/L.
    age : array-like
        Age in years.
    sex : array-like of str
        ``"female"`` or ``"male"``.

    Returns
    -------
    numpy.ndarray or float
        eGFR in mL/min/1.73 m²; NaN where an input is missing or invalid.
    """
    return call_formula(CKD_EPI_2012_CYS, cystatin_c_mg_l=cystatin_c_mg_l, age=age, sex=sex)


def _shape_2012_cys(**_: Any) -> tuple[Any, Any, Any]:
    return CYSTATIN_KNOT, CYS_2012.cystatin_below, CYS_2012.cystatin_above


CKD_EPI_2012_CYS = EquationSpec(
    id="ckd_epi_2012_cys",
    label="CKD-EPI cystatin C 2012",
    function=ckd_epi_2012_cys,
    kernel=_kernel_2012_cys,
    inputs=("cystatin_c_mg_l", "age", "sex"),
    output_unit=INDEXED,
    min_age=18,
    max_age=None,
    population="Adults, North American and European cohorts with standardised cystatin C",
    reference="Inker LA, Schmid CH, Tighiouart H, et al. N Engl J Med. 2012;367(1):20-29",
    doi="10.1056/NEJMoa1114248",
    kind="cystatin_c",
    cystatin_shape=_shape_2012_cys,
)


# ---------------------------------------------------------------- creatinine-cystatin C 2012


def _kernel_2012_crcys(
    *,
    creatinine_mg_dl: FloatArray,
    cystatin_c_mg_l: FloatArray,
    age: FloatArray,
    female: BoolArray,
    black: BoolArray | None = None,
) -> FloatArray:
    c = CRCYS_2012
    return np.exp(
        _demographic_terms(c, age, female, black)
        + _creatinine_term(c, creatinine_mg_dl, female)
        + _cystatin_term(c, cystatin_c_mg_l)
    )


def ckd_epi_2012_crcys(
    creatinine_mg_dl: ArrayLike,
    cystatin_c_mg_l: ArrayLike,
    age: ArrayLike,
    sex: ArrayLike,
    black_race: ArrayLike = None,
) -> FloatArray | float:
    r"""CKD-EPI 2012 creatinine–cystatin C equation (Inker et al., NEJM 2012 [2]).

    .. math::
        eGFR = 135 \times \min(S_{cr}/\kappa, 1)^{\alpha} \times
        \max(S_{cr}/\kappa, 1)^{-0.601} \times \min(S_{cys}/0.8, 1)^{-0.375} \times
        \max(S_{cys}/0.8, 1)^{-0.711} \times 0.995^{age} \times 0.969\,[female]
        \times 1.08\,[Black]

    :math:`\kappa` = 0.7 / 0.9 mg/dL, :math:`\alpha` = -0.248 (female) / -0.207 (male).
    The race coefficient is applied only when ``black_race`` is given (with an
    :class:`~kidneycohort.errors.EquationWarning`); current guidance uses the 2021
    equation instead.

    Parameters
    ----------
    creatinine_mg_dl, cystatin_c_mg_l : array-like
        Serum creatinine (mg/dL) and cystatin C (mg/L).
    age : array-like
        Age in years.
    sex : array-like of str
        ``"female"`` or ``"male"``.
    black_race : array-like of bool, optional
        Apply the legacy race coefficient where True.

    Returns
    -------
    numpy.ndarray or float
        eGFR in mL/min/1.73 m²; NaN where an input is missing or invalid.
    """
    return call_formula(
        CKD_EPI_2012_CRCYS,
        creatinine_mg_dl=creatinine_mg_dl,
        cystatin_c_mg_l=cystatin_c_mg_l,
        age=age,
        sex=sex,
        black_race=black_race,
    )


def _shape_2012_crcys_cr(*, female: BoolArray, **_: Any) -> tuple[Any, Any, Any]:
    return _creatinine_shape(CRCYS_2012, female)


def _shape_2012_crcys_cys(**_: Any) -> tuple[Any, Any, Any]:
    return CYSTATIN_KNOT, CRCYS_2012.cystatin_below, CRCYS_2012.cystatin_above


CKD_EPI_2012_CRCYS = EquationSpec(
    id="ckd_epi_2012_crcys",
    label="CKD-EPI creatinine-cystatin C 2012",
    function=ckd_epi_2012_crcys,
    kernel=_kernel_2012_crcys,
    inputs=("creatinine_mg_dl", "cystatin_c_mg_l", "age", "sex"),
    output_unit=INDEXED,
    min_age=18,
    max_age=None,
    population="Adults, North American and European cohorts; legacy race coefficient "
    "(1.08) applied only on explicit request",
    reference="Inker LA, Schmid CH, Tighiouart H, et al. N Engl J Med. 2012;367(1):20-29",
    doi="10.1056/NEJMoa1114248",
    kind="combined",
    race_coefficient=True,
    creatinine_shape=_shape_2012_crcys_cr,
    cystatin_shape=_shape_2012_crcys_cys,
)


# ---------------------------------------------------------------- creatinine 2009


def _kernel_2009_cr(
    *,
    creatinine_mg_dl: FloatArray,
    age: FloatArray,
    female: BoolArray,
    black: BoolArray | None = None,
) -> FloatArray:
    c = CR_2009
    return np.exp(
        _demographic_terms(c, age, female, black) + _creatinine_term(c, creatinine_mg_dl, female)
    )


def ckd_epi_2009_cr(
    creatinine_mg_dl: ArrayLike, age: ArrayLike, sex: ArrayLike, black_race: ArrayLike = None
) -> FloatArray | float:
    r"""CKD-EPI 2009 creatinine equation (Levey et al., Ann Intern Med 2009 [1]).

    .. math::
        eGFR = 141 \times \min(S_{cr}/\kappa, 1)^{\alpha} \times
        \max(S_{cr}/\kappa, 1)^{-1.209} \times 0.993^{age} \times 1.018\,[female]
        \times 1.159\,[Black]

    :math:`\kappa` = 0.7 / 0.9 mg/dL, :math:`\alpha` = -0.329 (female) / -0.411 (male).
    The race coefficient is applied only when ``black_race`` is given (with an
    :class:`~kidneycohort.errors.EquationWarning`): KDIGO 2024 recommends the race-free
    2021 equation.

    Parameters
    ----------
    creatinine_mg_dl : array-like
        Serum creatinine, IDMS-traceable, mg/dL.
    age : array-like
        Age in years.
    sex : array-like of str
        ``"female"`` or ``"male"``.
    black_race : array-like of bool, optional
        Apply the legacy race coefficient where True.

    Returns
    -------
    numpy.ndarray or float
        eGFR in mL/min/1.73 m²; NaN where an input is missing or invalid.
    """
    return call_formula(
        CKD_EPI_2009_CR, creatinine_mg_dl=creatinine_mg_dl, age=age, sex=sex, black_race=black_race
    )


def _shape_2009_cr(*, female: BoolArray, **_: Any) -> tuple[Any, Any, Any]:
    return _creatinine_shape(CR_2009, female)


CKD_EPI_2009_CR = EquationSpec(
    id="ckd_epi_2009_cr",
    label="CKD-EPI creatinine 2009",
    function=ckd_epi_2009_cr,
    kernel=_kernel_2009_cr,
    inputs=("creatinine_mg_dl", "age", "sex"),
    output_unit=INDEXED,
    min_age=18,
    max_age=None,
    population="Adults, US research and clinical cohorts; legacy race coefficient (1.159) "
    "applied only on explicit request; superseded by the 2021 equation",
    reference="Levey AS, Stevens LA, Schmid CH, et al. Ann Intern Med. 2009;150(9):604-612",
    doi="10.7326/0003-4819-150-9-200905050-00006",
    kind="creatinine",
    race_coefficient=True,
    creatinine_shape=_shape_2009_cr,
)

SPECS = (CKD_EPI_2021_CR, CKD_EPI_2021_CRCYS, CKD_EPI_2012_CYS, CKD_EPI_2012_CRCYS, CKD_EPI_2009_CR)
