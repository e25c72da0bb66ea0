"""Full Age Spectrum (FAS) creatinine equation.

References
----------
.. [1] Pottel H, Hoste L, Dubourg L, et al. An estimated glomerular filtration rate
   equation for the full age spectrum. Nephrol Dial Transplant. 2016;31(5):798-806.
   doi:10.1093/ndt/gfv454

The coefficients are the module constants below; their publication, table and whether
each was re-read or recalled are recorded in :mod:`kidneycohort.provenance` (ids
``fas.*``; ``kidneycohort equations --sources`` lists them).
"""

from __future__ import annotations

import math
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
    "ADULT_Q_FEMALE",
    "ADULT_Q_MALE",
    "AGE_FACTOR",
    "AGE_TERM_FROM",
    "CONSTANT",
    "FAS_CR",
    "INDEXED",
    "SPECS",
    "fas_cr",
]

INDEXED = "mL/min/1.73 m2"
CONSTANT: Final = 107.3
AGE_FACTOR: Final = 0.988  # per year above AGE_TERM_FROM
AGE_TERM_FROM: Final = 40.0  # years
ADULT_Q_FEMALE: Final = 0.70  # mg/dL
ADULT_Q_MALE: Final = 0.90


def _kernel(*, creatinine_mg_dl: FloatArray, age: FloatArray, female: BoolArray) -> FloatArray:
    q = np.where(female, ADULT_Q_FEMALE, ADULT_Q_MALE)
    return (
        CONSTANT
        * q
        / creatinine_mg_dl
        * np.exp(np.maximum(age - AGE_TERM_FROM, 0.0) * math.log(AGE_FACTOR))
    )


def fas_cr(creatinine_mg_dl: ArrayLike, age: ArrayLike, sex: ArrayLike) -> FloatArray | float:
    r"""Full Age Spectrum creatinine equation, adult Q (Pottel et al., NDT 2016 [1]).

    .. math::
        eGFR = \frac{107.3}{S_{cr}/Q} \times 0.988^{\max(age - 40,\,0)}

    Q = 0.70 mg/dL (female), 0.90 mg/dL (male), the adult medians. The paediatric and
    adolescent Q values (a table by age or a height polynomial in ref. [1]) are not
    implemented, so the validated range here starts at 20 years; use ``ekfc_cr`` or
    ``ckid_u25_cr`` for younger people.

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
    return call_formula(FAS_CR, creatinine_mg_dl=creatinine_mg_dl, age=age, sex=sex)


def _shape(*, female: BoolArray, **_: Any) -> tuple[Any, Any, Any]:
    return np.where(female, ADULT_Q_FEMALE, ADULT_Q_MALE), -1.0, -1.0


FAS_CR = EquationSpec(
    id="fas_cr",
    label="Full Age Spectrum creatinine (adult Q)",
    function=fas_cr,
    kernel=_kernel,
    inputs=("creatinine_mg_dl", "age", "sex"),
    output_unit=INDEXED,
    min_age=20,
    max_age=None,
    population="Adults (20+) with the adult Q; European development data (healthy and CKD); "
    "paediatric Q not implemented",
    reference="Pottel H, Hoste L, Dubourg L, et al. Nephrol Dial Transplant. 2016;31(5):798-806",
    doi="10.1093/ndt/gfv454",
    kind="creatinine",
    creatinine_shape=_shape,
)

SPECS = (FAS_CR,)
