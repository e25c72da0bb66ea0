"""The PostgreSQL test server: its URI, fresh databases, and loading a synthetic OMOP CDM.

``.ci/run`` starts a throwaway cluster (``.ci/postgres_test_server.sh``) and exports its
URI in ``KIDNEYCOHORT_TEST_POSTGRES_URI``. Outside CI without that variable the tests
that need the server skip, saying how to start one; with ``CI=true`` they fail instead.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import urllib.parse
import uuid
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import pytest

URI_VARIABLE = "KIDNEYCOHORT_TEST_POSTGRES_URI"


def server_uri() -> str:
    """The test server's URI, or a skip (a failure under CI) when there is none."""
    uri = os.environ.get(URI_VARIABLE)
    if uri:
        return uri
    reason = (
        f"no PostgreSQL test server: {URI_VARIABLE} is not set; start one with "
        '`eval "$(bash .ci/postgres_test_server.sh start)"` (.ci/run does this)'
    )
    if os.environ.get("CI", "").lower() == "true":
        pytest.fail(f"CI=true but {reason}")
    pytest.skip(reason)


def with_database(uri: str, name: str) -> str:
    """``uri`` pointing at database ``name`` instead."""
    parts = urllib.parse.urlparse(uri)
    return urllib.parse.urlunparse(parts._replace(path=f"/{name}"))


def _admin(uri: str, sql: str) -> None:
    import adbc_driver_postgresql.dbapi as adbc_pg

    with adbc_pg.connect(uri, autocommit=True) as con, con.cursor() as cur:
        cur.execute(sql)


@contextmanager
def fresh_database(prefix: str) -> Iterator[str]:
    """A new empty database on the test server (dropped afterwards); yields its URI."""
    uri = server_uri()
    name = f"{prefix}_{uuid.uuid4().hex[:10]}"
    _admin(uri, f'CREATE DATABASE "{name}"')
    try:
        yield with_database(uri, name)
    finally:
        _admin(uri, f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


def libpq_environment(uri: str) -> dict[str, str]:
    """The process environment with ``uri``'s parts as libpq variables (PGHOST, ...), so
    that no password is ever on a command line or in a failing command's message."""
    parts = urllib.parse.urlparse(uri)
    return {
        **os.environ,
        "PGHOST": parts.hostname or "",
        "PGPORT": str(parts.port or 5432),
        "PGUSER": urllib.parse.unquote(parts.username or ""),
        "PGPASSWORD": urllib.parse.unquote(parts.password or ""),
        "PGDATABASE": parts.path.lstrip("/"),
    }


def load_omop_folder(folder: Path, uri: str) -> None:
    """Load a synthetic ``omop/`` folder with its documented one-line psql command."""
    psql = shutil.which("psql")
    if psql is None:
        if os.environ.get("CI", "").lower() == "true":
            pytest.fail("CI=true but psql is not installed")
        pytest.skip("psql (PostgreSQL client) is not installed")
    done = subprocess.run(
        [psql, "-q", "-v", "ON_ERROR_STOP=1", "-f", "load_postgresql.sql"],
        cwd=folder,
        env=libpq_environment(uri),
        capture_output=True,
        text=True,
    )
    if done.returncode != 0:
        pytest.fail(f"psql could not load {folder}: {done.stderr.strip()}")
