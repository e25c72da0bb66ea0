"""OMOP Common Data Model v5.4 as a source: PostgreSQL (or a DuckDB file) in, canonical
raw tables out; and an optional results sink for a run's patient-level outputs.

``read_omop(OmopSource(...))`` resolves the configured LOINC, UCUM and event codes
through the database's CONCEPT table, pushes the selection into SQL, streams the result
as Arrow batches and maps it onto the tables the harmonise stage reads.
"""

from kidneycohort.io.omop._connect import OmopConnection, quote_identifier, quote_literal
from kidneycohort.io.omop._read import OmopTables, read_omop
from kidneycohort.io.omop._results import RESULT_TABLES, write_results
from kidneycohort.io.omop._spec import CodeSet, CohortGroups, EventConcepts, OmopSource
from kidneycohort.io.omop._vocabulary import Vocabulary, resolve_vocabulary

__all__ = [
    "RESULT_TABLES",
    "CodeSet",
    "CohortGroups",
    "EventConcepts",
    "OmopConnection",
    "OmopSource",
    "OmopTables",
    "Vocabulary",
    "quote_identifier",
    "quote_literal",
    "read_omop",
    "resolve_vocabulary",
    "write_results",
]
