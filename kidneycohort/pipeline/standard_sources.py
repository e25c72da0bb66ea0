"""Study sources in a standard layout (config ``data.source``): OMOP CDM or CDISC SDTM.

A config names one ``source`` with a ``kind`` instead of the ``patients`` / ``labs`` /
``events`` files::

    data:
      source:
        kind: omop                          # or sdtm
        connection_env: OMOP_DATABASE_URI    # the URI stays in the environment
        cdm_schema: cdm
        cohort: {groups: {1: exposed, 2: unexposed}}
        results_schema: kidneycohort_results # optional: write the run's outputs back

This module is the wiring between such a source and the runner: checking it before a
run, reading it into the run's ``patients``, ``raw_labs`` and ``events`` tables,
describing it in the manifest (never a secret: the variable's or service's name only),
anchoring file paths to the config folder, and writing results back after a run.
"""

from __future__ import annotations

import logging
import os
from pathlib import Path
from typing import Annotated, Any

import polars as pl
from pydantic import Field

from kidneycohort.errors import InputDataError
from kidneycohort.io.omop import OmopConnection, OmopSource, read_omop
from kidneycohort.io.omop._read import _check_catalogue
from kidneycohort.io.omop._results import write_results
from kidneycohort.io.omop._vocabulary import check_unit_codes, resolve_vocabulary
from kidneycohort.io.sdtm import SdtmSource, read_domain, read_sdtm
from kidneycohort.run_folder import sha256_of

__all__ = [
    "StandardSource",
    "anchor",
    "check_source",
    "input_records",
    "read_source",
    "write_results_after_run",
]

logger = logging.getLogger(__name__)

StandardSource = Annotated[OmopSource | SdtmSource, Field(discriminator="kind")]


def anchor(source: OmopSource | SdtmSource, config_dir: Path) -> OmopSource | SdtmSource:
    """The source with its file or folder resolved against the config folder."""
    if isinstance(source, SdtmSource):
        folder = Path(source.folder)
        if not folder.is_absolute():
            return source.model_copy(update={"folder": os.path.abspath(config_dir / folder)})
        return source
    if source.path is not None and not Path(source.path).is_absolute():
        return source.model_copy(update={"path": os.path.abspath(config_dir / source.path)})
    return source


def check_source(source: OmopSource | SdtmSource) -> dict[str, list[str]]:
    """Check the source without reading its rows: the connection, schemas, tables and
    codes of an OMOP database; the folder and domains of SDTM. Returns table -> columns."""
    if isinstance(source, SdtmSource):
        if not Path(source.folder).is_dir():
            raise InputDataError(f"data.source.folder: {source.where()}: folder not found")
        out = {}
        for domain in ("dm", "lb"):
            frame = read_domain(source, domain)
            assert frame is not None
            out[domain.upper()] = frame.columns
        return out
    check_unit_codes(source)
    with OmopConnection(source) as con:
        _check_catalogue(con)
        vocabulary = resolve_vocabulary(con)
    return {"MEASUREMENT concepts": [str(c) for c in sorted(vocabulary.labs)]}


def read_source(source: OmopSource | SdtmSource) -> dict[str, pl.DataFrame]:
    """The run's ``patients``, ``raw_labs`` and ``events`` read from the source."""
    if isinstance(source, SdtmSource):
        sdtm = read_sdtm(source)
        return {"patients": sdtm.patients, "raw_labs": sdtm.labs, "events": sdtm.events}
    omop = read_omop(source)
    for table, item, rows in omop.report.iter_rows():
        logger.info("OMOP read: %s: %s: %d", table, item, rows)
    return {"patients": omop.patients, "raw_labs": omop.labs, "events": omop.events}


def input_records(source: OmopSource | SdtmSource, tables: dict[str, Any]) -> list[dict[str, Any]]:
    """Manifest ``inputs`` of the source: domain files with SHA-256 (SDTM), or the
    database named by engine, schema and the connection's variable or service (OMOP)."""
    rows = {
        name: int(frame.height)
        for name, frame in tables.items()
        if name in ("patients", "raw_labs", "events") and isinstance(frame, pl.DataFrame)
    }
    if isinstance(source, SdtmSource):
        records = []
        for domain in ("dm", "lb", "ds", "ex", source.event_domain.lower()):
            path = source.file(domain)
            if path is not None:
                records.append(
                    {"table": f"sdtm.{domain}", "path": path.name, "sha256": sha256_of(path)}
                )
        return [*records, {"table": "rows read", **rows}]
    where = {
        "table": "omop",
        "database": source.database,
        "cdm_schema": source.cdm_schema,
        "vocabulary_schema": source.vocabulary_schema_name,
        "connection": f"${source.connection_env}"
        if source.connection_env
        else (f"service {source.service}" if source.service else str(source.path)),
    }
    if source.database == "duckdb" and source.path:
        where["sha256"] = sha256_of(Path(source.path))
    return [{**where, **rows}]


def write_results_after_run(source: OmopSource | SdtmSource | None, run_dir: Path) -> None:
    """Write the finished run's outputs to the OMOP results schema, when one is set."""
    if isinstance(source, OmopSource) and source.results_schema:
        write_results(run_dir, source, source.results_schema)
