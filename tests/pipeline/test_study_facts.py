"""Study-wide facts (data cut, group column, reference group, primary equation) are said
once under ``study``; every step reads them from there, and a section repeating one is an
error."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import polars as pl
import pytest

from kidneycohort.errors import ConfigError
from kidneycohort.pipeline import load_config
from kidneycohort.pipeline.demo import run_demo
from tests._fixtures import REPO_ROOT

CONFIG = REPO_ROOT / "configs" / "demo_trial.yaml"


@pytest.mark.parametrize(
    ("override", "study_key"),
    [
        ("survival.group_column=arm", "study.group_column"),
        ("slope_model.reference_group=active", "study.reference_group"),
        ("harmonize.data_cut_date=2024-01-01", "study.data_cut"),
        ("slope_model.equation=ekfc_cr", "study.primary_equation"),
    ],
)
def test_a_section_repeating_a_study_fact_is_an_error(override: str, study_key: str) -> None:
    section, key = override.split("=")[0].split(".")
    with pytest.raises(ConfigError, match=rf"^{section}\.{key}: .*study-wide fact.*{study_key}"):
        load_config(CONFIG, [override])


def test_every_stage_rule_gets_the_study_facts() -> None:
    config = load_config(CONFIG, ["study.reference_group=active"])
    s = config.sections
    assert s["harmonize"].data_cut_date == dt.date(2025, 9, 1)
    assert (s["slope_model"].reference_group, s["survival"].reference_group) == ("active",) * 2
    assert s["slope_model"].group_column == s["survival"].group_column == "group"
    assert s["slope_model"].equation == "ckd_epi_2021_cr"


def test_a_reference_group_needs_a_group_column() -> None:
    with pytest.raises(ConfigError, match=r"^study: a reference group needs a group column"):
        load_config(CONFIG, ["study.group_column=null"])


def test_the_endpoint_steps_need_a_data_cut() -> None:
    with pytest.raises(ConfigError, match=r"^study\.data_cut: required by the endpoint steps"):
        load_config(CONFIG, ["study.data_cut=null"])


@pytest.fixture(scope="module")
def whole_cohort(tmp_path_factory: pytest.TempPathFactory) -> Path:
    # no group column: every table, model and figure analyses the whole cohort
    base = tmp_path_factory.mktemp("whole")
    result, _ = run_demo(
        base / "run",
        patients=120,
        overrides=[
            "study.group_column=null",
            "study.reference_group=null",
            "figures.formats=[png]",
            "figures.dpi=50",
        ],
    )
    return result.run_dir


def test_no_group_column_analyses_the_whole_cohort(whole_cohort: Path) -> None:
    curves = pl.read_parquet(whole_cohort / "models/survival_curves.parquet")
    assert set(curves["group"]) == {"all"}
    summary = pl.read_parquet(whole_cohort / "models/slope_summary.parquet")
    assert set(summary["contrast"]) == {"all"}  # no between-group difference to report
    table = pl.read_csv(whole_cohort / "tables/endpoint_table.csv")
    assert table.height > 0


def test_labs_after_the_data_cut_are_not_used(whole_cohort: Path) -> None:
    labs = pl.read_parquet(whole_cohort / "labs.parquet")
    assert labs["sample_date"].max() <= dt.date(2025, 9, 1)
