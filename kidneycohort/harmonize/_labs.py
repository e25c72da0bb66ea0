"""Lab results: text results parsed, analytes and units mapped, values converted to the
standard unit, implausible and orphan rows rejected, same-day results collapsed.
"""

from __future__ import annotations

from typing import Any, Final

import numpy as np
import polars as pl

from kidneycohort import schemas, units
from kidneycohort._frames import conform, require_columns
from kidneycohort.errors import InputDataError
from kidneycohort.harmonize._plausible import DAYS_PER_YEAR, implausible_date
from kidneycohort.harmonize._rows import (
    Check,
    _cascade,
    _date_text,
    _lazy,
    _merged_rows,
    _text,
    _with_row_identity,
)
from kidneycohort.harmonize._rule import HarmonizeRule
from kidneycohort.io.loinc import LOINC_TO_ANALYTE
from kidneycohort.io.maps import (
    DEFAULT_ANALYTE_NAMES,
)
from kidneycohort.io.readers import AS_READ_SUFFIX, parse_date_columns
from kidneycohort.vocabulary import fold_code, fold_code_expr

__all__ = ["_GOOD_COLUMNS", "_LAB_CONTENT", "_collapse_same_day", "_finish_labs", "_prepare_labs"]

# A partial ISO 8601 date: year, or year and month (SDTM --DTC convention).
_PARTIAL_DATE: Final = r"^\d{4}(?:-\d{2})?$"
# A result reported as not done ("NOT DONE", "not done: haemolysed", ...).
_NOT_DONE: Final = r"(?i)^not\s+done\b"
_NUMBER: Final = r"[+-]?(?:\d{1,3}(?:,\d{3})+(?:\.\d*)?|\d+(?:[.,]\d*)?|[.,]\d+)(?:[eE][+-]?\d+)?"
# A comma followed by exactly three digits, in well-formed groups ("1,500", "12,000.5").
_THOUSANDS: Final = r"^[+-]?\d{1,3}(?:,\d{3})+(?:\.\d*)?(?:[eE][+-]?\d+)?$"
THOUSANDS_NOTE: Final = "',' read as a thousands separator (comma and three digits)"


_RESULT_PATTERN: Final = (
    r"(?i)^(?P<q><=|>=|<|>|≤|≥)?\s*(?P<num>" + _NUMBER + r")\s*"
    r"(?P<flag>\*|!|\(?(?:hh|ll|h|l|a)\)?)?$"
)


def _parse_result(text: pl.Expr, rule: HarmonizeRule) -> tuple[pl.Expr, pl.Expr, pl.Expr]:
    """(number, qualifier, note) of a reported result text; number null when not a
    result, note set when a comma was read as a thousands separator.

    Explicit rule: an optional leading ``<``, ``<=``, ``≤`` (-> ``"<"``) or ``>``,
    ``>=``, ``≥`` (-> ``">"``); one number; an optional trailing abnormal flag (``H``,
    ``L``, ``HH``, ``LL``, ``A``, ``*``, ``!``, in brackets or not), which is dropped. A
    comma is the decimal mark when ``rule.decimal_comma`` is true; otherwise a comma
    followed by exactly three digits (well-formed groups, no other separator) is a
    thousands separator, and any other single comma is a decimal comma only when the
    source states no decimal mark (``decimal_comma`` null).
    """
    groups = text.str.extract_groups(_RESULT_PATTERN)
    number_text = groups.struct.field("num")
    has_comma = number_text.str.contains(",", literal=True)
    has_point = number_text.str.contains(".", literal=True)
    thousands = number_text.str.contains(_THOUSANDS)
    if rule.decimal_comma:
        number_text = pl.when(~(has_comma & has_point)).then(
            number_text.str.replace(",", ".", literal=True)
        )
        note = pl.lit(None, pl.String)
    else:
        decimal = pl.lit(rule.decimal_comma is None) & has_comma & ~has_point
        number_text = (
            pl.when(thousands)
            .then(number_text.str.replace_all(",", "", literal=True))
            .when(decimal)
            .then(number_text.str.replace(",", ".", literal=True))
            .when(~has_comma)
            .then(number_text)
        )
        note = pl.when(thousands).then(pl.lit(THOUSANDS_NOTE))
    number = number_text.cast(pl.Float64, strict=False)
    q = groups.struct.field("q")
    qualifier = (
        pl.when(q.is_in(["<", "<=", "≤"]))
        .then(pl.lit("<"))
        .when(q.is_in([">", ">=", "≥"]))
        .then(pl.lit(">"))
    )
    return number, qualifier, note


def _prepare_labs(
    labs: Any, status: pl.DataFrame, rule: HarmonizeRule
) -> tuple[pl.LazyFrame, list[Check]]:
    frame = _lazy(labs, "labs")
    require_columns(frame, schemas.RAW_LABS_REQUIRED, "labs")
    names = frame.collect_schema().names()
    frame = _with_row_identity(frame, "labs")
    targets: dict[str, pl.DataType] = {"sample_date": pl.Datetime("us")}
    if "sample_datetime" in names:
        targets["sample_datetime"] = pl.Datetime("us")
    frame = parse_date_columns(frame, targets, name="labs", date_format=rule.date_format)
    names = frame.collect_schema().names()
    when_taken = (
        pl.coalesce(pl.col("sample_datetime"), pl.col("sample_date"))
        if "sample_datetime" in names
        else pl.col("sample_date")
    )
    as_read = [pl.col(c + AS_READ_SUFFIX) for c in targets if c + AS_READ_SUFFIX in names]
    date_as_read = pl.coalesce(as_read) if as_read else pl.lit(None, pl.String)

    analyte_map = {
        **{a: a for a in units.ANALYTES},
        **{fold_code(a): a for a in units.ANALYTES},
        **DEFAULT_ANALYTE_NAMES,
        **{fold_code(k): v for k, v in rule.analyte_names.items()},
    }
    raw_analyte = _text("analyte")
    analyte = pl.coalesce(
        pl.col("_analyte_raw").replace_strict(
            LOINC_TO_ANALYTE, default=None, return_dtype=pl.String
        ),
        fold_code_expr(pl.col("_analyte_raw")).replace_strict(
            analyte_map, default=None, return_dtype=pl.String
        ),
    )
    value_text = _text("value")
    number, parsed_qualifier, comma_note = _parse_result(pl.col("_value_text"), rule)
    factors = units.unit_factor_table()
    factor_map = dict(
        zip(
            (factors["analyte"] + "|" + factors["unit_key"]).to_list(),
            factors["unit_factor"].to_list(),
            strict=True,
        )
    )
    unit_text = _text("unit")
    factor = pl.concat_str(
        [pl.col("_analyte"), units.fold_unit_expr(pl.col("_unit_text"))], separator="|"
    ).replace_strict(factor_map, default=None, return_dtype=pl.Float64)
    ranges = {a: r.in_standard_unit(a) for a, r in rule.plausible_ranges.items()}
    low = pl.col("_analyte").replace_strict(
        {a: r[0] for a, r in ranges.items()}, default=None, return_dtype=pl.Float64
    )
    high = pl.col("_analyte").replace_strict(
        {a: r[1] for a, r in ranges.items()}, default=None, return_dtype=pl.Float64
    )

    base = frame.with_columns(
        _text("patient_id").alias("patient_id"),
        when_taken.cast(pl.Datetime("us")).alias("_when"),
        date_as_read.alias("_date_as_read"),
        raw_analyte.alias("_analyte_raw"),
        value_text.alias("_value_text"),
        (_text("qualifier") if "qualifier" in names else pl.lit(None, pl.String)).alias(
            "_qualifier_in"
        ),
        unit_text.alias("_unit_text"),
        (_text("setting") if "setting" in names else pl.lit(None, pl.String)).alias("setting"),
        (_text("reported_value") if "reported_value" in names else pl.lit(None, pl.String)).alias(
            "_reported_value_in"
        ),
        (_text("reported_unit") if "reported_unit" in names else pl.lit(None, pl.String)).alias(
            "_reported_unit_in"
        ),
        (
            pl.col("n_collapsed").cast(pl.Int32).fill_null(1)
            if "n_collapsed" in names
            else pl.lit(1, pl.Int32)
        ).alias("_n_in"),
    ).select(
        "_rid",
        "source",
        "source_row",
        "assumption",
        "patient_id",
        "_when",
        "_date_as_read",
        "_analyte_raw",
        "_value_text",
        "_qualifier_in",
        "_unit_text",
        "setting",
        "_reported_value_in",
        "_reported_unit_in",
        "_n_in",
    )
    try:
        base_data = base.collect()  # the source is read here, once
    except pl.exceptions.ComputeError as exc:
        raise InputDataError(f"labs: could not be read ({str(exc).splitlines()[0]})") from None
    # Text rules run once per distinct spelling (a few thousand), then join back: the
    # regular expressions never touch the millions of rows.
    result_lookup = (
        base_data.select("_value_text")
        .unique()
        .drop_nulls()
        .with_columns(
            number.alias("_number"),
            parsed_qualifier.alias("_parsed_qualifier"),
            pl.col("_value_text").str.contains(_NOT_DONE).alias("_not_done"),
            comma_note.alias("_comma_note"),
        )
    )
    code_lookup = (
        base_data.select("_analyte_raw", "_unit_text")
        .unique()
        .with_columns(analyte.alias("_analyte"))
        .with_columns(factor.alias("_factor"), low.alias("_low"), high.alias("_high"))
    )
    frame = (
        base_data.lazy()
        .join(result_lookup.lazy(), on="_value_text", how="left", maintain_order="left")
        .join(
            code_lookup.lazy(),
            on=["_analyte_raw", "_unit_text"],
            how="left",
            nulls_equal=True,
            maintain_order="left",
        )
        .with_columns(
            pl.coalesce("_parsed_qualifier", "_qualifier_in").alias("_qualifier"),
            pl.concat_str(["assumption", "_comma_note"], separator="; ", ignore_nulls=True)
            .replace("", None)
            .alias("assumption"),
            (pl.col("_number") * pl.col("_factor")).alias("_standard"),
            pl.col("_when").dt.date().alias("_day"),
        )
    )
    frame = frame.join(status.lazy(), on="patient_id", how="left", maintain_order="left")
    std_unit = pl.col("_analyte").replace_strict(units.STANDARD_UNIT, default=None)
    checks: list[Check] = [
        (pl.col("patient_id").is_null(), "missing_patient_id", pl.lit("patient_id is empty")),
        (
            pl.col("_date_as_read").str.contains(_PARTIAL_DATE),
            "partial_date",
            pl.format("sample_date '{}' is a partial date", pl.col("_date_as_read")),
        ),
        (
            pl.col("_date_as_read").is_not_null(),
            "unparseable_date",
            pl.format("sample_date '{}' does not parse", pl.col("_date_as_read")),
        ),
        (pl.col("_when").is_null(), "missing_date", pl.lit("sample_date is empty")),
        implausible_date(pl.col("_day"), "sample_date", rule),
        (
            pl.col("_analyte").is_null(),
            "unknown_analyte",
            pl.format(
                "analyte '{}' is not creatinine, cystatin_c or uacr",
                pl.col("_analyte_raw").fill_null(""),
            ),
        ),
        (
            pl.col("_not_done"),
            "not_done",
            pl.format("reported as '{}'", pl.col("_value_text")),
        ),
        (pl.col("_value_text").is_null(), "missing_value", pl.lit("value is empty")),
        (
            pl.col("_number").is_null(),
            "not_a_result",
            pl.format("value '{}' is not a number", pl.col("_value_text")),
        ),
    ]
    if rule.qualified_values == "reject":
        checks.append(
            (
                pl.col("_qualifier").is_not_null(),
                "qualified_value",
                pl.format("value '{}' is qualified", pl.col("_value_text")),
            )
        )
    checks += [
        (pl.col("_unit_text").is_null(), "missing_unit", pl.lit("unit is empty")),
        (
            pl.col("_factor").is_null(),
            "unknown_unit",
            pl.format("unit '{}' is not a unit of {}", pl.col("_unit_text"), pl.col("_analyte")),
        ),
        (
            ~pl.col("_standard").is_between(pl.col("_low"), pl.col("_high")),
            "implausible_value",
            pl.format(
                "{} {} outside {}-{} {}",
                pl.col("_standard").round(4),
                std_unit,
                pl.col("_low").round(4),
                pl.col("_high").round(4),
                std_unit,
            ),
        ),
        (
            pl.col("_patient_ok").is_null(),
            "unknown_patient",
            pl.format("patient_id '{}' not in patients", pl.col("patient_id")),
        ),
        (
            ~pl.col("_patient_ok"),
            "patient_rejected",
            pl.format("patient_id '{}' rejected in patients", pl.col("patient_id")),
        ),
        (
            pl.col("_day") < pl.col("birth_date"),
            "before_birth",
            pl.format(
                "sample {} before birth {}",
                _date_text(pl.col("_day")),
                _date_text(pl.col("birth_date")),
            ),
        ),
        (
            (pl.col("_day") - pl.col("birth_date")).dt.total_days() / DAYS_PER_YEAR
            > rule.max_age_years,
            "implausible_age",
            pl.format(
                "age at sample over {} years (born {})",
                pl.lit(rule.max_age_years),
                _date_text(pl.col("birth_date")),
            ),
        ),
        (
            pl.col("_day") > pl.col("death_date"),
            "after_death",
            pl.format(
                "sample {} after death {}",
                _date_text(pl.col("_day")),
                _date_text(pl.col("death_date")),
            ),
        ),
    ]
    if rule.data_cut_date is not None:
        cut = pl.lit(rule.data_cut_date, pl.Date)
        checks.append(
            (
                pl.col("_day") > cut,
                "after_data_cut",
                pl.format(
                    "sample {} after data cut {}",
                    _date_text(pl.col("_day")),
                    pl.lit(rule.data_cut_date.isoformat()),
                ),
            )
        )
    return frame.with_columns(_cascade(checks)), checks


_LAB_CONTENT: Final = (
    "patient_id",
    "_when",
    "_date_as_read",
    "_analyte_raw",
    "_value_text",
    "_unit_text",
    "setting",
    "_qualifier",
)


_GOOD_COLUMNS: Final = (
    *_LAB_CONTENT,
    "source",
    "source_row",
    "_analyte",
    "_standard",
    "_day",
    "_reported_value_in",
    "_reported_unit_in",
    "_n_in",
)


def _collapse_same_day(valid: pl.DataFrame, rule: str) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Fold usable results of one patient, analyte and day; return (kept, merged)."""
    key = ["patient_id", "_analyte", "_day"]
    if rule == "none":
        no_merge = _merged_rows(
            valid,
            pl.repeat(False, valid.height, eager=True),
            "same_day_collapsed",
            "labs",
            pl.lit(""),
        )
        return valid.with_columns(pl.col("_n_in").alias("_n")), no_merge
    # only groups with repeats need window work; most patient-days have one result
    # (a hash collision only moves a single result into the exact window work below)
    repeated = valid.select(pl.struct(key).hash().is_duplicated()).to_series()
    everything = valid.with_columns(pl.col("_n_in").alias("_n"))
    positions = np.flatnonzero(repeated.to_numpy())
    valid = (
        everything[positions]
        .with_columns(pl.Series("_pos", positions))
        .sort([*key, "_when", "source", "source_row"])
    )
    position = pl.int_range(pl.len()).over(key)
    chosen = {
        "first": pl.lit(0, pl.Int64),
        "mean": pl.lit(0, pl.Int64),
        "last": pl.len().over(key).cast(pl.Int64) - 1,
        "min": pl.col("_standard").arg_min().over(key).cast(pl.Int64),
        "max": pl.col("_standard").arg_max().over(key).cast(pl.Int64),
    }[rule]
    valid = valid.with_columns(
        (position.cast(pl.Int64) == chosen).alias("_keep"),
        pl.col("_n_in").sum().over(key).cast(pl.Int32).alias("_n"),
    )
    if rule == "mean":
        n_lt = (pl.col("_qualifier") == "<").sum().over(key)
        n_gt = (pl.col("_qualifier") == ">").sum().over(key)
        valid = valid.with_columns(
            (pl.col("_standard") * pl.col("_n_in"))
            .sum()
            .over(key)
            .truediv(pl.col("_n_in").sum().over(key))
            .alias("_standard"),
            pl.when((n_lt > 0) & (n_gt == 0))
            .then(pl.lit("<"))
            .when((n_gt > 0) & (n_lt == 0))
            .then(pl.lit(">"))
            .otherwise(pl.col("_qualifier"))
            .alias("_qualifier"),
        )
    kept = valid.filter(pl.col("_keep"))
    folded = valid.filter(~pl.col("_keep")).join(
        kept.select(*key, pl.format("{}:{}", "source", "source_row").alias("_kept_as")),
        on=key,
        how="left",
    )
    merged = _merged_rows(
        folded,
        pl.repeat(True, folded.height, eager=True),
        "same_day_collapsed",
        "labs",
        pl.format("folded into row {} ({})", pl.col("_kept_as"), pl.lit(rule)),
    )
    # write the repeated groups' results back in place: the output keeps source order
    keep = np.ones(everything.height, dtype=bool)
    where = valid["_pos"].to_numpy()
    keep[where] = valid["_keep"].to_numpy()
    updated = {
        c: everything[c].clone().scatter(where, valid[c]) for c in ("_standard", "_qualifier", "_n")
    }
    return everything.with_columns(**updated).filter(pl.Series(keep)), merged


def _finish_labs(kept: pl.DataFrame) -> pl.DataFrame:
    out = kept.select(
        "patient_id",
        pl.col("_day").alias("sample_date"),
        pl.col("_when").alias("sample_datetime"),
        pl.col("_analyte").alias("analyte"),
        pl.col("_standard").alias("value"),
        pl.col("_analyte").replace_strict(units.STANDARD_UNIT, default=None).alias("unit"),
        pl.coalesce("_reported_value_in", "_value_text").alias("reported_value"),
        pl.coalesce("_reported_unit_in", "_unit_text").alias("reported_unit"),
        pl.col("_qualifier").alias("qualifier"),
        "setting",
        "source",
        "source_row",
        pl.col("_n").alias("n_collapsed"),
    )
    # rows stay in source order (source, source_row): deterministic whatever the input
    # order, and no sort of millions of rows by patient
    return conform(out, schemas.LABS)
