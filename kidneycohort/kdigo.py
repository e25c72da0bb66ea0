"""KDIGO 2012 categories, the prognosis grid, sustained categories, transitions, progression.

Categories (KDIGO 2012 CKD guideline, Tables 5 and 6 and Figure 2; unchanged in 2024)
---------------------------------------------------------------------------------------
GFR (mL/min/1.73 m2): G1 >= 90, G2 60-89, G3a 45-59, G3b 30-44, G4 15-29, G5 < 15.
Albuminuria (UACR): A1 < 30 mg/g (< 3 mg/mmol), A2 30-300 mg/g (3-30 mg/mmol),
A3 > 300 mg/g (> 30 mg/mmol). The bounds, the prognosis grid and the defaults below that
come from the guideline are registered with their provenance in
:mod:`kidneycohort.provenance` (ids ``kdigo.*``).

**Non-integer eGFR.** The guideline writes the G ranges with integers (60-89) but
defines them by thresholds: CKD is "GFR < 60", G1 is ">= 90", G5 "< 15". We apply
the thresholds to the unrounded value, so each category is a half-open interval
``[lower, next lower)``: 59.5 is **G3a** (it is below 60), 89.99 is G2, 90 is G1.
Rounding first would make the category depend on the reporting precision of the
laboratory or equation, and 59.5 would become "no reduced GFR" although it is below the
guideline's CKD threshold. Values are compared after rounding to 9 decimal places only
to remove floating-point noise (an eGFR computed as 59.9999999999 is 60).

**Albuminuria.** The boundaries 30 and 300 mg/g belong to A2 ("30-300"); A3 is strictly
above 300. The mg/mmol thresholds (3 and 30) are the guideline's own rounded
equivalents, not exact conversions (3 mg/mmol = 26.5 mg/g), so a result *reported* in
mg/mmol is classified on the mg/mmol thresholds by default
(``SustainRule.albuminuria_thresholds="as_reported"``); ``"mg/g"`` classifies every
result on its mg/g value.

Sustained categories ("stages")
-------------------------------
CKD requires abnormality for more than 3 months, so a single low value is not a
category change. A result is **confirmed** when the first usable result of the same
patient, equation and axis at least ``confirm_after_days`` later (default 90) is in the
same category (and, optionally, at most ``confirm_within_days`` later). Results in
between are not consulted. Confirmed results, in time order, form the sustained
sequence; consecutive confirmed results of one category make one stage.

:func:`sustained_stages` returns one row per stage:

============== ======== =====================================================================
column         type     meaning
============== ======== =====================================================================
patient_id     str
equation       str      eGFR equation; null on the albuminuria axis
axis           str      ``"G"`` or ``"A"``
stage_number   i32      0 = the period before the first confirmed category (category null);
                        1, 2, ... the sustained stages in time order
category       str      G1 ... G5 or A1 ... A3 (null for stage 0)
start_date     date     date of the first result of the stage (its onset)
start_years    f64      years from index of that result
confirmed_date date     date of the result that confirmed the onset
end_date       date     start of the next stage, or the last usable result for the last stage
end_years      f64      as ``end_date``, in years from index
n_results      i32      usable results from start to end (end excluded unless last stage)
is_last        bool     the stage in force at the last usable result
============== ======== =====================================================================

From the stages come the transitions (``schemas.TRANSITIONS``), the transition count
matrix with rates per 100 person-years spent in the "from" category, and the time to
first worsening from index.

Progression (KDIGO 2012, recommendation 2.1.3)
----------------------------------------------
A **certain drop** is a drop in G category accompanied by a decline of at least 25 % from
baseline eGFR; here the first result after index that is confirmed in a G category worse
than the baseline category and is at most 75 % of the baseline value. **Rapid
progression** is a sustained decline of more than 5 mL/min/1.73 m2/yr, taken from
:func:`kidneycohort.slopes.egfr_slopes` (``rapid_decline``).

References
----------
.. [1] Kidney Disease: Improving Global Outcomes (KDIGO) CKD Work Group. KDIGO 2012
   clinical practice guideline for the evaluation and management of chronic kidney
   disease. Kidney Int Suppl 2013;3:1-150. doi:10.1038/kisup.2012.73
.. [2] KDIGO 2024 clinical practice guideline for the evaluation and management of
   chronic kidney disease. Kidney Int 2024;105(4S):S117-S314.
"""

from __future__ import annotations

import logging
from typing import Final, Literal

import numpy as np
import numpy.typing as npt
import polars as pl
from pydantic import Field

from kidneycohort import schemas
from kidneycohort._frames import FrameLike, conform, require_columns, to_polars
from kidneycohort._rules import RuleModel
from kidneycohort.aki import ValueFilter, apply_value_filter, usable_egfr
from kidneycohort.baseline import uacr_timeline
from kidneycohort.errors import InputDataError, UnknownUnitError, did_you_mean
from kidneycohort.units import UACR_MG_G_PER_MG_MMOL, normalize_unit

logger = logging.getLogger(__name__)

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

STAGES: Final[dict[str, pl.DataType]] = {
    "patient_id": pl.String(),
    "equation": pl.String(),
    "axis": pl.String(),
    "stage_number": pl.Int32(),
    "category": pl.String(),
    "start_date": pl.Date(),
    "start_years": pl.Float64(),
    "confirmed_date": pl.Date(),
    "end_date": pl.Date(),
    "end_years": pl.Float64(),
    "n_results": pl.Int32(),
    "is_last": pl.Boolean(),
}
"""Layout of :func:`sustained_stages` output (see the module docstring)."""

_RANK: Final[dict[str, int]] = {
    **{c: i for i, c in enumerate(G_CATEGORIES, start=1)},
    **{c: i for i, c in enumerate(A_CATEGORIES, start=1)},
}
_KEYS: Final = ["patient_id", "_eq", "axis"]
# integer codes of per-result levels (categories, and the CKD "yes"/"no" levels)
_LEVEL_CODES: Final[dict[str, int]] = {**_RANK, "no": 0, "yes": 1}


def _code(level: pl.Expr) -> pl.Expr:
    return level.replace_strict(_LEVEL_CODES, default=None, return_dtype=pl.Int8)


_NOISE_DECIMALS: Final = 9


class SustainRule(RuleModel):
    """When a category counts as sustained (config key ``sustain``)."""

    confirm_after_days: float = Field(
        default=90.0,
        ge=0,
        description=(
            "A result counts when the first result at least this many days later is in the "
            "same category (KDIGO: abnormality for more than 3 months)."
        ),
    )
    confirm_within_days: float | None = Field(
        default=None,
        gt=0,
        description="If set, the confirming result must come at most this many days later.",
    )
    albuminuria_thresholds: Literal["as_reported", "mg/g"] = Field(
        default="as_reported",
        description=(
            "Classify UACR reported in mg/mmol on the mg/mmol thresholds (3, 30) "
            "('as_reported') or every result on its mg/g value ('mg/g')."
        ),
    )


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
    out = pl.when(x.is_null() | (x < 0)).then(pl.lit(None, dtype=pl.String))
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


# ---- per-result categories and confirmation -------------------------------------------------
def _albuminuria_results(
    labs: FrameLike, patients: FrameLike | None, rule: SustainRule, value_filter: ValueFilter | None
) -> pl.DataFrame:
    uacr = uacr_timeline(labs, patients)
    if value_filter is not None and value_filter.exclude_settings:
        uacr = apply_value_filter(uacr, value_filter.model_copy(update={"exclude_aki": False}))
    else:
        uacr = uacr.with_columns(excluded=pl.lit(False))
    units = [u for u in uacr["reported_unit"].unique().to_list() if u is not None]
    per_mmol = {u: _reported_in_mmol(u) for u in units}
    in_mmol = pl.lit(False)
    if rule.albuminuria_thresholds == "as_reported" and any(per_mmol.values()):
        in_mmol = (
            pl.col("reported_unit")
            .replace_strict(per_mmol, default=False, return_dtype=pl.Boolean)
            .fill_null(False)
        )
    value = pl.col("uacr_mg_g")
    category = (
        pl.when(in_mmol)
        .then(albuminuria_category_expr(value / UACR_MG_G_PER_MG_MMOL, "mg/mmol"))
        .otherwise(albuminuria_category_expr(value, "mg/g"))
    )
    return uacr.select(
        "patient_id",
        pl.lit(None, dtype=pl.String).alias("equation"),
        pl.lit("A").alias("axis"),
        "sample_date",
        "years_from_index",
        value.alias("value"),
        category.alias("category"),
        "excluded",
    )


def _reported_in_mmol(unit: str) -> bool:
    try:
        return normalize_unit(unit) in ("mg/mmol", "g/mol")
    except UnknownUnitError:
        return False


def _gfr_results(egfr: FrameLike, value_filter: ValueFilter | None) -> pl.DataFrame:
    df = usable_egfr(egfr, value_filter)
    return df.select(
        "patient_id",
        "equation",
        pl.lit("G").alias("axis"),
        (pl.col("sample_date") if "sample_date" in df.columns else pl.lit(None))
        .cast(pl.Date)
        .alias("sample_date"),
        "years_from_index",
        pl.col("egfr").alias("value"),
        gfr_category_expr("egfr").alias("category"),
        "excluded",
    )


# Packed integer sort keys stay below 2**62, inside a signed 64-bit integer.
_PACKED_KEY_BITS: Final = 62
# Times are compared in whole microdays: ``_days`` is already rounded to 6 decimals.
_MICRODAYS: Final = 1_000_000
# Sort code of a missing level (the level codes run from 0 to 6).
_NO_LEVEL: Final = 7


def _bits(n: int) -> int:
    """Number of bits that hold every integer from 0 to ``n``."""
    return max(int(n), 0).bit_length()


def _sort_sequences(df: pl.DataFrame) -> pl.DataFrame:
    """Sort by patient, equation, axis, time and level code; add ``_gid`` and ``_t``.

    ``df`` holds the integer keys ``_pc`` and ``_ec`` (lexical ranks of patient and
    equation), ``_ac`` (axis G) and ``_days``. ``_gid`` numbers the patient x equation x
    axis sequences; ``_t`` is the time in microdays from the earliest result (missing
    times last). The five keys are packed into one 64-bit integer when they fit: sorting
    one integer column is several times faster than sorting strings or several columns.
    Otherwise the integer columns are sorted as they are (same order).
    """
    df = df.with_columns(
        _t=(pl.col("_days") * _MICRODAYS).round().cast(pl.Int64),
        _lc=pl.col("_lv").cast(pl.Int64).fill_null(_NO_LEVEL),
    )
    pc_max, ec_max, t_min, t_max = df.select(
        pl.col("_pc").max(),
        pl.col("_ec").max(),
        pl.col("_t").min().alias("_t_min"),
        pl.col("_t").max().alias("_t_max"),
    ).row(0)
    ec_span = (ec_max or 0) + 1
    t_min = t_min or 0
    t_missing = (t_max or 0) - t_min + 1
    df = df.with_columns(
        _seq=(pl.col("_pc") * ec_span + pl.col("_ec")) * 2 + pl.col("_ac").cast(pl.Int64),
        _t=(pl.col("_t") - t_min).fill_null(t_missing),
    )
    seq_bits = _bits(((pc_max or 0) + 1) * ec_span * 2)
    t_bits = _bits(t_missing)
    if seq_bits + t_bits + 3 <= _PACKED_KEY_BITS:
        packed = (pl.col("_seq") * (1 << t_bits) + pl.col("_t")) * 8 + pl.col("_lc")
        df = df.sort(packed)
    else:
        df = df.sort("_seq", "_t", "_lc")
    new_sequence = (pl.col("_seq") != pl.col("_seq").shift(1)).fill_null(True)
    return df.with_columns(_gid=new_sequence.cast(pl.Int64).cum_sum()).drop(
        "_pc", "_ec", "_lc", "_seq"
    )


def _merge_ties(candidates: pl.DataFrame, right: pl.DataFrame, level: str) -> pl.DataFrame:
    """Give each tied time point of ``right`` the combined level, date and years of its rows.

    ``right`` holds the first row of every time point of ``candidates`` in order, so the
    time point numbered ``k`` is row ``k`` of ``right``; only tied rows are grouped.
    """
    tie = pl.col("_tie")
    tied = candidates.with_columns(_tp=(~tie).cast(pl.Int64).cum_sum() - 1).filter(
        tie | tie.shift(-1).fill_null(False)
    )
    merged = tied.group_by("_tp").agg(
        _value=pl.col("value").mean(),
        _lo=pl.col("_lv").min(),
        _hi=pl.col("_lv").max(),
        _g_axis=pl.col("_ac").first(),
        _date=pl.col("sample_date").min(),
        _years=pl.col("years_from_index").min(),
    )
    combined = pl.col("_lo")
    if level == "category":
        # tied values in different categories: the category of their mean value
        combined = (
            pl.when(pl.col("_lo") == pl.col("_hi"))
            .then(pl.col("_lo"))
            .when("_g_axis")
            .then(_code(gfr_category_expr("_value")))
            .otherwise(_code(albuminuria_category_expr("_value")))
        )
    merged = merged.with_columns(_level=combined.cast(pl.Int8))
    at = merged["_tp"]
    columns = []
    for column, source in (
        ("_lv", "_level"),
        ("sample_date", "_date"),
        ("years_from_index", "_years"),
    ):
        values = right[column].clone()
        values.scatter(at, merged[source].cast(values.dtype))
        columns.append(values)
    return right.with_columns(columns)


_LABELS: Final = ("patient_id", "equation", "axis", "category")


def _confirm(
    results: pl.DataFrame, rule: SustainRule, level: str = "category", labels: bool = True
) -> pl.DataFrame:
    """Add ``used``, ``confirmed``, ``confirm_date``, ``confirm_years`` on the ``level`` column.

    Returns the rows sorted by patient, equation, axis, time and level (lexical order of
    the keys), with ``_row`` (input position), ``_gid`` (an integer id of the patient x
    equation x axis sequence), ``_t`` (time in microdays) and ``_lv`` (level code) so
    that later steps run over integer keys. Only numbers are sorted; the text columns
    (:data:`_LABELS`, ``_eq`` and the ``level`` column) are attached afterwards, or left
    out with ``labels=False`` for callers that fetch them by ``_row`` for a few rows.
    """
    keyed = results.select(
        # lexical ranks of the sequence keys, integer code of the level: integer sorts,
        # comparisons and reductions are cheap
        _pc=pl.col("patient_id").rank("dense").fill_null(0).cast(pl.Int64),
        _ec=pl.col("equation").fill_null("").rank("dense").cast(pl.Int64),
        _ac=pl.col("axis") == "G",
        _days=(pl.col("years_from_index") * schemas.DAYS_PER_YEAR).round(6),
        used=pl.col(level).is_not_null()
        & ~pl.col("excluded")
        & pl.col("years_from_index").is_not_null(),
        _lv=_code(pl.col(level)),
        value=pl.col("value"),
        sample_date=pl.col("sample_date"),
        years_from_index=pl.col("years_from_index"),
    ).with_row_index("_row")
    df = _sort_sequences(keyed)
    # one confirming candidate per time point: ties at the same time use their mean value,
    # so the answer does not depend on row order (only the tied rows are grouped)
    tie = (pl.col("_gid") == pl.col("_gid").shift(1)) & (pl.col("_t") == pl.col("_t").shift(1))
    candidates = (
        df.filter("used")
        .select("_gid", "_t", "_lv", "value", "_ac", "sample_date", "years_from_index")
        .with_columns(_tie=tie.fill_null(False))
    )
    right = candidates.filter(~pl.col("_tie"))
    if right.height < candidates.height:
        right = _merge_ties(candidates, right, level)
    right = right.select(
        pl.col("_gid").alias("_c_gid"),
        pl.col("_t").alias("_c_t"),
        pl.col("_lv").alias("_c_level"),
        pl.col("sample_date").alias("_c_date"),
        pl.col("years_from_index").alias("_c_years"),
    )
    after = round(rule.confirm_after_days * _MICRODAYS)
    left = df.with_columns(_target=pl.col("_t") + after)
    # the first candidate at or after the target time of the same sequence: with the
    # sequence and the time packed into one sorted integer the as-of join needs no
    # grouping, and a match in a later sequence is discarded below
    span = _bits(int(df["_t"].max() or 0) + after + 1)
    if _bits(int(df["_gid"].max() or 0)) + span <= _PACKED_KEY_BITS:
        scale = 1 << span
        joined = left.with_columns(
            _key=(pl.col("_gid") * scale + pl.col("_target")).set_sorted()
        ).join_asof(
            right.with_columns(_key=(pl.col("_c_gid") * scale + pl.col("_c_t")).set_sorted()),
            on="_key",
            strategy="forward",
            check_sortedness=False,
        )
    else:
        joined = left.join_asof(
            right.with_columns(_gid=pl.col("_c_gid")),
            left_on="_target",
            right_on="_c_t",
            by="_gid",
            strategy="forward",
            check_sortedness=False,
        )
    ok = (
        pl.col("used")
        & (pl.col("_c_gid") == pl.col("_gid")).fill_null(False)
        & (pl.col("_c_level") == pl.col("_lv")).fill_null(False)
    )
    if rule.confirm_within_days is not None:
        ok = ok & ((pl.col("_c_t") - pl.col("_t")) <= round(rule.confirm_within_days * _MICRODAYS))
    out = joined.with_columns(
        confirmed=pl.when("used").then(ok),
        confirm_date=pl.when(ok).then(pl.col("_c_date")),
        confirm_years=pl.when(ok).then(pl.col("_c_years")),
    ).drop(
        "_target", "_c_gid", "_c_t", "_c_level", "_c_date", "_c_years", "_key", "_ac", strict=False
    )
    if not labels:
        return out
    return out.with_columns(_labels(results, out["_row"], level))


def _labels(results: pl.DataFrame, rows: pl.Series, level: str = "category") -> pl.DataFrame:
    """The text columns of ``results`` at positions ``rows``, with ``_eq``."""
    names = list(dict.fromkeys([*_LABELS, level]))
    return results.select(pl.col(names).gather(rows)).with_columns(
        _eq=pl.col("equation").fill_null("")
    )


def _results(
    egfr: FrameLike | None,
    labs: FrameLike | None,
    patients: FrameLike | None,
    rule: SustainRule,
    value_filter: ValueFilter | None,
) -> pl.DataFrame:
    parts = []
    if egfr is not None:
        parts.append(_gfr_results(egfr, value_filter))
    if labs is not None:
        parts.append(_albuminuria_results(labs, patients, rule, value_filter))
    if not parts:
        raise InputDataError("categories: give an egfr table, a labs table with UACR, or both")
    return pl.concat(parts, how="vertical_relaxed")


def category_results(
    egfr: FrameLike | None = None,
    labs: FrameLike | None = None,
    patients: FrameLike | None = None,
    rule: SustainRule | None = None,
    value_filter: ValueFilter | None = None,
) -> pl.DataFrame:
    """KDIGO category of every result and whether it is confirmed (sustained).

    Parameters
    ----------
    egfr : polars or pandas DataFrame, optional
        ``schemas.EGFR`` rows (G axis, one sequence per equation).
    labs : polars or pandas DataFrame, optional
        Harmonised labs; UACR rows give the A axis (see
        :func:`kidneycohort.baseline.uacr_timeline` for how they are placed in time).
    patients : polars or pandas DataFrame, optional
        ``patient_id``, ``index_date``; needed with ``labs`` lacking ``years_from_index``.
    rule : SustainRule, optional
        Confirmation rule; ``SustainRule()`` (90 days) by default.
    value_filter : ValueFilter, optional
        Results it excludes are shown with ``used`` false and never confirm anything.

    Returns
    -------
    polars.DataFrame
        One row per input result: ``patient_id``, ``equation`` (null on axis A),
        ``axis``, ``sample_date``, ``years_from_index``, ``value``, ``category``,
        ``used``, ``confirmed`` (null when not used), ``confirm_date``,
        ``confirm_years``.
    """
    rule = rule or SustainRule()
    results = _results(egfr, labs, patients, rule, value_filter)
    # back in input order, where the text columns of ``results`` already are
    out = _confirm(results, rule, labels=False).sort("_row")
    return out.with_columns(results.select(_LABELS)).select(
        "patient_id",
        "equation",
        "axis",
        "sample_date",
        "years_from_index",
        "value",
        "category",
        "used",
        "confirmed",
        "confirm_date",
        "confirm_years",
    )


# ---- stages and transitions ------------------------------------------------------------------
def sustained_stages(
    egfr: FrameLike | None = None,
    labs: FrameLike | None = None,
    patients: FrameLike | None = None,
    rule: SustainRule | None = None,
    value_filter: ValueFilter | None = None,
) -> pl.DataFrame:
    """Sustained KDIGO category stages per patient, equation and axis.

    Parameters are those of :func:`category_results`.

    Returns
    -------
    polars.DataFrame
        :data:`STAGES` layout, described in the module docstring. Every patient x
        equation (x axis) with at least one usable result has at least one row. Rows
        are in patient, equation (albuminuria rows, with no equation, first), axis and
        stage order.
    """
    rule = rule or SustainRule()
    results = _results(egfr, labs, patients, rule, value_filter)
    return _stages_from_results(_confirm(results, rule, labels=False), results)


def _stages_from_results(confirmed_results: pl.DataFrame, results: pl.DataFrame) -> pl.DataFrame:
    # rows arrive sorted by sequence (``_gid``), time and category rank from _confirm. A
    # new stage starts at every confirmed result whose category differs from the one in
    # force; unconfirmed results belong to the stage in force (or to stage 0). Global
    # forward fills and cumulative sums, reset at each sequence start, stand in for
    # window expressions, and the stages are the rows where one starts (no group-by).
    used = confirmed_results.filter("used")
    confirmed = pl.col("confirmed").fill_null(False)
    row = pl.int_range(pl.len(), dtype=pl.Int64)
    gid = pl.col("_gid")
    first_row = (gid != gid.shift(1)).fill_null(True)
    last_row = (gid != gid.shift(-1)).fill_null(True)
    used = used.with_columns(
        _r=row,
        _first=first_row,
        _seq_start=pl.when(first_row).then(row).forward_fill(),
        _seq_end=pl.when(last_row).then(row).backward_fill(),
        _last_confirmed=pl.when(confirmed).then(row).forward_fill(),
        _ff=pl.when(confirmed).then(pl.col("_lv")).forward_fill(),
    ).with_columns(
        _in_force=pl.when(pl.col("_last_confirmed") >= pl.col("_seq_start")).then(pl.col("_ff"))
    )
    previous = pl.col("_in_force").shift(1)
    changed = confirmed & (
        pl.col("_first") | previous.is_null() | (pl.col("_in_force") != previous)
    )
    used = used.with_columns(_changed=changed.cast(pl.Int32)).with_columns(
        _cs=pl.col("_changed").cum_sum()
    )
    used = used.with_columns(
        stage_number=pl.col("_cs")
        - pl.when("_first").then(pl.col("_cs") - pl.col("_changed")).forward_fill()
    )
    stages = used.filter(pl.col("_first") | (pl.col("_changed") == 1))
    # the last usable result of each sequence closes its last stage
    ends = stages["_seq_end"]
    stages = stages.with_columns(
        _labels(results, stages["_row"]),
        _last_date=used["sample_date"].gather(ends),
        _last_years=used["years_from_index"].gather(ends),
    )
    is_last = (gid.shift(-1) != gid).fill_null(True)
    stage_zero = pl.col("stage_number") == 0
    stages = stages.with_columns(
        start_date=pl.col("sample_date"),
        start_years=pl.col("years_from_index"),
        n_results=pl.when(is_last).then(pl.col("_seq_end") + 1).otherwise(pl.col("_r").shift(-1))
        - pl.col("_r"),
        end_date=pl.when(is_last)
        .then(pl.col("_last_date"))
        .otherwise(pl.col("sample_date").shift(-1)),
        end_years=pl.when(is_last)
        .then(pl.col("_last_years"))
        .otherwise(pl.col("years_from_index").shift(-1)),
        is_last=is_last,
        category=pl.when(stage_zero).then(None).otherwise(pl.col("category")),
        confirmed_date=pl.when(stage_zero).then(None).otherwise(pl.col("confirm_date")),
    )
    return conform(stages, STAGES)


def _in_sequence_order(df: pl.DataFrame, columns: list[str]) -> bool:
    """True when ``df`` is already sorted by ``columns`` (no missing keys)."""
    if any(df[c].null_count() for c in columns):
        return False
    ok = pl.lit(True)
    for column in reversed(columns):
        current, previous = pl.col(column), pl.col(column).shift(1)
        ok = (current > previous) | ((current == previous) & ok)
    return bool(df.select(ok.fill_null(True).all()).item())


def _with_keys(stages: FrameLike) -> pl.DataFrame:
    """Stages in patient, equation, axis and stage order, with an integer sequence ``_gid``.

    :func:`sustained_stages` already returns that order, so the sort runs only for
    tables that arrive in another order.
    """
    df = to_polars(stages, "stages")
    require_columns(df, ("patient_id", "axis", "stage_number", "category", "start_years"), "stages")
    if "equation" not in df.columns:
        df = df.with_columns(equation=pl.lit(None, dtype=pl.String))
    df = df.with_columns(_eq=pl.col("equation").fill_null(""))
    order = [*_KEYS, "stage_number"]
    if not _in_sequence_order(df, order):
        df = df.sort(order)
    same = pl.all_horizontal([pl.col(k).eq_missing(pl.col(k).shift(1)) for k in _KEYS])
    return df.with_columns(_gid=(~same).cast(pl.Int64).cum_sum())


def _ranked_transitions(stages: pl.DataFrame) -> pl.DataFrame:
    df = stages.filter(pl.col("category").is_not_null()).with_columns(
        _rank=pl.col("category").replace_strict(_RANK, return_dtype=pl.Int8)
    )
    same = pl.col("_gid") == pl.col("_gid").shift(1)
    df = df.with_columns(
        from_category=pl.when(same).then(pl.col("category").shift(1)),
        _from_rank=pl.when(same).then(pl.col("_rank").shift(1)),
    )
    return df.filter(pl.col("from_category").is_not_null()).with_columns(
        to_category=pl.col("category"),
        transition_date=pl.col("start_date"),
        direction=pl.when(pl.col("_rank") > pl.col("_from_rank"))
        .then(pl.lit("worsening"))
        .otherwise(pl.lit("improvement")),
    )


def transitions(stages: FrameLike) -> pl.DataFrame:
    """Category transitions from a :func:`sustained_stages` table.

    A transition happens at the onset of each sustained stage after the first; its
    direction is ``"worsening"`` towards G5 / A3 and ``"improvement"`` otherwise.

    Returns
    -------
    polars.DataFrame
        ``schemas.TRANSITIONS`` layout, in patient, equation, axis and time order.
    """
    return conform(_ranked_transitions(_with_keys(stages)), schemas.TRANSITIONS)


def transition_matrix(stages: FrameLike) -> pl.DataFrame:
    """Transition counts and rates per 100 person-years, per equation and axis.

    .. math::

        \\text{rate}_{c \\to d} = 100 \\times \\frac{n_{c \\to d}}{\\sum_{\\text{stages in } c}
        (\\text{end\\_years} - \\text{start\\_years})}

    Person-time in a category runs from each stage's onset to the next stage's onset,
    or to the patient's last usable result.

    Returns
    -------
    polars.DataFrame
        ``equation``, ``axis``, ``from_category``, ``to_category``, ``n_transitions``,
        ``person_years_in_from``, ``rate_per_100_person_years``: every ordered pair of
        distinct categories of the axis, zeros included (rates null without person-time).
    """
    df = _with_keys(stages)
    person_time = (
        df.filter(pl.col("category").is_not_null())
        .group_by("_eq", "axis", pl.col("category").alias("from_category"))
        .agg(person_years_in_from=(pl.col("end_years") - pl.col("start_years")).sum())
    )
    counts = (
        _ranked_transitions(df)
        .group_by("_eq", "axis", "from_category", "to_category")
        .agg(n_transitions=pl.len().cast(pl.Int64))
    )
    cells = []
    for axis, cats in (("G", G_CATEGORIES), ("A", A_CATEGORIES)):
        pairs = [(a, b) for a in cats for b in cats if a != b]
        cells.append(
            pl.DataFrame(
                {
                    "axis": [axis] * len(pairs),
                    "from_category": [a for a, _ in pairs],
                    "to_category": [b for _, b in pairs],
                }
            )
        )
    grid = df.select("_eq", "axis").unique().join(pl.concat(cells), on="axis")
    out = (
        grid.join(counts, on=["_eq", "axis", "from_category", "to_category"], how="left")
        .join(person_time, on=["_eq", "axis", "from_category"], how="left")
        .with_columns(
            n_transitions=pl.col("n_transitions").fill_null(0),
            person_years_in_from=pl.col("person_years_in_from").fill_null(0.0),
        )
        .with_columns(
            rate_per_100_person_years=pl.when(pl.col("person_years_in_from") > 0).then(
                100.0 * pl.col("n_transitions") / pl.col("person_years_in_from")
            ),
            equation=pl.when(pl.col("_eq") == "").then(None).otherwise(pl.col("_eq")),
            _fr=pl.col("from_category").replace_strict(_RANK, return_dtype=pl.Int8),
            _tr=pl.col("to_category").replace_strict(_RANK, return_dtype=pl.Int8),
        )
        .sort("_eq", "axis", "_fr", "_tr", descending=[False, True, False, False])
    )
    return out.select(
        "equation",
        "axis",
        "from_category",
        "to_category",
        "n_transitions",
        "person_years_in_from",
        "rate_per_100_person_years",
    )


def time_to_first_worsening(stages: FrameLike) -> pl.DataFrame:
    """Time from index to the first sustained worsening of category, per patient.

    The origin is the index date; the event is the first worsening transition with onset
    after index; follow-up is censored at the last usable result. A patient whose last
    usable result is at or before index has ``years`` 0, ``event`` 0.

    Returns
    -------
    polars.DataFrame
        ``patient_id``, ``equation``, ``axis``, ``category_at_index`` (the sustained
        category in force at index, null if none yet), ``years``, ``event`` (Int8),
        ``event_date``, ``to_category``, ``reason`` (``"worsening"``,
        ``"censored_at_last_value"`` or ``"no_values_after_index"``).
    """
    df = _with_keys(stages)
    keys = df.group_by("_gid", maintain_order=True).agg(
        pl.col("patient_id", "equation", "axis").first(), _last_years=pl.col("end_years").max()
    )
    at_index = (
        df.filter(pl.col("start_years") <= 0)
        .group_by("_gid")
        .agg(category_at_index=pl.col("category").last())
    )
    worse = (
        _ranked_transitions(df)
        .filter((pl.col("direction") == "worsening") & (pl.col("start_years") > 0))
        .group_by("_gid")
        .agg(
            _event_years=pl.col("start_years").first(),
            event_date=pl.col("transition_date").first(),
            to_category=pl.col("to_category").first(),
        )
    )
    out = keys.join(at_index, on="_gid", how="left", maintain_order="left").join(
        worse, on="_gid", how="left", maintain_order="left"
    )
    has_event = pl.col("_event_years").is_not_null()
    out = out.with_columns(
        years=pl.when(has_event)
        .then(pl.col("_event_years"))
        .otherwise(pl.max_horizontal(pl.col("_last_years"), pl.lit(0.0))),
        event=has_event.cast(pl.Int8),
        reason=pl.when(has_event)
        .then(pl.lit("worsening"))
        .when(pl.col("_last_years") > 0)
        .then(pl.lit("censored_at_last_value"))
        .otherwise(pl.lit("no_values_after_index")),
    )
    return out.select(
        "patient_id",
        "equation",
        "axis",
        "category_at_index",
        "years",
        "event",
        pl.col("event_date").cast(pl.Date),
        "to_category",
        "reason",
    )


# ---- CKD and progression -------------------------------------------------------------------
def ckd_status(
    egfr: FrameLike | None = None,
    labs: FrameLike | None = None,
    patients: FrameLike | None = None,
    rule: SustainRule | None = None,
    value_filter: ValueFilter | None = None,
) -> pl.DataFrame:
    """CKD present by the KDIGO definition: eGFR < 60 or albuminuria A2+ for > 3 months.

    An eGFR below 60 (or a UACR in A2 or A3) counts when the first usable result at least
    ``rule.confirm_after_days`` later is also below 60 (also A2+). Unlike the category
    stages, the confirming value may be in another category (e.g. G3a then G3b): the
    definition is a threshold, not a category. Structural markers (imaging, biopsy,
    sediment) are outside laboratory tables and are not assessed.

    .. math:: \\text{CKD} \\iff \\exists\\, t: x_t < 60 \\land x_{t'} < 60,\\;
        t' = \\min\\{s : s \\ge t + 90\\,\\text{d}\\}

    Returns
    -------
    polars.DataFrame
        ``patient_id``, ``equation`` (null for patients with UACR only), ``ckd``,
        ``ckd_onset_date``, ``ckd_onset_years`` (the earliest first value of a
        confirmed pair), ``ckd_basis`` (``"egfr_below_60"``, ``"albuminuria_a2_plus"``,
        ``"egfr_and_albuminuria"``), ``egfr_criterion_date``,
        ``albuminuria_criterion_date``.
    """
    rule = rule or SustainRule()
    results = _results(egfr, labs, patients, rule, value_filter)
    abnormal = (
        pl.when(pl.col("category").is_null())
        .then(pl.lit(None, dtype=pl.String))
        .when(pl.col("axis") == "G")
        .then(
            pl.when(pl.col("category").is_in(["G1", "G2"]))
            .then(pl.lit("no"))
            .otherwise(pl.lit("yes"))
        )
        .otherwise(pl.when(pl.col("category") == "A1").then(pl.lit("no")).otherwise(pl.lit("yes")))
    )
    results = _confirm(results.with_columns(_abnormal=abnormal), rule, level="_abnormal")
    hits = results.filter(pl.col("confirmed").fill_null(False) & (pl.col("_abnormal") == "yes"))
    first = (
        hits.sort("_days")
        .group_by(_KEYS)
        .agg(_date=pl.col("sample_date").first(), _years=pl.col("years_from_index").first())
    )
    g_keys = (
        results.filter(pl.col("axis") == "G")
        .select("patient_id", "equation")
        .unique(maintain_order=True)
    )
    a_patients = (
        results.filter(pl.col("axis") == "A").select("patient_id").unique(maintain_order=True)
    )
    a_only = a_patients.join(g_keys.select("patient_id"), on="patient_id", how="anti")
    keys = pl.concat(
        [g_keys, a_only.with_columns(equation=pl.lit(None, dtype=pl.String))],
        how="vertical_relaxed",
    )
    g_first = first.filter(pl.col("axis") == "G").select(
        "patient_id",
        pl.col("_eq").alias("equation"),
        egfr_criterion_date="_date",
        _g_years="_years",
    )
    a_first = first.filter(pl.col("axis") == "A").select(
        "patient_id", albuminuria_criterion_date="_date", _a_years="_years"
    )
    out = keys.join(g_first, on=["patient_id", "equation"], how="left", maintain_order="left").join(
        a_first, on="patient_id", how="left", maintain_order="left"
    )
    g_hit = pl.col("_g_years").is_not_null()
    a_hit = pl.col("_a_years").is_not_null()
    a_first_in_time = a_hit & (~g_hit | (pl.col("_a_years") < pl.col("_g_years")))
    return out.select(
        "patient_id",
        "equation",
        ckd=g_hit | a_hit,
        ckd_onset_date=pl.when(a_first_in_time)
        .then(pl.col("albuminuria_criterion_date"))
        .otherwise(pl.col("egfr_criterion_date")),
        ckd_onset_years=pl.min_horizontal("_g_years", "_a_years"),
        ckd_basis=pl.when(g_hit & a_hit)
        .then(pl.lit("egfr_and_albuminuria"))
        .when(g_hit)
        .then(pl.lit("egfr_below_60"))
        .when(a_hit)
        .then(pl.lit("albuminuria_a2_plus")),
        egfr_criterion_date=pl.col("egfr_criterion_date").cast(pl.Date),
        albuminuria_criterion_date=pl.col("albuminuria_criterion_date").cast(pl.Date),
    )


def kdigo_progression(
    egfr: FrameLike,
    baseline: FrameLike,
    slopes: FrameLike | None = None,
    rule: SustainRule | None = None,
    value_filter: ValueFilter | None = None,
    decline_fraction: float = 0.25,
) -> pl.DataFrame:
    """KDIGO progression per patient and equation: certain drop and rapid progression.

    .. math::

        \\text{certain drop at } t \\iff G(x_t) \\succ G(x_0) \\;\\land\\;
        x_t \\le (1 - 0.25)\\,x_0 \\;\\land\\; G(x_t) \\text{ confirmed}

    with :math:`x_0` the baseline eGFR and :math:`t > 0` (after index).

    Parameters
    ----------
    egfr : polars or pandas DataFrame
        ``schemas.EGFR`` rows.
    baseline : polars or pandas DataFrame
        :func:`kidneycohort.baseline.baseline` output (``schemas.BASELINE``).
    slopes : polars or pandas DataFrame, optional
        :func:`kidneycohort.slopes.egfr_slopes` output; gives ``rapid_progression``.
    rule, value_filter
        As for :func:`category_results`.
    decline_fraction : float
        Fraction of baseline lost for a certain drop (KDIGO 2012: 0.25).

    Returns
    -------
    polars.DataFrame
        One row per baseline row: ``patient_id``, ``equation``, ``baseline_egfr``,
        ``baseline_category``, ``certain_drop`` (null without a baseline),
        ``certain_drop_date``, ``certain_drop_years``, ``certain_drop_category``,
        ``certain_drop_pct_decline``, ``slope_per_year``, ``rapid_progression``.
    """
    if not 0 < decline_fraction < 1:
        raise InputDataError(
            f"kdigo_progression: decline_fraction={decline_fraction} must be between 0 and 1 "
            "(e.g. 0.25 for KDIGO's 25 %)"
        )
    rule = rule or SustainRule()
    base = to_polars(baseline, "baseline")
    require_columns(base, ("patient_id", "equation", "baseline_egfr"), "baseline")
    base = base.select(
        pl.col("patient_id").cast(pl.String),
        pl.col("equation").cast(pl.String),
        pl.col("baseline_egfr").cast(pl.Float64),
    ).with_columns(baseline_category=gfr_category_expr("baseline_egfr"))
    results = _confirm(_gfr_results(egfr, value_filter), rule)
    rank = pl.col("category").replace_strict(_RANK, default=None, return_dtype=pl.Int8)
    base_rank = pl.col("baseline_category").replace_strict(
        _RANK, default=None, return_dtype=pl.Int8
    )
    drops = (
        results.join(base, on=["patient_id", "equation"], how="inner")
        .filter(
            pl.col("confirmed").fill_null(False)
            & (pl.col("years_from_index") > 0)
            & (rank > base_rank)
            & (pl.col("value") <= (1 - decline_fraction) * pl.col("baseline_egfr") + 1e-9)
        )
        .sort("_days", "value")
        .group_by("patient_id", "equation")
        .agg(
            certain_drop_date=pl.col("sample_date").first(),
            certain_drop_years=pl.col("years_from_index").first(),
            certain_drop_category=pl.col("category").first(),
            certain_drop_pct_decline=(
                100 * (1 - pl.col("value") / pl.col("baseline_egfr"))
            ).first(),
        )
    )
    out = base.join(drops, on=["patient_id", "equation"], how="left", maintain_order="left")
    out = out.with_columns(
        certain_drop=pl.when(pl.col("baseline_egfr").is_not_null()).then(
            pl.col("certain_drop_years").is_not_null()
        )
    )
    if slopes is not None:
        sl = to_polars(slopes, "slopes")
        require_columns(sl, ("patient_id", "equation", "slope_per_year", "rapid_decline"), "slopes")
        out = out.join(
            sl.select(
                pl.col("patient_id").cast(pl.String),
                pl.col("equation").cast(pl.String),
                "slope_per_year",
                pl.col("rapid_decline").alias("rapid_progression"),
            ),
            on=["patient_id", "equation"],
            how="left",
            maintain_order="left",
        )
    else:
        out = out.with_columns(
            slope_per_year=pl.lit(None, dtype=pl.Float64),
            rapid_progression=pl.lit(None, dtype=pl.Boolean),
        )
    return out.select(
        "patient_id",
        "equation",
        "baseline_egfr",
        "baseline_category",
        "certain_drop",
        pl.col("certain_drop_date").cast(pl.Date),
        "certain_drop_years",
        "certain_drop_category",
        "certain_drop_pct_decline",
        "slope_per_year",
        "rapid_progression",
    )


# ---- baseline categories (one row per patient) -------------------------------------------
BASELINE_CATEGORIES: Final[dict[str, pl.DataType]] = {
    "patient_id": pl.String(),
    "equation": pl.String(),
    "baseline_egfr": pl.Float64(),
    "g_category": pl.String(),
    "g_reason": pl.String(),
    "baseline_uacr_mg_g": pl.Float64(),
    "a_category": pl.String(),
    "a_reason": pl.String(),
    "risk": pl.String(),
}
"""Layout of :func:`baseline_categories` output."""

BASELINE_CATEGORY_REASONS: Final[dict[str, str]] = {
    "no_baseline_row": "the patient has no row in that baseline table",
    "no_uacr_baseline": "no UACR baseline table was given",
    "not_classifiable": "the baseline value is negative or not a number",
}
"""Codes in ``g_reason`` / ``a_reason`` besides the baseline tables' own ``baseline_reason``."""


def _one_row_each(df: pl.DataFrame, what: str) -> pl.DataFrame:
    duplicated = df.filter(pl.col("patient_id").is_duplicated())
    if duplicated.height:
        raise InputDataError(
            f"{what}: patient '{duplicated['patient_id'][0]}' has more than one row; give one "
            "baseline row per patient (and equation)"
        )
    return df


def baseline_categories(
    baseline: FrameLike,
    uacr_baseline: FrameLike | None = None,
    *,
    equation: str | None = None,
) -> pl.DataFrame:
    """KDIGO G and A category at baseline, and the prognosis-grid risk, per patient.

    .. math::

        G = G(\\text{baseline eGFR}),\\quad A = A(\\text{baseline UACR, mg/g}),\\quad
        \\text{risk} = R(G, A)

    with :math:`G` and :math:`A` the KDIGO 2012 categories of :func:`gfr_category_expr`
    and :func:`albuminuria_category_expr` (Tables 5 and 6) and :math:`R` the prognosis
    grid of KDIGO 2012 Figure 2 (:data:`RISK_GRID`) [1]_. The baseline UACR is a mean
    in mg/g (:func:`kidneycohort.baseline.baseline_uacr`), so it is classified on the
    mg/g thresholds 30 and 300 whatever unit the results were reported in.

    Parameters
    ----------
    baseline : polars or pandas DataFrame
        :func:`kidneycohort.baseline.baseline` output (``schemas.BASELINE``): at least
        ``patient_id``, ``equation``, ``baseline_egfr``; ``baseline_reason`` is used
        when present.
    uacr_baseline : polars or pandas DataFrame, optional
        :func:`kidneycohort.baseline.baseline_uacr` output: ``patient_id``,
        ``baseline_uacr_mg_g`` (and ``baseline_reason``). Without it every A category is
        null with reason ``no_uacr_baseline``.
    equation : str, optional
        The equation whose baseline eGFR gives the G category; required when
        ``baseline`` holds more than one.

    Returns
    -------
    polars.DataFrame
        :data:`BASELINE_CATEGORIES`: one row per patient of either table (patients of
        ``baseline`` first, in its order). ``g_reason`` / ``a_reason`` say why a
        category is null: the baseline table's ``baseline_reason``, or a code of
        :data:`BASELINE_CATEGORY_REASONS`. ``risk`` is null unless both are known.

    Raises
    ------
    InputDataError
        A missing column, an unknown or ambiguous equation, or two rows of one patient.

    References
    ----------
    .. [1] KDIGO 2012 clinical practice guideline for the evaluation and management of
       chronic kidney disease. Kidney Int Suppl 2013;3:1-150.

    Examples
    --------
    >>> import polars as pl
    >>> base = pl.DataFrame({"patient_id": ["a", "b"], "equation": ["e", "e"],
    ...                      "baseline_egfr": [59.5, 90.0]})
    >>> uacr = pl.DataFrame({"patient_id": ["a"], "baseline_uacr_mg_g": [30.0]})
    >>> baseline_categories(base, uacr).select("g_category", "a_category", "risk").rows()
    [('G3a', 'A2', 'high'), ('G1', None, None)]
    """
    eg = to_polars(baseline, "baseline")
    require_columns(eg, ("patient_id", "equation", "baseline_egfr"), "baseline")
    eg = eg.with_columns(pl.col("patient_id").cast(pl.String), pl.col("equation").cast(pl.String))
    equations = sorted(eg["equation"].drop_nulls().unique().to_list())
    if equation is not None:
        if equation not in equations:
            raise InputDataError(
                f"baseline: equation '{equation}' is not in the table (equations: "
                f"{', '.join(equations) or 'none'}){did_you_mean(equation, equations)}"
            )
    elif len(equations) > 1:
        raise InputDataError(
            f"baseline: the table holds {len(equations)} equations ({', '.join(equations)}); "
            "pass equation=... to choose the one for the G category"
        )
    else:
        equation = equations[0] if equations else None
    eg = eg.filter(pl.col("equation") == equation) if equation is not None else eg.clear()
    reason = pl.col("baseline_reason").cast(pl.String) if "baseline_reason" in eg.columns else None
    eg = _one_row_each(
        eg.select(
            "patient_id",
            pl.col("baseline_egfr").cast(pl.Float64),
            (reason if reason is not None else pl.lit(None, dtype=pl.String)).alias("_g_reason"),
            _in_egfr=pl.lit(True),
        ),
        "baseline",
    )
    if uacr_baseline is not None:
        ua = to_polars(uacr_baseline, "uacr_baseline")
        require_columns(ua, ("patient_id", "baseline_uacr_mg_g"), "uacr_baseline")
        a_reason = (
            pl.col("baseline_reason").cast(pl.String)
            if "baseline_reason" in ua.columns
            else pl.lit(None, dtype=pl.String)
        )
        ua = _one_row_each(
            ua.select(
                pl.col("patient_id").cast(pl.String),
                pl.col("baseline_uacr_mg_g").cast(pl.Float64),
                a_reason.alias("_a_reason"),
                _in_uacr=pl.lit(True),
            ),
            "uacr_baseline",
        )
    else:
        ua = pl.DataFrame(
            schema={
                "patient_id": pl.String,
                "baseline_uacr_mg_g": pl.Float64,
                "_a_reason": pl.String,
                "_in_uacr": pl.Boolean,
            }
        )
    both = eg.join(ua, on="patient_id", how="full", coalesce=True, maintain_order="left_right")
    g = gfr_category_expr("baseline_egfr")
    a = albuminuria_category_expr("baseline_uacr_mg_g", "mg/g")
    no_uacr_table = "no_uacr_baseline" if uacr_baseline is None else "no_baseline_row"

    def why(value: str, present: str, own: str, missing_code: str) -> pl.Expr:
        return (
            pl.when(pl.col(present).is_null())
            .then(pl.lit(missing_code))
            .when(pl.col(value).is_null())
            .then(pl.col(own).fill_null(pl.lit("not_classifiable")))
            .otherwise(pl.lit("not_classifiable"))
        )

    out = both.with_columns(g_category=g, a_category=a).with_columns(
        g_reason=pl.when(pl.col("g_category").is_null()).then(
            why("baseline_egfr", "_in_egfr", "_g_reason", "no_baseline_row")
        ),
        a_reason=pl.when(pl.col("a_category").is_null()).then(
            why("baseline_uacr_mg_g", "_in_uacr", "_a_reason", no_uacr_table)
        ),
        equation=pl.lit(equation, dtype=pl.String),
        risk=kdigo_risk_expr("g_category", "a_category"),
    )
    return out.select(list(BASELINE_CATEGORIES)).cast(BASELINE_CATEGORIES)
