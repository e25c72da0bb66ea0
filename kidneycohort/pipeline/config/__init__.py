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

from kidneycohort.pipeline.config._keys import (
    absolute,
    check_keys,
    validate_section,
)
from kidneycohort.pipeline.config._load import (
    load_config,
)
from kidneycohort.pipeline.config._recipes import (
    builtin_config_dir,
    builtin_recipe_dir,
    check_chain,
    find_recipe,
    load_recipe,
    source_tables,
)
from kidneycohort.pipeline.config._sections import (
    FIXED_SECTIONS,
    DataSection,
    ExecutionSection,
    OutputSection,
    Recipe,
    StudyConfig,
    StudySection,
)
from kidneycohort.pipeline.config._yaml import (
    apply_overrides,
    deep_merge,
    read_yaml,
)

__all__ = [
    "FIXED_SECTIONS",
    "DataSection",
    "ExecutionSection",
    "OutputSection",
    "Recipe",
    "StudyConfig",
    "StudySection",
    "absolute",
    "apply_overrides",
    "builtin_config_dir",
    "builtin_recipe_dir",
    "check_chain",
    "check_keys",
    "deep_merge",
    "find_recipe",
    "load_config",
    "load_recipe",
    "read_yaml",
    "source_tables",
    "validate_section",
]
