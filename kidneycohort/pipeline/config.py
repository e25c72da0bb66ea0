"""Study configs and recipes: safe YAML, ``--set`` overrides, validation before any data.

A study config is a YAML mapping with three fixed sections (``study``, ``data``,
``output``) and one section per stage option model (``baseline``, ``endpoints``, ...).
A stage section is validated by the very pydantic model the library function takes, so
the Python API and the config share one vocabulary. The recipe named in
``study.recipe`` lists the steps and gives default sections; the config's sections are
merged over those defaults key by key.

Every problem is a :class:`~kidneycohort.errors.ConfigError` with a one-line message
naming the file and the dotted field, the value got and what to do.
"""

from __future__ import annotations

import copy
import os
import types
import typing
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any, Literal

import yaml
from pydantic import BaseModel, ConfigDict, Field, model_validator

from kidneycohort._rules import rule_error_message, short_repr, validate_config
from kidneycohort.errors import ConfigError, did_you_mean
from kidneycohort.io.maps import FileSource
from kidneycohort.pipeline.registry import Step, StepRegistry, default_registry
from kidneycohort.pipeline.standard_sources import StandardSource
from kidneycohort.pipeline.standard_sources import anchor as anchor_source

FIXED_SECTIONS = ("study", "data", "output")


# ---- fixed sections -------------------------------------------------------------------
class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid")


class StudySection(_Strict):
    """Who the study is and which recipe runs it."""

    name: str = Field(description="Study name; used in the report title and the manifest.")
    recipe: str = Field(
        description="Recipe to run: a name from `pipelines/` (e.g. `trial_endpoints`) or a "
        "path to a recipe YAML, relative to the config file."
    )
    primary_equation: str | None = Field(
        None,
        description="The eGFR equation endpoints, models and tables use (one of "
        "`egfr.equations`); default the first of them.",
    )
    seed: int = Field(0, description="Seed for any resampling a step does; recorded.")
    description: str = Field("", description="Free text shown in the report header.")


class DataSection(_Strict):
    """The input tables of the study (see the data contract in DESIGN.md).

    Each entry is a :class:`kidneycohort.io.FileSource` (the readers' own option model),
    or a list of them for a table split over several files (e.g. one lab extract per
    site). Paths are relative to the config file. Instead of the files, ``source`` names
    a database or dataset folder in a standard layout (OMOP CDM, CDISC SDTM).
    """

    patients: FileSource | None = Field(None, description="One row per patient.")
    labs: FileSource | list[FileSource] | None = Field(
        None, description="Long lab results (one row per result); a list stacks several files."
    )
    events: FileSource | list[FileSource] | None = Field(
        None, description="Optional long events: dialysis, transplant, death, ..."
    )
    source: StandardSource | None = Field(
        None,
        description="A source in a standard layout instead of the files: `kind: omop` (an "
        "OMOP CDM v5.4 database, PostgreSQL or DuckDB) or `kind: sdtm` (CDISC SDTM "
        "datasets); see kidneycohort.io.omop.OmopSource and kidneycohort.io.sdtm.SdtmSource.",
    )

    @model_validator(mode="after")
    def _files_or_source(self) -> DataSection:
        files = self.patients is not None or self.labs is not None or self.events is not None
        if self.source is not None and files:
            raise ValueError("give either source or the patients/labs/events files, not both")
        if self.source is None and (self.patients is None or self.labs is None):
            raise ValueError("patients and labs are required (or a source)")
        return self

    def specs(self, table: str) -> list[FileSource]:
        """The sources of ``table`` ("patients", "labs" or "events") as a list."""
        value = getattr(self, table)
        if value is None:
            return []
        return list(value) if isinstance(value, list) else [value]


class OutputSection(_Strict):
    """Where the run folder goes and what it holds."""

    dir: Path | None = Field(
        None,
        description="Run folder, relative to the config file; `kidneycohort run --out` "
        "overrides it. Default: `runs/<config file name>` beside the config.",
    )
    xlsx: bool = Field(True, description="Also write `tables/tables.xlsx`, a sheet per table.")
    markdown: bool = Field(True, description="Also write each table as `tables/<name>.md`.")


class Recipe(_Strict):
    """A recipe: ordered steps and the default options of their sections."""

    name: str = Field(description="Recipe name.")
    description: str = Field("", description="What the recipe produces.")
    steps: list[str] = Field(description="Step names, in the order they run.")
    defaults: dict[str, dict[str, Any]] = Field(
        default_factory=dict,
        description="Section name -> default options; the study config overrides them.",
    )


# ---- the resolved config ----------------------------------------------------------------
@dataclass
class StudyConfig:
    """A validated study config, ready to run.

    Attributes
    ----------
    study, data, output : pydantic models
        The fixed sections (data paths already resolved against the config folder).
    sections : dict
        Stage section name -> validated options model.
    recipe : Recipe
        The recipe, as read.
    steps : list of Step
        The recipe's steps, looked up in the registry.
    config_path : pathlib.Path or None
        The config file.
    recipe_path : pathlib.Path
        The recipe file used.
    overrides : list of str
        The ``--set`` overrides applied, as given.
    """

    study: StudySection
    data: DataSection
    output: OutputSection
    sections: dict[str, BaseModel]
    recipe: Recipe
    steps: list[Step]
    config_path: Path | None
    recipe_path: Path
    overrides: list[str] = field(default_factory=list)

    def resolved(self) -> dict[str, Any]:
        """The config as run: every section with its defaults filled in (JSON-ready)."""
        out: dict[str, Any] = {
            "study": self.study.model_dump(mode="json"),
            "data": self.data.model_dump(mode="json", exclude_none=True),
            "output": self.output.model_dump(mode="json"),
        }
        for name, model in self.sections.items():
            out[name] = model.model_dump(mode="json")
        out["recipe_steps"] = list(self.recipe.steps)
        return out


# ---- YAML -----------------------------------------------------------------------------
def read_yaml(path: Path, what: str = "config") -> dict[str, Any]:
    """Read a YAML mapping with the safe loader (a config can never execute code)."""
    path = Path(path)
    if not path.is_file():
        raise ConfigError(f"{what} file '{path}' not found; check the path")
    try:
        data = yaml.safe_load(path.read_text(encoding="utf-8"))
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f" line {mark.line + 1}" if mark is not None else ""
        problem = getattr(exc, "problem", None) or str(exc).splitlines()[0]
        raise ConfigError(
            f"{what} file '{path}'{where}: not valid YAML ({problem}); "
            "only plain YAML (mappings, lists, strings, numbers) is accepted"
        ) from None
    if data is None:
        data = {}
    if not isinstance(data, dict):
        raise ConfigError(
            f"{what} file '{path}': expected a mapping of sections at the top, "
            f"got {type(data).__name__}"
        )
    return data


def apply_overrides(config: dict[str, Any], overrides: Sequence[str]) -> dict[str, Any]:
    """Return a copy of ``config`` with ``key.path=value`` overrides applied.

    The value is read as YAML, so ``--set baseline.window_days=90`` sets an integer and
    ``--set egfr.equations=[ckd_epi_2021_cr]`` a list. Missing intermediate keys are
    created (validation then catches a misspelt one, with a suggestion).
    """
    out = copy.deepcopy(config)
    for item in overrides:
        key, sep, raw = item.partition("=")
        key = key.strip()
        if not sep or not key or any(not part for part in key.split(".")):
            raise ConfigError(f"--set '{item}': expected key.path=value, e.g. --set study.seed=7")
        try:
            value = yaml.safe_load(raw) if raw.strip() else ""
        except yaml.YAMLError:
            value = raw
        node: Any = out
        parts = key.split(".")
        for depth, part in enumerate(parts[:-1]):
            child = node.get(part) if isinstance(node, dict) else None
            if child is None:
                child = {}
                node[part] = child
            if not isinstance(child, dict):
                raise ConfigError(
                    f"--set '{item}': '{'.'.join(parts[: depth + 1])}' is a "
                    f"{type(child).__name__}, not a section, so it has no key '{parts[depth + 1]}'"
                )
            node = child
        node[parts[-1]] = value
    return out


def deep_merge(base: Mapping[str, Any], over: Mapping[str, Any]) -> dict[str, Any]:
    """Merge ``over`` onto ``base``: mappings merge key by key, anything else replaces."""
    out = copy.deepcopy(dict(base))
    for key, value in over.items():
        if isinstance(value, Mapping) and isinstance(out.get(key), Mapping):
            out[key] = deep_merge(out[key], value)
        else:
            out[key] = copy.deepcopy(value)
    return out


# ---- unknown keys, with suggestions -----------------------------------------------------
def _models_in(annotation: Any, kind: str = "") -> list[tuple[type[BaseModel], str]]:
    """(model, nesting) pairs inside an annotation; nesting is "", "list" or "dict"."""
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return [(annotation, kind)]
    origin = typing.get_origin(annotation)
    args = typing.get_args(annotation)
    if origin is typing.Annotated:
        return _models_in(args[0], kind)
    if origin in (typing.Union, types.UnionType):
        return [pair for arg in args for pair in _models_in(arg, kind)]
    if kind:
        return []  # a list of lists or similar: leave it to pydantic
    if origin in (list, tuple, set, frozenset, Sequence) and args:
        return _models_in(args[0], "list")
    if origin in (dict, Mapping) and len(args) == 2:
        return _models_in(args[1], "dict")
    return []


def check_keys(data: Any, model: type[BaseModel], where: str) -> None:
    """Raise :class:`ConfigError` for the first key ``model`` does not define.

    Stage models may accept extra keys themselves; a config never should, because a
    misspelt option silently keeping its default is the worst kind of config error.
    """
    if not isinstance(data, Mapping):
        return
    fields = model.model_fields
    names = {}
    for name, info in fields.items():
        names[name] = info
        if info.alias:
            names[info.alias] = info
    for key, value in data.items():
        if key not in names:
            raise ConfigError(
                f"{where}: unknown key '{key}'{did_you_mean(str(key), names)}; "
                f"allowed keys: {', '.join(sorted(fields))}"
            )
        pairs = _models_in(names[key].annotation)
        child = f"{where}.{key}"
        if isinstance(value, list):
            listed = [m for m, k in pairs if k == "list"]
            for i, item in enumerate(value):
                sub = _pick_model(listed, item)
                if sub is not None:
                    check_keys(item, sub, f"{child}[{i}]")
        elif isinstance(value, Mapping):
            bare = [m for m, k in pairs if k == ""]
            mapped = [m for m, k in pairs if k == "dict"]
            sub = _pick_model(bare, value)
            if sub is not None:
                check_keys(value, sub, child)
            elif not bare and mapped:
                for k, item in value.items():
                    sub = _pick_model(mapped, item)
                    if sub is not None:
                        check_keys(item, sub, f"{child}.{k}")


def _pick_model(candidates: Sequence[type[BaseModel]], item: Any) -> type[BaseModel] | None:
    """The one candidate model ``item`` is meant for, or None when that is unclear.

    With several candidates (a tagged union such as endpoint kinds) the model whose
    ``Literal`` tag fields all match the item's values is chosen.
    """
    unique = list(dict.fromkeys(candidates))
    if len(unique) == 1:
        return unique[0]
    if not isinstance(item, Mapping):
        return None
    matches = []
    for model in unique:
        # tag fields: a Literal of one value (a discriminator such as ``kind``)
        tags = {
            name: typing.get_args(info.annotation)
            for name, info in model.model_fields.items()
            if typing.get_origin(info.annotation) is Literal
            and len(typing.get_args(info.annotation)) == 1
        }
        if tags and all(name in item and item[name] in allowed for name, allowed in tags.items()):
            matches.append(model)
    return matches[0] if len(matches) == 1 else None


def validate_section(model: type[BaseModel], data: Any, where: str) -> BaseModel:
    """Build ``model`` from ``data``; a failure becomes a one-line :class:`ConfigError`."""
    if data is None:
        data = {}
    if not isinstance(data, Mapping):
        raise ConfigError(f"{where}: expected a section (mapping), got {short_repr(data)}")
    check_keys(data, model, where)
    return validate_config(
        model.model_validate,
        dict(data),
        where,
        message=lambda exc, at: rule_error_message(at, exc, schema=model),
    )


def absolute(path: str | Path) -> Path:
    """``path`` made absolute with ``..`` taken lexically, symbolic links kept.

    Paths in a config are relative to the config file as the user sees it: a config
    reached through a linked folder keeps its neighbours (``../data``) of that folder.
    """
    return Path(os.path.abspath(path))


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
            update[table] = [anchor(s) for s in value]
        elif value is not None:
            update[table] = anchor(value)
    return data.model_copy(update=update)


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
    if raw is None:
        if path is None:
            raise ConfigError("no config given: pass a YAML file path")
        config_path: Path | None = absolute(path)
        data = read_yaml(config_path)
        config_dir = config_path.parent
    else:
        config_path = None
        data = copy.deepcopy(dict(raw))
        config_dir = absolute(base_dir or Path.cwd())
    data = apply_overrides(data, overrides)
    label = config_path.name if config_path else "config"

    allowed = set(FIXED_SECTIONS) | set(registry.sections())
    for key in data:
        if key not in allowed:
            raise ConfigError(
                f"{label}: unknown section '{key}'{did_you_mean(str(key), allowed)}; "
                f"sections: {', '.join(sorted(allowed))}"
            )
    for key in ("study", "data"):
        if key not in data:
            raise ConfigError(f"{label}: section '{key}' is missing; add it")
    study: StudySection = validate_section(StudySection, data["study"], "study")  # type: ignore[assignment]
    data_section: DataSection = validate_section(DataSection, data["data"], "data")  # type: ignore[assignment]
    output: OutputSection = validate_section(OutputSection, data.get("output"), "output")  # type: ignore[assignment]

    recipe_path = find_recipe(study.recipe, config_dir)
    recipe = load_recipe(recipe_path)
    steps = [registry.get(name, where=f"recipe '{recipe.name}' steps") for name in recipe.steps]

    used: dict[str, type[BaseModel] | None] = {}
    for step in steps:
        used.update(step.section_models())
    for key in data:
        if key not in FIXED_SECTIONS and key not in used:
            raise ConfigError(
                f"{label}: section '{key}' is not used by recipe '{recipe.name}' "
                f"(its sections: {', '.join(sorted(used)) or 'none'}); remove it or change study.recipe"
            )
    for key in recipe.defaults:
        if key not in used:
            raise ConfigError(
                f"recipe '{recipe_path.name}': defaults for section '{key}' which none of "
                f"its steps uses{did_you_mean(key, used)}"
            )

    sections: dict[str, BaseModel] = {}
    for name, model in used.items():
        merged = deep_merge(recipe.defaults.get(name, {}), data.get(name) or {})
        if model is None:
            if merged:
                raise ConfigError(f"{name}: this step takes no options, got {short_repr(merged)}")
            continue
        sections[name] = validate_section(model, merged, name)

    # data paths and the output folder are relative to the config file
    data_section = _anchor_paths(data_section, config_dir)
    if output.dir is not None and not output.dir.is_absolute():
        output.dir = absolute(config_dir / output.dir)
    elif output.dir is None:
        stem = config_path.stem if config_path else study.name.replace(" ", "_")
        output.dir = absolute(config_dir / "runs" / stem)

    check_chain(steps, source_tables(data_section), f"recipe '{recipe.name}'")
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
    )
    for step in steps:
        if step.check is not None:
            step.check(resolved)
    return resolved
