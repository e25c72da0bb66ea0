"""Property tests of harmonise on random dirty tables (hypothesis, seeded by its database)."""

from __future__ import annotations

import datetime as dt

import polars as pl
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from polars.testing import assert_frame_equal

from kidneycohort.harmonize import REASON_CODES, harmonize_tables

PATIENTS = pl.DataFrame(
    {
        "patient_id": ["A", "B", "C", "D", "D", "E"],
        "sex": ["female", "M", "F", "male", "female", None],
        "birth_date": [
            "1950-01-01",
            "1980-06-30",
            "2001-02-03",
            "1970-01-01",
            "1970-01-01",
            "1990-09-09",
        ],
        "death_date": [None, "2021-03-01", None, None, None, None],
        "weight_kg": ["70", "80,5", "n/a", None, None, "60"],
        "source_row": [1, 2, 3, 4, 5, 6],
    }
)
IDS = ["A", "B", "C", "D", "E", "Z", None, " ", "a"]
DATES = [
    "2020-01-01",
    "2020-01-01",
    "2020-01-02",
    "2021-05-05",
    "1949-12-31",
    "2022-02-02",
    "2025-01-01",
    None,
    "2020-02-30",
    "not a date",
    "2020-01-01 13:45:00",
]
ANALYTES = ["creatinine", "2160-0", "14682-9", "cystatin C", "uacr", "ACR", "glucose", None]
VALUES = [
    "1.0",
    "0,9",
    "1.1 H",
    "<0.2",
    ">15",
    "88",
    "80",
    "see comment",
    "",
    None,
    "-1",
    "0",
    "3.5",
    "1.0",
    "25000",
]
UNITS = ["mg/dL", "umol/L", "µmol/L", "mg/L", "mg/mmol", "mg/g", "", None, "furlong"]

rows = st.lists(
    st.tuples(
        st.sampled_from(IDS),
        st.sampled_from(DATES),
        st.sampled_from(ANALYTES),
        st.sampled_from(VALUES),
        st.sampled_from(UNITS),
    ),
    min_size=0,
    max_size=40,
)
RULES = {"date_format": "%Y-%m-%d", "data_cut_date": dt.date(2023, 12, 31)}
SETTINGS = settings(
    max_examples=40, deadline=None, derandomize=True, suppress_health_check=[HealthCheck.too_slow]
)


def _labs(data: list[tuple]) -> pl.DataFrame:
    names = ["patient_id", "sample_date", "analyte", "value", "unit"]
    frame = pl.DataFrame(data, schema={n: pl.String for n in names}, orient="row")
    return frame.with_columns(
        pl.int_range(1, pl.len() + 1, dtype=pl.Int64).alias("source_row"),
        pl.lit("site_q").alias("source"),
    )


@SETTINGS
@given(rows)
def test_accounting_identity_always_holds(data: list[tuple]) -> None:
    labs = _labs(data)
    out = harmonize_tables(labs, PATIENTS, **RULES)
    row = out.accounting.filter(pl.col("table") == "labs").row(0, named=True)
    assert row["rows_read"] == labs.height
    assert row["rows_read"] == row["rows_used"] + row["rows_rejected"] + row["rows_merged"]
    # every input row is accounted for exactly once (used rows carry n_collapsed of them)
    accounted = pl.concat(
        [
            out.rejected.filter(pl.col("table") == "labs"),
            out.merged.filter(pl.col("table") == "labs"),
        ]
    )["source_row"]
    assert sorted([*accounted, *out.labs["source_row"]]) == list(range(1, labs.height + 1))
    assert set(out.rejected["reason"]) | set(out.merged["reason"]) <= set(REASON_CODES)


@SETTINGS
@given(rows, st.randoms(use_true_random=False))
def test_result_does_not_depend_on_row_order(data: list[tuple], rnd) -> None:
    labs = _labs(data)
    order = list(range(labs.height))
    rnd.shuffle(order)
    first = harmonize_tables(labs, PATIENTS, **RULES)
    shuffled = harmonize_tables(labs[order], PATIENTS[[4, 3, 2, 1, 0, 5]], **RULES)
    assert_frame_equal(shuffled.labs, first.labs)
    assert_frame_equal(
        shuffled.rejected.filter(pl.col("table") == "labs"),
        first.rejected.filter(pl.col("table") == "labs"),
    )
    assert_frame_equal(
        shuffled.merged.filter(pl.col("table") == "labs"),
        first.merged.filter(pl.col("table") == "labs"),
    )


@SETTINGS
@given(rows)
def test_harmonising_twice_changes_nothing(data: list[tuple]) -> None:
    first = harmonize_tables(_labs(data), PATIENTS, **RULES)
    again = harmonize_tables(first.labs, first.patients, **RULES)
    assert_frame_equal(again.labs, first.labs)
    assert again.rejected.height == 0 and again.merged.height == 0


@SETTINGS
@given(rows, st.sets(st.sampled_from(["A", "B", "C", "D", "E", "Z", "a"])))
def test_partition_of_patients_gives_the_rows_of_the_whole(data: list[tuple], half: set) -> None:
    labs = _labs(data)
    whole = harmonize_tables(labs, PATIENTS, **RULES)
    in_half = pl.col("patient_id").str.strip_chars().is_in(list(half)).fill_null(False)
    parts = [
        harmonize_tables(labs.filter(mask), PATIENTS.filter(mask), **RULES)
        for mask in (in_half, ~in_half)
    ]
    key = ["patient_id", "sample_datetime", "analyte", "source", "source_row"]
    assert_frame_equal(pl.concat([p.labs for p in parts]).sort(key), whole.labs.sort(key))
    for name in ("rejected", "merged"):
        combined = pl.concat([getattr(p, name) for p in parts]).sort("table", "source_row")
        assert_frame_equal(combined, getattr(whole, name).sort("table", "source_row"))
    assert_frame_equal(pl.concat([p.patients for p in parts]).sort("patient_id"), whole.patients)
