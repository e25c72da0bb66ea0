"""Tables: small-cell suppression, the endpoint, slope and baseline tables, KDIGO grid,
transition matrix, and the CSV / XLSX / Markdown writers."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import polars as pl
import pytest
from polars.testing import assert_frame_equal

from kidneycohort.errors import InputDataError, StatisticalWarning
from kidneycohort.models.mixed import SlopeModel
from kidneycohort.models.rates import exact_poisson_interval
from kidneycohort.tables import (
    TableRule,
    baseline_characteristics_table,
    endpoint_table,
    kdigo_grid_table,
    slope_table,
    suppress_small_counts,
    suppression_footnote,
    suppression_label,
    to_markdown,
    transition_table,
    write_tables,
)
from tests._fixtures.disclosure import disclosed_counts
from tests._fixtures.models import simulate_two_slope_trial


def _patients(n_active: int = 30, n_placebo: int = 30) -> pl.DataFrame:
    n = n_active + n_placebo
    return pl.DataFrame(
        {
            "patient_id": [f"P{i:03d}" for i in range(n)],
            "group": ["active"] * n_active + ["placebo"] * n_placebo,
            # active: all but 5 female, 5 male; placebo: half and half
            "sex": ["female"] * (n_active - 5)
            + ["male"] * 5
            + ["female"] * (n_placebo // 2)
            + ["male"] * (n_placebo - n_placebo // 2),
            "age_at_index": np.linspace(40, 80, n),
        }
    )


def test_suppression_label_and_threshold() -> None:
    # common practice in data-use agreements: cells of 1-10 shown as "<11"
    assert suppression_label() == "<11"
    assert suppression_label(TableRule(small_cell_threshold=4)) == "<5"
    counts = pl.DataFrame({"n": [0, 1, 10, 11, None]})
    result = suppress_small_counts(counts, ["n"])
    assert result["n"].to_list() == ["0", "<11", "<11", "11", "–"]
    assert "1 to 10" in suppression_footnote()


def test_baseline_table_counts_percentages_and_suppression() -> None:
    table = baseline_characteristics_table(_patients(), covariates=[])
    sex = table.filter(pl.col("characteristic") == "Sex")
    cells = {
        (level, group): text
        for level, *texts in sex.select("level", "active", "placebo", "Overall").rows()
        for group, text in zip(("active", "placebo", "Overall"), texts, strict=True)
    }
    # the 5 active men are a small cell (common practice: 1-10 shown as "<11")
    assert cells[("male", "active")] == "<11"
    n_row = table.filter(pl.col("characteristic") == "N")
    assert n_row.select("active", "placebo", "Overall").rows() == [("30", "30", "60")]
    # a reader who knows that levels add up to N and groups to Overall learns nothing
    for group, n in (("active", "30"), ("placebo", "30"), ("Overall", "60")):
        cells[("N", group)] = n
    relations = [
        ([("female", g), ("male", g)], ("N", g)) for g in ("active", "placebo", "Overall")
    ] + [
        ([(level, "active"), (level, "placebo")], (level, "Overall"))
        for level in ("female", "male", "N")
    ]
    assert disclosed_counts(cells, relations) == {}
    # shown counts keep their percentage of the group
    shown = [text for text in cells.values() if "%" in text]
    assert shown and all(text.endswith("%)") for text in shown)
    age = table.filter(pl.col("characteristic") == "Age, years")
    expected_mean = float(np.linspace(40, 80, 60)[:30].mean())
    expected_sd = float(np.linspace(40, 80, 60)[:30].std(ddof=1))
    assert age["statistic"][0] == "mean (SD)"
    assert age["active"][0] == f"{expected_mean:.1f} ({expected_sd:.1f})"


def test_baseline_table_without_suppression_shows_everything() -> None:
    table = baseline_characteristics_table(_patients(), rule=TableRule(small_cell_threshold=0))
    sex = table.filter(pl.col("characteristic") == "Sex")
    assert sex["active"].to_list() == ["25 (83.3%)", "5 (16.7%)"]


def test_baseline_table_uacr_categories_equations_and_skewed_covariate() -> None:
    patients = _patients().with_columns(
        pl.Series("crp_mg_l", [1.0] * 50 + [50.0] * 10),  # strongly right-skewed
        pl.Series("diabetes", [True] * 20 + [False] * 40),
    )
    baseline = pl.DataFrame(
        {
            "patient_id": patients["patient_id"].to_list() * 2,
            "equation": ["ckd_epi_2021_cr"] * 60 + ["ckd_epi_2012_cys"] * 60,
            "baseline_egfr": [50.0] * 60 + [40.0] * 60,
        }
    )
    categories = pl.DataFrame(
        {
            "patient_id": patients["patient_id"],
            "g_category": ["G3a"] * 45 + ["G3b"] * 14 + [None],
            "a_category": ["A1"] * 30 + ["A2"] * 30,
            "uacr_mg_g": np.arange(60, dtype=float),
        }
    )
    table = baseline_characteristics_table(
        patients, baseline, categories, covariates=["crp_mg_l", "diabetes"]
    )
    characteristics = table["characteristic"].unique(maintain_order=True).to_list()
    assert "Baseline eGFR (ckd_epi_2021_cr), mL/min/1.73 m²" in characteristics
    assert "Baseline eGFR (ckd_epi_2012_cys), mL/min/1.73 m²" in characteristics
    crp = table.filter(pl.col("characteristic") == "crp_mg_l")
    assert crp["statistic"][0] == "median [IQR]"
    uacr = table.filter(pl.col("characteristic") == "UACR, mg/g")
    # overall median of 0..59 = 29.5, quartiles (linear) 14.75 and 44.25 (numpy.percentile)
    q1, median, q3 = np.percentile(np.arange(60), [25, 50, 75])
    assert uacr["Overall"][0] == f"{median:.1f} [{q1:.1f}, {q3:.1f}]"
    g = table.filter(pl.col("characteristic") == "KDIGO GFR category")
    assert g["level"].to_list() == ["G1", "G2", "G3a", "G3b", "G4", "G5", "missing"]
    assert g.filter(pl.col("level") == "G3a")["Overall"][0] == "45 (75.0%)"


def _kdigo() -> pl.DataFrame:
    g = ["G2"] * 40 + ["G3a"] * 25 + ["G4"] * 3 + [None] * 2
    a = ["A1"] * 30 + ["A2"] * 10 + ["A2"] * 25 + ["A3"] * 3 + ["A1"] * 2
    return pl.DataFrame(
        {"patient_id": [f"K{i}" for i in range(70)], "g_category": g, "a_category": a}
    )


def test_kdigo_grid_counts_every_cell() -> None:
    grid = kdigo_grid_table(_kdigo())
    assert grid.columns == ["g_category", "a_category", "n", "n_display"]
    cells = grid.filter((pl.col("g_category") != "all") & (pl.col("a_category") != "all"))
    assert cells.height == 7 * 3  # full KDIGO grid + missing GFR category row
    # margins: 7 G rows (with missing), 3 A columns, and all patients
    assert grid.height == 7 * 3 + 7 + 3 + 1
    cell = {(r[0], r[1]): (r[2], r[3]) for r in grid.rows()}
    assert cell[("G2", "A2")] == (None, "<11")  # 10 patients
    assert cell[("G4", "A3")] == (None, "<11")
    assert cell[("G1", "A1")] == (0, "0")
    assert cell[("missing", "A1")] == (None, "<11")
    assert cell[("all", "all")] == (70, "70")
    # a reader adding up rows and columns learns none of the hidden counts
    printed = {key: text for key, (_, text) in cell.items()}
    g_levels = ["G1", "G2", "G3a", "G3b", "G4", "G5", "missing"]
    a_levels = ["A1", "A2", "A3"]
    relations = [([(g, a) for a in a_levels], (g, "all")) for g in [*g_levels, "all"]] + [
        ([(g, a) for g in g_levels], ("all", a)) for a in a_levels
    ]
    assert disclosed_counts(printed, relations) == {}
    # every shown count is the true count
    truth = _kdigo().with_columns(pl.col("g_category").fill_null("missing"))
    for (g, a), (n, _) in cell.items():
        if n is not None and "all" not in (g, a):
            expected = truth.filter((pl.col("g_category") == g) & (pl.col("a_category") == a))
            assert n == expected.height


def test_kdigo_grid_refuses_unknown_category() -> None:
    bad = _kdigo().with_columns(pl.lit("G3").alias("g_category"))
    with pytest.raises(InputDataError, match="value 'G3'"):
        kdigo_grid_table(bad)


def test_transition_table_counts_transitions_and_patients() -> None:
    rows = pl.DataFrame(
        {
            "patient_id": [f"T{i}" for i in range(15)] + ["T0"] * 2 + [f"U{i}" for i in range(3)],
            "equation": "ckd_epi_2021_cr",
            "axis": "G",
            "from_category": ["G3a"] * 17 + ["G2"] * 3,
            "to_category": ["G3b"] * 17 + ["G3a"] * 3,
        }
    )
    matrix = transition_table(rows)
    assert matrix.height == 30  # 6 x 6 pairs without the diagonal
    cell = {(r[0], r[1]): r[2:] for r in matrix.rows()}
    assert cell[("G3a", "G3b")] == (17, 15, "17")
    assert cell[("G2", "G3a")] == (None, None, "<11")
    assert cell[("G1", "G2")] == (0, 0, "0")


def test_endpoint_table_by_hand() -> None:
    patients = _patients(20, 20)
    years = np.full(40, 2.0)
    event = np.zeros(40, dtype=int)
    event[:12] = 1  # active: 12 events
    event[20:23] = 1  # placebo: 3 events -> suppressed
    years[:12] = np.linspace(0.2, 1.8, 12)
    years[20:23] = [0.5, 1.0, 1.5]
    endpoints = pl.DataFrame(
        {
            "patient_id": patients["patient_id"],
            "endpoint": "kidney_composite",
            "years": years,
            "event": event,
            "competing": 0,
        }
    )
    table = endpoint_table(endpoints, patients, reference_group="placebo")
    assert table.columns == [
        "endpoint",
        "group",
        "n_patients",
        "events",
        "person_years",
        "rate_per_100py",
        "hazard_ratio",
        "p",
        "note",
    ]
    placebo, active, overall = table.rows(named=True)
    assert [placebo["group"], active["group"], overall["group"]] == ["placebo", "active", "Overall"]
    assert placebo["events"] == "<11" and placebo["rate_per_100py"] == "<11"
    assert placebo["hazard_ratio"] == "reference"
    assert overall["n_patients"] == "40"
    # 3 placebo events would be the overall 15 minus the active 12: one of those is hidden
    printed = {g: row["events"] for g, row in zip("pao", (placebo, active, overall), strict=True)}
    assert disclosed_counts(printed, [(["p", "a"], "o")]) == {}
    person_years = float(years[:20].sum())
    low, upp = exact_poisson_interval(12, person_years)
    assert active["person_years"] == f"{person_years:.1f}"
    if active["events"] != "*":
        assert active["events"] == "12 (60.0%)"
        assert active["rate_per_100py"] == (
            f"{1200 / person_years:.2f} ({low[0]:.2f} to {upp[0]:.2f})"
        )
    else:  # a hidden count hides its rate too (the person-years are printed)
        assert active["rate_per_100py"] == "*"
    assert active["hazard_ratio"].count("(") == 1 and " to " in active["hazard_ratio"]


def test_endpoint_table_marks_a_ratio_that_cannot_be_estimated() -> None:
    # one event against none: the partial likelihood has no maximum (monotone likelihood,
    # Heinze & Schemper 2001); the ratio reads NE with its reason, never a number
    patients = _patients(20, 20)
    event = np.zeros(40, dtype=int)
    event[0] = 1
    endpoints = pl.DataFrame(
        {
            "patient_id": patients["patient_id"],
            "endpoint": "kidney_failure",
            "years": np.linspace(0.5, 3.0, 40),
            "event": event,
            "competing": 0,
        }
    )
    with pytest.warns(StatisticalWarning, match="separation"):
        table = endpoint_table(
            endpoints, patients, reference_group="placebo", rule=TableRule(small_cell_threshold=0)
        )
    active = table.filter(pl.col("group") == "active").row(0, named=True)
    assert active["hazard_ratio"] == "NE"
    assert active["p"] == ""
    assert active["note"].startswith("NE: hazard ratio not estimable")
    assert "events" in active["note"]
    # the same rule in the models table the figures and the report read
    from kidneycohort.models.survival import hazard_ratio_table

    with pytest.warns(StatisticalWarning, match="separation"):
        ratios = hazard_ratio_table(
            endpoints, patients, group_column="group", reference_group="placebo"
        )
    row = ratios.row(0, named=True)
    assert row["estimable"] is False and row["reason"] == "too_few_events_in_group"
    assert row["hr"] is None and row["hr_upper"] is None


@pytest.fixture(scope="module")
def slope_model() -> SlopeModel:
    egfr, patients, _ = simulate_two_slope_trial(20, seed=3)
    return SlopeModel(knot_years=0.25, reference_group="placebo", horizons_years=[2]).fit(
        egfr, patients
    )


def test_slope_table_layout(slope_model: SlopeModel) -> None:
    table = slope_table(slope_model)
    assert table.columns == ["contrast", "quantity", "n_patients", "estimate", "se", "ci_95", "p"]
    summary = slope_model.summary()
    assert table.height == summary.height
    first = summary.row(0, named=True)
    assert table["estimate"][0] == f"{first['estimate']:.2f}"
    assert table.filter(pl.col("contrast") == "active - placebo")["n_patients"][0] == "20 vs 20"
    assert set(table["quantity"].to_list()) == {"acute_change", "chronic_slope", "total_slope_2y"}


def test_write_tables_csv_xlsx_and_notes(tmp_path: Path) -> None:
    grid = kdigo_grid_table(_kdigo())
    matrix = pl.DataFrame({"from_category": ["G2"], "to_category": ["G3a"], "n": [12]})
    written = write_tables(
        {"kdigo_grid": grid, "transitions": matrix},
        tmp_path,
        notes={"kdigo_grid": [suppression_footnote()]},
    )
    assert_frame_equal(pl.read_csv(written["kdigo_grid"], schema=grid.schema), grid)
    back = pd.read_excel(written["workbook"], sheet_name=None)  # openpyxl reads it back
    assert list(back) == ["kdigo_grid", "transitions", "footnotes"]
    assert back["footnotes"].iloc[0].tolist() == ["kdigo_grid", suppression_footnote()]
    assert back["transitions"].iloc[0].tolist() == ["G2", "G3a", 12]
    assert back["kdigo_grid"].iloc[grid.height + 1, 0].startswith("Counts of people from 1 to 10")
    assert (
        (tmp_path / "kdigo_grid.notes.txt")
        .read_text(encoding="utf-8")
        .startswith("Counts of people from 1 to 10")
    )
    with pytest.raises(InputDataError, match="cannot name a sheet"):
        write_tables({"a/b": grid}, tmp_path)


def test_to_markdown() -> None:
    frame = pl.DataFrame({"term": ["a|b", "c"], "hr": [1.23456, None]})
    text = to_markdown(frame, notes=["note one"])
    assert text.splitlines() == [
        "| term | hr |",
        "| --- | --- |",
        "| a\\|b | 1.23 |",
        "| c | – |",
        "",
        "note one",
    ]


@pytest.mark.parametrize("n_small_group", [5, 9, 13])
def test_no_percentage_of_a_hidden_group_size(n_small_group: int) -> None:
    # "3 (60.0%)" under a hidden N gives N away (3 / 0.6 = 5): a percentage is printed
    # only where its denominator is printed too (common practice in disclosure control)
    table = baseline_characteristics_table(_patients(n_small_group, 40), covariates=[])
    n_row = table.filter(pl.col("characteristic") == "N").row(0, named=True)
    for group in ("active", "placebo", "Overall"):
        if not n_row[group].isdigit():
            assert not table[group].str.contains("%").any(), table[group].to_list()
    if n_small_group <= 10:
        assert n_row["active"] == "<11"
