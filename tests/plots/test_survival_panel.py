"""Figures as a paper prints them: display labels and the eGFR equation in titles, the
survival panel's axis, censoring ticks and hazard ratio, the KDIGO grid's note on
patients it cannot place, and transition panels with their own axes.

External references: Kaplan–Meier estimates from lifelines (censoring ticks sit on the
curve lifelines computes), the KDIGO 2012 CKD guideline's category names.
"""

from __future__ import annotations

import itertools
import json
import shutil
from pathlib import Path

import matplotlib.pyplot as plt
import pandas as pd
import polars as pl
import pytest
from lifelines import KaplanMeierFitter

from kidneycohort import plots
from kidneycohort.plots._kdigo import missing_category_note
from kidneycohort.plots._survival_panel import (
    censor_marks,
    hazard_ratio_lines,
    probability_axis,
    term_text,
)
from tests._fixtures.run_folder import build_run_folder


def _layer_data(plot: object, column: str) -> pd.DataFrame:
    return next(
        layer._data  # type: ignore[attr-defined]
        for layer in plot.layers  # type: ignore[attr-defined]
        if isinstance(layer._data, pd.DataFrame) and column in layer._data.columns
    )


def _curves(low: float = 0.8) -> pl.DataFrame:
    years = [0.0, 1.0, 2.0, 3.0]
    rows = []
    for group, floor in (("a", low), ("b", low + 0.05)):
        estimate = [1.0, 1.0 - (1 - floor) / 3, 1.0 - 2 * (1 - floor) / 3, floor]
        rows.append(
            pl.DataFrame(
                {
                    "endpoint": "kidney_failure",
                    "group": group,
                    "years": years,
                    "estimate": estimate,
                    "lower": [e - 0.03 for e in estimate],
                    "upper": [min(e + 0.03, 1.0) for e in estimate],
                    "measure": "survival",
                }
            )
        )
    return pl.concat(rows)


# ---- the probability axis ------------------------------------------------------------


@pytest.mark.parametrize(
    ("low", "high", "falling"),
    [(0.77, 1.0, True), (0.0, 0.004, False), (0.0, 0.37, False), (0.995, 1.0, True), (0, 1, True)],
)
def test_probability_axis_spans_the_data_in_round_steps(
    low: float, high: float, falling: bool
) -> None:
    lo, hi, breaks = probability_axis(low, high, falling=falling)
    assert lo <= low + 1e-12 and hi >= high - 1e-12  # every value inside
    assert (hi == 1.0) if falling else (lo == 0.0)
    assert hi - lo >= 0.02 - 1e-12
    assert 3 <= len(breaks) <= 6
    steps = {round(b - a, 9) for a, b in itertools.pairwise(breaks)}
    assert len(steps) == 1  # evenly spaced
    # not more than one step of empty axis beyond the data (unless the data span less
    # than the smallest axis, 0.02)
    step = steps.pop()
    assert (low - lo if falling else hi - high) < step + 1e-9 or hi - lo <= 0.02 + 1e-12


def test_survival_axis_follows_the_curves_and_says_where_it_starts() -> None:
    plot = plots.survival_figure(_curves(0.8), endpoint="kidney_failure")
    limits = plot.scales.get_scales("y").limits
    # lowest band 0.77: the axis starts at 0.75, not at 0 (the events are not squashed)
    assert 0.7 < limits[0] < 0.77 and limits[1] >= 1.0
    assert "starts at 0.75" in plot.labels.get("caption", "")
    figure = plot.draw()
    plt.close(figure)


def test_cumulative_scale_draws_one_minus_kaplan_meier() -> None:
    curves = _curves(0.8)
    plot = plots.survival_figure(curves, endpoint="kidney_failure", scale="cumulative")
    line = pl.from_pandas(_layer_data(plot, "estimate")[["group", "years", "estimate"]])
    original = plots.survival_steps(curves, endpoint="kidney_failure")
    assert line["estimate"].to_list() == pytest.approx(
        (1.0 - original["estimate"]).to_list(), abs=1e-12
    )
    assert "1 − Kaplan–Meier" in plot.labels.get("y", "")
    limits = plot.scales.get_scales("y").limits
    assert limits[0] < 0.0 < 0.23 < limits[1] < 0.5  # 0 to a round number above 0.23


# ---- censoring ticks -------------------------------------------------------------------


def test_censoring_ticks_sit_on_the_kaplan_meier_curve() -> None:
    endpoints = pl.DataFrame(
        {
            "endpoint": "x",
            "group": ["a"] * 8,
            "years": [0.5, 1.0, 1.2, 1.5, 2.0, 2.5, 2.7, 3.0],
            "event": [1, 0, 1, 0, 1, 0, 0, 0],
            "competing": [0] * 8,
        }
    )
    km = KaplanMeierFitter().fit(endpoints["years"].to_numpy(), endpoints["event"].to_numpy())
    sf = km.survival_function_["KM_estimate"]
    curves = pl.DataFrame(
        {
            "endpoint": "x",
            "group": "a",
            "years": sf.index.to_numpy(),
            "estimate": sf.to_numpy(),
            "measure": "survival",
        }
    )
    marks = censor_marks(endpoints, endpoint="x")
    assert marks["years"].to_list() == [1.0, 1.5, 2.5, 2.7, 3.0]
    plot = plots.survival_figure(curves, endpoint="x", censored=marks)
    ticks = next(
        layer._data for layer in plot.layers if layer.geom.__class__.__name__ == "geom_point"
    )
    # lifelines' estimate at each censoring time (right-continuous: in force at t)
    expected = [float(km.predict(t)) for t in marks["years"].to_list()]
    assert ticks["estimate"].tolist() == pytest.approx(expected)
    assert "Ticks: censored follow-up" in plot.labels.get("caption", "")


def test_competing_deaths_are_not_censoring_marks() -> None:
    endpoints = pl.DataFrame(
        {"group": "a", "years": [1.0, 2.0, 3.0], "event": [0, 0, 1], "competing": [1, 0, 0]}
    )
    assert censor_marks(endpoints, competing_is_event=True)["years"].to_list() == [2.0]
    assert censor_marks(endpoints)["years"].to_list() == [1.0, 2.0]


# ---- hazard ratio in the panel, display labels -------------------------------------------


def test_hazard_ratio_text_in_the_panel() -> None:
    hrs = pl.DataFrame(
        {
            "endpoint": ["kidney_failure", "kidney_failure", "other"],
            "term": ["group=active", "group=active", "group=active"],
            "subgroup": [None, "age >= 65", None],
            "hr": [0.7512, 0.5, None],
            "hr_lower": [0.456, 0.2, None],
            "hr_upper": [1.2234, 1.1, None],
            "estimable": [True, True, False],
            "reason": [None, None, "no_events"],
        }
    )
    labels = {"active": "Active drug", "placebo": "Placebo"}
    lines = hazard_ratio_lines(hrs, "kidney_failure", labels=labels, reference="placebo")
    assert lines == ["HR Active drug vs Placebo: 0.75 (95% CI 0.46–1.22)"]  # no subgroup
    other = hazard_ratio_lines(hrs, "other", labels=labels, reference="placebo")
    assert other[0].startswith("HR Active drug vs Placebo: not estimable (")
    plot = plots.survival_figure(_curves(), endpoint="kidney_failure", hazard_ratio_text=lines)
    texts = [
        layer.geom.aes_params.get("label")
        for layer in plot.layers
        if layer.geom.__class__.__name__ == "geom_text"
    ]
    assert lines[0] in texts


def test_forest_rows_read_as_display_labels() -> None:
    hrs = pl.DataFrame(
        {
            "endpoint": ["egfr_decline_40"],
            "term": ["group=active"],
            "hr": [0.7],
            "hr_lower": [0.5],
            "hr_upper": [0.98],
        }
    )
    labels = {"egfr_decline_40": "eGFR decline of 40% or more", "active": "Active drug"}
    rows = plots.forest_rows(hrs, labels=labels, reference_group="placebo")
    assert rows["label"].to_list() == [
        "eGFR decline of 40% or more · Active drug vs placebo:  0.70 (0.50–0.98)"
    ]
    assert term_text("age", labels) == "age"
    plot = plots.forest_figure(hrs, labels=labels, reference_group="placebo")
    assert plot.labels.get("x", "") == "Hazard ratio, Active drug vs placebo (95% CI), log scale"
    assert "group=" not in " ".join(plot.scales.get_scales("y").limits)


def test_run_figures_use_display_labels_and_name_the_equation(tmp_path: Path) -> None:
    built = build_run_folder(tmp_path / "src", n_patients=80, seed=5)
    run = tmp_path / "run"
    shutil.copytree(built["run"], run)
    manifest = json.loads((run / "manifest.json").read_text(encoding="utf-8"))
    manifest["config"]["report"] = {
        "labels": {"kidney_failure": "kidney failure (dialysis or transplant)"}
    }
    groups = sorted(built["patients"]["group"].unique().to_list())
    manifest["config"]["report"]["labels"][groups[0]] = "First arm"
    (run / "manifest.json").write_text(json.dumps(manifest), encoding="utf-8")
    figures = plots.draw_figures(run)
    survival = figures["survival_kidney_failure"]
    assert survival.labels.get("title", "") == "Time to kidney failure (dialysis or transplant)"
    from kidneycohort.equations import REGISTRY

    primary = manifest["study"]["primary_equation"]
    for stem in ("egfr_trajectories", "slope_distribution", "survival_kidney_failure"):
        assert figures[stem].labels.get("subtitle", "") == f"eGFR by {REGISTRY[primary].label}"
    curve_groups = set(_layer_data(survival, "estimate")["group"])
    assert "First arm" in curve_groups and groups[0] not in curve_groups


# ---- KDIGO ---------------------------------------------------------------------------


def test_kdigo_grid_notes_patients_without_a_category() -> None:
    grid = pl.DataFrame(
        {
            "g_category": ["G2", "G3a", "missing", "missing", "G2", "missing", "all"],
            "a_category": ["A1", "A2", "A1", "A2", "all", "all", "all"],
            "n": [40, 30, 5, 7, 40, 12, 82],
            "n_display": ["40", "30", "<11", "<11", "40", "12", "82"],
        }
    )
    note = missing_category_note(grid)
    assert note.startswith("Not in the grid: 12 patients without a GFR category")
    plot = plots.kdigo_grid_figure(grid)
    assert "12 patients without a GFR category" in plot.labels.get("caption", "").replace("\n", " ")
    raw = grid.filter(pl.col("a_category") != "all", pl.col("g_category") != "all")
    raw = raw.drop("n_display").with_columns(
        a_category=pl.when(pl.col("g_category") == "missing")
        .then(pl.lit("missing"))
        .otherwise(pl.col("a_category")),
        g_category=pl.when(pl.col("g_category") == "missing")
        .then(pl.lit("G3b"))
        .otherwise(pl.col("g_category")),
    )
    # raw counts (no printed texts): the sum 12 is shown; a sum of 1..10 would not be
    assert "12 patients without an albuminuria category" in missing_category_note(raw)
    assert "<11 patients" in missing_category_note(raw.head(3))
    assert missing_category_note(grid.filter(pl.col("g_category") != "missing")) == ""


def test_transition_panels_have_their_own_axes() -> None:
    counts = pl.DataFrame(
        {
            "from_category": ["G2", "G3a", "G3a", "A1", "A2"],
            "to_category": ["G3a", "G3b", "G2", "A2", "A3"],
            "n": [30, 20, 15, 40, 12],
        }
    )
    figure = plots.transition_heatmap_figure(counts).draw()
    try:
        ticks = [
            {t.get_text() for t in ax.get_xticklabels() if t.get_text()}
            for ax in figure.axes
            if ax.get_xticklabels()
        ]
    finally:
        plt.close(figure)
    panels = [t for t in ticks if t]
    assert len(panels) == 2
    g_panel = next(t for t in panels if any(c.startswith("G") for c in t))
    a_panel = next(t for t in panels if any(c.startswith("A") for c in t))
    assert g_panel == {"G2", "G3a", "G3b"}  # no albuminuria columns in the GFR panel
    assert a_panel == {"A1", "A2", "A3"}


def test_at_risk_columns_stop_with_the_curves_and_long_text_wraps() -> None:
    at_risk = pl.DataFrame(
        {
            "endpoint": "kidney_failure",
            "group": ["a"] * 6 + ["b"] * 6,
            "years": [0.0, 1.0, 2.0, 3.0, 4.0, 5.0] * 2,
            "n_at_risk": [40, 38, 30, 22, 0, 0, 41, 39, 33, 25, 0, 0],
        }
    )
    long = "HR Active drug vs Placebo: not estimable (" + "too few events " * 5 + ")"
    plot = plots.survival_figure(
        _curves(), at_risk, endpoint="kidney_failure", hazard_ratio_text=[long]
    )
    table = _layer_data(plot, "label")
    assert sorted(set(table["years"])) == [0.0, 1.0, 2.0, 3.0]  # the curves end at 3 years
    text = next(
        layer.geom.aes_params["label"]
        for layer in plot.layers
        if "label" in layer.geom.aes_params and "HR" in str(layer.geom.aes_params["label"])
    )
    assert max(len(line) for line in text.splitlines()) <= 70
    assert " ".join(text.split()) == " ".join(long.split())  # wrapped, nothing lost
