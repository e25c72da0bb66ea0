"""Harmonise raw lab, patient and event tables: every row used, rejected or merged.

``harmonize(labs, patients, events=None, rules=None, **rules)`` turns raw tables (as read
by :mod:`kidneycohort.io`, or any polars/pandas frame with the canonical columns of
``schemas.RAW_LABS`` / ``PATIENTS`` / ``EVENTS``) into

* ``labs`` in standard units (``schemas.LABS``; creatinine mg/dL, cystatin C mg/L,
  UACR mg/g) with the reported value and unit kept beside them,
* ``rejected`` rows (``schemas.REJECTED``) with a reason code of :data:`REASON_CODES`,
* ``merged`` rows (same columns) folded into another row as an exact duplicate or by
  the same-day rule,
* ``accounting`` per input table, asserted inside the stage:

.. math::

    n_\\text{read} = n_\\text{used} + n_\\text{rejected} + n_\\text{merged}

Each lab row gets the *first* failing check of this order (so every row has exactly
one reason): missing patient id, missing or unparseable date, unknown analyte, missing
value, not a result, qualified value (when rejected by the rules), missing or unknown
unit, implausible value, unknown or rejected patient, before birth, after death, after
the data cut. Exact duplicates are merged before the checks; same-day repeats of usable
results are folded after them.

All work is polars expressions over the whole table (no per-row Python) and every
check is per patient, so harmonising any partition of patients gives the same rows.
"""

from __future__ import annotations

import datetime as dt
import logging
from dataclasses import dataclass, field
from typing import Any, Final, Literal

import numpy as np
import polars as pl
from pydantic import ConfigDict, Field

from kidneycohort import _rules, schemas, units
from kidneycohort._frames import conform, require_columns
from kidneycohort._rules import RuleModel
from kidneycohort.errors import AccountingError, InputDataError
from kidneycohort.io.loinc import LOINC_TO_ANALYTE
from kidneycohort.io.maps import (
    DEFAULT_ANALYTE_NAMES,
    DEFAULT_EVENT_CODES,
    DEFAULT_SEX_CODES,
    fold_code,
    fold_code_expr,
)
from kidneycohort.io.readers import AS_READ_SUFFIX, parse_date_columns

logger = logging.getLogger(__name__)

REASON_CODES: Final[dict[str, str]] = {
    # rejected (any table)
    "missing_patient_id": "the row has no patient identifier",
    "missing_date": "the row has no sample or event date",
    "unparseable_date": "the date text does not fit the column's date format",
    "partial_date": "the date is a partial ISO 8601 date (year, or year and month) and the "
    "source's imputation rule leaves it unimputed",
    "unknown_patient": "the patient identifier is not in the patients table",
    "patient_rejected": "the patient's own row in the patients table was rejected",
    "before_birth": "the date is before the patient's birth date",
    "after_death": "the date is after the patient's death date",
    "after_data_cut": "the date is after the data-cut date of the rules",
    # rejected (labs)
    "unknown_analyte": "the analyte name or LOINC code is not creatinine, cystatin C or "
    "UACR and is not in the analyte map",
    "missing_value": "the result is empty",
    "not_done": "the laboratory reports the test as not done (e.g. SDTM LBSTAT = NOT DONE)",
    "not_a_result": "the result text is not a number (e.g. 'see comment', 'haemolysed')",
    "qualified_value": "the result carries '<' or '>' and the rules reject qualified values",
    "missing_unit": "no unit was reported and the source gives no default",
    "unknown_unit": "the unit is not a known unit of the analyte",
    "implausible_value": "the value in standard units is outside the plausibility range",
    # rejected (patients)
    "duplicate_patient_id": "different rows share this patient identifier; all are rejected",
    "death_before_birth": "the death date is before the birth date",
    "invalid_number": "a numeric field (age, height, weight) is not a number",
    # rejected (events)
    "unknown_event": "the event code is not a canonical event and not in the event map",
    # merged (counted in rows_merged, listed in .merged)
    "exact_duplicate": "identical to an earlier row in every field; merged into it",
    "same_day_collapsed": "another usable result of the same patient, analyte and day; "
    "folded into one row by the same-day rule",
}
"""Stable reason codes (code -> description) of rejected and merged rows."""

MERGE_REASONS: Final = ("exact_duplicate", "same_day_collapsed")


class PlausibleRange(RuleModel):
    """Closed range ``[low, high]`` of plausible results of one analyte, in ``unit``."""

    model_config = ConfigDict(frozen=False)

    low: float = Field(description="Lowest plausible result (inclusive).")
    high: float = Field(description="Highest plausible result (inclusive).")
    unit: str = Field(description="Unit of low and high; any known unit of the analyte.")

    def in_standard_unit(self, analyte: str) -> tuple[float, float]:
        """``(low, high)`` converted to the analyte's standard unit."""
        factor = units.conversion_factor(analyte, self.unit)
        return self.low * factor, self.high * factor


# Common practice, not a published standard: wide enough to keep every real result
# (neonates' creatinine ~0.1-0.2 mg/dL, untreated kidney failure up to ~25-30 mg/dL;
# cystatin C ~0.4 in health, rarely above 8 mg/L; nephrotic UACR above 3000 mg/g, kept
# up to 30 000 mg/g) while catching unit slips (creatinine umol/L labelled mg/dL reads
# 50-1000 "mg/dL") and typing errors. UACR 0 is a real result (below detection).
DEFAULT_PLAUSIBLE_RANGES: Final[dict[str, PlausibleRange]] = {
    "creatinine": PlausibleRange(low=0.1, high=30.0, unit="mg/dL"),
    "cystatin_c": PlausibleRange(low=0.2, high=10.0, unit="mg/L"),
    "uacr": PlausibleRange(low=0.0, high=30000.0, unit="mg/g"),
}


class HarmonizeRules(RuleModel):
    """Rules of the harmonise stage; field names are the config keys under ``harmonize``.

    Examples
    --------
    >>> HarmonizeRules(same_day_rule="first", qualified_values="reject").same_day_rule
    'first'
    """

    model_config = ConfigDict(frozen=False)

    qualified_values: Literal["keep", "reject"] = Field(
        default="keep",
        description="Results reported as '<x' or '>x': 'keep' uses x and sets the "
        "qualifier column; 'reject' rejects them with reason qualified_value.",
    )
    decimal_comma: bool = Field(
        default=True,
        description="Read '0,9' as 0.9 (a single comma and no point). When false such "
        "text is not_a_result.",
    )
    plausible_ranges: dict[str, PlausibleRange] = Field(
        default_factory=lambda: dict(DEFAULT_PLAUSIBLE_RANGES),
        description="Analyte -> plausible range (any known unit). Defaults (common "
        "practice): creatinine 0.1-30 mg/dL, cystatin C 0.2-10 mg/L, UACR 0-30000 mg/g.",
    )
    same_day_rule: Literal["mean", "first", "last", "min", "max", "none"] = Field(
        default="mean",
        description="How usable results of one patient, analyte and calendar day are "
        "folded into one: mean, first or last by sample time, min, max; 'none' keeps all.",
    )
    data_cut_date: dt.date | None = Field(
        default=None, description="Rows dated after this day are rejected (after_data_cut)."
    )
    date_format: str | None = Field(
        default=None,
        description="strftime format of text date columns; inferred when omitted.",
    )
    analyte_names: dict[str, str] = Field(
        default_factory=dict,
        description="Extra site analyte names or codes -> creatinine / cystatin_c / uacr "
        "(added to the built-in names and LOINC codes).",
    )
    sex_codes: dict[str, str] = Field(
        default_factory=dict,
        description="Extra site sex codes -> female / male (added to F/M/female/male). "
        "Unrecognised codes leave sex missing and are counted in .assumptions.",
    )
    event_codes: dict[str, str] = Field(
        default_factory=dict,
        description="Extra site event codes -> dialysis / transplant / death / kidney_death.",
    )


def resolve_rules(rules: HarmonizeRules | None, overrides: dict[str, Any]) -> HarmonizeRules:
    """Return ``rules`` (or the defaults) updated by keyword ``overrides``, validated."""
    return _rules.resolve_rules(HarmonizeRules, rules, overrides, "harmonize")


@dataclass
class HarmonizeResult:
    """What :func:`harmonize` returns (all polars DataFrames).

    Attributes
    ----------
    labs
        Usable results in standard units, ``schemas.LABS`` columns, in source order
        (``source``, ``source_row``).
    rejected
        Rejected rows of every input table, ``schemas.REJECTED`` columns.
    merged
        Rows merged into another row (``exact_duplicate`` / ``same_day_collapsed``), same
        columns as ``rejected``; their ``detail`` names the row they were merged into.
    accounting
        One row per input table: ``table, rows_read, rows_used, rows_rejected,
        rows_merged``.
    accounting_by_reason
        ``table, outcome ('rejected'/'merged'), reason, rows``.
    assumptions
        ``table, source, assumption, rows``: source defaults applied, codes set missing.
    patients, events
        The cleaned patients and events tables (events ``None`` when not given).
    """

    labs: pl.DataFrame
    rejected: pl.DataFrame
    merged: pl.DataFrame
    accounting: pl.DataFrame
    accounting_by_reason: pl.DataFrame
    assumptions: pl.DataFrame
    patients: pl.DataFrame
    events: pl.DataFrame | None
    rules: HarmonizeRules = field(default_factory=HarmonizeRules)


# --------------------------------------------------------------------------------------
# helpers


def _lazy(data: Any, name: str) -> pl.LazyFrame:
    if isinstance(data, pl.LazyFrame):
        return data
    if isinstance(data, pl.DataFrame):
        return data.lazy()
    try:
        import pandas as pd
    except ImportError:  # pragma: no cover - pandas is a dependency
        pd = None
    if pd is not None and isinstance(data, pd.DataFrame):
        return pl.from_pandas(data).lazy()
    raise InputDataError(
        f"{name}: expected a polars or pandas DataFrame, got {type(data).__name__}"
    )


def _text(column: str) -> pl.Expr:
    """A column as stripped text, empty text as null."""
    t = pl.col(column).cast(pl.String).str.strip_chars()
    return pl.when(t != "").then(t)


def _with_row_identity(frame: pl.LazyFrame, table: str) -> pl.LazyFrame:
    names = frame.collect_schema().names()
    frame = frame.with_row_index("_rid")
    exprs = []
    if "source_row" not in names:
        exprs.append((pl.col("_rid").cast(pl.Int64) + 1).alias("source_row"))
    else:
        exprs.append(pl.col("source_row").cast(pl.Int64))
    if "source" not in names:
        exprs.append(pl.lit(table, pl.String).alias("source"))
    else:
        exprs.append(pl.col("source").cast(pl.String).fill_null(table))
    if "assumption" not in names:
        exprs.append(pl.lit(None, pl.String).alias("assumption"))
    return frame.with_columns(exprs)


Check = tuple[pl.Expr, str, pl.Expr]  # (failing condition, reason code, detail text)


def _cascade(checks: list[Check]) -> pl.Expr:
    """First failing check wins: the ``_reason`` expression (null when all pass).

    Works on small integers (the index of each failing check, then the smallest) and
    names the code last, which is much cheaper than a chain of text branches.
    """
    failing = [
        pl.when(condition.fill_null(False)).then(pl.lit(i, pl.UInt8))
        for i, (condition, _, _) in enumerate(checks)
    ]
    names = {i: code for i, (_, code, _) in enumerate(checks)}
    return (
        pl.min_horizontal(failing)
        .replace_strict(names, default=None, return_dtype=pl.String)
        .alias("_reason")
    )


def _detail(checks: list[Check]) -> pl.Expr:
    """The readable detail of ``_reason``; evaluated on rejected rows only (cheap)."""
    detail: Any = pl
    for _, code, text in checks:
        detail = detail.when(pl.col("_reason") == code).then(text)
    return detail.otherwise(pl.lit(None, pl.String))


def _date_text(expr: pl.Expr) -> pl.Expr:
    return expr.cast(pl.Date).cast(pl.String)


def _first_distinct(frame: pl.DataFrame, keys: list[str]) -> pl.Series:
    """True on the first row (in frame order) of each group of identical ``keys``."""
    return frame.select(pl.struct(keys).is_first_distinct()).to_series()


def _merged_rows(
    frame: pl.DataFrame, mask: pl.Series, reason: str, table: str, detail: pl.Expr
) -> pl.DataFrame:
    return frame.filter(mask).select(
        pl.lit(table).alias("table"),
        "source",
        "source_row",
        "patient_id",
        pl.lit(reason).alias("reason"),
        detail.alias("detail"),
    )


def _rejected_rows(frame: pl.DataFrame, table: str, checks: list[Check]) -> pl.DataFrame:
    return frame.filter(pl.col("_reason").is_not_null()).select(
        pl.lit(table).alias("table"),
        "source",
        "source_row",
        "patient_id",
        pl.col("_reason").alias("reason"),
        _detail(checks).alias("detail"),
    )


def _exact_duplicates(
    frame: pl.DataFrame, keys: list[str], table: str
) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Split ``frame`` (sorted by source, source_row) into first copies and merged rows.

    Rows are compared exactly on ``keys``; a hash of the keys only narrows the search to
    candidate groups first, so the exact comparison runs on few rows.
    """
    hashed = frame.select(pl.struct(keys).hash().alias("_h")).to_series()
    candidate = hashed.is_duplicated()
    if not candidate.any():
        empty = _merged_rows(
            frame.head(0), pl.Series([], dtype=pl.Boolean), "exact_duplicate", table, pl.lit("")
        )
        return frame, empty
    positions = np.flatnonzero(candidate.to_numpy())
    subset = frame[positions]
    subset_first = _first_distinct(subset, keys).to_numpy()
    first_np = np.ones(frame.height, dtype=bool)
    first_np[positions[~subset_first]] = False
    first = pl.Series(first_np)
    kept_as = subset.filter(pl.Series(subset_first)).select(
        *keys, pl.format("{}:{}", "source", "source_row").alias("_kept_as")
    )
    dupes = frame.filter(~first).join(kept_as, on=keys, how="left", nulls_equal=True)
    merged = _merged_rows(
        dupes,
        pl.repeat(True, dupes.height, eager=True),
        "exact_duplicate",
        table,
        pl.format("identical to row {}", pl.col("_kept_as")),
    )
    return frame.filter(first), merged


def _in_source_order(frame: pl.DataFrame) -> pl.DataFrame:
    """Sort by (source, source_row, _rid) unless the rows already are in that order."""
    one_source = frame["source"].n_unique() <= 1
    if one_source and frame["source_row"].is_sorted() and frame["_rid"].is_sorted():
        return frame
    return frame.sort("source", "source_row", "_rid")


def _assumption_counts(frame: pl.DataFrame, table: str) -> pl.DataFrame:
    return (
        frame.filter(pl.col("assumption").is_not_null())
        .group_by("source", "assumption")
        .agg(pl.len().cast(pl.Int64).alias("rows"))
        .select(pl.lit(table).alias("table"), "source", "assumption", "rows")
    )


# --------------------------------------------------------------------------------------
# patients


_PATIENT_DATES: Final = {c: t for c, t in schemas.PATIENTS.items() if t.is_temporal()}
_PATIENT_NUMBERS: Final = ("age_at_index", "height_cm", "weight_kg")
_TRUE_TEXT: Final = {
    "true": True,
    "t": True,
    "yes": True,
    "y": True,
    "1": True,
    "false": False,
    "f": False,
    "no": False,
    "n": False,
    "0": False,
}


def _clean_patients(
    patients: Any, rules: HarmonizeRules
) -> tuple[pl.DataFrame, pl.DataFrame, pl.DataFrame, pl.DataFrame, int]:
    """Return (used patients, status lookup, rejected, merged, rows read)."""
    frame = _lazy(patients, "patients")
    require_columns(frame, schemas.PATIENTS_REQUIRED, "patients")
    frame = _with_row_identity(frame, "patients")
    frame = parse_date_columns(
        frame, _PATIENT_DATES, name="patients", date_format=rules.date_format
    )
    names = frame.collect_schema().names()
    schema = frame.collect_schema()
    sex_map = {**DEFAULT_SEX_CODES, **{fold_code(k): v for k, v in rules.sex_codes.items()}}
    exprs: list[pl.Expr] = [_text("patient_id").alias("patient_id")]
    notes: list[pl.Expr] = [pl.col("assumption")]
    bad_number: list[str] = []
    if "sex" in names:
        folded = fold_code_expr(pl.col("sex"))
        mapped = folded.replace_strict(sex_map, default=None, return_dtype=pl.String)
        exprs.append(mapped.alias("sex"))
        notes.append(
            pl.when(mapped.is_null() & _text("sex").is_not_null()).then(
                pl.lit("sex code not recognised, set missing")
            )
        )
    for column in _PATIENT_NUMBERS:
        if column in names and not schema[column].is_numeric():
            number = (
                _text(column).str.replace(",", ".", literal=True).cast(pl.Float64, strict=False)
            )
            bad_number.append(column)
            exprs.append(number.alias(column))
    if "black_race" in names and schema["black_race"] != pl.Boolean:
        flag = fold_code_expr(pl.col("black_race")).replace_strict(
            _TRUE_TEXT, default=None, return_dtype=pl.Boolean
        )
        notes.append(
            pl.when(flag.is_null() & _text("black_race").is_not_null()).then(
                pl.lit("black_race value not recognised, set missing")
            )
        )
        exprs.append(flag.alias("black_race"))
    exprs.append(pl.concat_str(notes, separator="; ", ignore_nulls=True).alias("_note"))
    frame = frame.with_columns(pl.col(c).alias(f"_raw_{c}") for c in bad_number)
    frame = frame.with_columns(exprs)
    frame = frame.with_columns(
        pl.when(pl.col("_note") != "").then(pl.col("_note")).alias("assumption")
    ).drop("_note")
    data = _in_source_order(frame.collect())
    n_read = data.height

    bookkeeping = {"_rid", "source", "source_row", "assumption"}
    content = [c for c in data.columns if c not in bookkeeping and not c.startswith("_raw_")]
    data, merged = _exact_duplicates(data, content, "patients")
    id_count = pl.len().over("patient_id")
    checks: list[Check] = [
        (pl.col("patient_id").is_null(), "missing_patient_id", pl.lit("patient_id is empty")),
    ]
    for column in _PATIENT_DATES:
        as_read = column + AS_READ_SUFFIX
        if as_read in data.columns:
            checks.append(
                (
                    pl.col(as_read).is_not_null(),
                    "unparseable_date",
                    pl.format("{} '{}' does not parse", pl.lit(column), pl.col(as_read)),
                )
            )
    for column in bad_number:
        raw = _text(f"_raw_{column}")
        checks.append(
            (
                pl.col(column).is_null() & raw.is_not_null(),
                "invalid_number",
                pl.format("{} '{}' is not a number", pl.lit(column), raw),
            )
        )
    checks.append(
        (
            (id_count > 1) & pl.col("patient_id").is_not_null(),
            "duplicate_patient_id",
            pl.format("patient_id '{}' on {} differing rows", pl.col("patient_id"), id_count),
        )
    )
    if "death_date" in data.columns and "birth_date" in data.columns:
        checks.append(
            (
                pl.col("death_date") < pl.col("birth_date"),
                "death_before_birth",
                pl.format(
                    "death {} before birth {}",
                    _date_text(pl.col("death_date")),
                    _date_text(pl.col("birth_date")),
                ),
            )
        )
    data = data.with_columns(_cascade(checks))
    rejected = _rejected_rows(data, "patients", checks)
    used = data.filter(pl.col("_reason").is_null())
    lookup_cols = [c for c in ("birth_date", "death_date") if c in data.columns]
    status = (
        data.filter(pl.col("patient_id").is_not_null())
        .group_by("patient_id")
        .agg(
            (pl.col("_reason").is_null().all()).alias("_patient_ok"),
            *(pl.col(c).first() for c in lookup_cols),
        )
    )
    for c in ("birth_date", "death_date"):
        if c not in status.columns:
            status = status.with_columns(pl.lit(None, pl.Date).alias(c))
    return used, status, rejected, merged, n_read


def _finish_patients(used: pl.DataFrame) -> pl.DataFrame:
    extras = [
        c
        for c in used.columns
        if c not in schemas.PATIENTS
        and not c.startswith("_")
        and not c.endswith(AS_READ_SUFFIX)
        and c not in ("source", "source_row", "assumption")
    ]
    out = conform(used, schemas.PATIENTS)
    if extras:
        out = pl.concat([out, used.select(extras)], how="horizontal")
    return out.sort("patient_id")


# --------------------------------------------------------------------------------------
# labs


# A partial ISO 8601 date: year, or year and month (SDTM --DTC convention).
_PARTIAL_DATE: Final = r"^\d{4}(?:-\d{2})?$"
# A result reported as not done ("NOT DONE", "not done: haemolysed", ...).
_NOT_DONE: Final = r"(?i)^not\s+done\b"
_NUMBER: Final = r"[+-]?(?:\d+(?:[.,]\d*)?|[.,]\d+)(?:[eE][+-]?\d+)?"
_RESULT_PATTERN: Final = (
    r"(?i)^(?P<q><=|>=|<|>|≤|≥)?\s*(?P<num>" + _NUMBER + r")\s*"
    r"(?P<flag>\*|!|\(?(?:hh|ll|h|l|a)\)?)?$"
)


def _parse_result(text: pl.Expr, rules: HarmonizeRules) -> tuple[pl.Expr, pl.Expr]:
    """(number, qualifier) of a reported result text; number null when not a result.

    Explicit rules: an optional leading ``<``, ``<=``, ``≤`` (-> ``"<"``) or ``>``,
    ``>=``, ``≥`` (-> ``">"``); one number, with a decimal comma read as a point when
    ``rules.decimal_comma``; an optional trailing abnormal flag (``H``, ``L``, ``HH``,
    ``LL``, ``A``, ``*``, ``!``, in brackets or not), which is dropped.
    """
    groups = text.str.extract_groups(_RESULT_PATTERN)
    number_text = groups.struct.field("num")
    if rules.decimal_comma:
        comma_ok = ~(
            number_text.str.contains(",", literal=True)
            & number_text.str.contains(".", literal=True)
        )
        number_text = pl.when(comma_ok).then(number_text.str.replace(",", ".", literal=True))
    else:
        number_text = pl.when(~number_text.str.contains(",", literal=True)).then(number_text)
    number = number_text.cast(pl.Float64, strict=False)
    q = groups.struct.field("q")
    qualifier = (
        pl.when(q.is_in(["<", "<=", "≤"]))
        .then(pl.lit("<"))
        .when(q.is_in([">", ">=", "≥"]))
        .then(pl.lit(">"))
    )
    return number, qualifier


def _prepare_labs(
    labs: Any, status: pl.DataFrame, rules: HarmonizeRules
) -> tuple[pl.LazyFrame, list[Check]]:
    frame = _lazy(labs, "labs")
    require_columns(frame, schemas.RAW_LABS_REQUIRED, "labs")
    names = frame.collect_schema().names()
    frame = _with_row_identity(frame, "labs")
    targets: dict[str, pl.DataType] = {"sample_date": pl.Datetime("us")}
    if "sample_datetime" in names:
        targets["sample_datetime"] = pl.Datetime("us")
    frame = parse_date_columns(frame, targets, name="labs", date_format=rules.date_format)
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
        **{fold_code(k): v for k, v in rules.analyte_names.items()},
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
    number, parsed_qualifier = _parse_result(pl.col("_value_text"), rules)
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
    ranges = {a: r.in_standard_unit(a) for a, r in rules.plausible_ranges.items()}
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
    if rules.qualified_values == "reject":
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
            pl.col("_day") > pl.col("death_date"),
            "after_death",
            pl.format(
                "sample {} after death {}",
                _date_text(pl.col("_day")),
                _date_text(pl.col("death_date")),
            ),
        ),
    ]
    if rules.data_cut_date is not None:
        cut = pl.lit(rules.data_cut_date, pl.Date)
        checks.append(
            (
                pl.col("_day") > cut,
                "after_data_cut",
                pl.format(
                    "sample {} after data cut {}",
                    _date_text(pl.col("_day")),
                    pl.lit(rules.data_cut_date.isoformat()),
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


# --------------------------------------------------------------------------------------
# events


def _clean_events(
    events: Any, status: pl.DataFrame, rules: HarmonizeRules
) -> tuple[pl.DataFrame, pl.DataFrame, pl.DataFrame, int, pl.DataFrame]:
    frame = _lazy(events, "events")
    require_columns(frame, schemas.EVENTS_REQUIRED, "events")
    frame = _with_row_identity(frame, "events")
    dates = {c: t for c, t in schemas.EVENTS.items() if t.is_temporal()}
    frame = parse_date_columns(frame, dates, name="events", date_format=rules.date_format)
    names = frame.collect_schema().names()
    codes = {
        **{e: e for e in schemas.CANONICAL_EVENTS},
        **{fold_code(e): e for e in schemas.CANONICAL_EVENTS},
        **DEFAULT_EVENT_CODES,
        **{fold_code(k): v for k, v in rules.event_codes.items()},
    }
    frame = frame.with_columns(
        _text("patient_id").alias("patient_id"),
        _text("event").alias("_event_raw"),
        fold_code_expr(_text("event"))
        .replace_strict(codes, default=None, return_dtype=pl.String)
        .alias("event"),
    )
    data = _in_source_order(frame.collect())
    n_read = data.height
    assumptions = _assumption_counts(data, "events")
    content = [c for c in data.columns if c not in ("_rid", "source", "source_row", "assumption")]
    data, merged = _exact_duplicates(data, content, "events")
    data = data.join(status, on="patient_id", how="left", maintain_order="left")
    as_read = [c for c in names if c.endswith(AS_READ_SUFFIX)]
    checks: list[Check] = [
        (pl.col("patient_id").is_null(), "missing_patient_id", pl.lit("patient_id is empty")),
        *(
            (
                pl.col(c).is_not_null(),
                "unparseable_date",
                pl.format(
                    "{} '{}' does not parse", pl.lit(c.removesuffix(AS_READ_SUFFIX)), pl.col(c)
                ),
            )
            for c in as_read
        ),
        (pl.col("event_date").is_null(), "missing_date", pl.lit("event_date is empty")),
        (
            pl.col("event").is_null(),
            "unknown_event",
            pl.format("event '{}' is not a known event", pl.col("_event_raw").fill_null("")),
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
            pl.col("event_date") < pl.col("birth_date"),
            "before_birth",
            pl.format(
                "event {} before birth {}",
                _date_text(pl.col("event_date")),
                _date_text(pl.col("birth_date")),
            ),
        ),
        (
            pl.col("event_date") > pl.col("death_date"),
            "after_death",
            pl.format(
                "event {} after death {}",
                _date_text(pl.col("event_date")),
                _date_text(pl.col("death_date")),
            ),
        ),
    ]
    if rules.data_cut_date is not None:
        checks.append(
            (
                pl.col("event_date") > pl.lit(rules.data_cut_date, pl.Date),
                "after_data_cut",
                pl.format(
                    "event {} after data cut {}",
                    _date_text(pl.col("event_date")),
                    pl.lit(rules.data_cut_date.isoformat()),
                ),
            )
        )
    data = data.with_columns(_cascade(checks))
    rejected = _rejected_rows(data, "events", checks)
    extras = [
        c
        for c in data.columns
        if c not in schemas.EVENTS
        and not c.startswith("_")
        and not c.endswith(AS_READ_SUFFIX)
        and c not in ("source", "source_row", "assumption", "birth_date", "death_date")
    ]
    used = data.filter(pl.col("_reason").is_null())
    out = pl.concat([conform(used, schemas.EVENTS), used.select(extras)], how="horizontal")
    return (out.sort("patient_id", "event_date", "event"), rejected, merged, n_read, assumptions)


# --------------------------------------------------------------------------------------
# accounting


def _account(
    table: str, n_read: int, n_used: int, rejected: pl.DataFrame, merged: pl.DataFrame
) -> tuple[dict[str, Any], pl.DataFrame]:
    row = {
        "table": table,
        "rows_read": n_read,
        "rows_used": n_used,
        "rows_rejected": rejected.filter(pl.col("table") == table).height,
        "rows_merged": merged.filter(pl.col("table") == table).height,
    }
    if row["rows_read"] != row["rows_used"] + row["rows_rejected"] + row["rows_merged"]:
        raise AccountingError(
            f"{table}: rows read {row['rows_read']} != used {row['rows_used']} + rejected "
            f"{row['rows_rejected']} + merged {row['rows_merged']}"
        )
    by_reason = (
        pl.concat(
            [
                rejected.filter(pl.col("table") == table).with_columns(
                    pl.lit("rejected").alias("outcome")
                ),
                merged.filter(pl.col("table") == table).with_columns(
                    pl.lit("merged").alias("outcome")
                ),
            ]
        )
        .group_by("table", "outcome", "reason")
        .agg(pl.len().cast(pl.Int64).alias("rows"))
    )
    unknown = set(by_reason["reason"].to_list()) - set(REASON_CODES)
    if unknown:
        raise AccountingError(f"{table}: undocumented reason codes {sorted(unknown)}")
    return row, by_reason


_REJECTED_EMPTY: Final = pl.DataFrame(schema=schemas.REJECTED)


def harmonize(
    labs: Any,
    patients: Any,
    events: Any | None = None,
    rules: HarmonizeRules | None = None,
    **rule_fields: Any,
) -> HarmonizeResult:
    r"""Harmonise raw labs (and patients, events): standard units, reasons, accounting.

    Parameters
    ----------
    labs
        Raw lab results (polars DataFrame/LazyFrame or pandas) with the columns of
        ``schemas.RAW_LABS_REQUIRED``; ``value`` may be text (``"<0.2"``, ``"0,9"``) or
        numbers; ``sample_date`` text, date or datetime. Optional ``setting``,
        ``source`` and ``source_row`` (1-based row numbers are assigned when absent).
        Already-harmonised labs (``schemas.LABS``) are accepted and pass unchanged.
    patients
        Patients table (``schemas.PATIENTS``; only ``patient_id`` required). Covariate
        columns are kept.
    events
        Optional events table (``schemas.EVENTS``).
    rules
        :class:`HarmonizeRules`; keyword ``rule_fields`` override its fields.

    Returns
    -------
    HarmonizeResult
        ``.labs``, ``.rejected``, ``.merged``, ``.accounting``, ``.accounting_by_reason``,
        ``.assumptions``, ``.patients``, ``.events``.

    Raises
    ------
    InputDataError
        A required column is missing or a date column cannot be parsed at all.
    ConfigError
        An unknown or invalid rule.
    AccountingError
        Rows read differ from used + rejected + merged (a bug).

    Notes
    -----
    Values are converted to the standard unit :math:`x_\text{std} = f_u\,x_u` with
    :math:`f` from :func:`kidneycohort.units.conversion_factor` (creatinine
    :math:`1/88.4` per umol/L, UACR 8.84 per mg/mmol; KDIGO 2012). Same-day ``mean``
    weights each folded row by its ``n_collapsed``, so re-harmonising is a no-op.

    Examples
    --------
    >>> import polars as pl
    >>> labs = pl.DataFrame({"patient_id": ["a", "a"], "sample_date": ["2020-01-02"] * 2,
    ...                      "analyte": ["2160-0", "creatinine"], "value": ["88,4", "x"],
    ...                      "unit": ["umol/L", "mg/dL"]})
    >>> out = harmonize(labs, pl.DataFrame({"patient_id": ["a"]}))
    >>> out.labs["value"].to_list(), out.rejected["reason"].to_list()
    ([1.0], ['not_a_result'])
    """
    resolved = resolve_rules(rules, rule_fields)
    used_patients, status, rejected_p, merged_p, n_patients = _clean_patients(patients, resolved)

    frame, lab_checks = _prepare_labs(labs, status, resolved)
    data = _in_source_order(frame.collect())
    del frame  # drops the plan's reference to the pre-join copy
    n_labs = data.height
    assumptions_l = _assumption_counts(data, "labs")
    # Identical rows always get the same reason, so duplicates can be looked for on the
    # rejected and the usable side separately; the usable side keeps only what it needs.
    is_bad = data["_reason"].is_not_null()
    bad = data.filter(is_bad)
    good = data.filter(~is_bad).select(_GOOD_COLUMNS)
    del data
    bad, merged_bad = _exact_duplicates(bad, list(_LAB_CONTENT), "labs")
    good, merged_good = _exact_duplicates(good, list(_LAB_CONTENT), "labs")
    merged_exact = pl.concat([merged_bad, merged_good])
    rejected_l = _rejected_rows(bad, "labs", lab_checks)
    del bad
    kept, merged_day = _collapse_same_day(good, resolved.same_day_rule)
    del good
    labs_out = _finish_labs(kept)

    patients_assumptions = (
        used_patients.filter(pl.col("assumption").is_not_null())
        .group_by("source", "assumption")
        .agg(pl.len().cast(pl.Int64).alias("rows"))
        .select(pl.lit("patients").alias("table"), "source", "assumption", "rows")
    )
    rejected_parts = [rejected_l, rejected_p]
    merged_parts = [merged_exact, merged_day, merged_p]
    assumption_parts = [assumptions_l, patients_assumptions]
    events_out = None
    n_events = 0
    if events is not None:
        events_out, rejected_e, merged_e, n_events, assumptions_e = _clean_events(
            events, status, resolved
        )
        rejected_parts.append(rejected_e)
        merged_parts.append(merged_e)
        assumption_parts.append(assumptions_e)

    rejected = pl.concat([conform(p, schemas.REJECTED) for p in rejected_parts]).sort(
        "table", "source", "source_row"
    )
    merged = pl.concat([conform(p, schemas.REJECTED) for p in merged_parts]).sort(
        "table", "source", "source_row"
    )
    rows, reasons = [], []
    for table, n_read, n_used in (
        ("labs", n_labs, labs_out.height),
        ("patients", n_patients, used_patients.height),
        *((("events", n_events, events_out.height),) if events_out is not None else ()),
    ):
        row, by_reason = _account(table, n_read, n_used, rejected, merged)
        rows.append(row)
        reasons.append(by_reason)
    accounting = pl.DataFrame(
        rows,
        schema={
            "table": pl.String,
            "rows_read": pl.Int64,
            "rows_used": pl.Int64,
            "rows_rejected": pl.Int64,
            "rows_merged": pl.Int64,
        },
    )
    accounting_by_reason = pl.concat(reasons).sort("table", "outcome", "reason")
    assumptions = pl.concat(assumption_parts).sort("table", "source", "assumption")
    if assumptions.height:
        logger.info("harmonize: assumptions applied: %s", assumptions.head(50).to_dicts())
    logger.info("harmonize: %s", accounting.to_dicts())
    return HarmonizeResult(
        labs=labs_out,
        rejected=rejected,
        merged=merged,
        accounting=accounting,
        accounting_by_reason=accounting_by_reason,
        assumptions=assumptions,
        patients=_finish_patients(used_patients),
        events=events_out,
        rules=resolved,
    )
