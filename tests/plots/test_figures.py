"""Figures: each data layer is checked against the tables it summarises, then drawn.

External references: the Okabe–Ito palette (Okabe & Ito 2008, Color Universal Design,
RGB values as published), the KDIGO 2012 CKD guideline heat map (Figure 9), Student-t
intervals from scipy.stats, quartiles from numpy.percentile, Kaplan–Meier estimates
from lifelines, cross-tabulations from pandas.
"""

from __future__ import annotations

import datetime as dt
import io
import itertools
import shutil
from pathlib import Path

import matplotlib.pyplot as plt
import numpy as np
import pandas as pd
import polars as pl
import pytest
from lifelines import KaplanMeierFitter
from PIL import Image
from scipy import stats

from kidneycohort import plots
from kidneycohort.disclosure import protected_flow, small_cell_text
from kidneycohort.errors import InputDataError
from tests._fixtures.run_folder import PRIMARY, build_run_folder


@pytest.fixture(scope="module")
def run(tmp_path_factory: pytest.TempPathFactory) -> dict:
    return build_run_folder(tmp_path_factory.mktemp("plots_run"), n_patients=120, seed=3)


def _groups(run: dict) -> pl.DataFrame:
    return run["patients"].select("patient_id", "group")


def _draw(plot: object) -> None:
    figure = plot.draw()  # type: ignore[attr-defined]
    assert figure.axes, "the figure has no axes"
    plt.close(figure)


# ---- shared conventions -----------------------------------------------------------------


def test_okabe_ito_colours_match_the_published_rgb_values() -> None:
    # Okabe & Ito (2008), Color Universal Design, Fig. 16: RGB 0-255
    published = {
        "orange": (230, 159, 0),
        "sky_blue": (86, 180, 233),
        "bluish_green": (0, 158, 115),
        "yellow": (240, 228, 66),
        "blue": (0, 114, 178),
        "vermillion": (213, 94, 0),
        "reddish_purple": (204, 121, 167),
        "black": (0, 0, 0),
    }
    for name, rgb in published.items():
        hex_colour = plots.OKABE_ITO[name]
        assert tuple(int(hex_colour[i : i + 2], 16) for i in (1, 3, 5)) == rgb, name
    assert set(plots.GROUP_COLOURS) == set(plots.OKABE_ITO.values())
    risk = plots.KDIGO_RISK_COLOURS
    assert {risk[k] for k in ("low", "moderately_increased", "high")} <= set(
        plots.OKABE_ITO.values()
    )


def _relative_luminance(hex_colour: str) -> float:
    # WCAG 2.1 relative luminance (sRGB linearised, Rec. 709 weights)
    channels = [int(hex_colour[i : i + 2], 16) / 255 for i in (1, 3, 5)]
    linear = [c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4 for c in channels]
    return 0.2126 * linear[0] + 0.7152 * linear[1] + 0.0722 * linear[2]


def test_adjacent_kdigo_risk_colours_differ_in_lightness() -> None:
    # neighbouring risk levels must be told apart without hue (greyscale print,
    # colour-vision deficiency): WCAG 2.1 contrast ratio (L1 + 0.05) / (L2 + 0.05) of
    # at least 1.5 between neighbours (common practice for adjacent fills)
    levels = ["low", "moderately_increased", "high", "very_high"]
    lum = [_relative_luminance(plots.KDIGO_RISK_COLOURS[k]) for k in levels]
    ratios = [(max(a, b) + 0.05) / (min(a, b) + 0.05) for a, b in itertools.pairwise(lum)]
    assert min(ratios) >= 1.5, dict(zip(levels[1:], ratios, strict=True))
    # the two highest levels (orange and plain vermillion gave 1.7): clearly apart, the
    # darker one is the very high risk
    assert lum[3] < lum[2]
    assert ratios[2] >= 2.5


def test_group_colours_do_not_depend_on_order_or_duplicates() -> None:
    a = plots.group_palette(["placebo", "active", "active", None])
    b = plots.group_palette(["active", "placebo"])
    assert a == b == {"active": plots.OKABE_ITO["blue"], "placebo": plots.OKABE_ITO["vermillion"]}
    many = plots.group_palette(f"g{i:02d}" for i in range(10))
    assert many["g08"] == many["g00"]  # colours are reused after eight groups


def test_small_cell_text() -> None:
    # common practice: data-use agreements forbid showing cells below 11
    df = pl.DataFrame({"n": [0, 1, 10, 11, 250, None]})
    out = df.select(small_cell_text(pl.col("n"), 10))["n"].to_list()
    assert out == ["0", "<11", "<11", "11", "250", None]
    out5 = df.select(small_cell_text(pl.col("n"), 5))["n"].to_list()
    assert out5 == ["0", "<6", "10", "11", "250", None]
    with pytest.raises(InputDataError, match="small_cell_threshold"):
        plots.kdigo_grid_cells(
            pl.DataFrame({"g_category": [], "a_category": [], "n": []}), small_cell_threshold=-1
        )


# ---- eGFR trajectories ------------------------------------------------------------------


def test_time_bins_against_pandas_and_scipy(run: dict) -> None:
    egfr = run["egfr"].filter(pl.col("equation") == PRIMARY)
    result = plots.egfr_time_bins(run["egfr"], _groups(run), equation=PRIMARY, bin_years=0.25)

    # independent: pandas group-bys and scipy's Student-t interval
    frame = egfr.join(_groups(run), on="patient_id", suffix="_g").to_pandas()
    frame = frame[frame["egfr"].notna()]
    frame["bin"] = np.round(frame["years_from_index"] / 0.25).astype(int)
    per_patient = frame.groupby(["group_g", "bin", "patient_id"])["egfr"].mean().reset_index()
    expected = (
        per_patient.groupby(["group_g", "bin"])["egfr"].agg(["mean", "std", "count"]).reset_index()
    )
    merged = result.to_pandas().merge(
        expected, left_on=["group", "bin"], right_on=["group_g", "bin"], suffixes=("", "_pd")
    )
    assert len(merged) == len(expected) == result.height
    np.testing.assert_allclose(merged["mean"], merged["mean_pd"], rtol=1e-12)
    np.testing.assert_array_equal(merged["n_patients"], merged["count"])
    low, high = stats.t.interval(
        0.95,
        merged["count"] - 1,
        loc=merged["mean_pd"],
        scale=merged["std"] / np.sqrt(merged["count"]),
    )
    np.testing.assert_allclose(merged["lower"], low, rtol=1e-10)
    np.testing.assert_allclose(merged["upper"], high, rtol=1e-10)
    np.testing.assert_allclose(merged["years"], merged["bin"] * 0.25)


def test_time_bins_single_patient_has_no_interval() -> None:
    egfr = pl.DataFrame(
        {"patient_id": ["A-1"] * 3, "years_from_index": [0.0, 0.5, 1.0], "egfr": [60.0, 58.0, None]}
    )
    out = plots.egfr_time_bins(egfr, bin_years=0.5)
    assert out["group"].to_list() == [plots.ALL_PATIENTS] * 2
    assert out["n_patients"].to_list() == [1, 1]
    assert out["lower"].null_count() == 2


def test_time_bins_bad_input() -> None:
    egfr = pl.DataFrame({"patient_id": ["A"], "years": [0.0], "egfr": [50.0]})
    with pytest.raises(InputDataError, match="missing required column 'years_from_index'"):
        plots.egfr_time_bins(egfr)
    two = pl.DataFrame(
        {
            "patient_id": ["A", "A"],
            "years_from_index": [0.0, 0.0],
            "egfr": [50.0, 52.0],
            "equation": ["ckd_epi_2021_cr", "ekfc_cr"],
        }
    )
    with pytest.raises(InputDataError, match="pass equation="):
        plots.egfr_time_bins(two)
    with pytest.raises(InputDataError, match="did you mean 'ckd_epi_2021_cr'"):
        plots.egfr_time_bins(two, equation="ckd_epi_2021_crr")
    with pytest.raises(InputDataError, match="bin_years"):
        plots.egfr_time_bins(two, equation="ekfc_cr", bin_years=0)


def test_trajectory_figure_hides_small_bins_and_samples_reproducibly(run: dict) -> None:
    plot = plots.egfr_trajectory_figure(
        run["egfr"], _groups(run), equation=PRIMARY, sample_patients=5, seed=1
    )
    again = plots.egfr_trajectory_figure(
        run["egfr"], _groups(run), equation=PRIMARY, sample_patients=5, seed=1
    )
    individual = plot.layers[0]._data
    assert individual.groupby("group")["patient_id"].nunique().to_dict() == {
        "active": 5,
        "placebo": 5,
    }
    assert sorted(individual["patient_id"].unique()) == sorted(
        again.layers[0]._data["patient_id"].unique()
    )
    means = plot.layers[2]._data
    assert (means["n_patients"] > 10).all()
    _draw(plot)


def test_model_trajectory_figure_marks_the_knot(run: dict) -> None:
    traj = pl.read_parquet(run["run"] / "models/trajectories.parquet")
    plot = plots.model_trajectory_figure(traj, knot_years=0.25)
    assert any(layer.geom.__class__.__name__ == "geom_vline" for layer in plot.layers)
    assert plot.labels.get("y", "").endswith("(mL/min/1.73 m²)")
    _draw(plot)


def test_model_trajectory_figure_without_interval_bounds() -> None:
    # bounds that could not be estimated (null throughout) leave the knot labels at the
    # highest mean; this used to fail with float(None)
    traj = pl.DataFrame(
        {
            "group": ["a", "a", "a"],
            "years": [0.0, 0.5, 1.0],
            "mean": [60.0, 61.5, 58.0],
            "lower": [None, None, None],
            "upper": [None, None, None],
        },
        schema_overrides={"lower": pl.Float64, "upper": pl.Float64},
    )
    plot = plots.model_trajectory_figure(traj, knot_years=0.25)
    labels = [layer for layer in plot.layers if layer.geom.__class__.__name__ == "geom_text"]
    assert labels
    assert all(layer._data["y"].tolist() == [61.5] for layer in labels)
    _draw(plot)


# ---- slopes -----------------------------------------------------------------------------


def test_slope_distribution_against_numpy(run: dict) -> None:
    slopes = run["slopes"]
    out = plots.slope_distribution(slopes, _groups(run), equation=PRIMARY)
    for group in ("active", "placebo"):
        values = slopes.filter(
            (pl.col("equation") == PRIMARY) & (pl.col("group") == group) & pl.col("eligible")
        )
        v = values["slope_per_year"].to_numpy()
        row = out.filter(pl.col("group") == group).row(0, named=True)
        assert row["n"] == len(v)
        q1, median, q3 = np.percentile(v, [25, 50, 75])  # numpy's linear interpolation
        assert row["median"] == pytest.approx(median, rel=1e-12)
        assert row["q1"] == pytest.approx(q1, rel=1e-12)
        assert row["q3"] == pytest.approx(q3, rel=1e-12)
        # the slope stage's own flag: slope below -5 mL/min/1.73 m2/yr (KDIGO 2012)
        assert row["n_rapid"] == int(values["rapid_decline"].sum())
    total = slopes.filter(pl.col("equation") == PRIMARY).height
    assert int(out["n"].sum() + out["n_not_eligible"].sum()) == total


def test_slope_figure_labels_groups_with_protected_counts() -> None:
    slopes = pl.DataFrame(
        {
            "patient_id": [f"P-{i}" for i in range(15)],
            "slope_per_year": np.linspace(-8, 2, 15),
            "eligible": [True] * 15,
            "group": ["a"] * 12 + ["b"] * 3,
        }
    )
    plot = plots.slope_distribution_figure(slopes)
    x_scale = next(s for s in plot.scales if "x" in s.aesthetics)
    assert list(x_scale.labels) == ["a\n(n=12)", "b\n(n=<11)"]
    _draw(plot)


# ---- survival ---------------------------------------------------------------------------


def test_survival_steps_follow_lifelines_kaplan_meier(run: dict) -> None:
    curves = pl.read_parquet(run["run"] / "models/survival_curves.parquet")
    steps = plots.survival_steps(curves, endpoint="egfr_decline_40pct")
    endpoints = run["endpoints"].filter(pl.col("endpoint") == "egfr_decline_40pct")
    for group in ("active", "placebo"):
        e = endpoints.filter(pl.col("group") == group)
        km = KaplanMeierFitter().fit(e["years"].to_numpy(), e["event"].to_numpy())
        s = steps.filter(pl.col("group") == group)
        times = s["years"].to_numpy()
        # right-continuous: the last row at a time is the value from that time on
        last_at = s.group_by("years", maintain_order=True).agg(pl.col("estimate").last())
        expected = km.predict(last_at["years"].to_numpy())
        np.testing.assert_allclose(last_at["estimate"].to_numpy(), np.asarray(expected), atol=1e-12)
        assert np.all(np.diff(times) >= 0)
        assert np.all(np.diff(s["estimate"].to_numpy()) <= 1e-12)  # survival never rises


def test_survival_steps_add_the_origin() -> None:
    curves = pl.DataFrame(
        {
            "group": ["a", "a"],
            "years": [1.0, 2.0],
            "estimate": [0.2, 0.5],
            "measure": ["cumulative_incidence"] * 2,
        }
    )
    steps = plots.survival_steps(curves)
    assert steps["years"].to_list() == [0.0, 1.0, 1.0, 2.0, 2.0]
    assert steps["estimate"].to_list() == [0.0, 0.0, 0.2, 0.2, 0.5]
    mixed = curves.with_columns(measure=pl.Series(["survival", "cumulative_incidence"]))
    with pytest.raises(InputDataError, match="mixes measures"):
        plots.survival_steps(mixed)


def test_survival_figure_number_at_risk_is_protected(run: dict) -> None:
    curves = pl.read_parquet(run["run"] / "models/survival_curves.parquet")
    at_risk = pl.read_parquet(run["run"] / "models/at_risk.parquet")
    small = at_risk.with_columns(
        n_at_risk=pl.when(pl.col("years") == 3.0).then(4).otherwise(pl.col("n_at_risk"))
    )
    plot = plots.survival_figure(curves, small, endpoint="kidney_failure")
    # the layer's own data frame (plotnine keeps it as given until the plot is built)
    text = next(
        layer._data
        for layer in plot.layers
        if isinstance(layer._data, pd.DataFrame) and "label" in layer._data.columns
    )
    expected = small.filter(pl.col("endpoint") == "kidney_failure").sort("group", "years")
    got = pl.from_pandas(text[["group", "years", "label"]]).sort("group", "years")
    assert got["label"].to_list() == [
        "<11" if 1 <= n <= 10 else str(n) for n in expected["n_at_risk"].to_list()
    ]
    assert plot.labels.get("y", "") == "Cumulative incidence (Aalen–Johansen)"
    _draw(plot)
    with pytest.raises(InputDataError, match="pass endpoint="):
        plots.survival_figure(curves)


# ---- hazard ratios ----------------------------------------------------------------------


def test_forest_rows_labels_and_non_estimable_rows() -> None:
    hrs = pl.DataFrame(
        {
            "endpoint": ["egfr_decline_40pct", "kidney_failure", "kidney_failure"],
            "term": ["active vs placebo"] * 3,
            "subgroup": [None, None, "age >= 65"],
            "hr": [0.7, 1e-9, 1.25],
            "hr_lower": [0.5, 0.0, 0.4],
            "hr_upper": [0.98, float("inf"), 3.9],
        }
    )
    rows = plots.forest_rows(hrs)
    assert rows["label"].to_list() == [
        "eGFR decline 40pct · active vs placebo:  0.70 (0.50–0.98)",
        "kidney failure · active vs placebo:  not estimable",
        "kidney failure · active vs placebo [age >= 65]:  1.25 (0.40–3.90)",
    ]
    plot = plots.forest_figure(hrs)
    assert len(plot.data) == 2  # the non-estimable row is listed, not drawn
    _draw(plot)
    with pytest.raises(InputDataError, match="negative hazard ratio"):
        plots.forest_rows(hrs.with_columns(hr=pl.lit(-1.0)))


# ---- KDIGO ------------------------------------------------------------------------------


def test_kdigo_risk_table_is_the_guideline_heat_map() -> None:
    # KDIGO 2012 CKD guideline, Figure 9 (prognosis by GFR and albuminuria category):
    # rows G1..G5, columns A1, A2, A3 (green, yellow, orange, red)
    guideline = {
        "G1": ("low", "moderately_increased", "high"),
        "G2": ("low", "moderately_increased", "high"),
        "G3a": ("moderately_increased", "high", "very_high"),
        "G3b": ("high", "very_high", "very_high"),
        "G4": ("very_high", "very_high", "very_high"),
        "G5": ("very_high", "very_high", "very_high"),
    }
    assert len(plots.KDIGO_RISK) == 18
    for g, row in guideline.items():
        for a, risk in zip(("A1", "A2", "A3"), row, strict=True):
            assert plots.KDIGO_RISK[(g, a)] == risk, (g, a)


def test_kdigo_grid_cells_count_the_stages(run: dict) -> None:
    grid = pl.read_parquet(run["run"] / "models/kdigo_grid.parquet")
    cells = plots.kdigo_grid_cells(grid)
    assert cells.height == 18
    stages = run["stages"].to_pandas()
    crosstab = pd.crosstab(stages["g_category"], stages["a_category"])
    for row in cells.to_dicts():
        g, a = row["g_category"], row["a_category"]
        n = int(crosstab.loc[g, a]) if g in crosstab.index and a in crosstab.columns else 0
        assert row["n"] == n, (g, a)
        assert row["label"] == ("<11" if 1 <= n <= 10 else str(n))
        assert row["risk"] == plots.KDIGO_RISK[(g, a)]
    assert int(cells["n"].sum()) == stages["g_category"].notna().sum()
    _draw(plots.kdigo_grid_figure(grid))


def test_kdigo_grid_bad_category() -> None:
    grid = pl.DataFrame({"g_category": ["G3"], "a_category": ["A1"], "n": [5]})
    with pytest.raises(InputDataError, match=r"unknown value 'G3'.*did you mean 'G3"):
        plots.kdigo_grid_cells(grid)
    grid = pl.DataFrame(
        {"g_category": ["G3a"], "a_category": ["A1"], "n": [5], "risk": ["moderate"]}
    )
    with pytest.raises(InputDataError, match="risk"):
        plots.kdigo_grid_cells(grid)


def test_transition_cells_against_pandas_crosstab(run: dict) -> None:
    counts = pl.read_parquet(run["run"] / "models/transition_counts.parquet")
    cells = plots.transition_cells(counts)
    transitions = run["transitions"].to_pandas()
    crosstab = pd.crosstab(transitions["from_category"], transitions["to_category"])
    categories = sorted(set(cells["from_category"]))
    assert cells.height == len(categories) ** 2  # a square matrix
    for row in cells.to_dicts():
        f, t = row["from_category"], row["to_category"]
        n = int(crosstab.loc[f, t]) if f in crosstab.index and t in crosstab.columns else 0
        assert row["n"] == n
        assert (row["fill"] is None) == (1 <= n <= 10)
    shares = (
        cells.group_by("from_category")
        .agg(pl.col("share_of_from").sum(), total=pl.col("n").sum())
        .filter(pl.col("total") > 0)
    )
    assert shares.height > 0
    assert all(s == pytest.approx(100.0) for s in shares["share_of_from"])
    _draw(plots.transition_heatmap_figure(counts))


def test_transition_cells_both_axes_and_bad_category() -> None:
    counts = pl.DataFrame(
        {
            "from_category": ["G2", "A1", "G3a"],
            "to_category": ["G3a", "A2", "G3b"],
            "n": [12, 30, 4],
        }
    )
    cells = plots.transition_cells(counts)
    assert sorted(cells["axis"].unique().to_list()) == ["A", "G"]
    assert (
        cells.filter(pl.col("axis") == "G").height == 9
        and cells.filter(pl.col("axis") == "A").height == 4
    )
    _draw(plots.transition_heatmap_figure(counts))
    with pytest.raises(InputDataError, match="unknown category 'G6'"):
        plots.transition_cells(counts.with_columns(to_category=pl.lit("G6")))


# ---- attrition --------------------------------------------------------------------------


def test_attrition_boxes_follow_the_accounting(run: dict) -> None:
    manifest = run["manifest"]
    boxes = plots.attrition_boxes(
        manifest["accounting"],
        manifest["accounting_by_reason"],
        patients={"with eGFR": 118, "analysed": 9},
    )
    labs = {r["kind"]: r for r in boxes.filter(pl.col("table") == "labs").to_dicts()}
    acc = manifest["accounting"][0]
    assert (
        labs["read"]["n"]
        == acc["rows_read"]
        == acc["rows_used"] + acc["rows_rejected"] + acc["rows_merged"]
    )
    assert labs["used"]["n"] == acc["rows_used"]
    text = labs["excluded"]["text"]
    # rows are not people: row accounting is printed in full, small numbers included
    for reason in manifest["accounting_by_reason"]:
        assert f"{reason['reason'].replace('_', ' ')}: {reason['rows']}" in text
    assert f"Merged as duplicates: {acc['rows_merged']}" in text
    patients = boxes.filter(pl.col("kind") == "patients")["text"].to_list()
    assert patients == ["Patients with eGFR\n118", "Patients analysed\n<11"]
    # a flow given as printed texts (protected as a chain) is drawn as it stands
    flow = protected_flow({"with eGFR": 118, "analysed": 112})  # 6 left out: hidden
    assert flow == {"with eGFR": "118", "analysed": "*"}
    chain = plots.attrition_boxes(manifest["accounting"], patients=flow)
    drawn = chain.filter(pl.col("kind") == "patients")["text"].to_list()
    assert drawn == ["Patients with eGFR\n118", "Patients analysed\n*"]
    _draw(plots.attrition_figure(manifest["accounting"], manifest["accounting_by_reason"]))


def test_attrition_rejects_inconsistent_accounting() -> None:
    bad = [
        {"table": "labs", "rows_read": 100, "rows_used": 90, "rows_rejected": 5, "rows_merged": 0}
    ]
    with pytest.raises(
        InputDataError, match="table 'labs' has rows_read=100 but used\\+rejected\\+merged=95"
    ):
        plots.attrition_boxes(bad)
    good = [
        {"table": "labs", "rows_read": 100, "rows_used": 90, "rows_rejected": 10, "rows_merged": 0}
    ]
    reasons = [{"table": "labs", "reason": "unit_unknown", "rows": 7}]
    with pytest.raises(InputDataError, match="lists 7 rejected rows"):
        plots.attrition_boxes(good, reasons)
    with pytest.raises(InputDataError, match="missing required column 'rows_used'"):
        plots.attrition_boxes(
            pd.DataFrame({"table": ["labs"], "rows_read": [1], "rows_rejected": [0]})
        )


# ---- edge cases: every figure draws ---------------------------------------------------


def _edge_tables(kind: str) -> dict[str, pl.DataFrame]:
    """Tiny run-folder tables for one edge case."""
    ids = ["E-1"] if kind == "single_patient" else [f"E-{i}" for i in range(6)]
    groups = (
        ["only"] * len(ids)
        if kind in {"one_group", "single_patient"}
        else ["x", "y"] * (len(ids) // 2)
    )
    years = [0.0, 0.5, 1.0]
    egfr = pl.DataFrame(
        {
            "patient_id": [p for p in ids for _ in years],
            "years_from_index": years * len(ids),
            "egfr": [55.0 - 2 * t + i for i in range(len(ids)) for t in years],
        }
    )
    group_map = pl.DataFrame({"patient_id": ids, "group": groups})
    slopes = pl.DataFrame(
        {"patient_id": ids, "slope_per_year": [-2.0 - i for i in range(len(ids))], "eligible": True}
    )
    events = [0] * len(ids) if kind in {"no_events", "all_censored"} else [1] + [0] * (len(ids) - 1)
    lines = []
    for g in sorted(set(groups)):
        ev = [e for e, gg in zip(events, groups, strict=True) if gg == g]
        survival = 1.0 - (sum(ev) / len(ev))
        lines.append(
            {
                "endpoint": "kidney_failure",
                "group": g,
                "years": [0.0, 1.0],
                "estimate": [1.0, survival],
                "lower": [1.0, max(survival - 0.3, 0.0)] if sum(ev) else [None, None],
                "upper": [1.0, 1.0] if sum(ev) else [None, None],
                "measure": "survival",
            }
        )
    curves = pl.concat([pl.DataFrame(line) for line in lines], how="vertical_relaxed")
    at_risk = pl.DataFrame(
        {
            "endpoint": "kidney_failure",
            "group": sorted(set(groups)),
            "years": 0.0,
            "n_at_risk": len(ids),
        }
    )
    hrs = pl.DataFrame(
        {
            "endpoint": ["kidney_failure"],
            "term": ["y vs x"],
            "hr": [float("nan")],
            "hr_lower": [float("nan")],
            "hr_upper": [float("nan")],
        }
    )
    grid = pl.DataFrame({"g_category": ["G3a"], "a_category": ["A2"], "n": [len(ids)]})
    transitions = pl.DataFrame({"from_category": ["G3a"], "to_category": ["G3b"], "n": [1]})
    trajectories = pl.DataFrame(
        {
            "model": "m",
            "group": groups[0],
            "years": [0.0, 0.25, 1.0],
            "mean": [55.0, 53.0, 52.0],
            "lower": [50.0, 48.0, None],
            "upper": [60.0, 58.0, None],
        }
    )
    accounting = [
        {
            "table": "labs",
            "rows_read": 3 * len(ids),
            "rows_used": 3 * len(ids),
            "rows_rejected": 0,
            "rows_merged": 0,
        }
    ]
    return {
        "egfr": egfr, "groups": group_map, "slopes": slopes, "curves": curves, "at_risk": at_risk,
        "hrs": hrs, "grid": grid, "transitions": transitions, "trajectories": trajectories,
        "accounting": accounting,
    }  # fmt: skip


@pytest.mark.parametrize("kind", ["one_group", "no_events", "all_censored", "single_patient"])
def test_every_figure_draws_on_edge_cases(kind: str) -> None:
    t = _edge_tables(kind)
    figures = [
        plots.egfr_trajectory_figure(t["egfr"], t["groups"]),
        plots.model_trajectory_figure(t["trajectories"], knot_years=0.25),
        plots.slope_distribution_figure(t["slopes"], t["groups"].to_pandas()),
        plots.survival_figure(t["curves"], t["at_risk"]),
        plots.forest_figure(t["hrs"]),
        plots.kdigo_grid_figure(t["grid"]),
        plots.transition_heatmap_figure(t["transitions"]),
        plots.attrition_figure(t["accounting"], []),
    ]
    for figure in figures:
        _draw(figure)
    if kind == "single_patient":
        bins = plots.egfr_time_bins(t["egfr"], t["groups"])
        assert bins["n_patients"].to_list() == [1, 1, 1]


# ---- the run folder ---------------------------------------------------------------------


def test_write_figures_draws_what_the_folder_has(tmp_path: Path, run: dict) -> None:
    folder = tmp_path / "cohort_run"
    shutil.copytree(run["run"], folder)
    for name in (
        "models/trajectories.parquet",
        "models/kdigo_grid.parquet",
        "tables/kdigo_grid.csv",  # the grid figure prints the shared table when present
        "models/hazard_ratios.parquet",
    ):
        (folder / name).unlink()
    written = plots.write_figures(folder, formats=("png", "svg"), dpi=60)
    stems = sorted({p.stem for p in written})
    assert stems == [
        "attrition",
        "egfr_trajectories",
        "patient_flow",
        "slope_distribution",
        "survival_egfr_decline_40pct",
        "survival_kidney_failure",
        "transition_matrix",
    ]
    assert len(written) == 2 * len(stems)
    for path in written:
        data = path.read_bytes()
        if path.suffix == ".png":
            with Image.open(io.BytesIO(data)) as image:
                image.load()
                assert image.width > 200 and image.height > 100
        else:
            assert b"<svg" in data[:2000]
    # no patient identifier is written into the vector figures
    ids = run["patients"]["patient_id"].to_list()
    svg_text = "".join(p.read_text(encoding="utf-8") for p in written if p.suffix == ".svg")
    assert not [i for i in ids if i in svg_text]
    assert dt.date(2019, 5, 2).isoformat() not in svg_text


def test_write_figures_bad_folder(tmp_path: Path) -> None:
    with pytest.raises(InputDataError, match="is not a folder"):
        plots.write_figures(tmp_path / "missing")
    (tmp_path / "manifest.json").write_text("{not json", encoding="utf-8")
    with pytest.raises(InputDataError, match=r"manifest\.json: not valid JSON"):
        plots.write_figures(tmp_path)


def test_slope_density_is_the_binned_kernel_density() -> None:
    """The violin is a Gaussian kernel density with Silverman's bandwidth (R bw.nrd0,
    ggplot2's default) computed on 512 bins: within 2 % of the exact density (scipy's
    gaussian_kde with the same bandwidth) where the density is not small, and it
    integrates to about 1 over the range."""
    from scipy.stats import gaussian_kde

    rng = np.random.default_rng(5)
    values = np.concatenate([rng.normal(-1, 1.5, 4000), rng.normal(-6, 1.0, 1000)])
    slopes = pl.DataFrame(
        {
            "patient_id": [f"P{i}" for i in range(values.size)],
            "slope_per_year": values,
            "group": "a",
        }
    )
    out = plots.slope_density(slopes)
    assert out.height == 512  # DENSITY_BINS
    q1, q3 = np.percentile(values, [25, 75])
    bandwidth = 0.9 * min(values.std(ddof=1), (q3 - q1) / 1.34) * values.size**-0.2
    exact = gaussian_kde(values, bw_method=bandwidth / values.std(ddof=1))(
        out["slope_per_year"].to_numpy()
    )
    got = out["density"].to_numpy()
    big = exact > 0.02
    np.testing.assert_allclose(got[big], exact[big], rtol=0.02)
    step = (values.max() - values.min()) / 512
    assert got.sum() * step == pytest.approx(1.0, abs=0.01)
    assert out["width"].max() == pytest.approx(1.0)


def test_slope_figure_draws_summaries_only() -> None:
    """Every layer of the slope figure holds per-group summaries, never per-patient rows."""
    rng = np.random.default_rng(1)
    n = 20_000
    slopes = pl.DataFrame(
        {
            "patient_id": [f"P{i}" for i in range(n)],
            "slope_per_year": rng.normal(-1, 2, n),
            "eligible": True,
            "group": rng.choice(["a", "b"], n),
        }
    )
    plot = plots.slope_distribution_figure(slopes)
    assert plot.data is None or len(plot.data) == 0
    assert all(len(layer._data) <= 2 * 2 * 512 for layer in plot.layers if layer._data is not None)
    _draw(plot)
