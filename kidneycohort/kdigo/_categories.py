"""KDIGO 2012 GFR and albuminuria categories and the prognosis grid (KDIGO 2012 Tables 5-6,
Figure 2); the thresholds apply to unrounded values (see the package docstring).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Final

import numpy as np
import numpy.typing as npt
import polars as pl

from kidneycohort.errors import UnknownUnitError, did_you_mean
from kidneycohort.units import normalize_unit

if TYPE_CHECKING:
    from polars.expr.whenthen import ChainedThen, Then

__all__ = [
    "A_CATEGORIES",
    "A_UPPER_BOUNDS",
    "G_CATEGORIES",
    "G_LOWER_BOUNDS",
    "RISK_GRID",
    "RISK_LEVELS",
    "_RANK",
    "_code",
    "_reported_in_mmol",
    "albuminuria_category",
    "albuminuria_category_expr",
    "gfr_category",
    "gfr_category_expr",
    "kdigo_risk_expr",
    "risk_grid",
]

G_CATEGORIES: Final = ("G1", "G2", "G3a", "G3b", "G4", "G5")


A_CATEGORIES: Final = ("A1", "A2", "A3")


G_LOWER_BOUNDS: Final[dict[str, float]] = {
    "G1": 90.0,
    "G2": 60.0,
    "G3a": 45.0,
    "G3b": 30.0,
    "G4": 15.0,
    "G5": 0.0,
}
"""Lower bound (inclusive) of each G category, mL/min/1.73 m2 (KDIGO 2012 Table 5)."""


A_UPPER_BOUNDS: Final[dict[str, dict[str, float]]] = {
    "mg/g": {"A1": 30.0, "A2": 300.0},
    "mg/mmol": {"A1": 3.0, "A2": 30.0},
}
"""A1 is below the first bound; A2 runs up to and including the second (KDIGO 2012 Table 6)."""


RISK_LEVELS: Final = ("low", "moderately increased", "high", "very high")


# KDIGO 2012 Figure 2 (prognosis of CKD by GFR and albuminuria category): green, yellow,
# orange and red cells; the 2024 guideline keeps the same grid.
RISK_GRID: Final[dict[tuple[str, str], str]] = {
    ("G1", "A1"): "low",
    ("G1", "A2"): "moderately increased",
    ("G1", "A3"): "high",
    ("G2", "A1"): "low",
    ("G2", "A2"): "moderately increased",
    ("G2", "A3"): "high",
    ("G3a", "A1"): "moderately increased",
    ("G3a", "A2"): "high",
    ("G3a", "A3"): "very high",
    ("G3b", "A1"): "high",
    ("G3b", "A2"): "very high",
    ("G3b", "A3"): "very high",
    ("G4", "A1"): "very high",
    ("G4", "A2"): "very high",
    ("G4", "A3"): "very high",
    ("G5", "A1"): "very high",
    ("G5", "A2"): "very high",
    ("G5", "A3"): "very high",
}


_RANK: Final[dict[str, int]] = {
    **{c: i for i, c in enumerate(G_CATEGORIES, start=1)},
    **{c: i for i, c in enumerate(A_CATEGORIES, start=1)},
}


# integer codes of per-result levels (categories, and the CKD "yes"/"no" levels)
_LEVEL_CODES: Final[dict[str, int]] = {**_RANK, "no": 0, "yes": 1}


def _code(level: pl.Expr) -> pl.Expr:
    return level.replace_strict(_LEVEL_CODES, default=None, return_dtype=pl.Int8)


_NOISE_DECIMALS: Final = 9


# ---- categories on values ---------------------------------------------------------------
def _as_expr(value: pl.Expr | str) -> pl.Expr:
    return pl.col(value) if isinstance(value, str) else value


def gfr_category_expr(egfr: pl.Expr | str) -> pl.Expr:
    """Polars expression giving the KDIGO G category of an eGFR column.

    .. math::

        G(x) = \\begin{cases} \\mathrm{G1} & x \\ge 90 \\\\ \\mathrm{G2} & 60 \\le x < 90 \\\\
        \\mathrm{G3a} & 45 \\le x < 60 \\\\ \\mathrm{G3b} & 30 \\le x < 45 \\\\
        \\mathrm{G4} & 15 \\le x < 30 \\\\ \\mathrm{G5} & 0 \\le x < 15 \\end{cases}

    Null, NaN and negative values give null. See the module docstring for why 59.5 is
    G3a.
    """
    x = _as_expr(egfr).cast(pl.Float64).fill_nan(None).round(_NOISE_DECIMALS)
    out: Then | ChainedThen = pl.when(x.is_null() | (x < 0)).then(pl.lit(None, dtype=pl.String))
    for category in G_CATEGORIES:
        out = out.when(x >= G_LOWER_BOUNDS[category]).then(pl.lit(category))
    return out.otherwise(pl.lit(None, dtype=pl.String))


def albuminuria_category_expr(uacr: pl.Expr | str, unit: str = "mg/g") -> pl.Expr:
    """Polars expression giving the KDIGO A category of a UACR column in ``unit``.

    .. math::

        A(u) = \\begin{cases} \\mathrm{A1} & u < 30 \\\\ \\mathrm{A2} & 30 \\le u \\le 300
        \\\\ \\mathrm{A3} & u > 300 \\end{cases} \\quad (\\text{mg/g; } 3, 30 \\text{ in mg/mmol})

    Parameters
    ----------
    uacr : polars expression or column name
    unit : {"mg/g", "mg/mmol"} (other spellings of these are accepted)
    """
    bounds = A_UPPER_BOUNDS[_albuminuria_unit(unit)]
    u = _as_expr(uacr).cast(pl.Float64).fill_nan(None).round(_NOISE_DECIMALS)
    return (
        pl.when(u.is_null() | (u < 0))
        .then(pl.lit(None, dtype=pl.String))
        .when(u < bounds["A1"])
        .then(pl.lit("A1"))
        .when(u <= bounds["A2"])
        .then(pl.lit("A2"))
        .otherwise(pl.lit("A3"))
    )


def _albuminuria_unit(unit: str) -> str:
    try:
        key = normalize_unit(unit)
    except UnknownUnitError:
        key = unit
    if key in ("mg/g", "ug/mg"):
        return "mg/g"
    if key in ("mg/mmol", "g/mol"):
        return "mg/mmol"
    raise UnknownUnitError(
        f"albuminuria category: unit {unit!r} is not mg/g or mg/mmol"
        f"{did_you_mean(unit, A_UPPER_BOUNDS)}; convert the values first"
    )


def _classify(values: npt.ArrayLike, expr: pl.Expr) -> npt.NDArray[np.object_]:
    series = pl.Series("v", np.atleast_1d(np.asarray(values, dtype=np.float64)))
    return pl.DataFrame([series]).select(expr.alias("c"))["c"].to_numpy()


def gfr_category(egfr: npt.ArrayLike) -> npt.NDArray[np.object_]:
    """KDIGO G category of each value (array in, object array of str/None out).

    >>> gfr_category([90, 89.99, 60, 59.5, 45, 44.9, 30, 15, 14.9]).tolist()
    ['G1', 'G2', 'G2', 'G3a', 'G3a', 'G3b', 'G3b', 'G4', 'G5']
    """
    return _classify(egfr, gfr_category_expr("v"))


def albuminuria_category(uacr: npt.ArrayLike, unit: str = "mg/g") -> npt.NDArray[np.object_]:
    """KDIGO A category of each UACR value in ``unit`` (``"mg/g"`` or ``"mg/mmol"``).

    >>> albuminuria_category([29.9, 30, 300, 300.1]).tolist()
    ['A1', 'A2', 'A2', 'A3']
    >>> albuminuria_category([2.9, 3, 30, 31], unit="mg/mmol").tolist()
    ['A1', 'A2', 'A2', 'A3']
    """
    return _classify(uacr, albuminuria_category_expr("v", unit))


def risk_grid() -> pl.DataFrame:
    """The KDIGO 2012 prognosis grid: ``g_category``, ``a_category``, ``risk`` (18 rows)."""
    return pl.DataFrame(
        {
            "g_category": [g for g, _ in RISK_GRID],
            "a_category": [a for _, a in RISK_GRID],
            "risk": list(RISK_GRID.values()),
        }
    )


def kdigo_risk_expr(g_category: pl.Expr | str, a_category: pl.Expr | str) -> pl.Expr:
    """Polars expression: the prognosis grid's risk for a G and an A category column."""
    cell = pl.concat_str([_as_expr(g_category), _as_expr(a_category)], separator="|")
    mapping = {f"{g}|{a}": risk for (g, a), risk in RISK_GRID.items()}
    return cell.replace_strict(mapping, default=None, return_dtype=pl.String)


def _reported_in_mmol(unit: str) -> bool:
    try:
        return normalize_unit(unit) in ("mg/mmol", "g/mol")
    except UnknownUnitError:
        return False
