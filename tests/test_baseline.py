"""Baseline rules on hand-built timelines with answers worked out by hand."""

from __future__ import annotations

import statistics

import pandas as pd
import polars as pl
import pytest
from hypothesis import given, settings
from polars.testing import assert_frame_equal
from scipy import stats

from kidneycohort import schemas
from kidneycohort.baseline import BaselineRule, egfr_baseline, uacr_baseline
from kidneycohort.errors import ConfigError, InputDataError
from kidneycohort.value_filter import ValueFilterRule
from tests._fixtures.derivations import (
    EQ,
    egfr_table,
    patients_table,
    random_cohort,
    seeds,
    uacr_labs,
)

# patient a: one value before the window, four in it, one after index
TIMELINE = [
    ("a", -400, 70.0),
    ("a", -300, 64.0),
    ("a", -100, 60.0),
    ("a", -30, 52.0),
    ("a", 0, 56.0),
    ("a", 10, 40.0),
]


def _one(rule: BaselineRule, rows=TIMELINE, **kw) -> dict:
    out = egfr_baseline(egfr_table(rows), rule, **kw)
    return out.row(0, named=True)


def test_last_in_window_is_the_value_at_index():
    row = _one(BaselineRule())
    assert row["baseline_egfr"] == 56.0
    assert row["baseline_date"].isoformat() == "2021-01-01"
    assert row["baseline_n_values"] == 1
    assert row["baseline_reason"] is None


def test_mean_and_median_in_window():
    # values in [-365, 0]: 64, 60, 52, 56 -> mean 58, median (56 + 60) / 2 = 58
    assert _one(BaselineRule(method="mean_in_window"))["baseline_egfr"] == pytest.approx(58.0)
    assert _one(BaselineRule(method="median_in_window"))["baseline_egfr"] == statistics.median(
        [64, 60, 52, 56]
    )
    assert _one(BaselineRule(method="mean_in_window"))["baseline_n_values"] == 4


def test_mean_last_n_averages_screening_and_randomisation_values():
    row = _one(BaselineRule(method="mean_last_n", n=2))
    assert row["baseline_egfr"] == pytest.approx((52.0 + 56.0) / 2)
    assert row["baseline_n_values"] == 2
    row = _one(BaselineRule(method="mean_last_n", n=3, mean_type="geometric"))
    assert row["baseline_egfr"] == pytest.approx(stats.gmean([60.0, 52.0, 56.0]), rel=1e-12)


def test_window_bounds_are_inclusive():
    rows = [("a", -365, 50.0), ("a", -366, 99.0), ("a", 30, 80.0)]
    assert _one(BaselineRule(method="mean_in_window"), rows)["baseline_egfr"] == 50.0
    rule = BaselineRule(window_start_days=-30, window_end_days=30)
    assert _one(rule, rows)["baseline_egfr"] == 80.0


def test_values_only_before_index_and_only_after_index():
    rows = [("before", -20, 45.0), ("before", -5, 47.0), ("after", 5, 60.0), ("after", 90, 58.0)]
    out = egfr_baseline(egfr_table(rows)).sort("patient_id")
    assert out["baseline_egfr"].to_list() == [None, 47.0]
    assert out["baseline_reason"].to_list() == ["no_value_in_window", None]
    assert out["baseline_n_values"].to_list() == [0, 1]


def test_every_patient_and_equation_appears_with_a_reason():
    rows = [("none", -10, None), ("ok", -10, 50.0), ("sick", -10, 20.0, 1.0, "inpatient")]
    df = pl.concat([egfr_table(rows), egfr_table([("ok", -5, 48.0)], equation="ckd_epi_2009_cr")])
    out = egfr_baseline(df, value_filter=ValueFilterRule(exclude_aki=False)).sort(
        "patient_id", "equation"
    )
    expected = pl.DataFrame(
        {
            "patient_id": ["none", "ok", "ok", "sick"],
            "equation": [EQ, "ckd_epi_2009_cr", EQ, EQ],
            "baseline_egfr": [None, 48.0, 50.0, None],
            "baseline_reason": [
                "no_computable_value",
                None,
                None,
                "all_in_window_excluded",
            ],
        }
    )
    assert_frame_equal(out.select(expected.columns), expected, check_dtypes=False)
    assert out.schema == pl.Schema(schemas.BASELINE)


def test_require_n():
    rows = [("a", -10, 50.0)]
    row = _one(BaselineRule(method="mean_last_n", n=2, require_n=True), rows)
    assert row["baseline_egfr"] is None
    assert row["baseline_reason"] == "fewer_than_n_values"
    assert _one(BaselineRule(method="mean_last_n", n=2), rows)["baseline_egfr"] == 50.0


def test_accepts_pandas_and_ties_do_not_depend_on_row_order():
    rows = [("a", -10, 50.0), ("a", -10, 54.0)]
    df = egfr_table(rows)
    first = egfr_baseline(df.to_pandas())
    second = egfr_baseline(df.reverse())
    assert type(first).__module__.startswith("pandas")  # pandas in, pandas out
    first = pl.from_pandas(first)
    assert_frame_equal(first, second, check_dtypes=False)
    assert first["baseline_egfr"][0] == 54.0  # ties at the latest time: highest last


def test_bad_rules_and_tables():
    with pytest.raises(ConfigError, match=r"window_start_days=10\.0 is after"):
        BaselineRule(window_start_days=10)
    with pytest.raises(ConfigError, match=r"BaselineRule\.method"):
        BaselineRule(method="last")
    with pytest.raises(InputDataError, match="'egfr'"):
        egfr_baseline(
            pl.DataFrame({"patient_id": ["a"], "equation": [EQ], "years_from_index": [0.0]})
        )
    with pytest.raises(InputDataError, match="expected a polars or pandas"):
        egfr_baseline([1, 2, 3])


def test_uacr_geometric_mean_with_index_dates():
    labs = uacr_labs([("a", -200, 10.0), ("a", -20, 1000.0), ("a", 40, 5.0), ("b", 30, 50.0)])
    pts = patients_table(["a", "b", "c"])
    out = uacr_baseline(labs, pts).sort("patient_id")
    # geometric mean of 10 and 1000 is 100 (scipy.stats.gmean)
    assert out["baseline_uacr_mg_g"][0] == pytest.approx(stats.gmean([10.0, 1000.0]))
    assert out["baseline_uacr_mg_g"][0] == pytest.approx(100.0)
    assert out["baseline_reason"].to_list() == [None, "no_value_in_window", "no_computable_value"]
    arithmetic = uacr_baseline(labs, pts, BaselineRule(method="mean_in_window"))
    assert arithmetic.filter(pl.col("patient_id") == "a")["baseline_uacr_mg_g"][0] == 505.0
    no_index = patients_table(["a", "b"], index=None)
    assert uacr_baseline(labs, no_index)["baseline_reason"].to_list() == ["no_index_date"] * 2
    with pytest.raises(InputDataError, match="index_date"):
        uacr_baseline(labs)


def test_uacr_zero_value_has_no_geometric_mean():
    labs = uacr_labs([("a", -20, 0.0), ("a", -10, 30.0)])
    out = uacr_baseline(labs, patients_table(["a"]))
    assert out["baseline_reason"][0] == "nonpositive_value_for_geometric_mean"
    assert out["baseline_uacr_mg_g"][0] is None


def test_mean_matches_pandas_groupby():
    # reference: pandas group-by mean of the same window, a general-purpose library
    df = random_cohort(3, n_patients=60)
    rule = BaselineRule(method="mean_in_window", window_start_days=-365, window_end_days=0)
    ours = egfr_baseline(df, rule).sort("patient_id")
    pdf = df.to_pandas()
    days = pdf["years_from_index"] * 365.25
    ref = pdf[(days >= -365 - 1e-6) & (days <= 1e-6)].groupby("patient_id")["egfr"].mean()
    got = ours.drop_nulls("baseline_egfr").to_pandas().set_index("patient_id")["baseline_egfr"]
    pd.testing.assert_series_equal(got.sort_index(), ref.sort_index(), check_names=False)
    assert (ours["baseline_egfr"].is_null() == ours["baseline_reason"].is_not_null()).all()


@settings(max_examples=15, deadline=None)
@given(seed=seeds)
def test_partition_and_row_order_invariance(seed):
    df = random_cohort(seed, n_patients=30, equations=(EQ, "other"))
    rule = BaselineRule(method="mean_last_n", n=2)
    vf = ValueFilterRule()
    whole = egfr_baseline(df, rule, vf).sort("patient_id", "equation")
    part = df["patient_id"].unique().sort().sample(fraction=0.4, seed=seed).implode()
    split = pl.concat(
        [
            egfr_baseline(df.filter(pl.col("patient_id").is_in(part)), rule, vf),
            egfr_baseline(df.filter(~pl.col("patient_id").is_in(part)), rule, vf),
        ]
    ).sort("patient_id", "equation")
    assert_frame_equal(whole, split)
    shuffled = egfr_baseline(df.sample(fraction=1.0, shuffle=True, seed=seed), rule, vf)
    assert_frame_equal(whole, shuffled.sort("patient_id", "equation"))
