"""One synthetic cohort, four layouts, the same answers.

The dirty synthetic trial is written once as canonical Parquet, as an OMOP CDM database
(DuckDB file, and loaded into PostgreSQL with the documented psql command) and as SDTM
(XPT); each is read and run through harmonise -> eGFR -> baseline -> slopes ->
endpoints. The eGFR, slope and endpoint tables must be identical (not close: identical).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import polars as pl
import pytest
from polars.testing import assert_frame_equal

from kidneycohort.baseline import BaselineRule, egfr_baseline
from kidneycohort.egfr import compute_egfr
from kidneycohort.endpoints import derive_endpoints, usual_kidney_composite
from kidneycohort.harmonize import harmonize_tables
from kidneycohort.io.omop import OmopSource, read_omop
from kidneycohort.io.sdtm import SdtmSource, read_sdtm
from kidneycohort.slopes import SlopeRule, egfr_slopes
from kidneycohort.synthetic import write_cohort
from tests._fixtures.postgres import fresh_database, load_omop_folder, server_uri

EQUATIONS = ["ckd_epi_2021_cr", "ckd_epi_2021_crcys"]
ARMS = {1: "placebo", 2: "active"}
OMOP = {"cohort": {"groups": ARMS}, "patient_id": "person_source_value"}


def derive(patients: Any, labs: Any, events: Any) -> dict[str, pl.DataFrame]:
    clean = harmonize_tables(labs, patients, events)
    egfr = compute_egfr(clean.labs, clean.patients, equations=EQUATIONS)
    base = egfr_baseline(egfr, BaselineRule(method="mean_last_n", n=2, window_start_days=-42))
    slopes = egfr_slopes(egfr, SlopeRule(min_values=3, min_span_years=1.0))
    endpoints = derive_endpoints(
        egfr,
        base,
        clean.patients,
        clean.events,
        definitions=usual_kidney_composite(decline_percent=40),
        equation="ckd_epi_2021_cr",
        data_cut="2025-09-01",
    )
    return {
        "egfr": egfr.sort("patient_id", "sample_datetime", "equation"),
        "slopes": slopes.sort("patient_id", "equation"),
        "endpoints": endpoints.sort("patient_id", "endpoint"),
    }


@pytest.fixture(scope="module")
def written(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("parity")
    for fmt in ("omop", "sdtm"):  # both write the canonical Parquet files beside them
        write_cohort("synthetic/trial_two_arm_dirty.yaml", out, patients=250, seed=5, fmt=fmt)
    return out


@pytest.fixture(scope="module")
def from_parquet(written: Path) -> dict[str, pl.DataFrame]:
    return derive(
        pl.read_parquet(written / "patients.parquet"),
        pl.read_parquet(written / "labs.parquet"),
        pl.read_parquet(written / "events.parquet"),
    )


@pytest.fixture(scope="module")
def postgres_uri(written: Path) -> Iterator[str]:
    server_uri()
    with fresh_database("kc_parity") as uri:
        load_omop_folder(written / "omop", uri)
        yield uri


def _omop_duckdb(written: Path, _: pytest.MonkeyPatch) -> Any:
    return read_omop(
        OmopSource(database="duckdb", path=str(written / "omop" / "omop_cdm.duckdb"), **OMOP)
    )


def _sdtm(written: Path, _: pytest.MonkeyPatch) -> Any:
    return read_sdtm(SdtmSource(folder=str(written / "sdtm" / "xpt"), lab_setting="outpatient"))


def _sdtm_json(written: Path, _: pytest.MonkeyPatch) -> Any:
    return read_sdtm(SdtmSource(folder=str(written / "sdtm" / "json"), lab_setting="outpatient"))


READERS: dict[str, Callable[[Path, pytest.MonkeyPatch], Any]] = {
    "omop_duckdb": _omop_duckdb,
    "sdtm_xpt": _sdtm,
    "sdtm_dataset_json": _sdtm_json,
}


@pytest.mark.parametrize("layout", sorted(READERS))
def test_layouts_give_identical_tables(
    layout: str,
    written: Path,
    from_parquet: dict[str, pl.DataFrame],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    tables = READERS[layout](written, monkeypatch)
    got = derive(tables.patients, tables.labs, tables.events)
    for name, want in from_parquet.items():
        assert_frame_equal(got[name], want, check_exact=True)
    assert from_parquet["egfr"].height > 5000  # a real cohort, not an empty comparison
    assert int(from_parquet["endpoints"]["event"].fill_null(0).sum()) > 0


def test_omop_in_postgresql_gives_identical_tables(
    postgres_uri: str, from_parquet: dict[str, pl.DataFrame], monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("KC_PARITY_URI", postgres_uri)
    tables = read_omop(OmopSource(connection_env="KC_PARITY_URI", **OMOP))
    got = derive(tables.patients, tables.labs, tables.events)
    for name, want in from_parquet.items():
        assert_frame_equal(got[name], want, check_exact=True)
