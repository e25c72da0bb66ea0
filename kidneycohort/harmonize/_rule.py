"""The harmonise rule, its reason codes and plausible ranges, and the result object."""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from typing import Any, Final, Literal

import polars as pl
from pydantic import Field

from kidneycohort import _rules, units
from kidneycohort._rules import RuleModel

__all__ = [
    "DEFAULT_PLAUSIBLE_RANGES",
    "MERGE_REASONS",
    "REASON_CODES",
    "HarmonizeResult",
    "HarmonizeRule",
    "PlausibleRange",
    "resolve_rules",
    "unusable_tables",
]

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
    "implausible_date": "the date is before the earliest plausible date (1900-01-01 by "
    "default) or after today",
    "implausible_age": "the patient's age (at the sample, or at index) is below 0 or over "
    "the oldest plausible age (110 years by default)",
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


class HarmonizeRule(RuleModel):
    """Rules of the harmonise stage; field names are the config keys under ``harmonize``.

    Examples
    --------
    >>> HarmonizeRule(same_day_rule="first", qualified_values="reject").same_day_rule
    'first'
    """

    qualified_values: Literal["keep", "reject"] = Field(
        default="keep",
        description="Results reported as '<x' or '>x': 'keep' uses x and sets the "
        "qualifier column; 'reject' rejects them with reason qualified_value.",
    )
    decimal_comma: bool | None = Field(
        default=None,
        description="The decimal mark of the source, when it states one. true: a comma is "
        "the decimal mark ('1,500' is 1.5). false: a point is ('1,500' is 1500, '0,9' is "
        "not_a_result). null (not stated): a comma followed by exactly three digits, in "
        "well-formed groups and with no other separator ('1,500', '12,000.5'), is a "
        "thousands separator, any other single comma a decimal comma ('0,9' is 0.9); "
        "each thousands reading is recorded as an assumption and counted.",
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
    earliest_date: dt.date = Field(
        default=dt.date(1900, 1, 1),
        description="Dates before this day, or after today, are implausible: a lab row is "
        "rejected (implausible_date), a patient row too when it is a birth, index or death "
        "date.",
    )
    max_age_years: float = Field(
        default=110.0,
        gt=0,
        description="Oldest plausible age (years): a lab row of a patient older at the "
        "sample, or a patient whose age at index is outside 0 to this, is rejected "
        "(implausible_age).",
    )
    plausible_height_cm: tuple[float, float] = Field(
        default=(40.0, 250.0),
        description="Plausible height range (cm); a height outside is set missing with a "
        "recorded reason (the patient is kept).",
    )
    plausible_weight_kg: tuple[float, float] = Field(
        default=(1.0, 350.0),
        description="Plausible weight range (kg); a weight outside is set missing with a "
        "recorded reason (the patient is kept).",
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


def resolve_rules(rule: HarmonizeRule | None, overrides: dict[str, Any]) -> HarmonizeRule:
    """Return ``rules`` (or the defaults) updated by keyword ``overrides``, validated."""
    return _rules.resolve_rules(HarmonizeRule, rule, overrides, "harmonize")


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
    rule: HarmonizeRule = field(default_factory=HarmonizeRule)

    def unusable(self, tables: tuple[str, ...] = ("labs", "patients")) -> list[str]:
        """One line per table of ``tables`` that has no usable row: the table, the rows
        read and the top rejection reasons (or that it has no data rows at all)."""
        return unusable_tables(self.accounting, self.accounting_by_reason, tables)


def unusable_tables(
    accounting: pl.DataFrame,
    by_reason: pl.DataFrame,
    tables: tuple[str, ...] = ("labs", "patients"),
) -> list[str]:
    """One line per table of ``tables`` without a usable row, from row accounting.

    ``accounting`` has ``table, rows_read, rows_used`` per table and ``by_reason``
    ``table, reason, rows`` (the counts may be sums over partitions of patients).
    """
    lines = []
    for row in accounting.iter_rows(named=True):
        if row["table"] not in tables or row["rows_used"] > 0:
            continue
        if row["rows_read"] == 0:
            lines.append(f"{row['table']}: no data rows (a header only); nothing to analyse")
            continue
        top = (
            by_reason.filter(pl.col("table") == row["table"])
            .sort(["rows", "reason"], descending=[True, False])
            .head(3)
        )
        reasons = ", ".join(f"{r} {n}" for r, n in zip(top["reason"], top["rows"], strict=True))
        lines.append(
            f"{row['table']}: all {row['rows_read']} rows read were rejected "
            f"(top reasons: {reasons}); nothing to analyse"
        )
    return lines
