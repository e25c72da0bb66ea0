"""Concept sets resolved through the database's own CONCEPT table.

Every configured code (LOINC for the lab tests, UCUM for their units, SNOMED or another
vocabulary for kidney-failure events, the OMOP Gender and Visit vocabularies) is looked
up by ``vocabulary_id`` and ``concept_code`` in one query; a code that is not there stops
the read with one line naming it. No concept id is written in this package.

References
----------
.. [1] OHDSI. OMOP CDM v5.4: CONCEPT (concept_id, vocabulary_id, concept_code),
   MEASUREMENT.operator_concept_id ("Meas Value Operator": <, <=, =, >=, >),
   MEASUREMENT.unit_concept_id ("If units are provided but not mapped, set
   UNIT_CONCEPT_ID to 0").
"""

from __future__ import annotations

import logging
from collections.abc import Iterable
from dataclasses import dataclass, field

import polars as pl

from kidneycohort import units
from kidneycohort.errors import ConfigError, InputDataError
from kidneycohort.io.omop._connect import OmopConnection, quote_identifier, quote_literal
from kidneycohort.io.omop._spec import OPERATOR_QUALIFIERS, OmopSource

__all__ = ["UCUM", "Vocabulary", "check_unit_codes", "resolve_vocabulary"]

logger = logging.getLogger(__name__)

LOINC, UCUM, GENDER, VISIT, OPERATOR = "LOINC", "UCUM", "Gender", "Visit", "Meas Value Operator"


@dataclass(frozen=True)
class Vocabulary:
    """Configured codes resolved to concept ids.

    Attributes
    ----------
    labs
        measurement concept id -> analyte.
    units
        unit concept id -> UCUM code (the configured units).
    operators
        operator concept id -> qualifier ("<", ">" or None for "=").
    settings
        visit concept id -> setting.
    sexes
        gender concept id -> female / male.
    events
        (table, event) -> concept ids.
    kidney_death
        DEATH.cause concept ids that make a death a kidney death.
    """

    labs: dict[int, str]
    units: dict[int, str]
    operators: dict[int, str | None]
    settings: dict[int, str]
    sexes: dict[int, str]
    events: dict[tuple[str, str], list[int]] = field(default_factory=dict)
    kidney_death: list[int] = field(default_factory=list)


def check_unit_codes(spec: OmopSource) -> None:
    """Every configured UCUM code must be a unit kidneycohort can convert."""
    for code in spec.units:
        if not any(_converts(analyte, code) for analyte in units.ANALYTES):
            raise ConfigError(
                f"data.source.units: '{code}' is not a unit of creatinine, cystatin C or "
                "UACR that kidneycohort converts; remove it"
            )


def _converts(analyte: str, unit: str) -> bool:
    try:
        units.conversion_factor(analyte, unit)
    except Exception:  # UnknownUnitError and friends: not a unit of this analyte
        return False
    return True


def _lookup(con: OmopConnection, pairs: Iterable[tuple[str, str]]) -> pl.DataFrame:
    wanted: dict[str, set[str]] = {}
    for vocabulary, code in pairs:
        wanted.setdefault(vocabulary, set()).add(code)
    clauses = [
        f"(vocabulary_id = {quote_literal(v)} AND concept_code IN "
        f"({', '.join(quote_literal(c) for c in sorted(codes))}))"
        for v, codes in sorted(wanted.items())
    ]
    schema = quote_identifier(con.spec.vocabulary_schema_name)
    sql = (
        "SELECT CAST(concept_id AS BIGINT) AS concept_id, vocabulary_id, concept_code "
        f"FROM {schema}.{quote_identifier('concept')} WHERE " + " OR ".join(clauses)
    )
    return con.frame(sql, "CONCEPT")


def _ids(
    found: pl.DataFrame, vocabulary: str, codes: Iterable[str], setting: str
) -> dict[str, list[int]]:
    out: dict[str, list[int]] = {}
    for code in codes:
        ids = found.filter(
            (pl.col("vocabulary_id") == vocabulary) & (pl.col("concept_code") == code)
        )["concept_id"].to_list()
        if not ids:
            raise InputDataError(
                f"{setting}: concept code '{code}' of vocabulary {vocabulary} is not in the "
                "database's CONCEPT table; load that vocabulary or remove the code"
            )
        out[code] = ids
    return out


def resolve_vocabulary(con: OmopConnection) -> Vocabulary:
    """Resolve every configured code of ``con.spec`` through CONCEPT.

    Raises
    ------
    InputDataError
        A configured code absent from CONCEPT, naming the setting, vocabulary and code.
    """
    spec = con.spec
    pairs = [(LOINC, c) for codes in spec.labs.values() for c in codes]
    pairs += [(UCUM, c) for c in spec.units]
    pairs += [(GENDER, c) for c in spec.sex_codes]
    if spec.read_settings:
        pairs += [(VISIT, c) for c in spec.visit_settings]
    pairs += [(OPERATOR, c) for c in OPERATOR_QUALIFIERS]
    pairs += [(e.vocabulary, c) for e in spec.events for c in e.codes]
    if spec.kidney_death_causes is not None:
        pairs += [(spec.kidney_death_causes.vocabulary, c) for c in spec.kidney_death_causes.codes]
    found = _lookup(con, pairs)

    labs: dict[int, str] = {
        concept: analyte
        for analyte, codes in spec.labs.items()
        for ids in _ids(found, LOINC, codes, f"data.source.labs.{analyte}").values()
        for concept in ids
    }
    unit_ids = {
        concept: code
        for code, ids in _ids(found, UCUM, spec.units, "data.source.units").items()
        for concept in ids
    }
    sexes = {
        concept: spec.sex_codes[code]
        for code, ids in _ids(found, GENDER, spec.sex_codes, "data.source.sex_codes").items()
        for concept in ids
    }
    settings: dict[int, str] = {}
    if spec.read_settings:
        settings = {
            concept: spec.visit_settings[code]
            for code, ids in _ids(
                found, VISIT, spec.visit_settings, "data.source.visit_settings"
            ).items()
            for concept in ids
        }
    operators: dict[int, str | None] = {}
    for code, qualifier in OPERATOR_QUALIFIERS.items():
        ids = found.filter(
            (pl.col("vocabulary_id") == OPERATOR) & (pl.col("concept_code") == code)
        )["concept_id"].to_list()
        if not ids:
            logger.info("OMOP vocabulary has no operator concept '%s'", code)
        operators |= dict.fromkeys(ids, qualifier)
    events: dict[tuple[str, str], list[int]] = {}
    for i, e in enumerate(spec.events):
        by_code = _ids(found, e.vocabulary, e.codes, f"data.source.events[{i}]")
        events.setdefault((e.table, e.event), []).extend(c for v in by_code.values() for c in v)
    kidney_death: list[int] = []
    if spec.kidney_death_causes is not None:
        causes = spec.kidney_death_causes
        kidney_death = [
            c
            for v in _ids(
                found, causes.vocabulary, causes.codes, "data.source.kidney_death_causes"
            ).values()
            for c in v
        ]
    logger.info(
        "OMOP vocabulary: %d lab, %d unit, %d operator concepts resolved",
        len(labs),
        len(unit_ids),
        len(operators),
    )
    return Vocabulary(
        labs=labs,
        units=unit_ids,
        operators=operators,
        settings=settings,
        sexes=sexes,
        events=events,
        kidney_death=kidney_death,
    )
