"""Reading YAML safely, command-line overrides, and merging recipe defaults with a config."""

from __future__ import annotations

import copy
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import yaml

from kidneycohort.errors import ConfigError

__all__ = ["MAX_EXPANDED_NODES", "StrictLoader", "apply_overrides", "deep_merge", "read_yaml"]


# ---- YAML -----------------------------------------------------------------------------
# Values a config may hold once aliases are expanded: far more than any real config,
# far less than an alias bomb ("billion laughs") would make pydantic build.
MAX_EXPANDED_NODES = 100_000


class _Refused(Exception):
    """A YAML document refused by :class:`StrictLoader` (wording in ``args[0]``)."""


class StrictLoader(yaml.SafeLoader):
    """The safe loader, refusing a duplicated key and aliases that expand too far."""

    def compose_document(self) -> Any:
        node = super().compose_document()
        _check_expansion(node)
        return node

    def construct_mapping(self, node: yaml.MappingNode, deep: bool = False) -> dict[Any, Any]:
        seen: set[Any] = set()
        for key_node, _ in node.value:
            if key_node.tag == "tag:yaml.org,2002:merge":
                continue
            key = self.construct_object(key_node, deep=True)
            if isinstance(key, list | dict):
                continue  # unhashable: the base constructor words that error
            if key in seen:
                raise _Refused(
                    f"line {key_node.start_mark.line + 1}: key '{key}' appears twice in "
                    "one mapping; keep one"
                )
            seen.add(key)
        return super().construct_mapping(node, deep=deep)


def _timestamp(loader: StrictLoader, node: yaml.ScalarNode) -> Any:
    """A YAML date that is no date in the calendar (``2025-02-30``) is refused by line."""
    try:
        return yaml.SafeLoader.construct_yaml_timestamp(loader, node)
    except ValueError as exc:
        raise _Refused(
            f"line {node.start_mark.line + 1}: '{node.value}' is not a date in the "
            f"calendar ({exc}); write a real date as YYYY-MM-DD"
        ) from None


StrictLoader.add_constructor("tag:yaml.org,2002:timestamp", _timestamp)


def _check_expansion(root: yaml.Node | None) -> None:
    """Count the nodes of ``root`` with every alias expanded (memoised per node)."""
    sizes: dict[int, int] = {}

    def size(node: yaml.Node) -> int:
        known = sizes.get(id(node))
        if known is not None:
            return known
        sizes[id(node)] = 1  # a recursive alias counts once (the constructor handles it)
        total = 1
        if isinstance(node, yaml.SequenceNode):
            total += sum(size(child) for child in node.value)
        elif isinstance(node, yaml.MappingNode):
            total += sum(size(k) + size(v) for k, v in node.value)
        if total > MAX_EXPANDED_NODES:
            raise _Refused(
                f"aliases expand to more than {MAX_EXPANDED_NODES:,} values; a config "
                "needs far fewer (an alias bomb?)"
            )
        sizes[id(node)] = total
        return total

    if root is not None:
        size(root)


def load_yaml_text(text: str) -> Any:
    """Parse YAML text with :class:`StrictLoader` (raises ``yaml.YAMLError`` or
    ``_Refused``)."""
    return yaml.load(text, Loader=StrictLoader)


def read_yaml(path: Path, what: str = "config") -> dict[str, Any]:
    """Read a YAML mapping with the safe loader (a config can never execute code); a
    duplicated key or aliases expanding beyond :data:`MAX_EXPANDED_NODES` are refused."""
    path = Path(path)
    if not path.is_file():
        raise ConfigError(f"{what} file '{path}' not found; check the path")
    try:
        data = load_yaml_text(path.read_text(encoding="utf-8"))
    except _Refused as exc:
        raise ConfigError(f"{what} file '{path}': {exc.args[0]}") from None
    except RecursionError:
        raise ConfigError(f"{what} file '{path}': nested too deeply") from None
    except UnicodeDecodeError as exc:
        raise ConfigError(
            f"{what} file '{path}': not UTF-8 text (byte {exc.start}); save it as UTF-8"
        ) from None
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
            value = load_yaml_text(raw) if raw.strip() else ""
        except _Refused as exc:
            raise ConfigError(f"--set '{key}': {exc.args[0]}") from None
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
