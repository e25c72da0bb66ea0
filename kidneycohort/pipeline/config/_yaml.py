"""Reading YAML safely, command-line overrides, and merging recipe defaults with a config."""

from __future__ import annotations

import copy
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import yaml

from kidneycohort.errors import ConfigError

__all__ = ["apply_overrides", "deep_merge", "read_yaml"]


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
