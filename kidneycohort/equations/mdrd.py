"""Four-variable MDRD Study equations (175 for IDMS-traceable, 186 for older creatinine).

References
----------
.. [1] Levey AS, Coresh J, Greene T, et al. Using standardized serum creatinine values in
   the Modification of Diet in Renal Disease study equation for estimating glomerular
   filtration rate. Ann Intern Med. 2006;145(4):247-254.
   doi:10.7326/0003-4819-145-4-200608150-00004
.. [2] Levey AS, Bosch JP, Lewis JB, et al. A more accurate method to estimate glomerular
   filtration rate from serum creatinine: a new prediction equation. Ann Intern Med.
   1999;130(6):461-470. doi:10.7326/0003-4819-130-6-199903160-00002 (the 4-variable
   form with 186 was published as Levey AS, Greene T, Kusek JW, Beck GJ, J Am Soc
   Nephrol. 2000;11:155A, abstract).

The coefficients are the module constants below; their publication, table and whether
each was re-read or recalled are recorded in :mod:`kidneycohort.provenance` (ids
``mdrd.*``; ``kidneycohort equations --sources`` lists them).
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

__all__ = [
    "AGE_EXPONENT",
    "CREATININE_EXPONENT",
    "FEMALE_FACTOR",
    "IDMS",
    "INDEXED",
    "MDRD_175",
    "MDRD_186",
    "NON_IDMS",
    "SPECS",
    "MdrdVariant",
    "mdrd_175",
    "mdrd_186",
]

INDEXED = "mL/min/1.73 m2"
CREATININE_EXPONENT: Final = -1.154
AGE_EXPONENT: Final = -0.203
FEMALE_FACTOR: Final = 0.742


class MdrdVariant(NamedTuple):
    """Leading constant and legacy race factor of one creatinine calibration."""

    constant: float
    black_factor: float


IDMS: Final = MdrdVariant(constant=175.0, black_factor=1.212)
"""IDMS-traceable creatinine (ref. [1])."""
NON_IDMS: Final = MdrdVariant(constant=186.0, black_factor=1.210)
"""Creatinine from assays not traceable to IDMS (ref. [2])."""


def _mdrd(
    variant: MdrdVariant,
    creatinine_mg_dl: FloatArray,
    age: FloatArray,
    female: BoolArray,
    black: BoolArray | None,
) -> FloatArray:
    log_egfr = (
        math.log(variant.constant)
        + CREATININE_EXPONENT * np.log(creatinine_mg_dl)
        + AGE_EXPONENT * np.log(age)
        + np.where(female, math.log(FEMALE_FACTOR), 0.0)
    )
    if black is not None:
        log_egfr = log_egfr + np.where(black, math.log(variant.black_factor), 0.0)
    return np.exp(log_egfr)


def _kernel_175(
    *,
    creatinine_mg_dl: FloatArray,
    age: FloatArray,
    female: BoolArray,
    black: BoolArray | None = None,
) -> FloatArray:
    return _mdrd(IDMS, creatinine_mg_dl, age, female, black)


def _kernel_186(
    *,
    creatinine_mg_dl: FloatArray,
    age: FloatArray,
    female: BoolArray,
    black: BoolArray | None = None,
) -> FloatArray:
    return _mdrd(NON_IDMS, creatinine_mg_dl, age, female, black)


def mdrd_175(
    creatinine_mg_dl: ArrayLike, age: ArrayLike, sex: ArrayLike, black_race: ArrayLike = None
) -> FloatArray | float:
    r"""Four-variable MDRD equation for IDMS-traceable creatinine (Levey et al., 2006 [1]).

    .. math::
        eGFR = 175 \times S_{cr}^{-1.154} \times age^{-0.203} \times 0.742\,[female]
        \times 1.212\,[Black]

    The race coefficient is applied only when ``black_race`` is given (with an
    :class:`~kidneycohort.errors.EquationWarning`).

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
        MDRD_175, creatinine_mg_dl=creatinine_mg_dl, age=age, sex=sex, black_race=black_race
    )


def mdrd_186(
    creatinine_mg_dl: ArrayLike, age: ArrayLike, sex: ArrayLike, black_race: ArrayLike = None
) -> FloatArray | float:
    r"""Four-variable MDRD equation for non-standardised creatinine ([2]).

    .. math::
        eGFR = 186 \times S_{cr}^{-1.154} \times age^{-0.203} \times 0.742\,[female]
        \times 1.210\,[Black]

    For creatinine measured before IDMS standardisation; ``186/175`` is the 6 % the
    older assays read high relative to IDMS, as expressed by ref. [1].

    Parameters
    ----------
    creatinine_mg_dl : array-like
        Serum creatinine (non-standardised assay), mg/dL.
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
        MDRD_186, creatinine_mg_dl=creatinine_mg_dl, age=age, sex=sex, black_race=black_race
    )


def _shape(**_: Any) -> tuple[Any, Any, Any]:
    return 1.0, CREATININE_EXPONENT, CREATININE_EXPONENT


MDRD_175 = EquationSpec(
    id="mdrd_175",
    label="MDRD 4-variable, IDMS-traceable creatinine (175)",
    function=mdrd_175,
    kernel=_kernel_175,
    inputs=("creatinine_mg_dl", "age", "sex"),
    output_unit=INDEXED,
    min_age=18,
    max_age=None,
    population="Adults with CKD (MDRD Study, mostly GFR < 60); underestimates higher GFR; "
    "legacy race coefficient (1.212) only on explicit request",
    reference="Levey AS, Coresh J, Greene T, et al. Ann Intern Med. 2006;145(4):247-254",
    doi="10.7326/0003-4819-145-4-200608150-00004",
    kind="creatinine",
    race_coefficient=True,
    creatinine_shape=_shape,
)

MDRD_186 = EquationSpec(
    id="mdrd_186",
    label="MDRD 4-variable, non-standardised creatinine (186)",
    function=mdrd_186,
    kernel=_kernel_186,
    inputs=("creatinine_mg_dl", "age", "sex"),
    output_unit=INDEXED,
    min_age=18,
    max_age=None,
    population="Adults with CKD (MDRD Study); for creatinine from assays not traceable to "
    "IDMS; legacy race coefficient (1.210) only on explicit request",
    reference="Levey AS, Bosch JP, Lewis JB, et al. Ann Intern Med. 1999;130(6):461-470; "
    "4-variable form: Levey AS, Greene T, Kusek JW, Beck GJ. J Am Soc Nephrol. 2000;11:155A",
    doi="10.7326/0003-4819-130-6-199903160-00002",
    kind="creatinine",
    race_coefficient=True,
    creatinine_shape=_shape,
)

SPECS = (MDRD_175, MDRD_186)
