"""Body-surface area (DuBois & DuBois; Mosteller) and de-indexing of eGFR.

Indexed eGFR (mL/min/1.73 m²) describes kidney function relative to a standard body
size; drug dosing needs the absolute filtration rate in mL/min, which is the indexed
value times the person's BSA over 1.73 m².

References
----------
.. [1] Du Bois D, Du Bois EF. A formula to estimate the approximate surface area if
   height and weight be known. Arch Intern Med. 1916;17(6):863-871.
   doi:10.1001/archinte.1916.00080130010002
.. [2] Mosteller RD. Simplified calculation of body-surface area. N Engl J Med.
   1987;317(17):1098. doi:10.1056/NEJM198710223171717

The coefficients are the module constants below; their publication and whether each was
re-read or recalled are recorded in :mod:`kidneycohort.provenance` (ids ``bsa.*``;
``kidneycohort equations --sources`` lists them).
"""

from __future__ import annotations

from typing import Final, NamedTuple

import numpy as np

from kidneycohort.equations._core import ArrayLike, FloatArray, as_float_array, finish

__all__ = [
    "DUBOIS",
    "MOSTELLER_DIVISOR",
    "STANDARD_BSA_M2",
    "DuBoisCoefficients",
    "bsa_dubois",
    "bsa_mosteller",
    "deindex_egfr",
    "index_gfr",
]

STANDARD_BSA_M2: Final = 1.73


class DuBoisCoefficients(NamedTuple):
    """BSA (m²) = ``constant`` × weight (kg) ^ ``weight_exponent``
    × height (cm) ^ ``height_exponent``."""

    constant: float
    weight_exponent: float
    height_exponent: float


DUBOIS: Final = DuBoisCoefficients(constant=0.007184, weight_exponent=0.425, height_exponent=0.725)
MOSTELLER_DIVISOR: Final = 3600.0  # cm·kg per m⁴


def _positive(*arrays: FloatArray) -> np.ndarray:
    ok = np.ones(np.broadcast_shapes(*(a.shape for a in arrays)), dtype=bool)
    for a in arrays:
        ok &= np.isfinite(a) & (a > 0)
    return ok


def bsa_dubois(height_cm: ArrayLike, weight_kg: ArrayLike) -> FloatArray | float:
    r"""Body-surface area by DuBois & DuBois (1916) [1], in m².

    .. math:: BSA = 0.007184 \times weight\ (kg)^{0.425} \times height\ (cm)^{0.725}

    NaN where height or weight is missing or not positive.
    """
    h, w = as_float_array(height_cm, "height_cm"), as_float_array(weight_kg, "weight_kg")
    ok = _positive(h, w)
    with np.errstate(all="ignore"):
        bsa = DUBOIS.constant * w**DUBOIS.weight_exponent * h**DUBOIS.height_exponent
    return finish(np.where(ok, bsa, np.nan), h.ndim == 0 and w.ndim == 0)


def bsa_mosteller(height_cm: ArrayLike, weight_kg: ArrayLike) -> FloatArray | float:
    r"""Body-surface area by Mosteller (1987) [2], in m².

    .. math:: BSA = \sqrt{\frac{height\ (cm) \times weight\ (kg)}{3600}}

    NaN where height or weight is missing or not positive.
    """
    h, w = as_float_array(height_cm, "height_cm"), as_float_array(weight_kg, "weight_kg")
    ok = _positive(h, w)
    with np.errstate(all="ignore"):
        bsa = np.sqrt(h * w / MOSTELLER_DIVISOR)
    return finish(np.where(ok, bsa, np.nan), h.ndim == 0 and w.ndim == 0)


def deindex_egfr(egfr: ArrayLike, bsa_m2: ArrayLike) -> FloatArray | float:
    r"""Indexed eGFR (mL/min/1.73 m²) to absolute GFR (mL/min) for drug dosing.

    .. math:: GFR_{mL/min} = eGFR \times \frac{BSA}{1.73}

    Common practice (KDIGO 2012 CKD guideline, drug-dosing chapter). NaN where either
    input is missing or not positive.
    """
    e, b = as_float_array(egfr, "egfr"), as_float_array(bsa_m2, "bsa_m2")
    ok = _positive(e, b)
    return finish(np.where(ok, e * b / STANDARD_BSA_M2, np.nan), e.ndim == 0 and b.ndim == 0)


def index_gfr(gfr_ml_min: ArrayLike, bsa_m2: ArrayLike) -> FloatArray | float:
    r"""Absolute GFR or clearance (mL/min) to indexed (mL/min/1.73 m²).

    .. math:: GFR_{indexed} = GFR \times \frac{1.73}{BSA}
    """
    g, b = as_float_array(gfr_ml_min, "gfr_ml_min"), as_float_array(bsa_m2, "bsa_m2")
    ok = _positive(g, b)
    return finish(np.where(ok, g * STANDARD_BSA_M2 / b, np.nan), g.ndim == 0 and b.ndim == 0)
