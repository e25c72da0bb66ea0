"""The validate / run / demo commands: exit codes, one-line messages, run folders."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from click.testing import CliRunner

from kidneycohort.cli import cli


def _study(folder: Path, recipe_steps: str = "[harmonize]", extra: str = "") -> Path:
    (folder / "pipelines").mkdir(parents=True, exist_ok=True)
    (folder / "pipelines" / "clean.yaml").write_text(
        f"name: clean\nsteps: {recipe_steps}\n", encoding="utf-8"
    )
    (folder / "patients.csv").write_text(
        "SUBJID,SEX,RFSTDTC\nS1,F,2020-01-01\nS2,M,2020-02-01\n", encoding="utf-8"
    )
    (folder / "labs.csv").write_text(
        "SUBJID,LBDTC,LBTESTCD,LBORRES,LBORRESU\n"
        "S1,2020-01-01,CREAT,88.4,umol/L\n"
        "S1,2020-03-01,CREAT,1.1,mg/dL\n"
        "S2,2020-02-01,CREAT,not done,mg/dL\n",
        encoding="utf-8",
    )
    config = folder / "study.yaml"
    config.write_text(
        "study: {name: CLI test, recipe: clean}\n"
        "data:\n"
        "  patients:\n"
        "    path: patients.csv\n"
        "    columns: {SUBJID: patient_id, SEX: sex, RFSTDTC: index_date}\n"
        "  labs:\n"
        "    path: labs.csv\n"
        "    columns: {SUBJID: patient_id, LBDTC: sample_date, LBTESTCD: analyte,\n"
        "              LBORRES: value, LBORRESU: unit}\n"
        "output: {dir: run}\n" + extra,
        encoding="utf-8",
    )
    return config


def _invoke(*args: str):
    return CliRunner().invoke(cli, list(args), catch_exceptions=False)


def test_help_of_each_command() -> None:
    for command in ("validate", "run", "demo"):
        result = _invoke(command, "--help")
        assert result.exit_code == 0
        assert "Usage:" in result.output


def test_validate_ok(tmp_path: Path) -> None:
    result = _invoke("validate", str(_study(tmp_path)))
    assert result.exit_code == 0, result.output
    assert "valid" in result.output and "harmonize" in result.output
    # the columns each table is read as (after the column map), not the reader's own
    labs = next(line for line in result.output.splitlines() if line.startswith("data.labs"))
    assert "patient_id" in labs and "source_row" not in labs and "_as_read" not in labs


@pytest.mark.parametrize(
    ("extra", "overrides", "pattern"),
    [
        ("harmonise: {}\n", [], "unknown section 'harmonise' (did you mean 'harmonize'?)"),
        ("harmonize: {same_day_rul: first}\n", [], "harmonize: unknown key 'same_day_rul'"),
        ("harmonize: {same_day_rule: second}\n", [], "harmonize.same_day_rule: "),
        ("", ["harmonize.decimal_comma=perhaps"], "harmonize.decimal_comma: "),
        ("", ["study.recipe=clen"], "study.recipe: unknown recipe 'clen' (did you mean 'clean'?)"),
        ("", ["data.labs.path=nowhere.csv"], "data.labs.path: file"),
        ("", ["data.labs.columns.SUBJECT=patient_id"], "both map to 'patient_id'"),
    ],
)
def test_config_errors_exit_2_with_the_field(
    tmp_path: Path, extra: str, overrides: list[str], pattern: str
) -> None:
    config = _study(tmp_path, extra=extra)
    args = ["validate", str(config)]
    for item in overrides:
        args += ["--set", item]
    result = _invoke(*args)
    assert result.exit_code == 2, result.output
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ")
    assert pattern in lines[0]


def test_unknown_step_exit_2(tmp_path: Path) -> None:
    config = _study(tmp_path, recipe_steps="[harmonize, harmonise_more]")
    result = _invoke("validate", str(config))
    assert result.exit_code == 2
    assert "unknown step 'harmonise_more'" in result.output


def test_run_writes_the_folder_and_records_overrides(tmp_path: Path) -> None:
    config = _study(tmp_path)
    result = _invoke("run", str(config), "--quiet", "--set", "harmonize.same_day_rule=first")
    assert result.exit_code == 0, result.output
    run = tmp_path / "run"
    manifest = json.loads((run / "manifest.json").read_text())
    assert manifest["overrides"] == ["harmonize.same_day_rule=first"]
    assert manifest["config"]["harmonize"]["same_day_rule"] == "first"
    labs = manifest["accounting"][0]
    assert labs["table"] == "labs" and labs["rows_read"] == 3
    assert labs["rows_used"] + labs["rows_rejected"] + labs["rows_merged"] == 3
    # the "not done" result is rejected with its reason and listed in rejected_rows.csv
    assert "not_done" in (run / "rejected_rows.csv").read_text()


def test_second_run_needs_force(tmp_path: Path) -> None:
    config = _study(tmp_path)
    assert _invoke("run", str(config), "-q").exit_code == 0
    again = _invoke("run", str(config), "-q")
    assert again.exit_code == 2 and "--force" in again.output
    assert _invoke("run", str(config), "-q", "--force").exit_code == 0


def test_plain_log_lines_when_not_a_terminal(tmp_path: Path) -> None:
    result = CliRunner().invoke(cli, ["run", str(_study(tmp_path))])
    assert result.exit_code == 0
    assert "step harmonize:" in result.output  # one log line per step with rows and time
    assert "run folder:" in result.output


def test_bad_data_in_a_step_exits_2_and_points_to_the_log(tmp_path: Path) -> None:
    config = _study(tmp_path)
    # a source whose required column is absent after the map
    (tmp_path / "labs.csv").write_text("SUBJID,LBDTC\nS1,2020-01-01\n", encoding="utf-8")
    result = _invoke("run", str(config), "-q")
    assert result.exit_code == 2
    assert "data.labs" in result.output and "log:" in result.output
    assert (tmp_path / "run.failed" / "run.log").is_file()
    assert not (tmp_path / "run").exists()


def test_demo_study_cohort_runs_the_cohort_config(tmp_path: Path) -> None:
    out = tmp_path / "demo"
    result = _invoke(
        "demo",
        "--study",
        "cohort",
        "--patients",
        "300",
        "--out",
        str(out),
        "--set",
        "figures.formats=[png]",
        "--set",
        "figures.dpi=50",
    )
    assert result.exit_code == 0, result.output
    assert "report:" in result.output and (out / "report.html").is_file()
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["study"]["recipe"] == "cohort_progression"
    assert "figures.dpi=50" in manifest["overrides"]
    patients = next(r for r in manifest["accounting"] if r["table"] == "patients")
    assert patients["rows_read"] == 300
    for rel in (
        "stages.parquet",
        "kfre.parquet",
        "tables/kdigo_grid.csv",
        "tables/kfre_summary.csv",
    ):
        assert (out / rel).is_file(), rel
    assert (tmp_path / "demo_inputs" / "patients.parquet").is_file()


def test_demo_unknown_study_exits_2() -> None:
    result = _invoke("demo", "--study", "cohrt")
    assert result.exit_code == 2
    assert "cohrt" in result.output and "cohort" in result.output


def test_run_demo_unknown_study_is_a_config_error(tmp_path: Path) -> None:
    from kidneycohort.errors import ConfigError
    from kidneycohort.pipeline.demo import run_demo

    with pytest.raises(ConfigError, match="unknown demo 'cohrt' \\(did you mean 'cohort'\\?\\)"):
        run_demo(tmp_path / "x", study="cohrt")  # type: ignore[arg-type]
