"""The two record types of the registry and the reader of a constant's code location."""

from __future__ import annotations

import importlib
import inspect
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Final, Literal

from pydantic import BaseModel

__all__ = ["STATUSES", "Constant", "Publication", "Status", "read_code_location"]

Status = Literal["re-read", "recalled", "derived"]

STATUSES: Final[dict[str, str]] = {
    "re-read": "the value was read in the publication text (or a verbatim reprint of it)",
    "recalled": "the value was recalled, not re-read: verify it against the publication",
    "derived": "the value is computed from other registered constants",
}
"""The allowed provenance statuses and what each one means."""


@dataclass(frozen=True)
class Publication:
    """A publication or guideline that constants are taken from.

    Attributes
    ----------
    key : str
        Short stable key used by :class:`Constant` (``"levey_2009"``).
    authors : str
        First authors as cited (``"Levey AS, Stevens LA, Schmid CH, et al."``).
    title, journal : str
        Title; journal with volume, issue and pages.
    year : int
        Year of publication.
    doi : str or None
        DOI without the ``https://doi.org/`` prefix; None for the rare source without one.
    """

    key: str
    authors: str
    title: str
    journal: str
    year: int
    doi: str | None

    def citation(self) -> str:
        """One-line citation: authors, year, journal and DOI."""
        doi = f" doi:{self.doi}" if self.doi else ""
        return f"{self.authors} {self.title}. {self.journal} ({self.year}).{doi}"


@dataclass(frozen=True)
class Constant:
    """One published constant the library computes with, and where its value came from.

    The value itself is not stored here: it is read from the code location ``code`` so
    that it lives in one place (see :func:`read_code_location`).

    Attributes
    ----------
    id : str
        Stable identifier, independent of the code layout (``"ckd_epi.2021_cr.constant"``).
    code : str
        Where the value lives: ``"module:path"``; see :func:`read_code_location`.
    unit : str
        Unit of the value (``"1"`` for a pure number).
    source : str
        Key of the :class:`Publication` the value is taken from.
    where : str
        Where in the publication (table, figure, equation, page), as precisely as known;
        for a re-read value, also which copy of the text was read.
    status : {"re-read", "recalled", "derived"}
        See :data:`STATUSES`.
    note : str
        Anything a reader should know (rounding, the library's reading of a rule).
    """

    id: str
    code: str
    unit: str
    source: str
    where: str
    status: Status
    note: str = ""

    @property
    def value(self) -> float | str:
        """The value the library computes with, read from :attr:`code`."""
        value = read_code_location(self.code)
        if isinstance(value, bool) or not isinstance(value, int | float | str):
            raise TypeError(f"{self.id}: {self.code} is {value!r}, not a number or a label")
        return value


_STEP = re.compile(r"\.([A-Za-z_]\w*)|\[([^\]]+)\]|\(([A-Za-z_]\w*)\)")


def read_code_location(code: str) -> Any:
    """Return the object at a code location ``"package.module:path"``.

    ``path`` starts with a module attribute and continues with steps:

    * ``.name`` -- an attribute; on a pydantic model class, the default of field ``name``;
    * ``[key]`` -- an item of a mapping (``[male]``, ``[2]``, tuple keys as ``[G3a,A2]``)
      or of a sequence (``[0]``);
    * ``(name)`` -- the default value of parameter ``name`` of a function.

    >>> read_code_location("kidneycohort.units:CREATININE_UMOL_PER_MG_DL")
    88.4
    >>> read_code_location("kidneycohort.kfre:BASELINE_SURVIVAL[north_american][5]")
    0.924

    Raises
    ------
    LookupError
        When the module, attribute, key or parameter does not exist.
    """
    module_name, _, path = code.partition(":")
    if not path:
        raise LookupError(f"code location {code!r} has no ':path' after the module")
    try:
        obj: Any = importlib.import_module(module_name)
    except ImportError as exc:
        raise LookupError(f"code location {code!r}: module {module_name!r} not found") from exc
    head = re.match(r"[A-Za-z_]\w*", path)
    if head is None:
        raise LookupError(f"code location {code!r}: path must start with a name")
    obj = _attribute(obj, head.group(0), code)
    position = head.end()
    while position < len(path):
        step = _STEP.match(path, position)
        if step is None:
            raise LookupError(f"code location {code!r}: cannot read {path[position:]!r}")
        attribute, key, parameter = step.groups()
        if attribute is not None:
            obj = _attribute(obj, attribute, code)
        elif key is not None:
            obj = _item(obj, key, code)
        else:
            obj = _parameter_default(obj, parameter, code)
        position = step.end()
    return obj


def _attribute(obj: Any, name: str, code: str) -> Any:
    if isinstance(obj, type) and issubclass(obj, BaseModel) and name in obj.model_fields:
        return obj.model_fields[name].get_default(call_default_factory=True)
    try:
        return getattr(obj, name)
    except AttributeError:
        raise LookupError(f"code location {code!r}: no attribute {name!r}") from None


def _item(obj: Any, key: str, code: str) -> Any:
    candidates: list[Any] = [key]
    if "," in key:
        candidates.append(tuple(part.strip() for part in key.split(",")))
    for convert in (int, float):
        try:
            candidates.append(convert(key))
        except ValueError:
            pass
    if isinstance(obj, Mapping):
        for candidate in candidates:
            if candidate in obj:
                return obj[candidate]
    elif isinstance(obj, Sequence) and not isinstance(obj, str):
        for candidate in candidates:
            if isinstance(candidate, int) and -len(obj) <= candidate < len(obj):
                return obj[candidate]
    raise LookupError(f"code location {code!r}: no item [{key}]")


def _parameter_default(obj: Any, name: str, code: str) -> Any:
    try:
        parameter = inspect.signature(obj).parameters[name]
    except (TypeError, ValueError, KeyError):
        raise LookupError(f"code location {code!r}: no parameter {name!r}") from None
    if parameter.default is inspect.Parameter.empty:
        raise LookupError(f"code location {code!r}: parameter {name!r} has no default")
    return parameter.default
