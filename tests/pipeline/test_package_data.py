"""The recipes, demo configs and demo scenarios shipped inside the package are copies
of the repository's own files, so an installed ``kidneycohort demo`` runs the same study."""

from __future__ import annotations

from pathlib import Path

import pytest

from kidneycohort.pipeline import load_config
from kidneycohort.pipeline.config import builtin_config_dir, builtin_recipe_dir
from tests._fixtures import REPO_ROOT

ROOT = REPO_ROOT
SHIPPED = builtin_config_dir().parent

PAIRS = [
    *[(p, SHIPPED / "recipes" / p.name) for p in sorted((ROOT / "pipelines").glob("*.yaml"))],
    *[(p, SHIPPED / "configs" / p.name) for p in sorted((ROOT / "configs").glob("demo_*.yaml"))],
    *[
        (ROOT / "synthetic" / n, SHIPPED / "scenarios" / n)
        for n in ("trial_two_arm.yaml", "trial_two_arm_dirty.yaml", "ehr_cohort.yaml")
    ],
]


@pytest.mark.parametrize(("original", "copy"), PAIRS, ids=[p.name for p, _ in PAIRS])
def test_shipped_copy_is_identical(original: Path, copy: Path) -> None:
    # refresh with: cp pipelines/*.yaml kidneycohort/pipeline/recipes/ (and likewise)
    assert copy.read_bytes() == original.read_bytes()


def test_every_recipe_is_shipped() -> None:
    names = {p.name for p in (ROOT / "pipelines").glob("*.yaml")}
    assert names == {p.name for p in builtin_recipe_dir().glob("*.yaml")}
    assert {"trial_endpoints.yaml", "cohort_progression.yaml"} <= names


@pytest.mark.parametrize("name", ["demo_trial.yaml", "demo_cohort.yaml"])
def test_demo_configs_validate(name: str) -> None:
    # both the repository's config and the shipped copy resolve their recipe
    for folder in (ROOT / "configs", builtin_config_dir()):
        config = load_config(folder / name)
        assert config.study.primary_equation == "ckd_epi_2021_cr"
        assert [s.name for s in config.steps][:2] == ["harmonize", "egfr"]


def test_each_demo_finds_its_config_and_scenario() -> None:
    from kidneycohort.pipeline.demo import DEMOS, demo_config_path, demo_scenario_path

    assert set(DEMOS) == {"trial", "cohort"}
    for study, spec in DEMOS.items():
        assert demo_config_path(study).name == spec.config  # type: ignore[arg-type]
        assert demo_scenario_path(study).name == spec.scenario  # type: ignore[arg-type]
    recipes = {s: load_config(demo_config_path(s)).recipe.name for s in DEMOS}  # type: ignore[arg-type]
    assert recipes == {"trial": "trial_endpoints", "cohort": "cohort_progression"}
