"""Plausibility limits of dates, ages and body size (common practice, no single source).

A date before ``rule.earliest_date`` (1900-01-01) or after today is no real date of a
sample, birth, index or death; an age over ``rule.max_age_years`` (110) or below 0 is
no real age. Such rows are rejected with a reason code (``implausible_date``,
``implausible_age``). A height or weight outside its plausible range is set missing
and the reason is recorded in the row's ``assumption`` (the patient is kept).
"""

from __future__ import annotations

import datetime as dt
from typing import Final

import polars as pl

from kidneycohort.harmonize._rows import Check, _date_text
from kidneycohort.harmonize._rule import HarmonizeRule

__all__ = ["DAYS_PER_YEAR", "body_size", "implausible_date", "patient_checks"]

DAYS_PER_YEAR: Final = 365.25
_BODY: Final = {
    "height_cm": ("plausible_height_cm", "cm"),
    "weight_kg": ("plausible_weight_kg", "kg"),
}


def implausible_date(day: pl.Expr, column: str, rule: HarmonizeRule) -> Check:
    """A check rejecting a date before ``rule.earliest_date`` or after today."""
    earliest = pl.lit(rule.earliest_date, pl.Date)
    today = pl.lit(dt.date.today(), pl.Date)
    return (
        (day < earliest) | (day > today),
        "implausible_date",
        pl.format(
            "{} {} is before {} or after today",
            pl.lit(column),
            _date_text(day),
            pl.lit(rule.earliest_date.isoformat()),
        ),
    )


def patient_checks(columns: list[str], rule: HarmonizeRule) -> list[Check]:
    """Implausible birth, index and death dates; an age at index outside 0 to the
    oldest plausible age (given, or from birth and index dates)."""
    checks = [
        implausible_date(pl.col(c), c, rule)
        for c in ("birth_date", "index_date", "death_date")
        if c in columns
    ]
    oldest = rule.max_age_years
    if "age_at_index" in columns:
        age = pl.col("age_at_index")
        checks.append(
            (
                (age < 0) | (age > oldest),
                "implausible_age",
                pl.format("age_at_index {} outside 0-{}", age, pl.lit(oldest)),
            )
        )
    if "birth_date" in columns and "index_date" in columns:
        years = (pl.col("index_date") - pl.col("birth_date")).dt.total_days() / DAYS_PER_YEAR
        checks.append(
            (
                (years < 0) | (years > oldest),
                "implausible_age",
                pl.format(
                    "age at index {} years from birth {} outside 0-{}",
                    years.round(1),
                    _date_text(pl.col("birth_date")),
                    pl.lit(oldest),
                ),
            )
        )
    return checks


def body_size(columns: list[str], rule: HarmonizeRule) -> tuple[list[pl.Expr], list[pl.Expr]]:
    """(expressions setting an implausible height or weight missing, their notes)."""
    exprs: list[pl.Expr] = []
    notes: list[pl.Expr] = []
    for column, (field, unit) in _BODY.items():
        if column not in columns:
            continue
        low, high = getattr(rule, field)
        bad = ~pl.col(column).is_between(low, high) & pl.col(column).is_not_null()
        notes.append(
            pl.when(bad)
            .then(pl.lit(f"{column} outside {low:g}-{high:g} {unit}, set missing"))
            .otherwise(pl.lit(None, dtype=pl.String))
        )
        exprs.append(pl.when(~bad).then(pl.col(column)).alias(column))
    return exprs, notes
