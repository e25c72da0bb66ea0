"""Write a run's patient-level outputs back to a results schema of the OMOP database.

``write_results(run_dir, source, schema)`` copies ``egfr``, ``baseline``, ``slopes`` and
``endpoints`` of a finished run folder into tables ``kc_egfr``, ``kc_baseline``,
``kc_slopes`` and ``kc_endpoints`` of ``schema`` (created when missing), each row tagged
with the study name and the run id from ``manifest.json``, and records the run in
``kc_runs``. Everything happens in one transaction: the study's rows of the previous run
are deleted and the new ones inserted, so a reader sees either the old run or the new
one, never a mixture, and a failure leaves the old rows in place.
"""

from __future__ import annotations

import datetime as dt
import json
import logging
import os
from pathlib import Path
from typing import Any, Final

import polars as pl
import pyarrow as pa

from kidneycohort.errors import ConfigError, InputDataError
from kidneycohort.io.omop._connect import _secrets_of, quote_identifier, quote_literal, scrub
from kidneycohort.io.omop._spec import OmopSource

__all__ = ["RESULT_TABLES", "write_results"]

logger = logging.getLogger(__name__)

RESULT_TABLES: Final = ("egfr", "baseline", "slopes", "endpoints")
_TYPES: Final = {
    pl.String: "TEXT",
    pl.Date: "DATE",
    pl.Float64: "DOUBLE PRECISION",
    pl.Float32: "DOUBLE PRECISION",
    pl.Int64: "BIGINT",
    pl.Int32: "BIGINT",
    pl.Int16: "BIGINT",
    pl.Int8: "BIGINT",
    pl.UInt32: "BIGINT",
    pl.Boolean: "BOOLEAN",
}


def _sql_type(dtype: pl.DataType) -> str:
    if isinstance(dtype, pl.Datetime):
        return "TIMESTAMP"
    for kind, name in _TYPES.items():
        if dtype == kind:
            return name
    return "TEXT"


def _prepared(frame: pl.DataFrame, study: str, run_id: str) -> pl.DataFrame:
    """Tagged rows with types both engines store (small ints widened, odd types as text)."""
    out = frame.select(
        pl.lit(study).alias("study"),
        pl.lit(run_id).alias("run_id"),
        *[
            pl.col(c).cast(pl.Int64)
            if t.is_integer()
            else pl.col(c).cast(pl.Float64)
            if t.is_float()
            else pl.col(c)
            if t in (pl.String, pl.Date, pl.Boolean) or isinstance(t, pl.Datetime)
            else pl.col(c).cast(pl.String)
            for c, t in frame.schema.items()
        ],
    )
    return out


def _run_facts(run_dir: Path) -> tuple[str, str, str]:
    path = run_dir / "manifest.json"
    if not path.is_file():
        raise InputDataError(f"{run_dir}: no manifest.json; write results only of a finished run")
    manifest = json.loads(path.read_text(encoding="utf-8"))
    run_id = manifest.get("run_id")
    if not run_id:
        raise InputDataError(f"{path}: no run_id; re-run with this kidneycohort version")
    study = str(manifest.get("study", {}).get("name") or "")
    return str(run_id), study, str(manifest.get("created_utc", ""))


class _Writer:
    """One read-write transaction on PostgreSQL (ADBC) or DuckDB."""

    def __init__(self, spec: OmopSource) -> None:
        self.spec = spec
        self.secrets: list[str] = []
        if spec.database == "duckdb":
            import duckdb

            self.con: Any = duckdb.connect(str(spec.path))
            self.con.execute("BEGIN TRANSACTION")
        else:
            import adbc_driver_postgresql.dbapi as adbc_pg

            conninfo = (
                f"service={spec.service}"
                if spec.service
                else os.environ.get(str(spec.connection_env), "")
            )
            if not conninfo:
                raise ConfigError(
                    f"data.source.connection_env: environment variable {spec.connection_env} "
                    "is not set"
                )
            self.secrets = _secrets_of(conninfo)
            try:
                self.con = adbc_pg.connect(conninfo)
            except Exception as exc:  # driver errors, re-worded without secrets
                raise InputDataError(
                    f"{spec.where()}: cannot connect to write results: "
                    f"{scrub(str(exc), self.secrets)}"
                ) from None

    def run(self, sql: str) -> None:
        if self.spec.database == "duckdb":
            self.con.execute(sql)
            return
        with self.con.cursor() as cur:
            cur.execute(sql)

    def append(self, schema: str, table: str, data: pa.Table) -> None:
        if self.spec.database == "duckdb":
            arrow_table = data  # noqa: F841 - read by name in the SQL below
            self.con.execute(
                f"INSERT INTO {quote_identifier(schema)}.{quote_identifier(table)} "
                "SELECT * FROM arrow_table"
            )
            return
        with self.con.cursor() as cur:
            cur.adbc_ingest(table, data, mode="append", db_schema_name=schema)

    def commit(self) -> None:
        self.con.commit() if self.spec.database != "duckdb" else self.con.execute("COMMIT")

    def rollback(self) -> None:
        try:
            self.con.rollback() if self.spec.database != "duckdb" else self.con.execute("ROLLBACK")
        finally:
            self.con.close()


def write_results(
    run_dir: str | Path, source: OmopSource, schema: str = "kidneycohort_results"
) -> dict[str, int]:
    """Replace the study's rows in ``schema`` with the run's patient-level outputs.

    Parameters
    ----------
    run_dir
        A finished run folder (``manifest.json`` with ``run_id``, ``egfr.parquet``, ...).
    source
        The OMOP source the run read (the same database receives the results).
    schema
        The results schema (a plain identifier; created when missing).

    Returns
    -------
    dict
        Rows written per table.

    Raises
    ------
    InputDataError
        No manifest or run id, a refused connection (secrets never shown), or a write
        that failed (the transaction is rolled back: the previous rows stay).
    """
    run = Path(run_dir)
    quote_identifier(schema)
    run_id, study, created = _run_facts(run)
    frames = {
        name: _prepared(pl.read_parquet(run / f"{name}.parquet"), study, run_id)
        for name in RESULT_TABLES
        if (run / f"{name}.parquet").is_file()
    }
    writer = _Writer(source)
    written: dict[str, int] = {}
    try:
        writer.run(f"CREATE SCHEMA IF NOT EXISTS {quote_identifier(schema)}")
        runs = pl.DataFrame(
            {
                "study": [study],
                "run_id": [run_id],
                "created_utc": [created],
                "written_utc": [dt.datetime.now(dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")],
                "tables": [", ".join(frames)],
            }
        )
        for name, frame in {**{f"kc_{k}": v for k, v in frames.items()}, "kc_runs": runs}.items():
            columns = ", ".join(
                f"{quote_identifier(c)} {_sql_type(t)}" for c, t in frame.schema.items()
            )
            target = f"{quote_identifier(schema)}.{quote_identifier(name)}"
            writer.run(f"CREATE TABLE IF NOT EXISTS {target} ({columns})")
            writer.run(f"DELETE FROM {target} WHERE study = {quote_literal(study)}")
            writer.append(schema, name, frame.to_arrow())
            written[name] = frame.height
        writer.commit()
    except (ConfigError, InputDataError):
        writer.rollback()
        raise
    except Exception as exc:  # driver errors: roll back, one line, secrets removed
        writer.rollback()
        raise InputDataError(
            f"{source.where()}: writing results to schema {schema} failed, nothing changed: "
            f"{scrub(str(exc), writer.secrets)}"
        ) from None
    writer.con.close()
    logger.info("results of run %s (%s) written to %s: %s", run_id, study, schema, written)
    return written
