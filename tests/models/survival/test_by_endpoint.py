"""Subgroup hazard ratios: each level's estimate equals a Cox model fitted on that level."""

from __future__ import annotations

import polars as pl
import pytest

from kidneycohort.errors import ConfigError
from kidneycohort.models.survival import CoxModel
from kidneycohort.pipeline.demo import run_demo

FAST = ["figures.formats=[png]", "figures.dpi=50"]


def test_subgroup_rows_equal_direct_cox_fits(tmp_path) -> None:
    result, _ = run_demo(
        tmp_path / "run", patients=400, overrides=[*FAST, "survival.subgroups=[sex]"]
    )
    hazard = pl.read_parquet(result.run_dir / "models" / "hazard_ratios.parquet")
    assert set(hazard["subgroup"].drop_nulls().unique()) <= {"sex=female", "sex=male"}
    overall = hazard.filter(pl.col("subgroup").is_null())
    assert overall.height >= 1  # the whole-cohort estimate is kept
    endpoints = pl.read_parquet(result.run_dir / "endpoints.parquet").filter(
        pl.col("event").is_not_null()
    )
    cohort = result.tables["cohort"]
    # the reference: lifelines' Cox fitted on the female patients only (via CoxModel)
    women = cohort.filter(pl.col("sex") == "female")
    row = hazard.filter(
        (pl.col("subgroup") == "sex=female") & (pl.col("endpoint") == "egfr_decline_40")
    )
    direct = (
        CoxModel(endpoint="egfr_decline_40", reference_group="placebo")
        .fit(endpoints.join(women.select("patient_id"), on="patient_id", how="semi"), women)
        .summary()
    )
    assert row["hr"].item() == pytest.approx(direct["hr"].item(), rel=1e-9)
    assert row["hr_lower"].item() == pytest.approx(direct["hr_lower"].item(), rel=1e-9)
    # the forest figure was drawn with the subgroup rows
    assert (result.run_dir / "figures" / "forest_hazard_ratios.png").is_file()


def test_unknown_subgroup_column_names_the_field(tmp_path) -> None:
    with pytest.raises(ConfigError, match=r"survival\.subgroups: 'sexx'.*did you mean 'sex'"):
        run_demo(tmp_path / "run", patients=120, overrides=[*FAST, "survival.subgroups=[sexx]"])
