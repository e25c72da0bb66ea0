"""The base of the typed rules and options, and one-line messages from pydantic errors.

A rule a study can choose (a value filter, a baseline rule, an endpoint definition, table
options...) is a pydantic model that the stage function takes and that the YAML config
fills under the same keys (DEVELOPERS.md, "one vocabulary"). Built in Python with a bad
value, a :class:`RuleModel` raises :class:`~kidneycohort.errors.ConfigError` with one
line naming the field, the value got and, for a misspelt key, the closest field name,
instead of pydantic's multi-line report.
"""

from __future__ import annotations

import contextvars
import reprlib
import typing
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, TypeVar

from pydantic import BaseModel, ConfigDict, ValidationError
from pydantic_core import ErrorDetails

from kidneycohort.errors import ConfigError, did_you_mean

__all__ = [
    "RuleModel",
    "error_facts",
    "resolve_rules",
    "rule_error_message",
    "short_repr",
    "validate_config",
]

# Set while a model or a config section is being validated, so that only the outermost
# call turns pydantic's report into one ConfigError: pydantic calls a model's own
# ``__init__`` for nested models too, and the outer message keeps the full field path.
_VALIDATING: contextvars.ContextVar[bool] = contextvars.ContextVar("_validating", default=False)

Validated = TypeVar("Validated")
Model = TypeVar("Model", bound=BaseModel)


def first_error(exc: ValidationError) -> ErrorDetails:
    """The error to report: a misspelt key first (it also makes the intended field
    "missing"), else pydantic's first."""
    errors = exc.errors()
    return next((e for e in errors if e["type"] == "extra_forbidden"), errors[0])


@dataclass(frozen=True)
class ErrorFacts:
    """What a pydantic error says, ready to be worded in one line.

    Attributes
    ----------
    loc
        Location of the reported error inside the validated data.
    kind
        Pydantic's error type (``"extra_forbidden"``, ``"missing"``, ...).
    message
        Pydantic's message, without the ``"Value error, "`` of our own validators.
    got
        The value that failed.
    known
        For a misspelt key, the field names it may have meant; else empty.
    count
        How many errors pydantic found in all.
    """

    loc: tuple[Any, ...]
    kind: str
    message: str
    got: Any
    known: tuple[str, ...]
    count: int
    expected: str = ""

    @property
    def path(self) -> str:
        """The location as dotted text (``"windows.0.days"``; empty at the top level)."""
        return ".".join(str(p) for p in self.loc)

    @property
    def suggestion(self) -> str:
        """``" (did you mean 'x'?)"`` for a misspelt key close to a known field, else ``""``."""
        if self.kind != "extra_forbidden" or not self.loc:
            return ""
        return did_you_mean(str(self.loc[-1]), self.known)


def error_facts(
    model: type[BaseModel] | None, exc: ValidationError, fields: Iterable[str] | None = None
) -> ErrorFacts:
    """The facts of the error to report (see :func:`first_error`), for callers that word
    their own line; ``model`` (or None) and ``fields`` give the known names for a misspelt
    key as in :func:`rule_error_message`.
    """
    err = first_error(exc)
    loc = tuple(err.get("loc", ()))
    known: list[str] = []
    if err["type"] == "extra_forbidden" and loc:
        if fields is not None:
            known = list(fields)
        elif model is not None:
            known = _fields_at(model, loc[:-1])
    return ErrorFacts(
        loc=loc,
        kind=err["type"],
        # a ValueError raised in a validator already carries our own message
        message=str(err.get("msg", "invalid value")).removeprefix("Value error, "),
        got=err.get("input"),
        known=tuple(known),
        count=exc.error_count(),
        expected=str(err.get("ctx", {}).get("expected_tags", "")),
    )


class _ShortRepr(reprlib.Repr):
    """reprlib with a bounded integer: a huge int is never turned into text whole."""

    def repr_int(self, x: int, level: int) -> str:
        if x.bit_length() > 256:
            return f"<{'negative ' if x < 0 else ''}integer of {x.bit_length()} bits>"
        return super().repr_int(x, level)


def short_repr(value: Any, limit: int = 60) -> str:
    """``repr(value)`` cut to ``limit`` characters, without rendering a large value whole.

    A nested value (e.g. a YAML alias that expands to millions of items) is summarised
    level by level, so building an error message costs little whatever the value is.

    >>> short_repr("x" * 100, limit=12)
    "'xxx...xxxx'"
    >>> short_repr(list(range(10**6)))
    '[0, 1, 2, 3, 4, 5, ...]'
    """
    shortened = _ShortRepr()  # Python 3.11: limits are attributes, not arguments
    shortened.maxlevel, shortened.maxlist, shortened.maxdict = 2, 6, 4
    shortened.maxstring = shortened.maxother = shortened.maxlong = limit
    try:
        text = shortened.repr(value)
    except Exception:  # a value whose own repr fails: say what it is
        text = f"<{type(value).__name__}>"
    return text if len(text) <= limit else text[: limit - 3] + "..."


def _join(where: str, path: Sequence[Any]) -> str:
    """``where`` followed by a location; a file name is set off by ": " rather than "."."""
    parts = [str(p) for p in path]
    if not parts:
        return where
    if not where:
        return ".".join(parts)
    joint = ": " if where.endswith((".yaml", ".yml", ".json")) else "."
    return where + joint + ".".join(parts)


def rule_error_message(
    model: type[BaseModel] | str,
    exc: ValidationError,
    fields: Iterable[str] | None = None,
    *,
    schema: type[BaseModel] | None = None,
    kinds: Sequence[str] = (),
) -> str:
    """The one line every options error is worded in: ``where.field: problem (got value)``.

    A misspelt key reads ``where: unknown key 'x' (did you mean 'y'?)``, a missing one
    ``where.field: required key missing; add it``, an unknown kind of a tagged union
    ``where.kind: unknown kind 'x'; kind must be one of ...``. When pydantic found
    several problems, ``(+n more)`` says so.

    Parameters
    ----------
    model
        The model validated (its name starts the message, its fields give the "did you
        mean" for a misspelt key), or the config location as text.
    exc
        The pydantic error.
    fields
        Known field names for the suggestion; by default those of the (sub-)model the
        misspelt key sits in.
    schema
        The model validated, when ``model`` is a location text (for the suggestion).
    kinds
        The kinds of a tagged union, when pydantic does not list them itself.

    Examples
    --------
    >>> from pydantic import BaseModel, ConfigDict, ValidationError
    >>> class Window(BaseModel):
    ...     model_config = ConfigDict(extra="forbid")
    ...     days: int = 90
    >>> try:
    ...     Window(dayz=30)
    ... except ValidationError as exc:
    ...     print(rule_error_message(Window, exc))
    Window: unknown key 'dayz' (did you mean 'days'?)
    >>> try:
    ...     Window(days="many")
    ... except ValidationError as exc:
    ...     print(rule_error_message("window", exc))
    window.days: Input should be a valid integer, unable to parse string as an integer (got 'many')
    """
    facts = error_facts(schema if isinstance(model, str) else model, exc, fields)
    where = model if isinstance(model, str) else model.__name__
    if facts.kind == "extra_forbidden" and facts.loc:
        hint = facts.suggestion or (f"; known: {', '.join(facts.known)}" if facts.known else "")
        text = f"{_join(where, facts.loc[:-1])}: unknown key '{facts.loc[-1]}'{hint}"
    elif facts.kind == "missing":
        text = f"{_join(where, facts.loc)}: required key missing; add it"
    elif facts.kind in ("union_tag_invalid", "union_tag_not_found"):
        tag = str(facts.got.get("kind")) if isinstance(facts.got, Mapping) else str(facts.got)
        known = [k.strip(" '") for k in facts.expected.split(",")] if facts.expected else kinds
        text = (
            f"{_join(where, [*facts.loc, 'kind'])}: unknown or missing kind {tag!r}"
            f"{did_you_mean(tag, known)}; kind must be one of {', '.join(known)}"
        )
    else:
        got = facts.got
        shown = "" if isinstance(got, Mapping) else f" (got {short_repr(got)})"
        text = f"{_join(where, facts.loc)}: {facts.message}{shown}"
    # a misspelt key also makes its intended field "missing": that is not a second problem
    others = facts.count - 1 - (facts.kind == "extra_forbidden") * _missing_count(exc)
    return text + (f" (+{others} more)" if others > 0 else "")


def _missing_count(exc: ValidationError) -> int:
    return sum(1 for e in exc.errors() if e["type"] == "missing")


def _fields_at(model: type[BaseModel], path: tuple[Any, ...]) -> list[str]:
    """Field names of the sub-model(s) that ``path`` leads to (list indexes skipped).

    Inside a union of models, pydantic's location names the member tried: a
    discriminated union by its tag value, a plain union by the model's class name.
    """
    current: list[type[BaseModel]] = [model]
    for part in path:
        if not isinstance(part, str):
            continue
        member = [m for m in current if m.__name__ == part or part in _tags(m)]
        if len(current) > 1 and member:
            current = member
            continue
        following: list[type[BaseModel]] = []
        for m in current:
            info = m.model_fields.get(part)
            if info is not None:
                following.extend(_models_in(info.annotation))
        if not following:
            break
        current = following
    return list(dict.fromkeys(f for m in current for f in m.model_fields))


def _tags(model: type[BaseModel]) -> set[Any]:
    """Values of the model's ``Literal`` fields (the tags of a discriminated union)."""
    return {
        value
        for info in model.model_fields.values()
        if typing.get_origin(info.annotation) is typing.Literal
        for value in typing.get_args(info.annotation)
    }


def _models_in(annotation: Any) -> list[type[BaseModel]]:
    """The pydantic models inside an annotation (through Optional, list, dict, unions)."""
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return [annotation]
    args = typing.get_args(annotation)
    if typing.get_origin(annotation) is typing.Annotated:
        args = args[:1]
    return [m for a in args for m in _models_in(a)]


def validate_config(
    validator: Callable[[Any], Validated],
    raw: Any,
    where: str,
    message: Callable[[ValidationError, str], str] | None = None,
) -> Validated:
    """Run a pydantic ``validator`` on config data; failures become one-line ConfigErrors.

    ``message(exc, where)`` words the error (default: :func:`rule_error_message`).
    """
    token = _VALIDATING.set(True)
    try:
        return validator(raw)
    except ValidationError as exc:
        text = message(exc, where) if message else rule_error_message(where, exc)
        raise ConfigError(text) from None
    finally:
        _VALIDATING.reset(token)


class RuleModel(BaseModel):
    """Base of the rules and options: frozen, no unknown keys, errors as ConfigError.

    Building one in Python with a bad value raises :class:`ConfigError` with one line
    naming the field, the value got and the fix (see :func:`rule_error_message`).
    ``model_validate`` keeps pydantic's :class:`ValidationError`, for callers that
    gather a whole config's errors themselves. Subclasses may set ``frozen=False``.
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    def __init__(self, **data: Any) -> None:
        if _VALIDATING.get():  # nested inside another model or a config section
            super().__init__(**data)
            return
        token = _VALIDATING.set(True)
        try:
            super().__init__(**data)
        except ValidationError as exc:
            raise ConfigError(type(self)._error_message(exc)) from None
        finally:
            _VALIDATING.reset(token)

    @classmethod
    def model_validate(cls, obj: Any, **kwargs: Any) -> typing.Self:
        """Pydantic's ``model_validate``; nested rules leave the errors to the caller."""
        token = _VALIDATING.set(True)
        try:
            return super().model_validate(obj, **kwargs)
        finally:
            _VALIDATING.reset(token)

    @classmethod
    def _error_message(cls, exc: ValidationError) -> str:
        return rule_error_message(cls, exc)


def resolve_rules(
    model: type[Model], rule: Model | None, overrides: Mapping[str, Any], where: str
) -> Model:
    """``rules`` (or the model's defaults) updated by keyword ``overrides``, validated.

    Raises
    ------
    ConfigError
        For an override that is not a field (with the closest name) or a bad value.
    """
    for key in overrides:
        if key not in model.model_fields:
            raise ConfigError(
                f"{where}: unknown rule '{key}'{did_you_mean(key, model.model_fields)}"
            )
    base = (rule or model()).model_dump()
    try:
        return model.model_validate({**base, **overrides})
    except ValidationError as exc:
        raise ConfigError(rule_error_message(where, exc, fields=model.model_fields)) from None
