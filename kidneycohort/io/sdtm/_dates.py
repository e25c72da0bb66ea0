"""ISO 8601 dates of SDTM ``--DTC`` variables, complete or partial, and imputation rules.

SDTM stores dates as ISO 8601 text that may be partial: ``2024-03-05T10:30``,
``2024-03-05``, ``2024-03`` (day unknown) or ``2024`` (month unknown). A partial date is
used only under a stated rule (:data:`PARTIAL_DATE_RULES`):

* ``reject`` (default): not imputed; the row is rejected (labs: reason ``partial_date``)
  or the date left empty with an assumption recorded (patients);
* ``first``: the earliest possible date (``2024`` -> 2024-01-01, ``2024-03`` -> 2024-03-01);
* ``middle``: the middle of the known period (``2024`` -> 2024-07-01, ``2024-03`` ->
  2024-03-15), a common choice of analysis plans (common practice).

References
----------
.. [1] CDISC SDTM Implementation Guide v3.4, section 4.4 (date and time formats,
   intervals of uncertainty written as partial dates).
"""

from __future__ import annotations

from typing import Final, Literal

import polars as pl

__all__ = ["PARTIAL_DATE_RULES", "impute", "is_partial", "iso_datetime", "read_dtc"]

PartialDateRule = Literal["reject", "first", "middle"]
PARTIAL_DATE_RULES: Final = ("reject", "first", "middle")

_FULL_FORMATS: Final = (
    "%Y-%m-%dT%H:%M:%S%.f",
    "%Y-%m-%dT%H:%M:%S",
    "%Y-%m-%dT%H:%M",
    "%Y-%m-%d",
)
_YEAR_MONTH: Final = r"^(\d{4})-(\d{2})$"
_YEAR: Final = r"^(\d{4})$"


def iso_datetime(text: pl.Expr) -> pl.Expr:
    """A complete ISO 8601 date or date-time as a datetime (null when partial or bad)."""
    clean = text.str.strip_chars()
    return pl.coalesce(
        [clean.str.to_datetime(f, strict=False, time_unit="us") for f in _FULL_FORMATS]
    )


def is_partial(text: pl.Expr) -> pl.Expr:
    """True for a partial ISO 8601 date (year, or year and month)."""
    clean = text.str.strip_chars()
    return clean.str.contains(_YEAR_MONTH) | clean.str.contains(_YEAR)


def impute(text: pl.Expr, rule: PartialDateRule) -> pl.Expr:
    """The date a partial ISO 8601 date stands for under ``rule`` (null for ``reject``)."""
    if rule == "reject":
        return pl.lit(None, pl.Datetime("us"))
    clean = text.str.strip_chars()
    year = pl.coalesce(clean.str.extract(_YEAR_MONTH, 1), clean.str.extract(_YEAR, 1)).cast(
        pl.Int32
    )
    month_known = clean.str.extract(_YEAR_MONTH, 2).cast(pl.Int32)
    month = month_known.fill_null(7 if rule == "middle" else 1)
    day = pl.when(month_known.is_null()).then(1).otherwise(15 if rule == "middle" else 1)
    return pl.datetime(year, month, day, time_unit="us")


def read_dtc(
    text: pl.Expr, rule: PartialDateRule, variable: str
) -> tuple[pl.Expr, pl.Expr, pl.Expr]:
    """(datetime, text kept for a date not used, assumption note) of a ``--DTC`` column.

    A complete date is used as is. A partial one is imputed by ``rule`` (and noted), or,
    under ``reject``, left null with its text returned for the rejection reason.
    """
    full = iso_datetime(text)
    partial = is_partial(text)
    imputed = impute(text, rule)
    value = pl.when(full.is_not_null()).then(full).when(partial).then(imputed)
    present = text.str.strip_chars().fill_null("") != ""
    unused = pl.when(full.is_null() & present & (~partial | (rule == "reject"))).then(
        text.str.strip_chars()
    )
    note = pl.when(full.is_null() & partial & (rule != "reject")).then(
        pl.lit(f"{variable} partial, imputed ({rule})")
    )
    return value, unused, note
