"""The spark engine against the polars engine, on small synthetic cohorts.

Every data file of a run (per-patient tables, models, shared tables) must be the same
with Spark in local mode as with polars: exact for integers, text and dates, within
1e-12 for floating point, rows compared in sorted order; with 1, 3 and 17 partitions
and with patients split very unevenly. Steps that cannot run on partitions are refused
before any data is read, and an error raised inside a partition reads as the polars
engine's error.
"""

from __future__ import annotations

import json
import re
import sys
from pathlib import Path

import polars as pl
import pytest
import yaml
from polars.testing import assert_frame_equal

from kidneycohort.errors import ConfigError, InputDataError
from kidneycohort.pipeline import StepContext, StepRegistry, load_config, run_pipeline
from kidneycohort.pipeline.demo import demo_config_path, demo_scenario_path
from kidneycohort.pipeline.steps import build_registry
from kidneycohort.synthetic import write_cohort
from tests._fixtures import REPO_ROOT
from tests._fixtures.spark import spark_session

__all__ = ["spark_session"]

STUDIES = {"trial": ("trial_endpoints", 60), "cohort": ("cohort_progression", 90)}
LAYOUTS = ["1", "3", "17", "uneven"]


def _recipe_without_pictures(folder: Path, recipe: str) -> Path:
    """The recipe without figures and report (pictures, not data; they take the time)."""
    source = REPO_ROOT / "pipelines" / f"{recipe}.yaml"
    data = yaml.safe_load(source.read_text(encoding="utf-8"))
    data["steps"] = [s for s in data["steps"] if s not in {"figures", "report"}]
    path = folder / f"{recipe}_data_only.yaml"
    path.write_text(yaml.safe_dump(data), encoding="utf-8")
    return path


def _overrides(study: str, base: Path) -> list[str]:
    recipe, patients = STUDIES[study]
    inputs = base / "inputs"
    if not inputs.exists():
        write_cohort(demo_scenario_path(study), inputs, patients=patients, fmt="parquet")
    return [
        f"study.recipe={_recipe_without_pictures(base, recipe).as_posix()}",
        f"data.patients.path={(inputs / 'patients.parquet').as_posix()}",
        f"data.labs.path={(inputs / 'labs.parquet').as_posix()}",
        f"data.events.path={(inputs / 'events.parquet').as_posix()}",
    ]


@pytest.fixture(scope="module", params=list(STUDIES))
def polars_run(request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory):
    study = request.param
    base = tmp_path_factory.mktemp(study)
    overrides = _overrides(study, base)
    config = load_config(demo_config_path(study), overrides=overrides)
    result = run_pipeline(config, out_dir=base / "polars")
    return study, base, overrides, result


def _data_files(run: Path) -> list[Path]:
    return sorted(
        p.relative_to(run)
        for p in run.rglob("*")
        if p.suffix in {".parquet", ".csv"}
        and not p.relative_to(run).parts[0].startswith("patient_")
    )


def _read(path: Path) -> pl.DataFrame:
    if path.suffix == ".parquet":
        return pl.read_parquet(path)
    return pl.read_csv(path, infer_schema=False)


def _sorted(frame: pl.DataFrame) -> pl.DataFrame:
    keys = [c for c, t in frame.schema.items() if not isinstance(t, pl.List | pl.Struct | pl.Array)]
    return frame.sort(keys, nulls_last=True) if keys else frame


def _assert_same_files(expected: Path, got: Path) -> None:
    files = _data_files(expected)
    assert files, "the polars run wrote no data files"
    assert _data_files(got) == files
    for rel in files:
        want, have = _read(expected / rel), _read(got / rel)
        assert want.schema == have.schema, rel
        # integers, text and dates exactly; floating point within 1e-12
        (
            assert_frame_equal(
                _sorted(want), _sorted(have), check_exact=False, rel_tol=0, abs_tol=1e-12
            ),
            rel,
        )


@pytest.mark.parametrize("layout", LAYOUTS)
def test_spark_run_equals_polars_run(
    polars_run, layout: str, spark_session, monkeypatch: pytest.MonkeyPatch
) -> None:
    study, base, overrides, expected = polars_run
    partitions = 3 if layout == "uneven" else int(layout)
    if layout == "uneven":
        cohort = pl.read_parquet(expected.run_dir / "baseline.parquet")["patient_id"].cast(
            pl.String
        )
        cut = cohort.sort()[int(cohort.len() * 0.8)]
        from pyspark.sql import functions as F

        # four in five patients (ids before the 80th centile) hashed as one key
        monkeypatch.setattr(
            "kidneycohort.pipeline.spark._engine.partition_expression",
            lambda key: F.when(key < F.lit(cut), F.lit("one partition")).otherwise(key),
        )
    config = load_config(
        demo_config_path(study),
        overrides=[*overrides, "execution.engine=spark", f"execution.partitions={partitions}"],
    )
    result = run_pipeline(config, out_dir=base / f"spark_{layout}")
    _assert_same_files(expected.run_dir, result.run_dir)
    # the shared session keeps its own settings (the fixture's 4 shuffle partitions)
    assert spark_session.conf.get("spark.sql.shuffle.partitions") == "4"

    manifest = json.loads((result.run_dir / "manifest.json").read_text(encoding="utf-8"))
    assert manifest["execution"]["engine"] == "spark"
    assert manifest["execution"]["master"] == "local[2]"
    assert manifest["execution"]["partitions"] == partitions
    assert manifest["config"]["execution"]["engine"] == "spark"
    want = json.loads((expected.run_dir / "manifest.json").read_text(encoding="utf-8"))
    assert want["execution"] == {
        "engine": "polars",
        "master": None,
        "partitions": None,
        "spark_version": None,
    }
    for key in ("accounting", "accounting_by_reason", "merged_by_reason", "inputs"):
        assert manifest[key] == want[key], key
    steps = {s["name"]: s for s in manifest["steps"]}
    assert steps["harmonize"]["executor_seconds"] is not None
    assert steps["cox"]["executor_seconds"] is None

    # per-patient tables written as one Parquet file per partition that held patients
    pieces = sorted((result.run_dir / "patient_partitions" / "cohort").glob("part-*.parquet"))
    sizes = [pl.read_parquet(p).height for p in pieces]
    assert sum(sizes) == expected.tables["cohort"].height
    assert 1 <= len(pieces) <= partitions
    if layout == "uneven":
        assert max(sizes) >= 0.75 * sum(sizes), sizes


def _registry_with(step_name: str, **fields) -> StepRegistry:
    registry = build_registry()

    def count_labs(ctx: StepContext) -> dict:
        return {"lab_counts": ctx.tables["labs"].group_by("patient_id").len()}

    if fields.pop("patient_wise", False):
        registry.register_patient_wise(step_name, per_patient=count_labs, **fields)
    else:
        registry.register(step_name, **fields)(count_labs)
    return registry


def _config_with_step(tmp_path: Path, registry: StepRegistry, extra: list[str], *, after: str):
    recipe = yaml.safe_load((REPO_ROOT / "pipelines" / "trial_endpoints.yaml").read_text())
    steps = recipe["steps"]
    at = steps.index(after) + 1
    recipe["steps"] = [*steps[:at], "lab_counts", *steps[at:]]
    path = tmp_path / "recipe.yaml"
    path.write_text(yaml.safe_dump(recipe), encoding="utf-8")
    return load_config(
        demo_config_path("trial"),
        overrides=[f"study.recipe={path.as_posix()}", *extra],
        registry=registry,
    )


def test_a_step_not_declared_partition_safe_is_refused(tmp_path: Path) -> None:
    registry = _registry_with("lab_counts", needs=["labs"], makes=["lab_counts"])
    # the polars engine runs it; the spark engine refuses it before reading any data
    _config_with_step(tmp_path, registry, [], after="harmonize")
    with pytest.raises(ConfigError, match=r"execution\.engine: .*'lab_counts'.*partition-safe"):
        _config_with_step(tmp_path, registry, ["execution.engine=spark"], after="harmonize")


def test_a_partition_step_needing_a_cohort_level_table_is_refused(tmp_path: Path) -> None:
    registry = build_registry()

    def uses_grid(ctx: StepContext) -> dict:
        return {"lab_counts": ctx.tables["labs"].head(0)}

    registry.register_patient_wise(
        "lab_counts",
        per_patient=uses_grid,
        needs=["labs", "models/kdigo_grid"],
        makes=["lab_counts"],
    )
    with pytest.raises(ConfigError, match=r"'lab_counts'.*needs 'models/kdigo_grid'.*'kdigo_grid'"):
        _config_with_step(tmp_path, registry, ["execution.engine=spark"], after="kdigo_grid")


def test_execution_section_is_checked() -> None:
    with pytest.raises(ConfigError, match=r"execution\.engine"):
        load_config(demo_config_path("trial"), overrides=["execution.engine=dask"])
    with pytest.raises(ConfigError, match=r"execution\.partitions"):
        load_config(demo_config_path("trial"), overrides=["execution.partitions=0"])
    config = load_config(demo_config_path("trial"))
    assert config.execution.engine == "polars"
    assert config.resolved()["execution"] == {
        "engine": "polars",
        "master": "local[2]",
        "partitions": 8,
    }


def test_error_in_a_partition_reads_as_the_polars_error(tmp_path: Path, spark_session) -> None:
    registry = build_registry()

    def refuse_old_samples(ctx: StepContext) -> dict:
        labs = ctx.tables["labs"]
        old = labs.filter(pl.col("sample_date") < pl.date(2100, 1, 1))["patient_id"].n_unique()
        if old:
            raise InputDataError(f"labs.sample_date: {old} patients have samples before 2100")
        return {"lab_counts": labs.group_by("patient_id").len()}

    registry.register_patient_wise(
        "lab_counts", per_patient=refuse_old_samples, needs=["labs"], makes=["lab_counts"]
    )
    base = tmp_path / "inputs"
    write_cohort(demo_scenario_path("trial"), base, patients=30, fmt="parquet")
    data = [
        f"data.patients.path={(base / 'patients.parquet').as_posix()}",
        f"data.labs.path={(base / 'labs.parquet').as_posix()}",
        f"data.events.path={(base / 'events.parquet').as_posix()}",
    ]
    messages = {}
    for engine in ("polars", "spark"):
        config = _config_with_step(
            tmp_path,
            registry,
            [*data, f"execution.engine={engine}", "execution.partitions=3"],
            after="harmonize",
        )
        target = tmp_path / engine
        with pytest.raises(InputDataError) as caught:
            run_pipeline(config, out_dir=target)
        messages[engine] = str(caught.value)
        assert not target.exists(), "a failed run leaves no run folder"
        assert not (tmp_path / f"{engine}.failed" / "manifest.json").exists()
    assert "\n" not in messages["spark"]
    with_labs = pl.read_parquet(tmp_path / "polars.failed" / "labs.parquet")["patient_id"]
    patients = with_labs.n_unique()
    prefix = "step 'lab_counts': labs.sample_date: "
    assert messages["polars"] == f"{prefix}{patients} patients have samples before 2100"
    # the same error, as one partition saw it, with where and how many patients it hit
    assert re.fullmatch(
        re.escape(prefix) + r"\d+ patients have samples before 2100 "
        rf"\(raised on [123] of 3 partitions, {patients} patients\)",
        messages["spark"],
    ), messages["spark"]
    assert not any(str(i) in messages["spark"] for i in with_labs.unique().cast(pl.String))


def _as_dataset(table: pl.DataFrame, folder: Path, files: int) -> None:
    """``table`` as a hive-partitioned Parquet dataset: ``half=0|1`` folders, files each."""
    rows = table.with_row_index("_n")
    for half in (0, 1):
        part = rows.filter(pl.col("_n") % 2 == half).drop("_n")
        target = folder / f"half={half}"
        target.mkdir(parents=True)
        step = -(-part.height // files)
        for i in range(files):
            part.slice(i * step, step).write_parquet(target / f"part-{i}.parquet")


def test_parquet_dataset_folders_read_by_spark_equal_the_polars_run(
    tmp_path: Path, spark_session
) -> None:
    inputs = tmp_path / "inputs"
    write_cohort(demo_scenario_path("trial"), inputs, patients=40, fmt="parquet")
    _as_dataset(pl.read_parquet(inputs / "labs.parquet"), tmp_path / "labs", files=3)
    _as_dataset(pl.read_parquet(inputs / "patients.parquet"), tmp_path / "patients", files=1)
    overrides = [
        f"study.recipe={_recipe_without_pictures(tmp_path, 'trial_endpoints').as_posix()}",
        f"data.patients.path={(tmp_path / 'patients').as_posix()}",
        f"data.labs.path={(tmp_path / 'labs').as_posix()}",
        f"data.events.path={(inputs / 'events.parquet').as_posix()}",
    ]
    runs = {}
    for engine in ("polars", "spark"):
        config = load_config(
            demo_config_path("trial"),
            overrides=[*overrides, f"execution.engine={engine}", "execution.partitions=3"],
        )
        runs[engine] = run_pipeline(config, out_dir=tmp_path / engine)
    _assert_same_files(runs["polars"].run_dir, runs["spark"].run_dir)
    polars_manifest, spark_manifest = runs["polars"].manifest, runs["spark"].manifest
    assert spark_manifest.inputs == polars_manifest.inputs
    labs_input = next(i for i in polars_manifest.inputs if i.table == "labs")
    assert labs_input.rows == pl.read_parquet(inputs / "labs.parquet").height
    # rejected rows name the same source rows: numbered through the files in path order
    rejected = pl.read_csv(runs["spark"].run_dir / "rejected_rows.csv")
    assert rejected.filter(pl.col("table") == "labs")["source_row"].max() <= labs_input.rows
    # the driver held the events it read, never the lab rows: Spark read those
    read = {s.name: s for s in spark_manifest.steps}["read"]
    assert read.rows_out is None
    assert {s.name: s for s in polars_manifest.steps}["read"].rows_out == labs_input.rows


def test_without_pyspark_the_spark_engine_says_what_to_install(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    from kidneycohort.pipeline import ExecutionSection
    from kidneycohort.pipeline.spark._engine import spark_session

    monkeypatch.setitem(sys.modules, "pyspark.sql", None)  # import fails as if absent
    with pytest.raises(ConfigError, match=r"execution\.engine: 'spark' needs pyspark"):
        spark_session(ExecutionSection(engine="spark"))
