"""ADSL, ADEGFR and their files: values by hand, SAS transport v5 limits, round trips.

Sources beside each check: ADaM IG v1.3 (BDS and ADSL variables, flags, ADY without day
0), SAS TS-140 (XPORT v5: 8-character names, 40-character labels, 200-byte values),
CDISC Dataset-JSON v1.1 specification (attributes, data types), KDIGO 2012 (G categories).
"""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

import pandas as pd
import polars as pl
import pytest

from kidneycohort.adam import (
    Variable,
    VisitWindow,
    adegfr_dataset,
    adsl_dataset,
    check_xpt_round_trip,
    write_adam,
)
from kidneycohort.adam._metadata import make_dataset
from kidneycohort.errors import ConfigError, InputDataError

INDEX = dt.date(2022, 1, 1)
EQ = "ckd_epi_2021_cr"


def day(n: int) -> dt.date:
    return INDEX + dt.timedelta(days=n)


PATIENTS = pl.DataFrame(
    {
        "patient_id": ["s1", "s2"],
        "group": ["placebo", "active"],
        "index_date": [INDEX, INDEX],
        "sex": ["female", "male"],
        "birth_date": [dt.date(1960, 1, 2), None],
        "age_at_index": [None, 70.6],
        "death_date": [None, day(300)],
        "end_of_followup": [day(400), day(300)],
        "site": ["North", "East"],
    }
)
# s1: baseline from two values (mean of 60 and 64 = 62); s2: one value (50)
EGFR = pl.DataFrame(
    {
        "patient_id": ["s1"] * 5 + ["s2"] * 3,
        "sample_date": [day(-10), day(0), day(80), day(100), day(182), day(0), day(95), day(96)],
        "equation": [EQ] * 8,
        "egfr": [60.0, 64.0, 55.0, 58.0, 49.6, 50.0, 45.0, 47.0],
    }
)
BASELINE = pl.DataFrame(
    {
        "patient_id": ["s1", "s2"],
        "equation": [EQ, EQ],
        "baseline_egfr": [62.0, 50.0],
        "baseline_date": [day(0), day(0)],
        "baseline_n_values": [2, 1],
    }
)
WINDOWS = [
    VisitWindow(name="Month 3", target_day=92, first_day=47, last_day=137),
    VisitWindow(name="Month 6", target_day=183, first_day=138, last_day=228),
]


@pytest.fixture(scope="module")
def adegfr() -> pl.DataFrame:
    return adegfr_dataset(
        EGFR, BASELINE, PATIENTS, visit_windows=WINDOWS, arm_order=["placebo", "active"]
    ).data


def test_baseline_change_and_visits_by_hand(adegfr: pl.DataFrame) -> None:
    s1 = adegfr.filter(pl.col("USUBJID") == "s1")
    # the averaged baseline is a derived record (DTYPE AVERAGE) carrying ABLFL
    base = s1.filter(pl.col("ABLFL") == "Y").row(0, named=True)
    assert (base["DTYPE"], base["AVAL"], base["ADT"], base["AVISIT"]) == (
        "AVERAGE",
        62.0,
        INDEX,
        "Baseline",
    )
    assert s1["BASE"].unique().to_list() == [62.0]
    post = s1.filter(pl.col("ADT") > INDEX).sort("ADT")
    assert post["CHG"].to_list() == pytest.approx([-7.0, -4.0, -12.4])
    assert post["PCHG"].to_list() == pytest.approx([-700 / 62, -400 / 62, -1240 / 62])
    # ADY: day 1 is the index date, the day before is -1 (no day 0, ADaM IG)
    assert s1.sort("ADT")["ADY"].to_list()[:2] == [-10, 1]
    # window Month 3 (target 92): days 81 and 101 -> 101 is nearer (|101-92| = 9 < 11)
    month3 = post.filter(pl.col("AVISIT") == "Month 3")
    assert month3["ADY"].to_list() == [81, 101]
    assert month3["ANL01FL"].to_list() == [None, "Y"]
    # pre-baseline and baseline-day collected values have no change
    assert s1.filter(pl.col("ADT") <= INDEX)["CHG"].null_count() == 3


def test_single_value_baseline_flags_the_record(adegfr: pl.DataFrame) -> None:
    s2 = adegfr.filter(pl.col("USUBJID") == "s2").sort("ASEQ")
    assert s2["DTYPE"].null_count() == 3  # no derived record for a one-value baseline
    assert s2["ABLFL"].to_list() == ["Y", None, None]
    # days 96 and 97 against target 92: the nearer (96) is analysed
    assert s2["ANL01FL"].to_list() == ["Y", "Y", None]
    assert s2["ASEQ"].to_list() == [1, 2, 3]
    assert s2["TRTPN"].unique().to_list() == [2]
    assert s2["PARAMCD"].unique().to_list() == ["EGFRC21"]


def test_adsl_one_row_per_subject() -> None:
    adsl = adsl_dataset(
        PATIENTS,
        BASELINE,
        equation=EQ,
        data_cut=dt.date(2024, 1, 1),
        arm_order=["placebo", "active"],
        study_id="T",
    )
    rows = adsl.data.sort("USUBJID")
    assert rows["USUBJID"].to_list() == ["s1", "s2"]
    # AGE: whole years from birth (1960-01-02) to the index date (2022-01-01) = 61;
    # without a birth date the patients' age at index (70.6) in whole years
    assert rows["AGE"].to_list() == [61, 70]
    # KDIGO 2012 G categories: 62 -> G2 (60-89), 50 -> G3a (45-59)
    assert rows["GFRCATBL"].to_list() == ["G2", "G3a"]
    assert rows["SEX"].to_list() == ["F", "M"]
    assert rows["DTHFL"].to_list() == [None, "Y"]
    assert rows["TRT01PN"].to_list() == [1, 2]
    assert rows["SITEID"].to_list() == ["North", "East"]
    assert adsl.variable("TRT01P").label == "Planned Treatment for Period 01"


def test_files_round_trip_and_validate(adegfr: pl.DataFrame, tmp_path: Path) -> None:
    ds = adegfr_dataset(EGFR, BASELINE, PATIENTS, visit_windows=WINDOWS)
    adsl = adsl_dataset(PATIENTS, BASELINE, equation=EQ, study_id="T")
    files = write_adam([adsl, ds], tmp_path, study_oid="T")
    assert {f.name for f in files} == {
        "adsl.xpt",
        "adsl.json",
        "adegfr.xpt",
        "adegfr.json",
        "spec.csv",
    }
    # pandas reads the XPT file back: same rows, labels in the file
    back = pd.read_sas(tmp_path / "adegfr.xpt", format="xport", encoding="utf-8")
    assert len(back) == ds.data.height and list(back.columns) == ds.data.columns
    assert back["AVAL"].tolist() == pytest.approx(ds.data["AVAL"].to_list())
    check_xpt_round_trip(tmp_path / "adegfr.xpt", ds)
    spec = pl.read_csv(tmp_path / "spec.csv")
    row = spec.filter((pl.col("dataset") == "ADEGFR") & (pl.col("variable") == "PARAMCD")).row(
        0, named=True
    )
    assert (row["type"], row["length"], row["label"], row["origin"]) == (
        "Char",
        7,  # longest value "EGFRC21"
        "Parameter Code",
        "Assigned",
    )
    document = json.loads((tmp_path / "adegfr.json").read_text(encoding="utf-8"))
    assert document["records"] == len(document["rows"]) == ds.data.height
    adt = next(c for c in document["columns"] if c["name"] == "ADT")
    # Dataset-JSON v1.1: ADaM numeric dates as ISO text, dataType date, target integer
    assert (adt["dataType"], adt["targetDataType"]) == ("date", "integer")
    assert document["rows"][0][document["columns"].index(adt)] == ds.data["ADT"][0].isoformat()


def _dataset(name: str, label: str, variables: list[Variable], data: pl.DataFrame) -> None:
    make_dataset(name, label, data, variables)


def test_transport_v5_limits_are_enforced() -> None:
    v = Variable("USUBJID", "Unique Subject Identifier", "text", "Predecessor")
    one = pl.DataFrame({"USUBJID": ["a"]})
    with pytest.raises(InputDataError, match=r"dataset name must be 1-8 capital letters"):
        _dataset("ADVERYLONG", "x", [v], one)
    long_name = Variable("PARAMCODE", "Parameter", "text", "Assigned")
    with pytest.raises(InputDataError, match=r"variable name 'PARAMCODE' is not 1-8"):
        _dataset("ADX", "x", [long_name], pl.DataFrame({"PARAMCODE": ["a"]}))
    long_label = Variable("XVAR", "L" * 41, "text", "Derived")
    with pytest.raises(InputDataError, match=r"has 41 characters; SAS transport v5 allows 40"):
        _dataset("ADX", "x", [long_label], pl.DataFrame({"XVAR": ["a"]}))
    with pytest.raises(InputDataError, match=r"a value of 201 bytes exceeds the 200-byte limit"):
        _dataset("ADX", "x", [v], pl.DataFrame({"USUBJID": ["x" * 201]}))
    wrong = Variable("AVAL", "Value", "float", "Derived")
    with pytest.raises(InputDataError, match=r"differs from the ADaM IG label 'Analysis Value'"):
        _dataset("ADX", "x", [wrong], pl.DataFrame({"AVAL": [1.0]}))
    flag = Variable("ABLFL", "Baseline Record Flag", "text", "Derived")
    with pytest.raises(InputDataError, match=r"flag value 'yes' is not 'Y', 'N' or empty"):
        _dataset("ADX", "x", [flag], pl.DataFrame({"ABLFL": ["yes"]}))


def test_overlapping_windows_are_refused() -> None:
    overlapping = [*WINDOWS, VisitWindow(name="Late", target_day=200, first_day=137, last_day=260)]
    with pytest.raises(ConfigError, match=r"overlap; make them disjoint"):
        adegfr_dataset(EGFR, BASELINE, PATIENTS, visit_windows=overlapping)
    with pytest.raises(ConfigError, match=r"need first_day <= target_day <= last_day"):
        VisitWindow(name="Bad", target_day=10, first_day=20, last_day=30)


# Our transcription of the Dataset-JSON v1.1 specification's constraints (CDISC, 2024:
# "Top-level Metadata Attributes" and "Column Metadata" tables, with their patterns and
# enumerations) as a JSON Schema (draft 2019-09).
_DATETIME = (
    r"^([0-9][0-9][0-9][0-9])(-(([0][1-9])|([1][0-2])))(-(([0][1-9])|([1-2][0-9])|([3][0-1])))"
    r"T(([0-1][0-9])|([2][0-3])):([0-5][0-9])(:([0-5][0-9]))((\.[0-9]+))?"
    r"((((\+|-)(([0-1][0-9])|([2][0-3])):[0-5][0-9])|(Z)))?$"
)
DATASET_JSON_V11 = {
    "$schema": "https://json-schema.org/draft/2019-09/schema",
    "type": "object",
    "additionalProperties": False,
    "required": [
        "datasetJSONCreationDateTime",
        "datasetJSONVersion",
        "itemGroupOID",
        "records",
        "name",
        "label",
        "columns",
    ],
    "properties": {
        "datasetJSONCreationDateTime": {"type": "string", "pattern": _DATETIME},
        "datasetJSONVersion": {"type": "string", "pattern": r"^1.1(.(0|([1-9][0-9]*)))?$"},
        "fileOID": {"type": "string", "minLength": 1},
        "dbLastModifiedDateTime": {"type": "string", "pattern": _DATETIME},
        "originator": {"type": "string"},
        "sourceSystem": {
            "type": "object",
            "additionalProperties": False,
            "required": ["name", "version"],
            "properties": {"name": {"type": "string"}, "version": {"type": "string"}},
        },
        "studyOID": {"type": "string", "minLength": 1},
        "metaDataVersionOID": {"type": "string", "minLength": 1},
        "metaDataRef": {"type": "string"},
        "itemGroupOID": {"type": "string", "minLength": 1},
        "records": {"type": "integer", "minimum": 0},
        "name": {"type": "string", "minLength": 1},
        "label": {"type": "string"},
        "columns": {
            "type": "array",
            "items": {
                "type": "object",
                "additionalProperties": False,
                "required": ["itemOID", "name", "label", "dataType"],
                "properties": {
                    "itemOID": {"type": "string", "minLength": 1},
                    "name": {"type": "string", "minLength": 1},
                    "label": {"type": "string"},
                    "dataType": {
                        "enum": [
                            "string",
                            "integer",
                            "decimal",
                            "float",
                            "double",
                            "boolean",
                            "datetime",
                            "date",
                            "time",
                            "URI",
                        ]
                    },
                    "targetDataType": {"enum": ["integer", "decimal"]},
                    "length": {"type": "integer", "minimum": 1},
                    "displayFormat": {"type": "string"},
                    "keySequence": {"type": "integer", "minimum": 1},
                },
            },
        },
        "rows": {
            "type": "array",
            "items": {
                "type": "array",
                "items": {"type": ["string", "integer", "number", "boolean", "null"]},
            },
        },
    },
}


def test_dataset_json_files_validate_against_the_v11_schema(tmp_path: Path) -> None:
    import jsonschema

    ds = adegfr_dataset(EGFR, BASELINE, PATIENTS, visit_windows=WINDOWS)
    adsl = adsl_dataset(PATIENTS, BASELINE, equation=EQ, study_id="T")
    write_adam([adsl, ds], tmp_path, study_oid="T")
    validator = jsonschema.Draft201909Validator(DATASET_JSON_V11)
    for name in ("adsl.json", "adegfr.json"):
        document = json.loads((tmp_path / name).read_text(encoding="utf-8"))
        errors = sorted(validator.iter_errors(document), key=str)
        assert not errors, f"{name}: {errors[0].message}"
        # every row has one value per column (specification: rows are arrays in column order)
        assert {len(r) for r in document["rows"]} == {len(document["columns"])}
    # the schema can fail: a missing required attribute is reported
    broken = json.loads((tmp_path / "adsl.json").read_text(encoding="utf-8"))
    del broken["itemGroupOID"]
    assert any("itemGroupOID" in e.message for e in validator.iter_errors(broken))
