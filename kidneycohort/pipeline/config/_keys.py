"""Unknown keys with suggestions, and one-line errors for a section's values."""

from __future__ import annotations

import os
import types
import typing
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any, Literal

from pydantic import BaseModel

from kidneycohort._rules import rule_error_message, short_repr, validate_config
from kidneycohort.errors import ConfigError, did_you_mean

__all__ = ["_models_in", "absolute", "check_keys", "validate_section"]


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
        _check_value(value, _models_in(names[key].annotation), f"{where}.{key}")


def _check_value(value: Any, pairs: list[tuple[type[BaseModel], str]], child: str) -> None:
    """Check the keys of a nested value against the models its field can hold."""
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
