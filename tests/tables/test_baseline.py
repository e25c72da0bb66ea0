"""Baseline characteristics: a missing level is shown once, with counts by hand."""

from __future__ import annotations

import datetime as dt

import polars as pl

from kidneycohort.tables import TableRule, baseline_characteristics_table


def test_missing_baseline_is_one_row_with_the_hand_count() -> None:
    n = 40
    patients = pl.DataFrame(
        {
            "patient_id": [f"p{i}" for i in range(n)],
            "group": ["a"] * 20 + ["b"] * 20,
            "sex": ["female", "male"] * 20,
            "index_date": [dt.date(2022, 1, 1)] * n,
            "age_at_index": [60.0] * n,
        }
    )
    # 3 patients in group a and 2 in group b have no baseline value
    values = [None if i in (0, 1, 2, 20, 21) else 50.0 + i for i in range(n)]
    baseline = pl.DataFrame(
        {
            "patient_id": patients["patient_id"],
            "equation": ["ckd_epi_2021_cr"] * n,
            "baseline_egfr": values,
        }
    )
    table = baseline_characteristics_table(
        patients, baseline, rule=TableRule(small_cell_threshold=0)
    )
    missing = table.filter(
        pl.col("characteristic").str.starts_with("Baseline eGFR") & (pl.col("level") == "missing")
    )
    assert missing.height == 1
    # counts by hand: 3 of 20 (15.0 %), 2 of 20 (10.0 %), 5 of 40 (12.5 %)
    assert missing["a"].item() == "3 (15.0%)"
    assert missing["b"].item() == "2 (10.0%)"
    assert missing["Overall"].item() == "5 (12.5%)"


def test_age_comes_from_the_dates_when_an_age_column_is_empty() -> None:
    # regression: an empty age_at_index column (added by harmonise when the file has
    # none) must not hide the ages the birth and index dates give
    import datetime as dt

    people = pl.DataFrame(
        {
            "patient_id": [f"p{i}" for i in range(12)],
            "group": ["a"] * 12,
            "birth_date": [dt.date(1950 + i, 1, 1) for i in range(12)],
            "index_date": [dt.date(2020, 1, 1)] * 12,
            "age_at_index": [None] * 12,
        },
        schema_overrides={"age_at_index": pl.Float64},
    )
    table = baseline_characteristics_table(people, rule=TableRule(small_cell_threshold=0))
    age = table.filter(pl.col("characteristic") == "Age, years")
    # mean of exact ages 70.0 .. 59.0 (days / 365.25) is 64.5; SD of 12 consecutive
    # integers is 3.6 (numpy, ddof 1)
    assert age["a"][0].startswith("64.5 (3.6")
    assert table.filter(pl.col("level") == "missing").height == 0
