"""The recipes, demo configs and demo scenarios ship inside the package, and the
repository's top-level folders are links to them, so an installed ``kidneycohort demo``
runs the same study from the one copy."""

from __future__ import annotations

import pytest

from kidneycohort.pipeline import load_config
from kidneycohort.pipeline.config import builtin_config_dir, builtin_recipe_dir
from tests._fixtures import REPO_ROOT

ROOT = REPO_ROOT
SHIPPED = builtin_config_dir().parent


@pytest.mark.parametrize(
    ("folder", "shipped"),
    [("pipelines", "recipes"), ("configs", "configs"), ("synthetic", "scenarios")],
)
def test_repository_folders_are_the_shipped_files(folder: str, shipped: str) -> None:
    # one copy of each YAML: the repository's folder is a link to the package data
    link = ROOT / folder
    assert link.is_symlink()
    assert link.resolve() == (SHIPPED / shipped).resolve()


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
