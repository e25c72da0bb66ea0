"""Cockcroft–Gault creatinine clearance (mL/min, not indexed to body-surface area).

References
----------
.. [1] Cockcroft DW, Gault MH. Prediction of creatinine clearance from serum creatinine.
   Nephron. 1976;16(1):31-41. doi:10.1159/000180580

The constants are the module constants below; their publication and whether each was
re-read or recalled are recorded in :mod:`kidneycohort.provenance` (ids
``cockcroft_gault.*``; ``kidneycohort equations --sources`` lists them).
"""

from __future__ import annotations

from typing import Any, Final

import numpy as np

from kidneycohort.equations._core import (
    ArrayLike,
    BoolArray,
    EquationSpec,
    FloatArray,
    call_formula,
)

__all__ = ["AGE_OFFSET", "COCKCROFT_GAULT", "DIVISOR", "FEMALE_FACTOR", "SPECS", "cockcroft_gault"]

AGE_OFFSET: Final = 140.0  # years: (AGE_OFFSET - age)
DIVISOR: Final = 72.0
FEMALE_FACTOR: Final = 0.85


def _kernel(
    *, creatinine_mg_dl: FloatArray, age: FloatArray, weight_kg: FloatArray, female: BoolArray
) -> FloatArray:
    # ages of 140 and over give a non-positive clearance: outside the formula's domain
    return (
        (AGE_OFFSET - age)
        * weight_kg
        / (DIVISOR * creatinine_mg_dl)
        * np.where(female, FEMALE_FACTOR, 1.0)
    )


def cockcroft_gault(
    creatinine_mg_dl: ArrayLike, age: ArrayLike, weight_kg: ArrayLike, sex: ArrayLike
) -> FloatArray | float:
    r"""Cockcroft–Gault creatinine clearance (Cockcroft & Gault, Nephron 1976 [1]).

    .. math::
        C_{cr} = \frac{(140 - age) \times weight\ (kg)}{72 \times S_{cr}\ (mg/dL)}
        \times 0.85\,[female]

    In mL/min (not indexed). The original used actual body weight and non-standardised
    creatinine; which weight to use (actual, ideal, adjusted) is the caller's choice.

    Parameters
    ----------
    creatinine_mg_dl : array-like
        Serum creatinine, mg/dL.
    age : array-like
        Age in years.
    weight_kg : array-like
        Body weight in kg.
    sex : array-like of str
        ``"female"`` or ``"male"``.

    Returns
    -------
    numpy.ndarray or float
        Creatinine clearance in mL/min; NaN where an input is missing or invalid.
    """
    return call_formula(
        COCKCROFT_GAULT, creatinine_mg_dl=creatinine_mg_dl, age=age, weight_kg=weight_kg, sex=sex
    )


def _shape(**_: Any) -> tuple[Any, Any, Any]:
    return 1.0, -1.0, -1.0


COCKCROFT_GAULT = EquationSpec(
    id="cockcroft_gault",
    label="Cockcroft-Gault creatinine clearance",
    function=cockcroft_gault,
    kernel=_kernel,
    inputs=("creatinine_mg_dl", "age", "weight_kg", "sex"),
    output_unit="mL/min",
    min_age=18,
    max_age=None,
    population="Adult men (Canadian hospital patients, 1976); female factor 0.85 proposed "
    "by the authors; used for drug dosing",
    reference="Cockcroft DW, Gault MH. Nephron. 1976;16(1):31-41",
    doi="10.1159/000180580",
    kind="clearance",
    creatinine_shape=_shape,
)

SPECS = (COCKCROFT_GAULT,)
