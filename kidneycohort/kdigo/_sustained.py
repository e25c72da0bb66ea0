"""The sustained-category engine: results confirmed by a later result in the same category
(KDIGO 2012: more than 3 months) make stages, one row per stage.
"""

from __future__ import annotations

from typing import Final, Literal

import polars as pl
from pydantic import Field

from kidneycohort import schemas
from kidneycohort._frames import FrameLike, as_int, conform, follows_input, to_polars
from kidneycohort._rules import RuleModel
from kidneycohort.errors import InputDataError
from kidneycohort.kdigo._categories import (
    _code,
    _reported_in_mmol,
    albuminuria_category_expr,
    gfr_category_expr,
)
from kidneycohort.schemas import STAGES
from kidneycohort.uacr import uacr_timeline
from kidneycohort.units import UACR_MG_G_PER_MG_MMOL
from kidneycohort.value_filter import ValueFilterRule, apply_value_filter, usable_egfr

__all__ = [
    "STAGES",
    "_KEYS",
    "SustainRule",
    "_confirm",
    "_gfr_results",
    "_results",
    "category_results",
    "sustained_stages",
]

_KEYS: Final = ["patient_id", "_eq", "axis"]


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


# ---- per-result categories and confirmation -------------------------------------------------
def _albuminuria_results(
    labs: FrameLike,
    patients: FrameLike | None,
    rule: SustainRule,
    value_filter: ValueFilterRule | None,
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


def _gfr_results(egfr: FrameLike, value_filter: ValueFilterRule | None) -> pl.DataFrame:
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
    span = _bits(as_int(df["_t"].max() or 0, "last sample time") + after + 1)
    if _bits(as_int(df["_gid"].max() or 0, "last sequence number")) + span <= _PACKED_KEY_BITS:
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
    value_filter: ValueFilterRule | None,
) -> pl.DataFrame:
    parts = []
    if egfr is not None:
        parts.append(_gfr_results(egfr, value_filter))
    if labs is not None:
        parts.append(_albuminuria_results(labs, patients, rule, value_filter))
    if not parts:
        raise InputDataError("categories: give an egfr table, a labs table with UACR, or both")
    return pl.concat(parts, how="vertical_relaxed")


@follows_input
def category_results(
    egfr: FrameLike | None = None,
    labs: FrameLike | None = None,
    patients: FrameLike | None = None,
    rule: SustainRule | None = None,
    value_filter: ValueFilterRule | None = None,
) -> pl.DataFrame:
    """KDIGO category of every result and whether it is confirmed (sustained).

    Parameters
    ----------
    egfr : polars or pandas DataFrame, optional
        ``schemas.EGFR`` rows (G axis, one sequence per equation).
    labs : polars or pandas DataFrame, optional
        Harmonised labs; UACR rows give the A axis (see
        :func:`kidneycohort.uacr.uacr_timeline` for how they are placed in time).
    patients : polars or pandas DataFrame, optional
        ``patient_id``, ``index_date``; needed with ``labs`` lacking ``years_from_index``.
    rule : SustainRule, optional
        Confirmation rule; ``SustainRule()`` (90 days) by default.
    value_filter : ValueFilterRule, optional
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
@follows_input
def sustained_stages(
    egfr: FrameLike | None = None,
    labs: FrameLike | None = None,
    patients: FrameLike | None = None,
    rule: SustainRule | None = None,
    value_filter: ValueFilterRule | None = None,
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
    parts = _patient_chunks(egfr, labs, patients)
    if parts is None:
        results = _results(egfr, labs, patients, rule, value_filter)
        return _stages_from_results(_confirm(results, rule, labels=False), results)
    stages = []
    for part_egfr, part_labs, part_patients in parts:
        results = _results(part_egfr, part_labs, part_patients, rule, value_filter)
        stages.append(_stages_from_results(_confirm(results, rule, labels=False), results))
        del results
    return pl.concat(stages)


# Results (eGFR plus UACR rows) derived at once. Larger inputs are split into ranges of
# patients: the working tables of the value filter, the sort and the as-of join are
# several times the input, so their peak grows with the chunk, not with the cohort.
_CHUNK_ROWS: Final = 2_000_000


def _patient_range(ids: pl.Expr, low: str | None, high: str | None) -> pl.Expr:
    """Patients with ``low <= id < high`` (missing ids with the first range)."""
    text = ids.cast(pl.String)
    inside = pl.lit(True)
    if low is not None:
        inside = inside & (text >= low)
    if high is not None:
        inside = inside & (text < high)
    return inside if low is not None else (inside | text.is_null())


def _patient_chunks(
    egfr: FrameLike | None, labs: FrameLike | None, patients: FrameLike | None
) -> list[tuple[pl.DataFrame | None, pl.DataFrame | None, pl.DataFrame | None]] | None:
    """The inputs split into consecutive ranges of patient ids, or ``None`` when small.

    Stages are a per-patient derivation (the partition rule) and come out sorted by
    patient id first, so the stages of consecutive id ranges, concatenated in order,
    are the stages of the whole cohort, row for row.
    """
    egfr_df = to_polars(egfr, "egfr") if egfr is not None else None
    labs_df = to_polars(labs, "labs") if labs is not None else None
    if labs_df is not None and "analyte" in labs_df.columns:
        # only UACR rows make the A axis; the other labs need not be split
        labs_df = labs_df.filter(pl.col("analyte").cast(pl.String) == "uacr")
    frames = [f for f in (egfr_df, labs_df) if f is not None and "patient_id" in f.columns]
    rows = sum(f.height for f in frames)
    if rows <= _CHUNK_ROWS:
        return None
    ids = (
        pl.concat([f.select(pl.col("patient_id").cast(pl.String)) for f in frames])
        .drop_nulls()
        .unique()
        .sort("patient_id")["patient_id"]
    )
    n_chunks = min(-(-rows // _CHUNK_ROWS), max(ids.len(), 1))
    cuts = [ids[i * ids.len() // n_chunks] for i in range(1, n_chunks)]
    bounds = list(zip([None, *cuts], [*cuts, None], strict=True))
    patients_df = to_polars(patients, "patients") if patients is not None else None

    def part(frame: pl.DataFrame | None, low: str | None, high: str | None) -> pl.DataFrame | None:
        if frame is None or "patient_id" not in frame.columns:
            return frame
        return frame.filter(_patient_range(pl.col("patient_id"), low, high))

    return [
        (part(egfr_df, low, high), part(labs_df, low, high), part(patients_df, low, high))
        for low, high in bounds
    ]


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
