"""OMOP CDM reader on a tiny hand-made DuckDB database: mapping rules and bad input.

Expected values are read off the rows in ``tests/_omop_fixtures.py``. Rules checked
against the OMOP CDM v5.4 field specifications: ``operator_concept_id`` holds <, <=, =,
>=, > ("Meas Value Operator"); an unmapped unit has ``unit_concept_id`` 0 and keeps
``unit_source_value``; ``value_source_value`` holds the value as reported.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import polars as pl
import pytest

from kidneycohort.errors import ConfigError, InputDataError
from kidneycohort.harmonize import harmonize_tables
from kidneycohort.io.omop import OmopSource, read_omop
from tests._fixtures.omop import LOCAL_UNIT_ID, write_tiny_cdm


@pytest.fixture(scope="module")
def cdm(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return write_tiny_cdm(tmp_path_factory.mktemp("omop") / "tiny_cdm.duckdb")


def spec(path: Path, **fields: object) -> OmopSource:
    return OmopSource(database="duckdb", path=str(path), **fields)  # type: ignore[arg-type]


def test_measurements_map_onto_raw_labs(cdm: Path) -> None:
    labs = read_omop(spec(cdm)).labs.sort("source_row")
    # measurement 10 has a concept outside the lab sets: not selected by the query
    assert labs["source_row"].to_list() == list(range(1, 10))
    assert labs["analyte"].to_list() == ["creatinine"] * 8 + ["uacr"]
    assert labs["value"].to_list() == [
        "1.1",
        "97.0",
        "see comment",
        "0.2",
        "1.3",
        "1.4",
        "1.5",
        "1.2",
        "30.0",
    ]
    assert labs["qualifier"].to_list() == [None, None, None, "<", None, None, None, None, None]
    # unit: the UCUM code; concept 0 and a non-UCUM concept fall back to the source text
    assert labs["unit"].to_list() == [
        "mg/dL",
        "umol/L",
        "mg/dL",
        "mg/dL",
        "mg/dl",
        "mg/dL",
        None,
        "mg/dL",
        "mg/g",
    ]
    assert labs["setting"].to_list() == ["outpatient", "inpatient", *[None] * 6, "emergency"]
    assert labs["patient_id"].to_list() == ["1", "1", "1", "1", "2", "2", "2", "9", "2"]
    assert labs["sample_date"][0] == dt.datetime(2022, 3, 1, 9, 30)
    notes = dict(zip(labs["source_row"], labs["assumption"], strict=True))
    assert notes[3] == "value from value_source_value"
    assert notes[5] == "unit concept 0 (unmapped); unit_source_value used"
    assert notes[6] == (
        f"unit concept {LOCAL_UNIT_ID} (vocabulary Local units) has no UCUM code; "
        "unit_source_value used"
    )
    assert notes[1] is None


def test_harmonise_counts_each_problem_row_with_a_reason(cdm: Path) -> None:
    tables = read_omop(spec(cdm))
    result = harmonize_tables(tables.labs, tables.patients, tables.events)
    reasons = dict(
        result.rejected.select("source_row", "reason").iter_rows()  # measurement_id -> reason
    )
    assert reasons == {3: "not_a_result", 7: "missing_unit", 8: "unknown_patient"}
    accounting = result.accounting.filter(pl.col("table") == "labs").row(0, named=True)
    assert accounting["rows_read"] == 9
    assert accounting["rows_used"] + accounting["rows_rejected"] + accounting["rows_merged"] == 9
    used = result.labs.sort("source_row")
    # 97 umol/L -> 97 / 88.4 mg/dL (KDIGO 2012 conversion factor)
    assert used.filter(pl.col("source_row") == 2)["value"][0] == pytest.approx(97 / 88.4)
    assert used.filter(pl.col("source_row") == 4)["qualifier"][0] == "<"
    report = dict(
        tables.report.filter(pl.col("table") == "MEASUREMENT").select("item", "rows").iter_rows()
    )
    assert report["person not in PERSON (orphan)"] == 1
    assert report["value from value_source_value"] == 1


def test_patients_from_person_and_observation_period(cdm: Path) -> None:
    patients = read_omop(spec(cdm, patient_id="person_source_value")).patients.sort("patient_id")
    assert patients["patient_id"].to_list() == ["P-1", "P-2"]
    assert patients["sex"].to_list() == ["female", "male"]
    # P-2 has only a year of birth: 1 July by the default 'middle' rule, recorded
    assert patients["birth_date"].to_list() == [dt.date(1960, 5, 17), dt.date(1955, 7, 1)]
    assert patients["assumption"][1] == "birth date imputed from year_of_birth (middle)"
    first = read_omop(spec(cdm, birth_date_rule="first")).patients.sort("patient_id")
    assert first["birth_date"][1] == dt.date(1955, 1, 1)
    # without a cohort the index date is the start of the first observation period
    assert patients["index_date"].to_list() == [dt.date(2022, 3, 1)] * 2
    assert patients["end_of_followup"].to_list() == [dt.date(2024, 1, 1), dt.date(2023, 6, 30)]


def test_date_range_and_settings_are_pushed_down(cdm: Path) -> None:
    labs = read_omop(
        spec(
            cdm, first_date=dt.date(2022, 3, 2), last_date=dt.date(2022, 3, 4), read_settings=False
        )
    ).labs
    assert sorted(labs["source_row"].to_list()) == [2, 3, 4]
    assert labs["setting"].null_count() == labs.height


def test_missing_table_is_named(tmp_path: Path) -> None:
    path = write_tiny_cdm(tmp_path / "no_death.duckdb", drop=("death",))
    with pytest.raises(
        InputDataError, match=r"table cdm\.death not found; check data\.source\.cdm_schema"
    ):
        read_omop(spec(path))


def test_missing_schema_is_named(cdm: Path) -> None:
    with pytest.raises(
        InputDataError, match=r"schema 'cmd' not found or empty \(did you mean 'cdm'\?\)"
    ):
        read_omop(spec(cdm, cdm_schema="cmd"))


def test_code_absent_from_the_vocabulary_is_named(cdm: Path) -> None:
    with pytest.raises(
        InputDataError,
        match=r"data\.source\.labs\.cystatin_c: concept code '99999-9' of vocabulary LOINC "
        r"is not in the database's CONCEPT table",
    ):
        read_omop(spec(cdm, labs={"creatinine": ["2160-0"], "cystatin_c": ["99999-9"]}))
    with pytest.raises(InputDataError, match=r"data\.source\.units: concept code 'ug/mL'"):
        read_omop(spec(cdm, units=["mg/dL", "ug/mL"]))


def test_unit_without_conversion_and_bad_identifiers_are_config_errors(cdm: Path) -> None:
    with pytest.raises(ConfigError, match=r"data\.source\.units: 'U/L' is not a unit"):
        read_omop(spec(cdm, units=["U/L"]))
    with pytest.raises(ConfigError, match=r"cdm_schema.*not a plain SQL identifier"):
        spec(cdm, cdm_schema='cdm"; drop table person; --')
    with pytest.raises(ConfigError, match=r"exactly one of connection_env or service"):
        OmopSource()
