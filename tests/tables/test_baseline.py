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
