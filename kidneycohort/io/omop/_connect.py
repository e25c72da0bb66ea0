"""Read-only connections to an OMOP database, streaming query results as Arrow batches.

PostgreSQL is reached through the ADBC PostgreSQL driver (libpq underneath, so
connection strings, URIs, the service file and ``~/.pgpass`` all work as with psql),
inside a read-only transaction; DuckDB files are opened read-only. Both hand results
over as Arrow record batches of bounded size, which the reader maps one at a time.

Every error a user can cause is one line naming the database by the environment
variable or service it came from, never by its connection string; any password in a
driver message is removed before it is shown.
"""

from __future__ import annotations

import logging
import os
import re
import urllib.parse
from collections.abc import Iterator, Mapping
from types import TracebackType
from typing import Any, Final

import polars as pl
import pyarrow as pa

from kidneycohort.errors import ConfigError, InputDataError, did_you_mean
from kidneycohort.io.omop._spec import IDENTIFIER, OmopSource

__all__ = ["OmopConnection", "_secrets_of", "quote_identifier", "quote_literal", "scrub"]

logger = logging.getLogger(__name__)

# Bytes per row assumed when turning the rows-per-batch option into the PostgreSQL
# driver's batch-size hint (a measurement row is about 60-100 bytes in Arrow).
_BYTES_PER_ROW: Final = 80


def quote_identifier(name: str) -> str:
    """``name`` as a quoted SQL identifier, after checking it is a plain identifier.

    >>> quote_identifier("cdm")
    '"cdm"'
    """
    if not IDENTIFIER.match(name):
        raise ConfigError(f"'{name}' is not a plain SQL identifier (letters, digits, '_')")
    return f'"{name}"'


def quote_literal(text: str) -> str:
    """``text`` as an SQL string literal (quotes doubled; standard-conforming strings).

    >>> quote_literal("it's")
    "'it''s'"
    """
    if "\x00" in text:
        raise ConfigError(f"{text!r}: a NUL character cannot be part of a code")
    return "'" + text.replace("'", "''") + "'"


def _secrets_of(conninfo: str) -> list[str]:
    """Passwords in a libpq URI or key=value string (to remove from any message)."""
    found = [conninfo]
    parsed = urllib.parse.urlparse(conninfo)
    if parsed.password:
        found += [parsed.password, urllib.parse.unquote(parsed.password)]
    found += re.findall(r"password\s*=\s*'((?:[^'\\]|\\.)*)'", conninfo)
    found += re.findall(r"password\s*=\s*([^\s']+)", conninfo)
    query = urllib.parse.parse_qs(parsed.query)
    found += query.get("password", [])
    return sorted({s for s in found if s}, key=len, reverse=True)


def scrub(message: str, secrets: list[str]) -> str:
    """First meaningful line of a driver message, with every secret removed."""
    for secret in secrets:
        message = message.replace(secret, "***")
    lines = [line.strip() for line in message.splitlines() if line.strip()]
    text = lines[0] if lines else message.strip()
    text = re.sub(r"^[A-Z_]+: \[libpq\] ", "", text)
    return text.replace("FATAL:  ", "").replace("ERROR:  ", "")


def duckdb_reader(con: Any, sql: str, batch_rows: int) -> pa.RecordBatchReader:
    """A DuckDB query result as an Arrow batch reader (no full copy of the result)."""
    relation = con.sql(sql)
    if hasattr(relation, "to_arrow_reader"):  # DuckDB 2
        return relation.to_arrow_reader(batch_rows)
    return relation.fetch_arrow_reader(batch_rows)  # DuckDB 1


class OmopConnection:
    """A read-only connection to an OMOP database (use as a context manager).

    Parameters
    ----------
    spec
        The source; its connection comes from ``connection_env``, ``service`` or ``path``.
    """

    def __init__(self, spec: OmopSource) -> None:
        self.spec = spec
        self.dialect = spec.database
        self._secrets: list[str] = []
        self._con: Any = None

    # ---- opening ------------------------------------------------------------------
    def __enter__(self) -> OmopConnection:
        if self.dialect == "duckdb":
            self._open_duckdb()
        else:
            self._open_postgresql()
        return self

    def __exit__(
        self,
        kind: type[BaseException] | None,
        value: BaseException | None,
        traceback: TracebackType | None,
    ) -> None:
        self.close()

    def _conninfo(self) -> str:
        spec = self.spec
        if spec.service is not None:
            return f"service={spec.service}"
        variable = str(spec.connection_env)
        value = os.environ.get(variable)
        if not value:
            raise ConfigError(
                f"data.source.connection_env: environment variable {variable} is not set; "
                "export the PostgreSQL connection URI in it"
            )
        return value

    def _open_postgresql(self) -> None:
        import adbc_driver_postgresql.dbapi as adbc_pg

        conninfo = self._conninfo()
        self._secrets = _secrets_of(conninfo)
        try:
            self._con = adbc_pg.connect(conninfo)
        except Exception as exc:  # the driver's own error classes; re-worded below
            raise InputDataError(
                f"{self.spec.where()}: cannot connect: {scrub(str(exc), self._secrets)}; "
                "check the server, the user and the password"
            ) from None
        # a read-only transaction: nothing this reader sends can change the database
        self._run("SET TRANSACTION READ ONLY")
        self._run("SET standard_conforming_strings = on")

    def _open_duckdb(self) -> None:
        import duckdb

        path = str(self.spec.path)
        if not os.path.isfile(path):
            raise InputDataError(f"{self.spec.where()}: file not found")
        try:
            self._con = duckdb.connect(path, read_only=True)
        except duckdb.Error as exc:
            raise InputDataError(
                f"{self.spec.where()}: cannot open as a DuckDB database "
                f"({str(exc).splitlines()[0]})"
            ) from None

    def close(self) -> None:
        """Close the connection (a PostgreSQL transaction is rolled back: it read only)."""
        if self._con is None:
            return
        try:
            if self.dialect == "postgresql":
                self._con.rollback()
            self._con.close()
        finally:
            self._con = None

    # ---- queries ------------------------------------------------------------------
    def _run(self, sql: str) -> None:
        cur = self._con.cursor()
        try:
            cur.execute(sql)
        finally:
            cur.close()

    def batches(self, sql: str, what: str) -> Iterator[pa.RecordBatch]:
        """Stream the result of ``sql`` as Arrow record batches of bounded size.

        ``what`` names the table read, for error messages.
        """
        try:
            if self.dialect == "duckdb":
                yield from duckdb_reader(self._con, sql, self.spec.batch_rows)
                return
            cur = self._con.cursor()
            try:
                cur.adbc_statement.set_options(
                    **{
                        "adbc.postgresql.batch_size_hint_bytes": str(
                            self.spec.batch_rows * _BYTES_PER_ROW
                        )
                    }
                )
                cur.execute(sql)
                yield from cur.fetch_record_batch()
            finally:
                cur.close()
        except (InputDataError, ConfigError):
            raise
        except Exception as exc:  # driver errors: one line, secrets removed
            raise InputDataError(
                f"{self.spec.where()}: reading {what} failed: {scrub(str(exc), self._secrets)}"
            ) from None

    def frame(self, sql: str, what: str) -> pl.DataFrame:
        """The whole result of ``sql`` as a polars frame (for small results)."""
        parts = [pl.from_arrow(b) for b in self.batches(sql, what)]
        frames = [p for p in parts if isinstance(p, pl.DataFrame)]
        if frames:
            return pl.concat(frames, how="vertical_relaxed")
        return self._empty(sql, what)

    def _empty(self, sql: str, what: str) -> pl.DataFrame:
        if self.dialect == "duckdb":
            reader = duckdb_reader(self._con, sql, self.spec.batch_rows)
            return pl.from_arrow(reader.schema.empty_table())  # type: ignore[return-value]
        cur = self._con.cursor()
        try:
            cur.execute(sql)
            return pl.from_arrow(cur.fetch_arrow_table())  # type: ignore[return-value]
        finally:
            cur.close()

    # ---- catalogue ----------------------------------------------------------------
    def require_tables(
        self, schema: str, tables: Mapping[str, tuple[str, ...]], setting: str
    ) -> None:
        """Check that ``schema`` has each table with its columns; one line names the first
        missing schema, table or column and the config setting to change."""
        rows = self.frame(
            "SELECT table_name, column_name FROM information_schema.columns "
            f"WHERE table_schema = {quote_literal(schema)}",
            f"the catalogue of schema {schema}",
        )
        if rows.is_empty():
            schemas = self.frame(
                "SELECT DISTINCT table_schema FROM information_schema.tables "
                "WHERE table_schema NOT IN ('pg_catalog', 'information_schema')",
                "the list of schemas",
            )["table_schema"].to_list()
            raise InputDataError(
                f"{self.spec.where()}: schema '{schema}' not found or empty"
                f"{did_you_mean(schema, schemas)}; set {setting} (schemas: "
                f"{', '.join(sorted(schemas)) or 'none'})"
            )
        have: dict[str, set[str]] = {}
        for table, column in rows.select(
            pl.col("table_name").str.to_lowercase(), pl.col("column_name").str.to_lowercase()
        ).iter_rows():
            have.setdefault(table, set()).add(column)
        for table, columns in tables.items():
            if table not in have:
                raise InputDataError(
                    f"{self.spec.where()}: table {schema}.{table} not found"
                    f"{did_you_mean(table, have)}; check {setting}"
                )
            for column in columns:
                if column not in have[table]:
                    raise InputDataError(
                        f"{self.spec.where()}: column {schema}.{table}.{column} not found; "
                        "the table does not follow OMOP CDM v5.4"
                    )
