"""Analytes, unit spellings and conversions.

Standard units used inside kidneycohort:

* serum creatinine: mg/dL (1 mg/dL = 88.4 umol/L = 0.0884 mmol/L; 10 000 / 113.12,
  the molar mass of creatinine in g/mol),
* serum cystatin C: mg/L (reported in mg/L almost everywhere; 1 mg/dL = 10 mg/L),
* urine albumin/creatinine ratio (UACR): mg/g (1 mg/mmol = 8.84 mg/g; 1 g/g = 1000 mg/g).

The two kidney-specific factors, :data:`CREATININE_UMOL_PER_MG_DL` and
:data:`UACR_MG_G_PER_MG_MMOL`, are registered with their provenance in
:mod:`kidneycohort.provenance` (ids ``units.*``); the others are SI prefixes.

Spellings are normalised before lookup: case, spaces, the micro sign (U+00B5) and the
Greek small mu (U+03BC) are folded to ``u``, and UCUM codes (``umol/L``, ``mg/dL``,
``mg/mmol{creat}``, ``mg/g{creat}``) are accepted.
"""

from __future__ import annotations

import re
from typing import Final

import numpy as np
import numpy.typing as npt
import polars as pl

from kidneycohort.errors import UnknownUnitError, did_you_mean

__all__ = [
    "ANALYTES",
    "CREATININE_UMOL_PER_MG_DL",
    "STANDARD_UNIT",
    "UACR_MG_G_PER_MG_MMOL",
    "conversion_factor",
    "creatinine_mg_dl_to_umol",
    "creatinine_umol_to_mg_dl",
    "fold_unit_expr",
    "normalize_unit",
    "to_standard",
    "uacr_mg_mmol_to_mg_g",
    "unit_factor_table",
]

CREATININE_UMOL_PER_MG_DL: Final = 88.4
UACR_MG_G_PER_MG_MMOL: Final = 8.84

ANALYTES: Final = ("creatinine", "cystatin_c", "uacr")

STANDARD_UNIT: Final[dict[str, str]] = {
    "creatinine": "mg/dL",
    "cystatin_c": "mg/L",
    "uacr": "mg/g",
}

# factor that turns one reported unit into the standard unit of the analyte
_FACTORS: Final[dict[str, dict[str, float]]] = {
    "creatinine": {
        "mg/dl": 1.0,
        "umol/l": 1.0 / CREATININE_UMOL_PER_MG_DL,
        "mmol/l": 1000.0 / CREATININE_UMOL_PER_MG_DL,
        "mg/l": 0.1,
    },
    "cystatin_c": {
        "mg/l": 1.0,
        "mg/dl": 10.0,
        "ug/ml": 1.0,
        "ng/ml": 0.001,
    },
    "uacr": {
        "mg/g": 1.0,
        "ug/mg": 1.0,
        "g/g": 1000.0,
        "mg/mmol": UACR_MG_G_PER_MG_MMOL,
        "g/mol": UACR_MG_G_PER_MG_MMOL,
    },
}

_ALIASES: Final[dict[str, str]] = {
    "mg/dl": "mg/dl",
    "mg/100ml": "mg/dl",
    "mg%": "mg/dl",
    "umol/l": "umol/l",
    "micromol/l": "umol/l",
    "mcmol/l": "umol/l",
    "mmol/l": "mmol/l",
    "mg/l": "mg/l",
    "ug/ml": "ug/ml",
    "mcg/ml": "ug/ml",
    "ng/ml": "ng/ml",
    "mg/g": "mg/g",
    "mg/gcreat": "mg/g",
    "mg/gcr": "mg/g",
    "mg/gcreatinine": "mg/g",
    "ug/mg": "ug/mg",
    "ug/mgcreat": "ug/mg",
    "mcg/mg": "ug/mg",
    "g/g": "g/g",
    "g/gcreat": "g/g",
    "mg/mmol": "mg/mmol",
    "mg/mmolcreat": "mg/mmol",
    "mg/mmolcr": "mg/mmol",
    "mg/mmolcreatinine": "mg/mmol",
    "g/mol": "g/mol",
    "g/molcreat": "g/mol",
}

_BRACES = re.compile(r"\{([^}]*)\}")


def normalize_unit(unit: str) -> str:
    """Fold a reported unit spelling to kidneycohort's lower-case key.

    ``"µmol/L"``, ``"μmol/l"``, ``" umol / L "`` -> ``"umol/l"``; UCUM annotations in
    braces (``mg/mmol{creat}``) are kept as a suffix so that they still match.

    Raises
    ------
    UnknownUnitError
        When the spelling is not one kidneycohort knows.
    """
    key = _fold(unit)
    if key in _ALIASES:
        return _ALIASES[key]
    raise UnknownUnitError(
        f"unknown unit {unit!r}{did_you_mean(key, _ALIASES)}; known: "
        + ", ".join(sorted(set(_ALIASES.values())))
    )


def _fold(unit: str) -> str:
    s = str(unit).strip().lower().replace("\u00b5", "u").replace("\u03bc", "u")
    s = _BRACES.sub(lambda m: m.group(1), s)
    return re.sub(r"\s+", "", s)


def conversion_factor(analyte: str, unit: str) -> float:
    """Multiplier turning a value in ``unit`` into the analyte's standard unit.

    >>> round(conversion_factor("creatinine", "µmol/L") * 88.4, 12)
    1.0
    >>> conversion_factor("uacr", "mg/mmol")
    8.84
    """
    if analyte not in _FACTORS:
        raise UnknownUnitError(f"unknown analyte {analyte!r}{did_you_mean(analyte, ANALYTES)}")
    key = normalize_unit(unit)
    try:
        return _FACTORS[analyte][key]
    except KeyError:
        raise UnknownUnitError(
            f"unit {unit!r} is not a unit of {analyte}; known: "
            + ", ".join(sorted(_FACTORS[analyte]))
        ) from None


def to_standard(
    value: npt.ArrayLike | float, analyte: str, unit: str
) -> npt.NDArray[np.float64] | float:
    """Convert ``value`` in ``unit`` to the analyte's standard unit (see module doc)."""
    factor = conversion_factor(analyte, unit)
    if np.isscalar(value):
        return float(value) * factor  # type: ignore[arg-type]
    return np.asarray(value, dtype=np.float64) * factor


def creatinine_umol_to_mg_dl(value: npt.ArrayLike) -> npt.NDArray[np.float64]:
    """Creatinine umol/L -> mg/dL (divide by 88.4)."""
    return np.asarray(value, dtype=np.float64) / CREATININE_UMOL_PER_MG_DL


def creatinine_mg_dl_to_umol(value: npt.ArrayLike) -> npt.NDArray[np.float64]:
    """Creatinine mg/dL -> umol/L (multiply by 88.4)."""
    return np.asarray(value, dtype=np.float64) * CREATININE_UMOL_PER_MG_DL


def uacr_mg_mmol_to_mg_g(value: npt.ArrayLike) -> npt.NDArray[np.float64]:
    """UACR mg/mmol -> mg/g (multiply by 8.84)."""
    return np.asarray(value, dtype=np.float64) * UACR_MG_G_PER_MG_MMOL


def unit_factor_table() -> pl.DataFrame:
    """Every known (analyte, spelling key) with its factor to the standard unit.

    Used by the harmonise stage to convert a whole column with one join instead of a
    Python call per row.
    """
    rows = [
        (analyte, alias, canonical, _FACTORS[analyte][canonical], STANDARD_UNIT[analyte])
        for analyte in ANALYTES
        for alias, canonical in _ALIASES.items()
        if canonical in _FACTORS[analyte]
    ]
    return pl.DataFrame(
        rows,
        schema={
            "analyte": pl.String,
            "unit_key": pl.String,
            "unit_canonical": pl.String,
            "unit_factor": pl.Float64,
            "standard_unit": pl.String,
        },
        orient="row",
    )


def fold_unit_expr(column: str | pl.Expr) -> pl.Expr:
    """Polars expression applying :func:`normalize_unit`'s folding (not the lookup)."""
    expr = pl.col(column) if isinstance(column, str) else column
    return (
        expr.cast(pl.String)
        .str.strip_chars()
        .str.to_lowercase()
        .str.replace_all("\u00b5", "u", literal=True)
        .str.replace_all("\u03bc", "u", literal=True)
        .str.replace_all(r"[{}]", "")
        .str.replace_all(r"\s+", "")
    )
