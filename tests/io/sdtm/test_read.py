"""SDTM reader: LB results, not-done records, partial dates, DM/EX/DS facts, bad input.

A small invented trial (two subjects) is written as SDTM in both formats with our own
writers, then read back. Rules checked: SDTM IG v3.4 (LBSTAT = "NOT DONE" with LBREASND;
ISO 8601 partial dates such as "2024-03"); the partial-date rules are our stated options.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import polars as pl
import pytest

from kidneycohort.errors import InputDataError
from kidneycohort.harmonize import harmonize_tables
from kidneycohort.io.cdisc_files import write_dataset_json, write_xpt
from kidneycohort.io.sdtm import SdtmSource, impute, read_sdtm
from kidneycohort.synthetic._sdtm_writer import (
    DM_VARIABLES,
    DS_VARIABLES,
    EX_VARIABLES,
    LB_VARIABLES,
)

DM = pl.DataFrame(
    {
        "STUDYID": ["T1", "T1"],
        "DOMAIN": ["DM", "DM"],
        "USUBJID": ["T1-001", "T1-002"],
        "SUBJID": ["001", "002"],
        "RFSTDTC": ["2023-01-10", "2023-02-01"],
        "RFXSTDTC": ["2023-01-10", None],
        "RFPENDTC": ["2024-01-10", "2024-02-01"],
        "DTHDTC": [None, "2024-01"],
        "DTHFL": [None, "Y"],
        "SITEID": ["S1", "S2"],
        "BRTHDTC": ["1960-04-02", "1950"],
        "AGE": [62, 73],
        "AGEU": ["YEARS", "YEARS"],
        "SEX": ["F", "M"],
        "ARMCD": ["A", "P"],
        "ARM": ["active", "placebo"],
        "ACTARMCD": ["A", "P"],
        "ACTARM": ["active", "placebo"],
    }
)
LB = pl.DataFrame(
    {
        "STUDYID": ["T1"] * 6,
        "DOMAIN": ["LB"] * 6,
        "USUBJID": ["T1-001"] * 4 + ["T1-002"] * 2,
        "LBSEQ": [1, 2, 3, 4, 1, 2],
        "LBTESTCD": ["CREAT", "CREAT", "CREAT", "ALT", "CREAT", "CYSTC"],
        "LBTEST": ["Creatinine"] * 3 + ["Alanine Aminotransferase", "Creatinine", "Cystatin C"],
        "LBCAT": ["CHEMISTRY"] * 6,
        "LBSPEC": ["SERUM"] * 6,
        "LBORRES": ["97", "", "1.1", "30", "1.30", "1.05"],
        "LBORRESU": ["umol/L", "", "mg/dL", "U/L", "mg/dL", "mg/L"],
        "LBSTRESC": ["1.097", "", "1.1", "30", "1.3", "1.05"],
        "LBSTRESN": [1.097, None, 1.1, 30.0, 1.3, 1.05],
        "LBSTRESU": ["mg/dL", "", "mg/dL", "U/L", "mg/dL", "mg/L"],
        "LBSTAT": [None, "NOT DONE", None, None, None, None],
        "LBREASND": [None, "HEMOLYZED", None, None, None, None],
        "VISITNUM": [1.0, 2.0, 3.0, 1.0, 1.0, 1.0],
        "VISIT": ["SCREENING", "WEEK 4", "WEEK 12", "SCREENING", "SCREENING", "SCREENING"],
        "LBDTC": [
            "2023-01-03T09:15",
            "2023-02-07",
            "2023-04",
            "2023-01-03",
            "2023-01-28",
            "2023-01-28",
        ],
        "LBDY": [-7, 29, None, -7, -4, -4],
    }
)
DS = pl.DataFrame(
    {
        "STUDYID": ["T1"] * 3,
        "DOMAIN": ["DS"] * 3,
        "USUBJID": ["T1-001", "T1-001", "T1-002"],
        "DSSEQ": [1, 2, 1],
        "DSTERM": ["RANDOMIZED", "COMPLETED", "RANDOMIZED"],
        "DSDECOD": ["RANDOMIZED", "COMPLETED", "RANDOMIZED"],
        "DSCAT": ["PROTOCOL MILESTONE", "DISPOSITION EVENT", "PROTOCOL MILESTONE"],
        "DSSTDTC": ["2023-01-09", "2024-01-10", "2023-01-31"],
    }
)
EX = pl.DataFrame(
    {
        "STUDYID": ["T1", "T1"],
        "DOMAIN": ["EX", "EX"],
        "USUBJID": ["T1-001", "T1-001"],
        "EXSEQ": [1, 2],
        "EXTRT": ["ACTIVE", "ACTIVE"],
        "EXSTDTC": ["2023-01-12", "2023-01-10"],
        "EXENDTC": ["2023-06-01", "2023-01-11"],
    }
)
DOMAINS = {
    "DM": (DM, DM_VARIABLES),
    "LB": (LB, LB_VARIABLES),
    "DS": (DS, DS_VARIABLES),
    "EX": (EX, EX_VARIABLES),
}


def write_folder(folder: Path, fmt: str, skip: tuple[str, ...] = ()) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    for name, (frame, variables) in DOMAINS.items():
        if name in skip:
            continue
        frame = frame.select([v.name for v in variables if v.name in frame.columns])
        chosen = [v for v in variables if v.name in frame.columns]
        path = folder / f"{name.lower()}.{fmt}"
        if fmt == "xpt":
            write_xpt(frame, path, name=name, label=name, variables=chosen)
        else:
            write_dataset_json(frame, path, name=name, label=name, variables=chosen)
    return folder


@pytest.fixture(scope="module", params=["xpt", "json"])
def folder(request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory) -> Path:
    return write_folder(tmp_path_factory.mktemp("sdtm") / request.param, request.param)


def test_lab_rows_and_their_reasons(folder: Path) -> None:
    tables = read_sdtm(SdtmSource(folder=str(folder)))
    labs = tables.labs.sort("source_row")
    # the ALT row (LBTESTCD not configured) is not read; source_row is the LB file row
    assert labs["source_row"].to_list() == [1, 2, 3, 5, 6]
    assert labs["analyte"].to_list() == ["creatinine"] * 4 + ["cystatin_c"]
    # standard result read, the original one kept as reported
    assert labs["value"].to_list()[:1] == ["1.097"]
    assert labs["reported_value"][0] == "97" and labs["reported_unit"][0] == "umol/L"
    assert labs["sample_date"][0] == dt.datetime(2023, 1, 3, 9, 15)
    result = harmonize_tables(tables.labs, tables.patients, tables.events)
    reasons = dict(result.rejected.select("source_row", "reason").iter_rows())
    # LBSTAT NOT DONE -> not_done; LBDTC "2023-04" left unimputed by default -> partial_date
    assert reasons == {2: "not_done", 3: "partial_date"}
    detail = result.rejected.filter(pl.col("source_row") == 2)["detail"][0]
    assert detail == "reported as 'NOT DONE: HEMOLYZED'"


def test_partial_dates_imputed_only_by_the_stated_rule(folder: Path) -> None:
    middle = read_sdtm(SdtmSource(folder=str(folder), partial_dates="middle"))
    row = middle.labs.filter(pl.col("source_row") == 3).row(0, named=True)
    assert row["sample_date"] == dt.datetime(2023, 4, 15)
    assert row["assumption"] == "LBDTC partial, imputed (middle)"
    first = read_sdtm(SdtmSource(folder=str(folder), partial_dates="first"))
    assert first.labs.filter(pl.col("source_row") == 3)["sample_date"][0] == dt.datetime(2023, 4, 1)
    # a year-only birth date: 1 July under 'middle', and none under 'reject' (AGE used)
    born = middle.patients.filter(pl.col("patient_id") == "T1-002").row(0, named=True)
    assert born["birth_date"] == dt.date(1950, 7, 1)
    strict = read_sdtm(SdtmSource(folder=str(folder))).patients
    p2 = strict.filter(pl.col("patient_id") == "T1-002").row(0, named=True)
    assert p2["birth_date"] is None and p2["age_at_index"] == 73.0
    assert p2["death_date"] is None
    assert "DTHDTC partial, not used (reject)" in p2["assumption"]


def test_index_arm_and_dosing_facts(folder: Path) -> None:
    patients = read_sdtm(SdtmSource(folder=str(folder))).patients.sort("patient_id")
    # first dose is the earliest EXSTDTC (2023-01-10); T1-002 has no dose record
    assert patients["index_date"].to_list() == [dt.date(2023, 1, 10), None]
    assert patients["first_dose_date"].to_list() == [dt.date(2023, 1, 10), None]
    assert patients["group"].to_list() == ["active", "placebo"]
    assert patients["end_of_followup"].to_list() == [dt.date(2024, 1, 10), None]
    randomised = read_sdtm(SdtmSource(folder=str(folder), index="randomization")).patients
    assert randomised.sort("patient_id")["index_date"].to_list() == [
        dt.date(2023, 1, 9),
        dt.date(2023, 1, 31),
    ]


def test_impute_rules() -> None:
    # stated rules: 'first' = earliest possible day, 'middle' = 1 July / the 15th
    text = pl.Series(["2024", "2024-03"])
    out = pl.select(impute(pl.lit(text), "middle")).to_series().dt.date().to_list()
    assert out == [dt.date(2024, 7, 1), dt.date(2024, 3, 15)]
    out = pl.select(impute(pl.lit(text), "first")).to_series().dt.date().to_list()
    assert out == [dt.date(2024, 1, 1), dt.date(2024, 3, 1)]


def test_missing_domain_and_variable_are_named(tmp_path: Path) -> None:
    folder = write_folder(tmp_path / "no_lb", "json", skip=("LB",))
    with pytest.raises(
        InputDataError, match=r"domain LB not found \(looked for lb\.xpt / lb\.json"
    ):
        read_sdtm(SdtmSource(folder=str(folder)))
    broken = tmp_path / "broken"
    write_folder(broken, "json")
    frame = DM.drop("SEX")
    variables = [v for v in DM_VARIABLES if v.name != "SEX"]
    write_dataset_json(frame, broken / "dm.json", name="DM", label="DM", variables=variables)
    with pytest.raises(InputDataError, match=r"DM has no variable SEX"):
        read_sdtm(SdtmSource(folder=str(broken)))
    with pytest.raises(InputDataError, match=r"SDTM folder .*nowhere: folder not found"):
        read_sdtm(SdtmSource(folder=str(tmp_path / "nowhere")))
