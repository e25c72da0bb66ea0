"""Synthetic cohort generator: scenario validation, tables, defects, determinism, CLI."""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from click.testing import CliRunner
from polars.testing import assert_frame_equal

from kidneycohort import equations, schemas, units
from kidneycohort.cli import cli
from kidneycohort.errors import ConfigError
from kidneycohort.synthetic import generate_cohort, load_scenario, write_cohort
from tests._fixtures import REPO_ROOT

SCENARIOS = REPO_ROOT / "synthetic"
TRIAL = SCENARIOS / "trial_two_arm.yaml"
DIRTY = SCENARIOS / "trial_two_arm_dirty.yaml"
EHR = SCENARIOS / "ehr_cohort.yaml"


# ---- scenario files -------------------------------------------------------------------


@pytest.mark.parametrize("path", [TRIAL, DIRTY, EHR])
def test_shipped_scenarios_load(path: Path) -> None:
    scenario = load_scenario(path)
    assert scenario.patients >= 2000
    assert path.read_text(encoding="utf-8").startswith("# Scenario:")


def test_dirty_scenario_extends_the_trial() -> None:
    trial, dirty = load_scenario(TRIAL), load_scenario(DIRTY)
    assert dirty.dirty is not None and dirty.dirty.duplicate_export == 40
    assert dirty.trajectory == trial.trajectory
    assert dirty.schedule == trial.schedule
    assert dirty.name != trial.name


@pytest.mark.parametrize(
    ("data", "match"),
    [
        (
            {"trajectory": {"slope_men": -1.0}},
            r"unknown key 'trajectory\.slope_men'.*did you mean 'slope_mean'",
        ),
        ({"patients": "many"}, r"field 'patients'.*got 'many'"),
        ({"pateints": 10}, r"unknown key 'pateints'.*did you mean 'patients'"),
        (
            {"schedule": {"kind": "visits", "visits": [{"name": "b", "day": 0}], "jiter_days": 3}},
            r"unknown key 'schedule\.visits\.jiter_days'.*did you mean 'jitter_days'",
        ),
        (
            {"sites": [{"name": "A", "creatinine_unit": "mg/dx"}]},
            r"field 'sites\.0'.*creatinine_unit",
        ),
        ({"population": {"age": {"mean": 50, "min": 60, "max": 70}}}, r"field 'population\.age'"),
        ({"calendar": {"followup_years": None}}, r"field 'calendar'.*followup_years or end_date"),
    ],
)
def test_bad_scenario_gives_one_line_config_error(data: dict, match: str) -> None:
    with pytest.raises(ConfigError, match=match) as info:
        load_scenario(data)
    assert "\n" not in str(info.value)


def test_bad_scenario_files(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="scenario file not found"):
        load_scenario(tmp_path / "nope.yaml")
    broken = tmp_path / "broken.yaml"
    broken.write_text("patients: [1, 2\n", encoding="utf-8")
    with pytest.raises(ConfigError, match="not valid YAML"):
        load_scenario(broken)
    listed = tmp_path / "list.yaml"
    listed.write_text("- 1\n- 2\n", encoding="utf-8")
    with pytest.raises(ConfigError, match="expected a mapping"):
        load_scenario(listed)
    loop = tmp_path / "loop.yaml"
    loop.write_text("extends: loop.yaml\n", encoding="utf-8")
    with pytest.raises(ConfigError, match="extends itself"):
        load_scenario(loop)
    python_tag = tmp_path / "tag.yaml"
    python_tag.write_text("patients: !!python/object/apply:os.getcwd []\n", encoding="utf-8")
    with pytest.raises(ConfigError, match="not valid YAML"):  # safe_load refuses the tag
        load_scenario(python_tag)


# ---- canonical tables -----------------------------------------------------------------


@pytest.fixture(scope="module")
def trial_small():
    return generate_cohort(TRIAL, patients=300, seed=11)


@pytest.fixture(scope="module")
def ehr_small():
    return generate_cohort(EHR, patients=1500, seed=5)


def _dtypes_match(frame: pl.DataFrame, contract: dict[str, pl.DataType]) -> None:
    assert frame.columns[: len(contract)] == list(contract)
    for column, dtype in contract.items():
        assert frame.schema[column] == dtype, column


def test_tables_follow_the_contracts(trial_small, ehr_small) -> None:
    for cohort in (trial_small, ehr_small):
        _dtypes_match(cohort.patients, schemas.PATIENTS)
        _dtypes_match(cohort.labs, schemas.RAW_LABS)
        _dtypes_match(cohort.events, schemas.EVENTS)
        assert cohort.patients["patient_id"].is_unique().all()
        assert cohort.labs["sample_id"].is_unique().all()
        assert set(cohort.events["event"]) <= set(schemas.CANONICAL_EVENTS)
        assert cohort.labs["analyte"].is_in(list(units.ANALYTES)).all()
        # every reported value parses as a number in a known unit of its analyte
        assert cohort.labs["value"].cast(pl.Float64).is_not_null().all()
        for (analyte, unit), _ in cohort.labs.group_by(["analyte", "unit"]):
            assert units.conversion_factor(analyte, unit) > 0


def test_trial_groups_index_and_visits(trial_small) -> None:
    p = trial_small.patients
    assert p.group_by("group").len().sort("group")["len"].to_list() == [150, 150]  # exact 1:1
    assert (p["end_of_followup"] > p["index_date"]).all()
    samples = trial_small.truth["samples"]
    # screening and randomisation visits are always attended (common practice)
    visit_count = samples.filter(analyte="creatinine").group_by("visit").len()
    counts = dict(zip(visit_count["visit"], visit_count["len"], strict=True))
    assert counts["screening"] == counts["randomisation"] == 300
    day_zero = samples.filter(visit="randomisation").join(
        p.select("patient_id", "index_date"), on="patient_id"
    )
    assert (day_zero["sample_date"].dt.date() == day_zero["index_date"]).all()


def test_labs_stop_at_kidney_failure_or_end_of_followup(trial_small, ehr_small) -> None:
    for cohort in (trial_small, ehr_small):
        joined = cohort.labs.join(cohort.patients, on="patient_id")
        last = pl.min_horizontal(
            pl.col("end_of_followup"), pl.col("kfrt_date").fill_null(pl.date(2999, 1, 1))
        )
        assert joined.filter(pl.col("sample_date").dt.date() > last).height == 0
        # at most one result per patient, analyte and day in a clean cohort
        per_day = cohort.labs.with_columns(day=pl.col("sample_date").dt.date())
        assert not per_day.select(["patient_id", "analyte", "day"]).is_duplicated().any()


def test_events_agree_with_patients_and_truth(ehr_small) -> None:
    p, ev, truth = ehr_small.patients, ehr_small.events, ehr_small.truth["events"]
    deaths = ev.filter(event="death").select("patient_id", death="event_date")
    expected = p.filter(pl.col("death_date").is_not_null()).select("patient_id", death="death_date")
    assert_frame_equal(deaths, expected)
    kfrt = ev.filter(pl.col("event").is_in(["dialysis", "transplant"]))
    assert kfrt.height == p["kfrt_date"].is_not_null().sum()
    assert (truth["end_reason"] == "death").sum() == deaths.height
    t = truth.filter(pl.col("kfrt_date").is_not_null())
    assert (t["kfrt_date"] >= t["threshold_reached_date"]).all()


def test_ehr_sites_report_their_units(ehr_small) -> None:
    units_by_site = (
        ehr_small.labs.join(ehr_small.patients.select("patient_id", "site"), on="patient_id")
        .filter(analyte="creatinine")
        .group_by("site")
        .agg(pl.col("unit").unique())
    )
    found = {
        row: sorted(u) for row, u in zip(units_by_site["site"], units_by_site["unit"], strict=True)
    }
    assert found == {
        "Lakeshore Health Partners": ["mg/dL"],
        "Granite Valley Health Network": ["umol/L"],
    }
    # umol/L results are printed as integers, mg/dL with two decimals (common practice)
    umol = ehr_small.labs.filter(unit="umol/L")["value"]
    assert umol.str.contains(r"^\d+$").all()
    assert ehr_small.labs.filter(unit="mg/dL")["value"].str.contains(r"^\d+\.\d{1,2}$").all()
    assert {"outpatient", "inpatient", "emergency"} <= set(ehr_small.labs["setting"])


# ---- defects --------------------------------------------------------------------------


@pytest.fixture(scope="module")
def dirty_small():
    return generate_cohort(DIRTY, patients=400, seed=3)


def test_injected_defect_counts_are_exact(dirty_small) -> None:
    want = load_scenario(DIRTY).dirty
    assert want is not None
    assert dirty_small.defect_counts == want.model_dump()
    labs, patients = dirty_small.labs, dirty_small.patients
    clean_rows = dirty_small.truth["samples"].height
    assert labs.height == clean_rows + want.duplicate_export
    # each defect found again in the written tables, independently of the defect list
    assert (labs["unit"] == "U/L").sum() == want.unknown_unit
    numbers = labs["value"].cast(pl.Float64, strict=False)
    assert (numbers < 0).sum() == want.implausible_value
    assert numbers.is_null().sum() == want.text_result
    assert (
        ~labs["patient_id"].is_in(patients["patient_id"].implode())
    ).sum() == want.orphan_patient
    births = labs.join(patients.select("patient_id", "birth_date"), on="patient_id")
    assert (births["sample_date"].dt.date() < births["birth_date"]).sum() == want.date_before_birth
    assert labs.is_duplicated().sum() == 2 * want.duplicate_export
    assert patients["sex"].is_null().sum() == want.missing_sex
    defects = dirty_small.truth["defects"]
    assert defects.group_by("defect").len().height == 7
    assert defects.filter(table="labs")["sample_id"].is_unique().all()  # one defect per row


def test_defects_need_a_big_enough_cohort() -> None:
    with pytest.raises(ConfigError, match=r"dirty: asked for 140 defective lab rows"):
        generate_cohort(DIRTY, patients=13)
    with pytest.raises(ConfigError, match=r"dirty\.missing_sex"):
        generate_cohort(DIRTY, patients=5)


# ---- noise off: equation round trip ---------------------------------------------------


def _reestimate(cohort, analyte: str, equation_id: str) -> tuple[np.ndarray, np.ndarray]:
    rows = (
        cohort.labs.filter(analyte=analyte)
        .join(
            cohort.truth["samples"].select("sample_id", "true_gfr", "age_at_sample"), on="sample_id"
        )
        .join(cohort.patients.select("patient_id", "sex"), on="patient_id")
    )
    factor = rows["unit"].replace_strict(
        {u: units.conversion_factor(analyte, u) for u in rows["unit"].unique()},
        return_dtype=pl.Float64,
    )
    value = rows["value"].cast(pl.Float64) * factor
    keyword = "creatinine_mg_dl" if analyte == "creatinine" else "cystatin_c_mg_l"
    estimate = equations.evaluate(
        equation_id,
        **{keyword: value.to_numpy()},
        age=rows["age_at_sample"].to_numpy(),
        sex=rows["sex"].to_numpy(),
        allow_outside_age=True,
    )
    return np.asarray(estimate), rows["true_gfr"].to_numpy()


@pytest.mark.parametrize("path", [TRIAL, EHR])
def test_without_noise_the_equation_returns_the_true_gfr(path: Path) -> None:
    # The published equations (CKD-EPI 2021 creatinine, Inker 2021 NEJM; CKD-EPI 2012
    # cystatin C, Inker 2012 NEJM) evaluated on the exported text must give back the
    # true GFR the generator started from: the inverse, the unit conversion
    # (88.4 umol/L per mg/dL) and the full-precision text all round-trip.
    cohort = generate_cohort({**_raw(path), "noise_off": True, "patients": 250, "seed": 2})
    assert (cohort.truth["samples"]["aki_creatinine_multiplier"] == 1.0).all()
    for analyte, equation_id in (
        ("creatinine", "ckd_epi_2021_cr"),
        ("cystatin_c", "ckd_epi_2012_cys"),
    ):
        estimate, truth = _reestimate(cohort, analyte, equation_id)
        assert truth.size > 20
        np.testing.assert_allclose(estimate, truth, rtol=1e-9)


def test_with_noise_creatinine_varies_by_the_stated_cv(trial_small) -> None:
    s = trial_small.truth["samples"].filter(analyte="creatinine")
    ratio = (s["measured_value"] / s["noise_free_value"]).to_numpy()
    # mean-one log-normal with CV = sqrt(0.05^2 + 0.03^2) = 0.0583 (variances add)
    assert abs(ratio.mean() - 1.0) < 0.004
    assert abs(ratio.std() - np.hypot(0.05, 0.03)) < 0.004


def _raw(path: Path) -> dict:
    import yaml

    return yaml.safe_load(path.read_text(encoding="utf-8"))


# ---- determinism, writer and command line ---------------------------------------------


def _digests(folder: Path) -> dict[str, str]:
    return {
        str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(folder.rglob("*"))
        if p.is_file()
    }


@pytest.mark.parametrize("fmt", ["parquet", "csv"])
def test_same_seed_gives_byte_identical_files(tmp_path: Path, fmt: str) -> None:
    a = write_cohort(DIRTY, tmp_path / "a", patients=120, seed=9, fmt=fmt)
    b = write_cohort(DIRTY, tmp_path / "b", patients=120, seed=9, fmt=fmt)
    assert a["files"] == b["files"] == 9
    first, second = _digests(tmp_path / "a"), _digests(tmp_path / "b")
    assert len(first) == 9
    assert first == second
    write_cohort(DIRTY, tmp_path / "c", patients=120, seed=10, fmt=fmt)
    other = _digests(tmp_path / "c")
    assert other[f"labs.{fmt}"] != first[f"labs.{fmt}"]


def test_different_seed_gives_a_different_cohort() -> None:
    a = generate_cohort(EHR, patients=200, seed=1)
    b = generate_cohort(EHR, patients=200, seed=1)
    c = generate_cohort(EHR, patients=200, seed=2)
    assert_frame_equal(a.labs, b.labs)
    assert_frame_equal(a.truth["events"], b.truth["events"])
    assert not a.truth["patients"]["true_intercept"].equals(c.truth["patients"]["true_intercept"])


def test_written_folder_reads_back(tmp_path: Path) -> None:
    summary = write_cohort(TRIAL, tmp_path, patients=60, seed=4)
    labs = pl.read_parquet(tmp_path / "labs.parquet")
    assert summary["labs"] == labs.height
    truth = pl.read_parquet(tmp_path / "truth" / "samples.parquet")
    assert labs.join(truth, on="sample_id").height == labs.height
    resolved = load_scenario(tmp_path / "truth" / "scenario.yaml")
    assert resolved.patients == 60 and resolved.seed == 4
    assert (tmp_path / "truth" / "defect_counts.json").read_text().count(": 0") == 7


def test_cli_synth_writes_duckdb(tmp_path: Path) -> None:
    import duckdb

    result = CliRunner().invoke(
        cli, ["synth", str(EHR), "--out", str(tmp_path), "--patients", "40", "--format", "duckdb"]
    )
    assert result.exit_code == 0, result.output
    assert "patients: 40" in result.output
    with duckdb.connect(str(tmp_path / "cohort.duckdb"), read_only=True) as con:
        got = con.execute("SELECT count(*) FROM patients").fetchone()
    assert got == (40,)
    assert (tmp_path / "truth" / "samples.parquet").is_file()


def test_cli_bad_scenario_is_one_line_exit_2(tmp_path: Path) -> None:
    bad = tmp_path / "bad.yaml"
    bad.write_text("patients: 10\ntrajectory:\n  slope_meen: -2\n", encoding="utf-8")
    result = CliRunner().invoke(cli, ["synth", str(bad), "--out", str(tmp_path / "o")])
    assert result.exit_code == 2
    lines = result.output.strip().splitlines()
    assert len(lines) == 1
    assert "trajectory.slope_meen" in lines[0] and "did you mean 'slope_mean'" in lines[0]
    result = CliRunner().invoke(
        cli, ["synth", str(TRIAL), "--out", str(tmp_path), "--patients", "0"]
    )
    assert result.exit_code == 2 and "--patients" in result.output
