"""Results sink: a run's patient-level outputs replace the previous run's rows atomically."""

from __future__ import annotations

import datetime as dt
import json
from collections.abc import Iterator
from pathlib import Path

import duckdb
import polars as pl
import pytest

from kidneycohort.errors import InputDataError
from kidneycohort.io.omop import OmopSource
from kidneycohort.io.omop._results import write_results
from tests._fixtures.omop import write_tiny_cdm
from tests._fixtures.postgres import fresh_database, server_uri


def run_folder(folder: Path, run_id: str, egfr_values: list[float], broken: bool = False) -> Path:
    """A minimal finished run: manifest with run id and study, four patient tables."""
    folder.mkdir(parents=True, exist_ok=True)
    manifest = {
        "run_id": run_id,
        "study": {"name": "Invented study"},
        "created_utc": "2025-01-01T00:00:00Z",
    }
    (folder / "manifest.json").write_text(json.dumps(manifest), encoding="utf-8")
    n = len(egfr_values)
    pl.DataFrame(
        {
            "patient_id": [f"p{i}" for i in range(n)],
            "sample_date": [dt.date(2024, 1, 1)] * n,
            "equation": ["ckd_epi_2021_cr"] * n,
            "egfr": egfr_values,
        }
    ).write_parquet(folder / "egfr.parquet")
    pl.DataFrame({"patient_id": ["p0"], "baseline_egfr": [60.0]}).write_parquet(
        folder / "baseline.parquet"
    )
    pl.DataFrame({"patient_id": ["p0"], "slope_per_year": [-1.5]}).write_parquet(
        folder / "slopes.parquet"
    )
    # a broken run: the endpoints table's column types differ from the stored table's
    endpoints = {"patient_id": ["p0"], "event": ["yes" if broken else 1]}
    pl.DataFrame(endpoints).write_parquet(folder / "endpoints.parquet")
    return folder


def rows(con: duckdb.DuckDBPyConnection, table: str) -> list[tuple]:
    return con.execute(f"SELECT * FROM kidneycohort_results.{table} ORDER BY 3").fetchall()


def test_second_run_replaces_the_first_in_one_transaction(tmp_path: Path) -> None:
    cdm = write_tiny_cdm(tmp_path / "results_cdm.duckdb")
    source = OmopSource(database="duckdb", path=str(cdm))
    written = write_results(run_folder(tmp_path / "run1", "run-1", [50.0, 55.0]), source)
    assert written == {
        "kc_egfr": 2,
        "kc_baseline": 1,
        "kc_slopes": 1,
        "kc_endpoints": 1,
        "kc_runs": 1,
    }
    write_results(run_folder(tmp_path / "run2", "run-2", [40.0, 45.0, 47.0]), source)
    with duckdb.connect(str(cdm), read_only=True) as con:
        egfr = rows(con, "kc_egfr")
        assert [r[1] for r in egfr] == ["run-2"] * 3  # the first run's rows are gone
        assert [r[5] for r in egfr] == [40.0, 45.0, 47.0]
        assert [r[1] for r in rows(con, "kc_runs")] == ["run-2"]
    # a failing write (endpoint event text into the stored integer column) changes nothing
    with pytest.raises(
        InputDataError,
        match=r"writing results to schema kidneycohort_results failed, nothing changed",
    ):
        write_results(run_folder(tmp_path / "run3", "run-3", [1.0], broken=True), source)
    with duckdb.connect(str(cdm), read_only=True) as con:
        assert [r[1] for r in rows(con, "kc_egfr")] == ["run-2"] * 3
        assert [r[1] for r in rows(con, "kc_runs")] == ["run-2"]


def test_a_run_without_run_id_is_refused(tmp_path: Path) -> None:
    folder = run_folder(tmp_path / "old", "x", [1.0])
    (folder / "manifest.json").write_text(json.dumps({"study": {"name": "s"}}), encoding="utf-8")
    cdm = write_tiny_cdm(tmp_path / "cdm2.duckdb")
    with pytest.raises(InputDataError, match=r"manifest\.json: no run_id"):
        write_results(folder, OmopSource(database="duckdb", path=str(cdm)))


@pytest.fixture
def postgres(monkeypatch: pytest.MonkeyPatch) -> Iterator[str]:
    server_uri()
    with fresh_database("kc_results") as uri:
        monkeypatch.setenv("KC_RESULTS_URI", uri)
        yield uri


def test_postgresql_sink_is_atomic(postgres: str, tmp_path: Path) -> None:
    import adbc_driver_postgresql.dbapi as adbc_pg

    source = OmopSource(connection_env="KC_RESULTS_URI")
    write_results(run_folder(tmp_path / "a", "run-a", [50.0, 55.0]), source)
    write_results(run_folder(tmp_path / "b", "run-b", [41.0]), source)
    with pytest.raises(InputDataError, match=r"nothing changed"):
        write_results(run_folder(tmp_path / "c", "run-c", [1.0], broken=True), source)
    with adbc_pg.connect(postgres) as con, con.cursor() as cur:
        cur.execute("SELECT run_id, egfr FROM kidneycohort_results.kc_egfr ORDER BY egfr")
        assert cur.fetchall() == [("run-b", 41.0)]
        cur.execute("SELECT run_id FROM kidneycohort_results.kc_runs")
        assert cur.fetchall() == [("run-b",)]
