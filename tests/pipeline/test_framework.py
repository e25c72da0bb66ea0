"""The runner framework on tiny test steps: configs, overrides, chain check, run folder."""

from __future__ import annotations

import json
from pathlib import Path

import polars as pl
import pytest
from polars.testing import assert_frame_equal

from kidneycohort.errors import ConfigError, InputDataError
from kidneycohort.pipeline import check_inputs, load_config, run_pipeline
from kidneycohort.pipeline.config import apply_overrides, deep_merge
from tests._fixtures.pipeline import build_test_registry, write_study

REG = build_test_registry()


def _load(config: Path, overrides: list[str] | None = None):
    return load_config(config, overrides=overrides or [], registry=REG)


# ---- config errors: each message names the field -------------------------------------
def test_unknown_key_suggests_the_right_one(tmp_path: Path) -> None:
    config = write_study(tmp_path, ["scale"], extra="scale:\n  factr: 3\n")
    with pytest.raises(
        ConfigError, match=r"scale: unknown key 'factr' \(did you mean 'factor'\?\)"
    ):
        _load(config)


def test_unknown_section_suggests(tmp_path: Path) -> None:
    config = write_study(tmp_path, ["scale"], extra="scael:\n  factor: 3\n")
    with pytest.raises(ConfigError, match=r"unknown section 'scael' \(did you mean 'scale'\?\)"):
        _load(config)


def test_unknown_key_in_a_source_is_named_with_its_path(tmp_path: Path) -> None:
    config = write_study(tmp_path, ["scale"])
    text = config.read_text().replace(
        "columns: {SUBJ: patient_id}\n  labs", "colums: {SUBJ: patient_id}\n  labs"
    )
    config.write_text(text)
    with pytest.raises(
        ConfigError, match=r"data\.patients: unknown key 'colums' \(did you mean 'columns'\?\)"
    ):
        _load(config)


def test_wrong_type_names_the_field_and_value(tmp_path: Path) -> None:
    config = write_study(tmp_path, ["scale"], extra="scale:\n  factor: lots\n")
    with pytest.raises(ConfigError, match=r"^scale\.factor: .*got 'lots'"):
        _load(config)


def test_wrong_type_inside_a_list(tmp_path: Path) -> None:
    config = write_study(
        tmp_path, ["scale"], extra="scale:\n  keep_analytes: [creatinine, {a: 1}]\n"
    )
    with pytest.raises(ConfigError, match=r"^scale\.keep_analytes\.1: "):
        _load(config)


def test_missing_required_key(tmp_path: Path) -> None:
    config = write_study(tmp_path, ["scale"])
    config.write_text(config.read_text().replace("  name: Tiny study\n", ""))
    with pytest.raises(ConfigError, match=r"^study\.name: required key missing"):
        _load(config)


def test_unknown_step_suggests(tmp_path: Path) -> None:
    config = write_study(tmp_path, ["scale", "cuont"])
    with pytest.raises(ConfigError, match=r"unknown step 'cuont' \(did you mean 'count'\?\)"):
        _load(config)


def test_unknown_recipe_suggests(tmp_path: Path) -> None:
    config = write_study(tmp_path, ["scale"])
    config.write_text(config.read_text().replace("recipe: tiny", "recipe: tinny"))
    with pytest.raises(
        ConfigError, match=r"study\.recipe: unknown recipe 'tinny' \(did you mean 'tiny'\?\)"
    ):
        _load(config)


def test_step_needing_a_table_no_earlier_step_makes(tmp_path: Path) -> None:
    config = write_study(tmp_path, ["count", "scale"])
    with pytest.raises(
        ConfigError, match=r"step 'count' needs table 'scaled_labs' which no earlier step makes"
    ):
        _load(config)


def test_section_not_used_by_recipe(tmp_path: Path) -> None:
    config = write_study(tmp_path, ["scale"], extra="count:\n  by: analyte\n")
    with pytest.raises(ConfigError, match=r"section 'count' is not used by recipe 'tiny'"):
        _load(config)


def test_missing_file_names_the_field(tmp_path: Path) -> None:
    config = write_study(tmp_path, ["scale"])
    (tmp_path / "data" / "labs.csv").unlink()
    study = _load(config)  # the config itself is fine
    with pytest.raises(InputDataError, match=r"^data\.labs\.path: file '.*labs\.csv' not found"):
        check_inputs(study)


def test_column_map_naming_a_missing_column(tmp_path: Path) -> None:
    config = write_study(tmp_path, ["scale"])
    config.write_text(
        config.read_text().replace(
            "path: data/labs.csv\n    columns: {SUBJ: patient_id}",
            "path: data/labs.csv\n    columns: {SUBJECT: patient_id}",
        )
    )
    study = _load(config)
    with pytest.raises(InputDataError, match=r"^data\.labs: .*'SUBJECT'.*did you mean 'SUBJ'"):
        check_inputs(study)


def test_yaml_is_read_safely(tmp_path: Path) -> None:
    config = write_study(tmp_path, ["scale"])
    # a python-object tag would run code under an unsafe loader
    config.write_text(config.read_text() + "scale: !!python/object/apply:os.system ['echo hi']\n")
    with pytest.raises(ConfigError, match=r"not valid YAML"):
        _load(config)


def test_bad_override_syntax() -> None:
    with pytest.raises(ConfigError, match=r"--set 'scale\.factor': expected key\.path=value"):
        apply_overrides({}, ["scale.factor"])


# ---- overrides and merging --------------------------------------------------------------
def test_overrides_are_typed_and_recorded(tmp_path: Path) -> None:
    config = write_study(tmp_path, ["scale"])
    study = _load(
        config, ["scale.factor=3", "scale.keep_analytes=[creatinine, uacr]", "study.seed=5"]
    )
    assert study.sections["scale"].factor == 3.0  # type: ignore[attr-defined]
    assert study.sections["scale"].keep_analytes == ["creatinine", "uacr"]  # type: ignore[attr-defined]
    assert study.study.seed == 5
    assert study.overrides == [
        "scale.factor=3",
        "scale.keep_analytes=[creatinine, uacr]",
        "study.seed=5",
    ]


def test_recipe_defaults_are_overridden_key_by_key() -> None:
    merged = deep_merge({"a": {"b": 1, "c": 2}, "d": [1]}, {"a": {"c": 3}, "d": [2]})
    assert merged == {"a": {"b": 1, "c": 3}, "d": [2]}


def test_recipe_default_applies(tmp_path: Path) -> None:
    study = _load(write_study(tmp_path, ["scale"]))
    assert study.sections["scale"].factor == 2.0  # type: ignore[attr-defined]


def test_paths_are_relative_to_the_config(tmp_path: Path) -> None:
    study = _load(write_study(tmp_path, ["scale"]))
    assert Path(study.data.labs.path) == (tmp_path / "data" / "labs.csv").resolve()  # type: ignore[union-attr]
    assert study.output.dir == (tmp_path / "out" / "run").resolve()


# ---- running ------------------------------------------------------------------------------
def test_run_writes_folder_manifest_and_values(tmp_path: Path) -> None:
    study = _load(write_study(tmp_path, ["scale", "count"]))
    result = run_pipeline(study)
    run = tmp_path / "out" / "run"
    assert result.run_dir == run.resolve()
    for rel in (
        "scaled_labs.parquet",
        "tables/lab_counts.csv",
        "tables/lab_counts.md",
        "tables/tables.xlsx",
        "models/lab_means.parquet",
        "manifest.json",
        "run.log",
        "warnings.txt",
    ):
        assert (run / rel).is_file(), rel
    labs = pl.read_parquet(run / "scaled_labs.parquet")
    # recipe default factor 2.0 on the 4 creatinine rows: 1.0, 1.2, 0.8, 2.0 -> doubled
    assert sorted(labs["value"].to_list()) == pytest.approx([1.6, 2.0, 2.4, 4.0])
    manifest = json.loads((run / "manifest.json").read_text())
    assert manifest["seed"] == 11
    assert manifest["config"]["scale"]["factor"] == 2.0
    assert [s["name"] for s in manifest["steps"]] == ["read", "scale", "count"]
    assert manifest["steps"][1]["rows_out"] == 4
    labs_input = next(i for i in manifest["inputs"] if i["table"] == "labs")
    assert labs_input["rows"] == 5 and len(labs_input["sha256"]) == 64
    acc = manifest["accounting"][0]
    assert acc["rows_read"] == acc["rows_used"] + acc["rows_rejected"] + acc["rows_merged"]
    assert manifest["packages"]["polars"] == pl.__version__
    assert manifest["study"]["recipe"] == "tiny"
    # no temporary or failed folder is left behind
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == ["run"]


def test_sha256_matches_hashlib(tmp_path: Path) -> None:
    import hashlib  # reference: the standard library's own SHA-256

    study = _load(write_study(tmp_path, ["scale"]))
    manifest = run_pipeline(study).manifest
    want = hashlib.sha256((tmp_path / "data" / "labs.csv").read_bytes()).hexdigest()
    assert next(i for i in manifest.inputs if i.table == "labs").sha256 == want


def test_existing_folder_is_not_overwritten_without_force(tmp_path: Path) -> None:
    study = _load(write_study(tmp_path, ["scale", "count"]))
    run_pipeline(study)
    before = (tmp_path / "out" / "run" / "scaled_labs.parquet").read_bytes()
    with pytest.raises(ConfigError, match=r"already exists.*--force"):
        run_pipeline(study)
    study = _load(tmp_path / "study.yaml", ["scale.factor=10"])
    run_pipeline(study, force=True)
    after = (tmp_path / "out" / "run" / "scaled_labs.parquet").read_bytes()
    assert before != after


def test_two_runs_give_identical_files(tmp_path: Path) -> None:
    study = _load(write_study(tmp_path, ["scale", "count"]))
    a = run_pipeline(study, out_dir=tmp_path / "a").run_dir
    b = run_pipeline(study, out_dir=tmp_path / "b").run_dir
    for rel in (
        "scaled_labs.parquet",
        "tables/lab_counts.csv",
        "tables/tables.xlsx",
        "models/lab_means.parquet",
    ):
        assert (a / rel).read_bytes() == (b / rel).read_bytes(), rel


def test_failing_step_leaves_only_a_failed_folder(tmp_path: Path) -> None:
    study = _load(write_study(tmp_path, ["scale", "count", "boom"]))
    with pytest.raises(RuntimeError, match="on purpose") as info:
        run_pipeline(study)
    out = tmp_path / "out"
    assert sorted(p.name for p in out.iterdir()) == ["run.failed"]
    failed = out / "run.failed"
    assert not (failed / "manifest.json").exists()
    assert "step failed on purpose" in (failed / "run.log").read_text()
    assert "RuntimeError" in (failed / "error.txt").read_text()
    assert info.value.log_path == str(failed / "run.log")  # type: ignore[attr-defined]


def test_failing_rerun_keeps_the_previous_good_folder(tmp_path: Path) -> None:
    config = write_study(tmp_path, ["scale", "count"])
    run_pipeline(_load(config))
    (tmp_path / "pipelines" / "tiny.yaml").write_text(
        "name: tiny\nsteps: [scale, count, boom]\n", encoding="utf-8"
    )
    with pytest.raises(RuntimeError):
        run_pipeline(_load(config), force=True)
    assert (tmp_path / "out" / "run" / "manifest.json").is_file()
    assert (tmp_path / "out" / "run.failed" / "run.log").is_file()


def test_input_error_in_a_step_names_the_step(tmp_path: Path) -> None:
    study = _load(write_study(tmp_path, ["scale", "bad_data"]))
    with pytest.raises(InputDataError, match=r"^step 'bad_data': labs: column 'value' holds 'abc'"):
        run_pipeline(study)


def test_warnings_are_captured_into_the_run_folder(tmp_path: Path) -> None:
    study = _load(write_study(tmp_path, ["scale", "warn"]))
    result = run_pipeline(study)
    assert result.warnings == ["StatisticalWarning: few events: estimate unstable"]
    text = (result.run_dir / "warnings.txt").read_text()
    assert "few events" in text
    assert result.manifest.warnings == result.warnings


def test_run_folder_tables_equal_the_step_results(tmp_path: Path) -> None:
    study = _load(write_study(tmp_path, ["scale", "count"]))
    result = run_pipeline(study)
    written = pl.read_csv(result.run_dir / "tables" / "lab_counts.csv")
    assert_frame_equal(written, result.tables["tables/lab_counts"], check_dtypes=False)
    md = (result.run_dir / "tables" / "lab_counts.md").read_text().splitlines()
    assert md[0] == "| patient_id | n |" and md[2] == "| P1 | 2 |"


def test_unknown_key_inside_a_tagged_union_item() -> None:
    from pydantic import BaseModel

    from kidneycohort.endpoints import EndpointDefinition
    from kidneycohort.pipeline.config import check_keys

    class Section(BaseModel):
        definitions: list[EndpointDefinition]

    data = {"definitions": [{"kind": "death"}, {"kind": "egfr_decline", "percnt": 40}]}
    with pytest.raises(
        ConfigError,
        match=r"endpoints\.definitions\[1\]: unknown key 'percnt' \(did you mean 'percent'\?\)",
    ):
        check_keys(data, Section, "endpoints")


def test_a_step_reading_the_folder_sees_the_finished_tables(tmp_path: Path) -> None:
    # a registry of its own: the test steps plus one that lists the folder it finds
    from kidneycohort.pipeline import StepContext

    registry = build_test_registry()
    seen: dict[str, list[str]] = {}

    @registry.register("look", makes=["looked"], reads_folder=True)
    def look(ctx: StepContext) -> dict[str, pl.DataFrame]:
        """Record the run folder's files (as the report step reads them)."""
        seen["files"] = sorted(
            p.relative_to(ctx.run_dir).as_posix() for p in ctx.run_dir.rglob("*")
        )
        assert ctx.folder is not None
        seen["steps"] = [s.name for s in ctx.folder.manifest.steps]
        return {"looked": pl.DataFrame({"n": [len(seen["files"])]})}

    config = write_study(tmp_path, ["scale", "count", "look"], extra="  markdown: false\n")
    study = load_config(config, registry=registry)
    assert study.output.markdown is False
    run_pipeline(study)
    # the workbook is written, and the Markdown copies removed, before the step runs
    assert "tables/tables.xlsx" in seen["files"]
    assert "tables/lab_counts.csv" in seen["files"]
    assert not any(f.endswith(".md") for f in seen["files"])
    # no manifest.json until the run is complete; the step gets the manifest so far
    assert "manifest.json" not in seen["files"]
    assert seen["steps"] == ["read", "scale", "count"]
