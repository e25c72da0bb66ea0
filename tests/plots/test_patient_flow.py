"""The CONSORT-style patient flow by group: counts from the run folder's per-patient files,
one small-cell protection over the boxes, the figure at report width.

External reference: the CONSORT 2010 flow diagram (Schulz, Altman, Moher; BMJ
2010;340:c332) for the layout (enrolment, then one column per group with exclusions
beside the arrows).
"""

from __future__ import annotations

import itertools
import json
import shutil
from pathlib import Path

import matplotlib.pyplot as plt
import polars as pl
import pytest

from kidneycohort import plots
from kidneycohort.disclosure import protected_group_flow
from kidneycohort.errors import InputDataError
from kidneycohort.run_folder import RunFolder
from tests._fixtures.run_folder import PRIMARY, build_run_folder


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory) -> dict:
    return build_run_folder(tmp_path_factory.mktemp("flow_run"), n_patients=120, seed=3)


def test_flow_by_group_counts_the_per_patient_files(built: dict) -> None:
    run = built["run"]
    flow = RunFolder(run).patient_flow_by_group(PRIMARY)
    got = {(g, s): n for g, s, n in flow.rows()}
    # counted directly as sets of ids per group
    groups = dict(built["patients"].select("patient_id", "group").rows())
    labs = set(pl.read_parquet(run / "labs.parquet")["patient_id"].cast(pl.String))
    egfr = pl.read_parquet(run / "egfr.parquet").filter(
        (pl.col("equation") == PRIMARY) & pl.col("egfr").is_not_null() & pl.col("egfr").is_not_nan()
    )
    base = pl.read_parquet(run / "baseline.parquet").filter(
        (pl.col("equation") == PRIMARY) & pl.col("baseline_egfr").is_not_null()
    )
    for group in set(groups.values()):
        ids = {p for p, g in groups.items() if g == group}
        assert got[(group, "enrolled")] == len(ids)
        assert got[(group, "with lab results")] == len(ids & labs)
        assert got[(group, "with eGFR")] == len(ids & set(egfr["patient_id"]))
        assert got[(group, "with a baseline (analysed)")] == len(ids & set(base["patient_id"]))


def test_lab_rows_of_unknown_patients_are_not_enrolled(built: dict, tmp_path: Path) -> None:
    run = tmp_path / "run"
    shutil.copytree(built["run"], run)
    rejected = pl.read_csv(run / "rejected_rows.csv", infer_schema_length=0)
    ghost = rejected.head(1).with_columns(patient_id=pl.lit("NOT-ENROLLED-1"))
    pl.concat([rejected, ghost]).write_csv(run / "rejected_rows.csv")
    flow = RunFolder(run).patient_flow(PRIMARY)
    assert flow["enrolled"] == built["patients"].height
    assert list(flow) == ["enrolled", "with lab results", "with eGFR", "with a baseline (analysed)"]


def test_group_flow_protection_leaves_no_small_count_to_subtract() -> None:
    steps = ["enrolled", "with eGFR", "analysed"]
    counts = {
        ("a", "enrolled"): 120, ("a", "with eGFR"): 114, ("a", "analysed"): 100,
        ("b", "enrolled"): 130, ("b", "with eGFR"): 130, ("b", "analysed"): 127,
    }  # fmt: skip
    texts = protected_group_flow(counts, steps, ["a", "b"], 10)
    assert texts[("left out", "a", "with eGFR")] == "<11"  # 6
    assert texts[("left out", "b", "analysed")] == "<11"  # 3
    assert texts[("left out", "b", "with eGFR")] == "0"  # zero discloses nobody
    # every relation a reader knows: before = after + left out; total = sum of groups
    values = {("flow", g, s): n for (g, s), n in counts.items()}
    for g in ("a", "b"):
        for before, after in itertools.pairwise(steps):
            values[("left out", g, after)] = counts[(g, before)] - counts[(g, after)]
    values[("flow", "all", "enrolled")] = 250
    relations = [
        [("flow", g, before), ("flow", g, after), ("left out", g, after)]
        for g in ("a", "b")
        for before, after in itertools.pairwise(steps)
    ] + [[("flow", "all", "enrolled"), ("flow", "a", "enrolled"), ("flow", "b", "enrolled")]]
    for relation in relations:
        hidden = [k for k in relation if not texts[k].replace(",", "").isdigit()]
        assert len(hidden) != 1, f"{hidden} follows from the other two of {relation}"
    shown = {k: int(t.replace(",", "")) for k, t in texts.items() if t.replace(",", "").isdigit()}
    assert all(values[k] == n for k, n in shown.items())  # what is shown is true


def test_boxes_print_labels_and_the_protected_texts() -> None:
    flow = pl.DataFrame(
        {
            "group": ["active"] * 3 + ["placebo"] * 3,
            "step": ["enrolled", "with eGFR", "with a baseline (analysed)"] * 2,
            "n": [120, 114, 114, 130, 130, 127],
        }
    )
    boxes = plots.patient_flow_boxes(flow, labels={"active": "Active drug"})
    texts = boxes["text"].to_list()
    assert "Active drug\nenrolled\nn = 120" in texts
    assert "Enrolled, all groups\nn = 250" in texts
    assert "No computable eGFR\nn = <11" in texts
    hidden = boxes.filter(pl.col("text").str.contains(r"n = (<11|\*)$"))
    assert hidden["n"].null_count() == hidden.height  # no number behind a hidden text
    figure = plots.patient_flow_figure(flow, note="Not patients: 3 lab rows.")
    width, _ = figure.theme.getp("figure_size")
    assert width <= 7.8  # two groups read at report width (A4 or Letter text width)
    drawn = figure.draw()
    plt.close(drawn)
    with pytest.raises(InputDataError, match="more patients 'with eGFR'"):
        plots.patient_flow_boxes(flow.with_columns(n=pl.Series([1, 2, 2, 5, 5, 5])))


def test_run_draws_the_flow_and_notes_unknown_patients(built: dict, tmp_path: Path) -> None:
    run = tmp_path / "run"
    shutil.copytree(built["run"], run)
    manifest = json.loads((run / "manifest.json").read_text(encoding="utf-8"))
    manifest["accounting_by_reason"].append(
        {"table": "labs", "reason": "unknown_patient", "rows": 0}
    )
    (run / "manifest.json").write_text(json.dumps(manifest), encoding="utf-8")
    figure = plots.draw_figures(run)["patient_flow"]
    assert figure.labels.get("title", "") == "Patient flow by group"
    manifest["accounting_by_reason"][-1]["rows"] = 17
    labs = next(a for a in manifest["accounting"] if a["table"] == "labs")
    labs["rows_read"] += 17
    labs["rows_rejected"] += 17
    (run / "manifest.json").write_text(json.dumps(manifest), encoding="utf-8")
    caption = plots.draw_figures(run)["patient_flow"].labels.get("caption", "")
    assert "17 lab rows with a patient id that is not" in caption.replace("\n", " ")
