"""Incidence-rate comparison table: rates, ratios and differences by hand, small cells."""

from __future__ import annotations

import datetime as dt

import polars as pl
import pytest
from scipy.stats import chi2

from kidneycohort.errors import InputDataError
from kidneycohort.tables import TableRule, rate_comparison_table


def _endpoints(spec: dict[str, tuple[int, int, float]]) -> tuple[pl.DataFrame, pl.DataFrame]:
    """group -> (patients, events, years each): equal follow-up for everyone."""
    rows, people = [], []
    for group, (n, events, years) in spec.items():
        for i in range(n):
            pid = f"{group}{i}"
            people.append({"patient_id": pid, "group": group})
            rows.append(
                {
                    "patient_id": pid,
                    "endpoint": "kidney_failure",
                    "start_date": dt.date(2020, 1, 1),
                    "end_date": dt.date(2021, 1, 1),
                    "years": years,
                    "event": 1 if i < events else 0,
                    "competing": 0,
                    "reason": "kidney_failure" if i < events else "end_of_followup",
                }
            )
    return pl.DataFrame(rows), pl.DataFrame(people)


def test_rates_ratios_and_differences_by_hand() -> None:
    # group a: 12 events in 50 x 2 = 100 person-years; reference b: 20 events in 200
    endpoints, patients = _endpoints({"a": (50, 12, 2.0), "b": (100, 20, 2.0)})
    table = rate_comparison_table(endpoints, patients, reference_group="b")
    a = table.filter(pl.col("group") == "a").row(0, named=True)
    b = table.filter(pl.col("group") == "b").row(0, named=True)
    # exact Poisson limits (Garwood 1936): chi2(0.025, 2d)/2 and chi2(0.975, 2d + 2)/2
    lower, upper = chi2.ppf(0.025, 24) / 2, chi2.ppf(0.975, 26) / 2
    assert a["events"] == "12" and a["person_years"] == "100.0"
    assert a["rate_per_100py"] == f"12.00 ({lower:.2f} to {upper:.2f})"
    # rate ratio (12/100) / (20/200) = 1.20; difference 12 - 10 = 2.00 per 100 PY
    assert a["rate_ratio"].startswith("1.20 (")
    assert a["rate_difference_per_100py"].startswith("2.00 (")
    assert b["rate_ratio"] == "reference" and b["rate_difference_per_100py"] == "reference"


def test_small_counts_hide_everything_that_reveals_them() -> None:
    # 3 events (1..10 is a small cell, common practice in data-use agreements)
    endpoints, patients = _endpoints({"a": (50, 3, 2.0), "b": (100, 20, 2.0)})
    table = rate_comparison_table(endpoints, patients, reference_group="b", rule=TableRule())
    a = table.filter(pl.col("group") == "a").row(0, named=True)
    assert a["events"] == "<11"
    assert a["rate_per_100py"] == a["rate_ratio"] == a["rate_difference_per_100py"] == "<11"
    # a small reference count hides every comparison against it
    endpoints, patients = _endpoints({"a": (50, 30, 2.0), "b": (100, 4, 2.0)})
    table = rate_comparison_table(endpoints, patients, reference_group="b")
    a = table.filter(pl.col("group") == "a").row(0, named=True)
    assert a["events"] == "30" and a["rate_ratio"] == "<11"
    assert (
        not table.select(pl.all().cast(pl.String).str.contains(r"^(?:[1-9]|10)$").any())
        .row(0)
        .count(True)
    )


def test_unknown_reference_group_is_named() -> None:
    endpoints, patients = _endpoints({"a": (20, 12, 1.0), "b": (20, 12, 1.0)})
    with pytest.raises(InputDataError, match="reference_group 'c'"):
        rate_comparison_table(endpoints, patients, reference_group="c")
