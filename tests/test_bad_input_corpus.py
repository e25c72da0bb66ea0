"""A corpus of bad inputs: each ends in one line naming the file, row or config field,
the right exit code, no traceback on the terminal, and the study folder unchanged.

Every case builds a tiny invented study in ``tmp_path`` (a harmonise-only recipe unless
a case needs more), hashes the study folder, runs the command line through click's
runner, and checks the folder's files are byte-identical afterwards.
"""

from __future__ import annotations

import hashlib
import os
import re
import signal
import subprocess
import sys
import textwrap
import time
from dataclasses import dataclass, field
from pathlib import Path

import polars as pl
import pytest
from click.testing import CliRunner

from kidneycohort.cli import cli

PATIENTS = (
    "SUBJID,SEX,BRTHDTC,RFSTDTC,ARM\nS1,F,1960-05-01,2020-01-01,A\nS2,M,1955-03-02,2020-02-01,B\n"
)
LABS = (
    "SUBJID,LBDTC,LBTESTCD,LBORRES,LBORRESU\n"
    "S1,2020-01-01,CREAT,1.0,mg/dL\n"
    "S1,2020-06-01,CREAT,1.1,mg/dL\n"
    "S2,2020-02-01,CREAT,0.9,mg/dL\n"
    "S2,2020-08-01,CREAT,1.2,mg/dL\n"
)
PATIENT_COLUMNS = "{SUBJID: patient_id, SEX: sex, BRTHDTC: birth_date, RFSTDTC: index_date}"
LAB_COLUMNS = (
    "{SUBJID: patient_id, LBDTC: sample_date, LBTESTCD: analyte, LBORRES: value, LBORRESU: unit}"
)


@dataclass
class Study:
    """An invented study folder: files by name, the config text, the recipe's steps."""

    files: dict[str, str | bytes] = field(default_factory=dict)
    study: str = "{name: corpus, recipe: clean}"
    data: str = ""
    extra: str = ""
    steps: str = "[harmonize]"

    def write(self, folder: Path) -> Path:
        folder.mkdir(parents=True, exist_ok=True)
        (folder / "pipelines").mkdir(exist_ok=True)
        (folder / "pipelines" / "clean.yaml").write_text(
            f"name: clean\nsteps: {self.steps}\n", encoding="utf-8"
        )
        files = {"patients.csv": PATIENTS, "labs.csv": LABS, **self.files}
        for name, content in files.items():
            path = folder / name
            if isinstance(content, bytes):
                path.write_bytes(content)
            else:
                path.write_text(content, encoding="utf-8")
        data = self.data or DATA
        config = folder / "study.yaml"
        config.write_text(f"study: {self.study}\n{data}{self.extra}", encoding="utf-8")
        return config


DATA = (
    "data:\n"
    f"  patients: {{path: patients.csv, columns: {PATIENT_COLUMNS}}}\n"
    f"  labs: {{path: labs.csv, columns: {LAB_COLUMNS}}}\n"
)


def tree_hashes(folder: Path) -> dict[str, str]:
    """SHA-256 of every file under ``folder`` (relative path -> digest)."""
    return {
        p.relative_to(folder).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(folder.rglob("*"))
        if p.is_file()
    }


def invoke(args: list[str], cwd: Path) -> tuple[int, str]:
    old = Path.cwd()
    os.chdir(cwd)
    try:
        result = CliRunner().invoke(cli, args, catch_exceptions=False)
    finally:
        os.chdir(old)
    return result.exit_code, result.output


def check_one_line(output: str) -> None:
    assert "Traceback" not in output, output
    errors = [line for line in output.splitlines() if "error" in line.lower()]
    assert len(errors) == 1, output
    assert "internal error" not in output, output


# ---- input is never destroyed --------------------------------------------------------------
@pytest.mark.parametrize(
    ("out", "force", "fragment"),
    [
        (".", True, "holds an input of this run"),
        ("labs.csv", True, "is a file, not a run folder"),
        ("labs.csv", False, "is a file, not a run folder"),
        ("pipelines", True, "holds an input of this run"),
        ("notes", True, "is not a previous run folder (no manifest.json)"),
        ("notes", False, "already exists"),
    ],
)
def test_force_never_replaces_inputs(tmp_path: Path, out: str, force: bool, fragment: str) -> None:
    folder = tmp_path / "study"
    (folder / "notes").mkdir(parents=True)
    (folder / "notes" / "readme.txt").write_text("mine", encoding="utf-8")
    config = Study().write(folder)
    before = tree_hashes(folder)
    args = ["run", str(config.name), "--out", out, "-q"] + (["--force"] if force else [])
    code, output = invoke(args, folder)
    assert code == 2, output
    assert fragment in output
    check_one_line(output)
    assert tree_hashes(folder) == before
    assert not list(folder.glob(".*partial*")) and not list(folder.glob("*.failed"))


def test_force_replaces_a_previous_run_folder(tmp_path: Path) -> None:
    folder = tmp_path / "study"
    config = Study().write(folder)
    assert invoke(["run", str(config), "--out", "out", "-q"], folder)[0] == 0
    before = tree_hashes(folder)
    code, output = invoke(["run", str(config), "--out", "out", "-q", "--force"], folder)
    assert code == 0, output
    assert {k: v for k, v in tree_hashes(folder).items() if not k.startswith("out/")} == {
        k: v for k, v in before.items() if not k.startswith("out/")
    }
    assert not (folder / ".out.lock").exists()


def _dead_pid() -> int:
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    return proc.pid


def test_a_locked_target_is_refused_and_a_dead_lock_taken_over(tmp_path: Path) -> None:
    folder = tmp_path / "study"
    config = Study().write(folder)
    lock = folder / ".out.lock"
    lock.write_text(f"{os.getppid()}\n", encoding="utf-8")  # a live process owns it
    code, output = invoke(["run", str(config), "--out", "out", "-q"], folder)
    assert code == 2 and "being written by another run" in output, output
    check_one_line(output)
    assert not (folder / "out").exists()
    lock.write_text(f"{_dead_pid()}\n", encoding="utf-8")
    code, output = invoke(["run", str(config), "--out", "out", "-q"], folder)
    assert code == 0, output
    assert not lock.exists()


def test_stale_partial_folders_of_dead_runs_are_removed_and_logged(tmp_path: Path) -> None:
    folder = tmp_path / "study"
    config = Study().write(folder)
    stale = folder / f".out.partial-{_dead_pid()}"
    stale.mkdir()
    (stale / "manifest.json").write_text("{}", encoding="utf-8")
    code, output = invoke(["run", str(config), "--out", "out", "-q"], folder)
    assert code == 0, output
    assert not stale.exists()
    assert "removed the unfinished folder" in (folder / "out" / "run.log").read_text()


_SLOW_RUN = textwrap.dedent(
    """
    import sys, time
    from kidneycohort.pipeline import load_config, run_pipeline
    from kidneycohort.pipeline.sources import read_sources

    def slow(config):
        tables = read_sources(config)
        print("reading", flush=True)
        time.sleep(30)
        return tables

    run_pipeline(load_config(sys.argv[1]), out_dir=sys.argv[2], reader=slow)
    """
)


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGKILL])
def test_killed_runs_leave_no_manifest_and_are_cleaned_up(tmp_path: Path, sig: int) -> None:
    folder = tmp_path / "study"
    config = Study().write(folder)
    proc = subprocess.Popen(
        [sys.executable, "-c", _SLOW_RUN, str(config), str(folder / "out")],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    assert proc.stdout is not None
    assert proc.stdout.readline().strip() == "reading"
    proc.send_signal(sig)
    _, stderr = proc.communicate(timeout=30)
    assert not list(folder.rglob("manifest.json"))
    if sig == signal.SIGTERM:  # handled like SIGINT: the failed folder keeps the log
        assert not list(folder.glob(".out.partial-*"))
        assert (folder / "out.failed" / "run.log").is_file()
        assert "KeyboardInterrupt" in stderr
    code, output = invoke(["run", str(config), "--out", "out", "-q"], folder)
    assert code == 0, output
    assert not list(folder.glob(".out.partial-*")) and not (folder / ".out.lock").exists()


@pytest.mark.parametrize("style", ["python", "polars"])
def test_a_full_disk_leaves_nothing_half_written(tmp_path: Path, monkeypatch, style) -> None:
    import errno

    from kidneycohort.run_folder import _writer

    folder = tmp_path / "study"
    config = Study().write(folder)
    before = tree_hashes(folder)

    def full(*args, **kwargs):
        if style == "polars":  # how polars and pyarrow report it: no errno attribute
            raise OSError("No space left on device (os error 28)")
        raise OSError(errno.ENOSPC, "No space left on device", str(folder / "x"))

    monkeypatch.setattr(_writer, "markdown_table", full)
    monkeypatch.setattr(pl.DataFrame, "write_csv", full)
    code, output = invoke(["run", str(config), "--out", "out", "-q"], folder)
    assert code == 2, output
    assert "no space left" in output
    check_one_line(output)
    assert tree_hashes(folder) == before
    assert sorted(p.name for p in folder.iterdir()) == sorted(
        ["labs.csv", "patients.csv", "pipelines", "study.yaml"]
    )


# ---- spreadsheet formula injection -----------------------------------------------------------
FORMULAS = ['=HYPERLINK("http://x")', "+1+cmd|' /C calc'!A0", "-2+3", "@SUM(A1)"]


def test_formula_leading_ids_are_text_in_rejected_rows(tmp_path: Path) -> None:
    labs = LABS
    rows = "".join('"' + f.replace('"', '""') + '",2020-03-01,CREAT,1.0,mg/dL\n' for f in FORMULAS)
    folder = tmp_path / "study"
    config = Study(files={"labs.csv": labs + rows}).write(folder)
    code, output = invoke(["run", str(config), "--out", "out", "-q"], folder)
    assert code == 0, output
    text = (folder / "out" / "rejected_rows.csv").read_text(encoding="utf-8")
    for formula in FORMULAS:
        assert "'" + formula.split('"')[0] in text
    for line in text.splitlines()[1:]:
        assert not line.startswith(("=", "+", "-", "@", '"=', '"+', '"-', '"@')), line


def test_workbook_and_csv_write_text_cells_as_text(tmp_path: Path) -> None:
    import zipfile

    from kidneycohort.run_folder import write_table, write_workbook

    table = pl.DataFrame(
        {"group": [*FORMULAS, "-3.2", "A"], "estimate": [-3.2, 1.0, 2.0, 3.0, -3.2, 4.0]}
    )
    write_table(tmp_path, "tables/slope_table", table)
    write_workbook(tmp_path, {"tables/slope_table": table})
    with zipfile.ZipFile(tmp_path / "tables" / "tables.xlsx") as book:
        sheets = [n for n in book.namelist() if n.startswith("xl/worksheets/sheet")]
        xml = "".join(book.read(n).decode() for n in sheets)
    assert "<f>" not in xml  # no formula cell
    csv = pl.read_csv(tmp_path / "tables" / "slope_table.csv", infer_schema=False)
    assert csv["group"].to_list() == [*("'" + f for f in FORMULAS), "-3.2", "A"]
    assert csv["estimate"][0] == "-3.2"  # numbers stay numbers


# ---- the corpus: one bad input per row -------------------------------------------------------
def _bomb() -> str:
    levels = ["&a0 [x, x, x, x, x, x, x, x, x]"]
    levels += [f"&a{i} [" + ", ".join([f"*a{i - 1}"] * 9) + "]" for i in range(1, 9)]
    return "[" + ", ".join(levels) + "]"


@dataclass
class Case:
    """One bad input: the study, the command, the exit code and a message fragment."""

    id: str
    study: Study
    fragment: str
    code: int = 2
    command: str = "run"
    args: tuple[str, ...] = ()
    lines: int = 1  # validate reports every problem, one line each


COMPARE = "[harmonize, egfr, slope_model]"
GROUPED = DATA.replace("RFSTDTC: index_date}", "RFSTDTC: index_date, ARM: group}")
NO_UNITS = LABS.replace("mg/dL", "")


def _validate(fragment: str, lines: int = 1, **study: str) -> Case:
    return Case(fragment, Study(**study), fragment, command="validate", lines=lines)


CASES = [
    _validate("labs.csv: no data rows (a header only)", files={"labs.csv": LABS.split("\n")[0]}),
    Case(
        "run: a header-only labs file",
        Study(files={"labs.csv": LABS.split("\n")[0] + "\n"}),
        "labs: no data rows (a header only); nothing to analyse",
    ),
    _validate(
        "labs: all 4 rows read were rejected (top reasons: unknown_unit 4)",
        files={"labs.csv": LABS.replace("mg/dL", "mg/g")},
    ),
    Case(
        "run: all rows rejected",
        Study(files={"labs.csv": LABS.replace("mg/dL", "mg/g")}),
        "labs: all 4 rows read were rejected (top reasons: unknown_unit 4)",
    ),
    _validate(
        "labs: all 4 rows read were rejected (top reasons: unparseable_date 4)",
        data=DATA.replace("path: labs.csv,", "path: labs.csv, date_format: '%d/%m/%Y',"),
    ),
    _validate(
        "labs: all 4 rows read were rejected (top reasons: after_data_cut 4)",
        study="{name: corpus, recipe: clean, data_cut: 2010-01-01}",
    ),
    _validate(
        "data.labs.defaults.unit: 'mg/g' is not a unit of creatinine",
        lines=2,  # and: all rows rejected
        files={"labs.csv": NO_UNITS},
        data=DATA.replace("path: labs.csv,", "path: labs.csv, defaults: {unit: mg/g},"),
    ),
    _validate(
        "column map names 'SUBJD', not in the file (did you mean 'SUBJID'?); the file's "
        "columns: SUBJID, LBDTC",
        data=DATA.replace("{SUBJID: patient_id, LBDTC", "{SUBJD: patient_id, LBDTC"),
    ),
    _validate(
        "study.group_column: only 1 group (A) in 'group', but slope_model compare two",
        steps=COMPARE,
        data=GROUPED,
        files={"patients.csv": PATIENTS.replace(",B\n", ",A\n")},
    ),
    _validate(
        "study.reference_group: 'C' is not a group of 'group' (groups: A, B)",
        steps=COMPARE,
        data=GROUPED,
        study="{name: corpus, recipe: clean, reference_group: C}",
    ),
    _validate(
        "study.group_column: 1 patients have no 'group' value",
        steps=COMPARE,
        data=GROUPED,
        files={
            "patients.csv": PATIENTS + "S3,F,1950-01-01,2020-01-01,\nS4,F,1950-01-01,2020-01-01,B\n"
        },
    ),
    _validate(
        "study.group_column: group 'B' has no usable patient",
        lines=2,  # and: only one group left
        steps=COMPARE,
        data=GROUPED,
        files={"patients.csv": PATIENTS.replace("1955-03-02", "1800-03-02")},
    ),
    Case(
        "yaml alias bomb",
        Study(study="{name: corpus, recipe: clean, description: " + _bomb() + "}"),
        "aliases expand to more than",
        command="validate",
    ),
    Case(
        "duplicated yaml key",
        Study(study="{name: corpus, recipe: clean, data_cut: 2021-01-01, data_cut: 2022-01-01}"),
        "key 'data_cut' appears twice",
        command="validate",
    ),
    Case(
        "duplicated yaml section",
        Study(extra="study: {name: again, recipe: clean}\n"),
        "key 'study' appears twice",
    ),
    Case(
        "impossible data cut",
        Study(study="{name: corpus, recipe: clean, data_cut: 2025-02-30}"),
        "'2025-02-30' is not a date in the calendar",
    ),
    Case("empty labs file", Study(files={"labs.csv": ""}), "labs.csv: the file is empty"),
    Case(
        "empty patients file",
        Study(files={"patients.csv": ""}),
        "patients.csv: the file is empty",
        command="validate",
    ),
    Case(
        "encoding changes after the first MiB",
        Study(
            files={
                "labs.csv": (LABS + "S1,2020-04-01,CREAT,1.0,mg/dL\n" * 40_000).encode()
                + "S1,2020-05-01,CRÉAT,1.0,mg/dL\n".encode("latin-1")
            }
        ),
        "not readable as UTF-8 at line 40006",
    ),
    Case(
        "unknown encoding name",
        Study(data=DATA.replace("path: labs.csv,", "path: labs.csv, encoding: klingon,")),
        "unknown encoding 'klingon'",
    ),
    Case(
        "unbalanced quote",
        Study(files={"labs.csv": LABS + 'S1,"2020-04-01,CREAT,1.0,mg/dL\n'}),
        'line 6: a quote (") opens a field that is never closed',
    ),
    Case(
        "ragged row, too many fields",
        Study(files={"labs.csv": LABS + "S1,2020-04-01,CREAT,1.0,mg/dL,extra\n"}),
        "labs.csv: line 6 has 6 fields where the header has 5",
    ),
    Case(
        "ragged row, too few fields",
        Study(files={"labs.csv": LABS + "S1,2020-04-01\n"}),
        "labs.csv: line 6 has 2 fields where the header has 5",
        command="validate",
    ),
    Case(
        "two source columns mapped to one name",
        Study(data=DATA.replace("LBORRES: value", "LBORRES: unit")),
        "source columns 'LBORRES' and 'LBORRESU' both map to 'unit'",
    ),
    Case(
        "a mapped column collides with a file column",
        Study(files={"patients.csv": PATIENTS.replace("ARM", "sex")}),
        "columns 'SEX' and 'sex' would both be 'sex'",
    ),
    Case(
        "duplicated CSV header",
        Study(files={"labs.csv": LABS.replace("LBORRESU", "LBORRES")}),
        "column 'LBORRES' appears twice in the header",
    ),
    Case(
        "wrong delimiter",
        Study(files={"labs.csv": LABS.replace(",", ";")}),
        "set delimiter: ';'",
        command="validate",
    ),
    Case(
        "unknown figure format",
        Study(steps="[harmonize, figures]", extra="figures: {formats: [bmp]}\n"),
        "figures.formats",
    ),
    Case(
        "output under a file",
        Study(),
        "cannot write the run folder",
        args=("--out", "labs.csv/run"),
    ),
    Case(
        "seed above 2^64",
        Study(study="{name: corpus, recipe: clean, seed: 18446744073709551617}"),
        "study.seed:",
    ),
]


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_bad_input(tmp_path: Path, case: Case) -> None:
    folder = tmp_path / "study"
    config = case.study.write(folder)
    before = tree_hashes(folder)
    args = [case.command, config.name, *case.args]
    if case.command == "run" and "--out" not in case.args:
        args += ["--out", "out"]
    started = time.perf_counter()
    code, output = invoke(args, folder)
    assert time.perf_counter() - started < 10
    assert code == case.code, output
    assert case.fragment in output, output
    assert "Traceback" not in output and "internal error" not in output, output
    assert len([line for line in output.splitlines() if "error" in line.lower()]) == case.lines
    assert len([line for line in output.splitlines() if line.startswith("error")]) == case.lines
    after = tree_hashes(folder)
    assert {name: after.get(name) for name in before} == before  # inputs unchanged
    assert all(name.startswith("out.failed/") for name in set(after) - set(before))
    assert not list(folder.glob(".*partial*")) and not list(folder.glob(".*lock"))


# ---- wrong values accepted -------------------------------------------------------------------
@pytest.mark.parametrize(
    ("decimal_comma", "expected"),
    [
        (None, {"1,500": 1500.0, "0,9": 0.9, "12,000.5": 12000.5, "1.500": 1.5}),
        (True, {"1,500": 1.5, "0,9": 0.9, "1.500": 1.5}),
        (False, {"1,500": 1500.0, "12,000.5": 12000.5, "1.500": 1.5}),
    ],
)
def test_a_comma_and_three_digits_is_a_thousands_separator(decimal_comma, expected) -> None:
    """Common practice (no single source): '1,500' mg/g is 1500 unless the source says
    its decimal mark is a comma; each such reading is counted as an assumption."""
    from kidneycohort.harmonize import harmonize_tables

    texts = ["1,500", "0,9", "12,000.5", "1.500"]
    labs = pl.DataFrame(
        {
            "patient_id": ["a"] * 4,
            "sample_date": [f"2020-01-0{i}" for i in range(1, 5)],
            "analyte": ["uacr"] * 4,
            "value": texts,
            "unit": ["mg/g"] * 4,
        }
    )
    out = harmonize_tables(labs, pl.DataFrame({"patient_id": ["a"]}), decimal_comma=decimal_comma)
    got = dict(zip([texts[r - 1] for r in out.labs["source_row"]], out.labs["value"], strict=True))
    assert got == expected
    thousands = out.assumptions.filter(pl.col("assumption").str.contains("thousands"))
    assert thousands["rows"].sum() == (0 if decimal_comma else 2)


def test_impossible_dates_ages_and_body_size_are_not_analysed() -> None:
    """Common practice (no single source): no sample after today or before 1900, no age
    over 110 or below 0; an implausible height or weight is set missing, patient kept."""
    from kidneycohort.harmonize import harmonize_tables

    labs = pl.DataFrame(
        {
            "patient_id": ["a", "a", "a", "b", "c", "f"],
            "sample_date": [
                "2020-01-01",
                "2999-01-01",
                "9999-12-31",
                "2020-01-01",
                "2020-01-01",
                "2020-01-01",
            ],
            "analyte": ["creatinine"] * 6,
            "value": ["1.0"] * 6,
            "unit": ["mg/dL"] * 6,
        }
    )
    patients = pl.DataFrame(
        {
            "patient_id": ["a", "b", "c", "d", "f"],
            "birth_date": ["1960-01-01", "1800-01-01", "1950-01-01", None, "1905-01-01"],
            "index_date": ["2020-01-01", "2020-01-01", "2020-01-01", "2020-01-01", "2010-01-01"],
            "age_at_index": [60.0, None, 130.0, 111.0, None],
            "weight_kg": [700.0, 80.0, 70.0, 60.0, 60.0],
            "height_cm": [170.0, 170.0, 170.0, 170.0, 30.0],
        }
    )
    out = harmonize_tables(labs, patients)
    reasons = dict(
        zip(
            zip(out.rejected["table"], out.rejected["source_row"], strict=True),
            out.rejected["reason"],
            strict=True,
        )
    )
    assert reasons[("labs", 2)] == reasons[("labs", 3)] == "implausible_date"
    assert reasons[("labs", 6)] == "implausible_age"  # 115 years old at the sample
    assert reasons[("patients", 2)] == "implausible_date"  # born 1800
    assert reasons[("patients", 3)] == reasons[("patients", 4)] == "implausible_age"
    kept = out.patients.filter(pl.col("patient_id").is_in(["a", "f"]))
    assert kept["weight_kg"].to_list() == [None, 60.0]
    assert kept["height_cm"].to_list() == [170.0, None]
    notes = set(out.assumptions["assumption"])
    assert {
        "weight_kg outside 1-350 kg, set missing",
        "height_cm outside 40-250 cm, set missing",
    } <= notes


def test_two_lab_files_with_one_stem_are_told_apart(tmp_path: Path) -> None:
    import json

    folder = tmp_path / "study"
    files = {
        "site_a/labs.csv": LABS,
        "site_b/labs.csv": LABS.splitlines()[0] + "\nS1,2021-01-01,CREAT,x,mg/dL\n",
    }
    (folder / "site_a").mkdir(parents=True)
    (folder / "site_b").mkdir()
    data = DATA.replace(
        f"  labs: {{path: labs.csv, columns: {LAB_COLUMNS}}}\n",
        f"  labs:\n    - {{path: site_a/labs.csv, columns: {LAB_COLUMNS}}}\n"
        f"    - {{path: site_b/labs.csv, columns: {LAB_COLUMNS}}}\n",
    )
    config = Study(files=files, data=data).write(folder)
    code, output = invoke(["run", str(config), "--out", "out", "-q"], folder)
    assert code == 0, output
    manifest = json.loads((folder / "out" / "manifest.json").read_text())
    rows = {r["path"]: r["rows"] for r in manifest["inputs"] if r["table"] == "labs"}
    assert rows == {"site_a/labs.csv": 4, "site_b/labs.csv": 1}
    rejected = pl.read_csv(folder / "out" / "rejected_rows.csv", infer_schema=False)
    assert rejected.filter(pl.col("table") == "labs")["source"].to_list() == ["site_b/labs"]


def test_a_patient_without_an_index_date_gets_no_eligible_slope() -> None:
    from kidneycohort.slopes import egfr_slopes

    egfr = pl.DataFrame(
        {
            "patient_id": ["a"] * 3 + ["b"] * 3,
            "equation": ["ckd_epi_2021_cr"] * 6,
            "years_from_index": [0.0, 1.0, 2.0, None, None, None],
            "egfr": [60.0, 58.0, 55.0, 60.0, 50.0, 40.0],
        }
    )
    out = egfr_slopes(egfr).sort("patient_id")
    assert out["eligible"].to_list() == [True, False]
    assert out["ineligible_reason"].to_list() == [None, "no_index_date"]
    assert out["n_values"].to_list() == [3, 0]


@pytest.mark.parametrize(
    ("text", "fragment"),
    [
        (LABS + "S1,2020-04-01\n", "line 6 has 2 fields where the header has 5"),
        (LABS + "S1,2020-04-01,CREAT,1.0,mg/dL,x\n", "line 6 has 6 fields where the header has 5"),
        (LABS.replace("LBORRESU", "LBORRES"), "column 'LBORRES' appears twice in the header"),
    ],
)
def test_the_python_api_refuses_ragged_rows_and_duplicated_headers(
    tmp_path: Path, text: str, fragment: str
) -> None:
    from kidneycohort.errors import InputDataError
    from kidneycohort.io import read_labs

    path = tmp_path / "labs.csv"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(InputDataError, match=re.escape(fragment)):
        read_labs(path, columns={"SUBJID": "patient_id", "LBDTC": "sample_date"}).collect()


def test_an_event_dated_in_the_future_is_rejected() -> None:
    from kidneycohort.harmonize import harmonize_tables

    labs = pl.DataFrame(
        {
            "patient_id": ["a"],
            "sample_date": ["2020-01-01"],
            "analyte": ["creatinine"],
            "value": ["1.0"],
            "unit": ["mg/dL"],
        }
    )
    events = pl.DataFrame(
        {
            "patient_id": ["a", "a"],
            "event_date": ["2021-01-01", "2999-01-01"],
            "event": ["dialysis", "dialysis"],
        }
    )
    out = harmonize_tables(labs, pl.DataFrame({"patient_id": ["a"]}), events)
    assert out.rejected["reason"].to_list() == ["implausible_date"]
    assert out.events.height == 1


def test_two_runs_into_one_folder_at_once_the_second_fails(tmp_path: Path) -> None:
    folder = tmp_path / "study"
    config = Study().write(folder)
    first = subprocess.Popen(
        [sys.executable, "-c", _SLOW_RUN, str(config), str(folder / "out")],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        assert first.stdout is not None and first.stdout.readline().strip() == "reading"
        code, output = invoke(["run", str(config), "--out", "out", "-q"], folder)
        assert code == 2 and f"being written by another run (pid {first.pid}" in output, output
        check_one_line(output)
    finally:
        first.send_signal(signal.SIGTERM)
        first.communicate(timeout=30)
