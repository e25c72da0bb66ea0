"""The design run: same results whatever the number of processes, resuming a stopped
run, the folder's files and its refusal to mix two designs."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import polars as pl
import pytest
from polars.testing import assert_frame_equal

from kidneycohort.design import simulate_power
from kidneycohort.errors import ConfigError

KEYS = ["scenario", "sample_size", "trial", "analysis", "endpoint"]


def _tiny(**design: Any) -> dict[str, Any]:
    return {
        "design": {
            "seed": 3,
            "sample_sizes": [40, 60],
            "trials": 4,
            "null_trials": 2,
            "trials_per_chunk": 2,
            "time_to_event_endpoints": ["egfr_decline_40"],
            **design,
        },
        "scenario": {"treatment": {"acute_effect": -2.0, "chronic_effect": 1.0}},
    }


class _Stop(Exception):
    pass


def test_same_seed_same_results_with_one_or_two_processes(tmp_path: Path) -> None:
    design = _tiny(sample_sizes=[40])
    one = simulate_power(design, out=tmp_path / "one", workers=1)
    two = simulate_power(design, out=tmp_path / "two", workers=2)
    assert_frame_equal(one.estimates.sort(KEYS), two.estimates.sort(KEYS))
    assert_frame_equal(one.summary, two.summary)
    assert_frame_equal(one.chunks, two.chunks)
    # the seeds are recorded, one per chunk
    recorded = pl.read_csv(tmp_path / "one" / "tables" / "chunks.csv")
    assert recorded.height == 2 + 1 and recorded["chunk_seed"].n_unique() == 3


def test_a_stopped_run_resumes_with_identical_results(tmp_path: Path) -> None:
    design = _tiny(sample_sizes=[40])
    fresh = simulate_power(design, out=tmp_path / "fresh")
    seen: list[int] = []

    def stop_after_two_chunks(done: int, total: int) -> None:
        seen.append(done)
        if len(seen) == 3:  # the first call reports the start, then one per chunk
            raise _Stop

    with pytest.raises(_Stop):
        simulate_power(design, out=tmp_path / "resumed", progress=stop_after_two_chunks)
    folder = tmp_path / "resumed"
    assert len(list((folder / "chunks").glob("*.parquet"))) == 2
    assert not (folder / "manifest.json").exists()  # not a finished design
    resumed = simulate_power(design, out=folder)
    assert (resumed.chunks_reused, resumed.chunks_run) == (2, 1)
    assert_frame_equal(resumed.estimates, fresh.estimates)
    assert_frame_equal(resumed.summary, fresh.summary)


def test_the_folder_holds_every_output_and_a_manifest(tmp_path: Path) -> None:
    result = simulate_power(_tiny(), out=tmp_path / "d")
    folder = result.folder
    for name in (
        "estimates.parquet",
        "tables/power.csv",
        "tables/power.md",
        "tables/type_one_error.csv",
        "tables/operating_characteristics.csv",
        "tables/true_values.csv",
        "figures/power_curve.png",
        "figures/power_curve.svg",
        "report.html",
    ):
        assert (folder / name).is_file(), name
    manifest = json.loads((folder / "manifest.json").read_text())
    listed = {o["path"] for o in manifest["outputs"]}
    assert "estimates.parquet" in listed and "report.html" in listed
    assert manifest["config"]["design"]["seed"] == 3
    report = (folder / "report.html").read_text()
    assert "Research estimates only" in report and "Monte Carlo" in report
    estimates = pl.read_parquet(folder / "estimates.parquet")
    # every trial of every scenario and size has a row per analysed endpoint
    counts = estimates.group_by("scenario", "sample_size").agg(pl.col("trial").n_unique())
    assert sorted(counts.rows()) == [
        ("effect", 40, 4),
        ("effect", 60, 4),
        ("null", 40, 2),
        ("null", 60, 2),
    ]
    assert set(estimates["endpoint"]) == {
        "acute_change",
        "chronic_slope",
        "total_slope_2y",
        "total_slope_3y",
        "egfr_decline_40",
    }
    # a rejection is an estimable p below alpha, nothing else
    wrong = estimates.filter(pl.col("rejected") != (pl.col("estimable") & (pl.col("p") < 0.05)))
    assert wrong.height == 0


def test_a_folder_of_another_design_is_refused(tmp_path: Path) -> None:
    small = {"sample_sizes": [40], "trials": 2, "null_trials": 0, "slope_quantities": []}
    simulate_power(_tiny(**small), out=tmp_path / "d")
    with pytest.raises(ConfigError, match="another design"):
        simulate_power(_tiny(seed=4, **small), out=tmp_path / "d")
    again = simulate_power(_tiny(seed=4, **small), out=tmp_path / "d", force=True)
    assert again.chunks_reused == 0
