"""Where the library's published constants come from, and how sure we are of each.

Every published number the library computes with -- equation coefficients, knots and
exponents, Q values, KFRE coefficients and baseline survivals, KDIGO category bounds and
prognosis grid, AKI criteria, rule defaults taken from guidelines, unit factors -- is a
:class:`Constant` here: a stable id, the unit, the :class:`Publication` it is taken from,
where in it, and a status (:data:`STATUSES`):

* ``"re-read"``: the value was read in the publication text, or a verbatim reprint of it,
  and ``where`` names the table or page and the copy that was read;
* ``"recalled"``: the value was recalled and has not been re-read -- verify it against
  the publication before results are published;
* ``"derived"``: computed from other registered constants.

**One place for each value.** The registry does not hold numbers. Each constant names its
code location (``"kidneycohort.equations.ckd_epi:CR_2021.constant"``) and
:attr:`Constant.value` reads the value from there, so the equation code stays plain
Python with named constants and cannot drift from what the registry reports. The test
suite checks that every location resolves and that every numeric constant defined at the
top of a formula module is registered.

``kidneycohort equations --sources`` prints the registry with the number of recalled
values and a caution.

>>> from kidneycohort.provenance import get_constant
>>> c = get_constant("schwartz_bedside.k")
>>> c.value, c.status, get_publication(c.source).year
(0.413, 're-read', 2009)
"""

from __future__ import annotations

from collections import Counter
from typing import Final

import polars as pl

from kidneycohort.errors import InputDataError, did_you_mean
from kidneycohort.provenance._equations import EQUATION_CONSTANTS
from kidneycohort.provenance._model import (
    STATUSES,
    Constant,
    Publication,
    Status,
    read_code_location,
)
from kidneycohort.provenance._publications import PUBLICATIONS
from kidneycohort.provenance._rules import RULE_CONSTANTS

__all__ = [
    "CONSTANTS",
    "PUBLICATIONS",
    "RECALLED_CAUTION",
    "STATUSES",
    "Constant",
    "Publication",
    "Status",
    "constants_table",
    "get_constant",
    "get_publication",
    "read_code_location",
    "status_counts",
]

CONSTANTS: Final[tuple[Constant, ...]] = (*EQUATION_CONSTANTS, *RULE_CONSTANTS)
"""Every registered constant, equations first."""

RECALLED_CAUTION: Final = (
    "Recalled values have not been re-read in their publication: verify them against the "
    "publication before using results in a publication."
)

_BY_ID: Final[dict[str, Constant]] = {c.id: c for c in CONSTANTS}
_BY_KEY: Final[dict[str, Publication]] = {p.key: p for p in PUBLICATIONS}


def get_constant(constant_id: str) -> Constant:
    """The registered constant ``constant_id``.

    Raises
    ------
    InputDataError
        When no constant has that id (with a suggestion for near misses).
    """
    try:
        return _BY_ID[constant_id]
    except KeyError:
        raise InputDataError(
            f"unknown constant id {constant_id!r}{did_you_mean(constant_id, _BY_ID)}"
        ) from None


def get_publication(key: str) -> Publication:
    """The publication with ``key``.

    Raises
    ------
    InputDataError
        When no publication has that key (with a suggestion for near misses).
    """
    try:
        return _BY_KEY[key]
    except KeyError:
        raise InputDataError(f"unknown publication {key!r}{did_you_mean(key, _BY_KEY)}") from None


def status_counts() -> dict[str, int]:
    """How many registered constants have each status (every status present, zeros too)."""
    counts: Counter[str] = Counter(c.status for c in CONSTANTS)
    return {status: counts.get(status, 0) for status in STATUSES}


def constants_table() -> pl.DataFrame:
    """The registry as a table: one row per constant, in registry order.

    Returns
    -------
    polars.DataFrame
        ``id``, ``value`` (text, as the library holds it), ``unit``, ``publication``
        (first author, year and DOI), ``where``, ``status``, ``note``, ``code``.
    """
    rows = []
    for c in CONSTANTS:
        publication = _BY_KEY[c.source]
        first_author = publication.authors.split(",")[0].split(" ")[0].rstrip(".")
        if publication.key.startswith("kdigo"):
            first_author = "KDIGO"
        doi = f", doi:{publication.doi}" if publication.doi else ""
        rows.append(
            {
                "id": c.id,
                "value": str(c.value),
                "unit": c.unit,
                "publication": f"{first_author} {publication.year}{doi}",
                "where": c.where,
                "status": c.status,
                "note": c.note,
                "code": c.code,
            }
        )
    return pl.DataFrame(rows, schema={name: pl.String for name in rows[0]})
