"""Loading a study config: read, override, merge with the recipe, validate, resolve."""

from __future__ import annotations

import copy
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from pydantic import BaseModel

from kidneycohort._rules import short_repr
from kidneycohort.errors import ConfigError, did_you_mean
from kidneycohort.pipeline.config._keys import absolute, validate_section
from kidneycohort.pipeline.config._recipes import (
    _anchor_paths,
    check_chain,
    find_recipe,
    load_recipe,
    source_tables,
)
from kidneycohort.pipeline.config._sections import (
    FIXED_SECTIONS,
    STUDY_FACTS,
    DataSection,
    ExecutionSection,
    OutputSection,
    Recipe,
    StudyConfig,
    StudySection,
)
from kidneycohort.pipeline.config._yaml import apply_overrides, deep_merge, read_yaml
from kidneycohort.pipeline.registry import StepRegistry, default_registry
from kidneycohort.pipeline.spark import partition_plan

__all__ = ["load_config"]


# ---- entry point ------------------------------------------------------------------------
def load_config(
    path: str | Path | None = None,
    overrides: Sequence[str] = (),
    *,
    raw: Mapping[str, Any] | None = None,
    registry: StepRegistry | None = None,
    base_dir: Path | None = None,
) -> StudyConfig:
    """Read, override, merge and validate a study config; no data is read.

    Parameters
    ----------
    path : str or Path, optional
        The YAML config file.
    overrides : sequence of str
        ``key.path=value`` strings (the command line's ``--set``), applied before
        validation and recorded in the manifest.
    raw : mapping, optional
        A config given as a mapping instead of a file (``base_dir`` then anchors
        relative paths; default the working directory).
    registry : StepRegistry, optional
        Steps to resolve recipe names against; default the library's stages.

    Returns
    -------
    StudyConfig

    Raises
    ------
    ConfigError
        Unknown key or step (with a suggestion), wrong type, missing recipe, a step
        needing a table no earlier step makes. Files are checked by
        :func:`kidneycohort.pipeline.check_inputs`.
    """
    registry = registry or default_registry()
    data, config_path, config_dir = _read(path, raw, base_dir)
    data = apply_overrides(data, overrides)
    label = config_path.name if config_path else "config"
    _check_section_names(data, set(FIXED_SECTIONS) | set(registry.sections()), label)
    study: StudySection = validate_section(StudySection, data["study"], "study")  # type: ignore[assignment]
    data_section: DataSection = validate_section(DataSection, data["data"], "data")  # type: ignore[assignment]
    output: OutputSection = validate_section(OutputSection, data.get("output"), "output")  # type: ignore[assignment]
    execution = validate_section(ExecutionSection, data.get("execution"), "execution")
    assert isinstance(execution, ExecutionSection)

    recipe_path = find_recipe(study.recipe, config_dir)
    recipe = load_recipe(recipe_path)
    steps = [registry.get(name, where=f"recipe '{recipe.name}' steps") for name in recipe.steps]
    used: dict[str, type[BaseModel] | None] = {}
    for step in steps:
        used.update(step.section_models())
    _check_used(data, used, recipe, recipe_path, label)
    sections = _stage_sections(data, used, recipe, study)

    # data paths and the output folder are relative to the config file
    data_section = _anchor_paths(data_section, config_dir)
    if output.dir is not None and not output.dir.is_absolute():
        output.dir = absolute(config_dir / output.dir)
    elif output.dir is None:
        stem = config_path.stem if config_path else study.name.replace(" ", "_")
        output.dir = absolute(config_dir / "runs" / stem)

    check_chain(steps, source_tables(data_section), f"recipe '{recipe.name}'")
    if execution.engine == "spark":
        # a step that cannot run on partitions of patients is refused before any data
        partition_plan(steps, source_tables(data_section))
    resolved = StudyConfig(
        study=study,
        data=data_section,
        output=output,
        sections=sections,
        recipe=recipe,
        steps=steps,
        config_path=config_path,
        recipe_path=recipe_path,
        overrides=list(overrides),
        execution=execution,
    )
    for step in steps:
        if step.check is not None:
            step.check(resolved)
    return resolved


def _read(
    path: str | Path | None, raw: Mapping[str, Any] | None, base_dir: Path | None
) -> tuple[dict[str, Any], Path | None, Path]:
    """The config as a mapping, its file and the folder relative paths start from."""
    if raw is not None:
        return copy.deepcopy(dict(raw)), None, absolute(base_dir or Path.cwd())
    if path is None:
        raise ConfigError("no config given: pass a YAML file path")
    config_path = absolute(path)
    return read_yaml(config_path), config_path, config_path.parent


def _check_section_names(data: Mapping[str, Any], allowed: set[str], label: str) -> None:
    for key in data:
        if key not in allowed:
            raise ConfigError(
                f"{label}: unknown section '{key}'{did_you_mean(str(key), allowed)}; "
                f"sections: {', '.join(sorted(allowed))}"
            )
    for key in ("study", "data"):
        if key not in data:
            raise ConfigError(f"{label}: section '{key}' is missing; add it")


def _check_used(
    data: Mapping[str, Any],
    used: Mapping[str, Any],
    recipe: Recipe,
    recipe_path: Path,
    label: str,
) -> None:
    """Every section of the config and of the recipe's defaults is read by a step."""
    for key in data:
        if key not in FIXED_SECTIONS and key not in used:
            raise ConfigError(
                f"{label}: section '{key}' is not used by recipe '{recipe.name}' "
                f"(its sections: {', '.join(sorted(used)) or 'none'}); remove it or change "
                "study.recipe"
            )
    for key in recipe.defaults:
        if key not in used:
            raise ConfigError(
                f"recipe '{recipe_path.name}': defaults for section '{key}' which none of "
                f"its steps uses{did_you_mean(key, used)}"
            )


def _stage_sections(
    data: Mapping[str, Any],
    used: Mapping[str, type[BaseModel] | None],
    recipe: Recipe,
    study: StudySection,
) -> dict[str, BaseModel]:
    """Each stage section: recipe defaults, then the config, validated, study facts filled."""
    sections: dict[str, BaseModel] = {}
    for name, model in used.items():
        given = data.get(name) or {}
        _refuse_study_facts(name, given)
        merged = deep_merge(recipe.defaults.get(name, {}), given)
        if model is None:
            if merged:
                raise ConfigError(f"{name}: this step takes no options, got {short_repr(merged)}")
            continue
        sections[name] = with_study_facts(validate_section(model, merged, name), study)
    return sections


def _refuse_study_facts(name: str, given: Any) -> None:
    if not isinstance(given, Mapping):
        return
    for key in given:
        if key in STUDY_FACTS:
            raise ConfigError(
                f"{name}.{key}: {key.replace('_', ' ')} is a study-wide fact; set it once as "
                f"study.{STUDY_FACTS[key]} (every step reads it from there)"
            )


def with_study_facts(rule: BaseModel, study: StudySection) -> BaseModel:
    """``rule`` with its study-fact fields (data cut, group, reference, equation) taken
    from ``study``, so a stage rule and the study never disagree."""
    update = {
        field: getattr(study, fact)
        for field, fact in STUDY_FACTS.items()
        if field in type(rule).model_fields
    }
    return rule.model_copy(update=update) if update else rule
