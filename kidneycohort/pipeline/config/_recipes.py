"""Finding and reading recipes; the whole-chain check of a recipe's steps; source paths."""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from importlib import resources
from pathlib import Path
from typing import Any

from kidneycohort.errors import ConfigError, did_you_mean
from kidneycohort.io.maps import FileSource
from kidneycohort.pipeline.config._keys import absolute, validate_section
from kidneycohort.pipeline.config._sections import DataSection, Recipe
from kidneycohort.pipeline.config._yaml import read_yaml
from kidneycohort.pipeline.registry import Step
from kidneycohort.pipeline.standard_sources import anchor as anchor_source

__all__ = [
    "_anchor_paths",
    "builtin_config_dir",
    "builtin_recipe_dir",
    "check_chain",
    "find_recipe",
    "load_recipe",
    "source_tables",
]


# ---- recipes ----------------------------------------------------------------------------
def builtin_recipe_dir() -> Path:
    """The recipes shipped inside the package (copies of the repository's ``pipelines/``)."""
    return Path(str(resources.files("kidneycohort.pipeline") / "recipes"))


def builtin_config_dir() -> Path:
    """The study configs shipped inside the package (copies of ``configs/``)."""
    return Path(str(resources.files("kidneycohort.pipeline") / "configs"))


def find_recipe(recipe: str, config_dir: Path) -> Path:
    """Locate a recipe by path or name.

    A value ending in ``.yaml``/``.yml`` is a path relative to the config folder. A bare
    name is looked for in ``pipelines/`` beside or above the config folder (the
    repository layout), then among the recipes shipped with the package.
    """
    if recipe.endswith((".yaml", ".yml")):
        path = absolute(config_dir / recipe)
        if not path.is_file():
            raise ConfigError(f"study.recipe: recipe file '{recipe}' not found in {config_dir}")
        return path
    candidates = [config_dir / "pipelines", config_dir.parent / "pipelines", builtin_recipe_dir()]
    known: set[str] = set()
    for folder in candidates:
        path = folder / f"{recipe}.yaml"
        if path.is_file():
            return path.resolve()
        if folder.is_dir():
            known |= {p.stem for p in folder.glob("*.yaml")}
    raise ConfigError(
        f"study.recipe: unknown recipe '{recipe}'{did_you_mean(recipe, known)}; "
        f"known recipes: {', '.join(sorted(known)) or 'none'}"
    )


def load_recipe(path: Path) -> Recipe:
    """Read and validate a recipe file."""
    raw = read_yaml(path, what="recipe")
    return validate_section(Recipe, raw, f"recipe '{path.name}'")  # type: ignore[return-value]


# ---- whole-chain check ------------------------------------------------------------------
def check_chain(steps: Sequence[Step], available: Iterable[str], where: str) -> list[str]:
    """Check that every step's needs are made by an earlier step or a data source.

    Returns the table names available at the end. Raises :class:`ConfigError` naming
    the step, the missing table and which step would make it.
    """
    have = list(available)
    makers: dict[str, str] = {}
    seen: set[str] = set()
    for step in steps:
        if step.name in seen:
            raise ConfigError(f"{where}: step '{step.name}' is listed twice")
        seen.add(step.name)
        for need in step.needs:
            if need not in have:
                hint = did_you_mean(need, have)
                raise ConfigError(
                    f"{where}: step '{step.name}' needs table '{need}' which no earlier "
                    f"step makes{hint}; available then: {', '.join(have) or 'none'}"
                )
        for made in step.makes:
            if made in makers:
                raise ConfigError(
                    f"{where}: table '{made}' is made by both '{makers[made]}' and '{step.name}'"
                )
            makers[made] = step.name
            have.append(made)
    return have


def source_tables(data: DataSection) -> list[str]:
    """Tables available before the first step: one per configured data source."""
    names = ["patients", "raw_labs"]
    if data.source is not None or data.specs("events"):
        names.append("events")
    return names


def _anchor_paths(data: DataSection, config_dir: Path) -> DataSection:
    def anchor(spec: FileSource) -> FileSource:
        path = Path(spec.path)
        if path.is_absolute():
            return spec
        return spec.model_copy(update={"path": str(absolute(config_dir / path))})

    update: dict[str, Any] = {}
    if data.source is not None:
        update["source"] = anchor_source(data.source, config_dir)
    for table in ("patients", "labs", "events"):
        value = getattr(data, table)
        if isinstance(value, list):
            update[table] = _distinct_labels([anchor(s) for s in value], table, config_dir)
        elif value is not None:
            update[table] = anchor(value)
    return data.model_copy(update=update)


def _distinct_labels(specs: list[FileSource], table: str, config_dir: Path) -> list[FileSource]:
    """Files of one table that share a file stem are labelled by their path instead
    (``site_a/labs``), so the manifest and rejected rows tell them apart; the same file
    twice, or one explicit label twice, is an error."""
    paths = [Path(s.path).resolve() for s in specs]
    for i, path in enumerate(paths):
        if path in paths[:i]:
            raise ConfigError(
                f"data.{table}[{i}]: '{specs[i].path}' is the same file as "
                f"data.{table}[{paths.index(path)}]; list it once"
            )
    stems = [s.source_name() for s in specs]
    out = []
    for spec, stem, path in zip(specs, stems, paths, strict=True):
        if spec.name is None and stems.count(stem) > 1:
            try:
                label = path.relative_to(config_dir.resolve()).with_suffix("").as_posix()
            except ValueError:
                label = path.with_suffix("").as_posix()
            spec = spec.model_copy(update={"name": label})
        out.append(spec)
    labels = [s.source_name() for s in out]
    for i, label in enumerate(labels):
        if label in labels[:i]:
            raise ConfigError(
                f"data.{table}[{i}].name: label '{label}' is also the label of "
                f"data.{table}[{labels.index(label)}]; give each file its own name"
            )
    return out
