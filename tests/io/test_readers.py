"""Tests of kidneycohort.io: readers, source specs, date inference, the LOINC table."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import duckdb
import polars as pl
import pytest
from polars.testing import assert_frame_equal

from kidneycohort import units
from kidneycohort.errors import ConfigError, InputDataError
from kidneycohort.harmonize import harmonize_tables
from kidneycohort.io import (
    LOINC_CODES,
    FileSource,
    infer_date_format,
    loinc_table,
    read_events,
    read_labs,
    read_many,
    read_patients,
)

SITE_B_MAP = {
    "PID": "patient_id",
    "DRAWN": "sample_date",
    "TEST": "analyte",
    "RESULT": "value",
    "UNIT": "unit",
}


def write(path: Path, text: str, encoding: str = "utf-8") -> Path:
    path.write_bytes(text.encode(encoding))
    return path


def test_csv_with_bom_semicolons_column_map_and_default_unit(tmp_path: Path) -> None:
    path = write(
        tmp_path / "site_b.csv",
        "\ufeffPID;DRAWN;TEST;RESULT;UNIT\n"
        "B1;14/03/2020;crea;88,4;\n"
        "B1;15/03/2020;crea;<20;umol/L\n",
    )
    frame = read_labs(path, delimiter=";", columns=SITE_B_MAP, defaults={"unit": "umol/L"})
    assert isinstance(frame, pl.LazyFrame)
    got = frame.collect()
    assert got["patient_id"].to_list() == ["B1", "B1"]  # BOM not glued to the first name
    assert got["sample_date"].to_list() == [dt.datetime(2020, 3, 14), dt.datetime(2020, 3, 15)]
    assert got["unit"].to_list() == ["umol/L", "umol/L"]
    assert got["assumption"].to_list() == ["unit 'umol/L' from source defaults", None]
    assert got["source"].to_list() == ["site_b", "site_b"]
    assert got["source_row"].to_list() == [1, 2]
    out = harmonize_tables(frame, pl.DataFrame({"patient_id": ["B1"]}))
    assert out.labs["value"].to_list() == pytest.approx([1.0, 20 / units.CREATININE_UMOL_PER_MG_DL])
    assert out.assumptions.select("table", "source", "rows").row(0) == ("labs", "site_b", 1)


def test_csv_latin1_and_value_maps(tmp_path: Path) -> None:
    path = write(
        tmp_path / "demo.csv",
        "patient_id,sex,birth_date,town\nA,1,1970-01-01,Zürich\nB,2,1980-05-05,Genève\n",
        encoding="latin-1",
    )
    with pytest.raises(InputDataError, match=r"demo.csv: not readable as UTF-8.*set encoding"):
        read_patients(path)
    frame = read_patients(path, encoding="latin-1", values={"sex": {"1": "male", "2": "female"}})
    got = frame.collect()
    assert got["town"].to_list() == ["Zürich", "Genève"]
    assert got["sex"].to_list() == ["male", "female"]
    assert got["birth_date"].to_list() == [dt.date(1970, 1, 1), dt.date(1980, 5, 5)]


def test_parquet_round_trip(tmp_path: Path) -> None:
    labs = pl.DataFrame(
        {
            "patient_id": ["A", "B"],
            "sample_date": [dt.date(2020, 1, 1), dt.date(2020, 1, 2)],
            "analyte": ["2160-0", "33863-2"],
            "value": ["1.0", "0.9"],
            "unit": ["mg/dL", "mg/L"],
        }
    )
    labs.write_parquet(tmp_path / "labs.parquet")
    got = read_labs(tmp_path / "labs.parquet").collect()
    assert got["sample_date"].dtype == pl.Datetime("us")
    assert got["source_row"].to_list() == [1, 2]
    assert_frame_equal(
        got.select("patient_id", "analyte", "value"), labs.select("patient_id", "analyte", "value")
    )


def test_parquet_dataset_folder_in_path_order_with_hive_columns(tmp_path: Path) -> None:
    folder = tmp_path / "labs"
    rows = {
        ("site=north", "b.parquet"): ["N3"],
        ("site=north", "a.parquet"): ["N1", "N2"],
        ("site=south", "a.parquet"): ["S1"],
    }
    for (site, name), ids in rows.items():
        (folder / site).mkdir(parents=True, exist_ok=True)
        pl.DataFrame(
            {
                "patient_id": ids,
                "sample_date": ["2020-01-0" + str(i + 1) for i in range(len(ids))],
                "analyte": ["2160-0"] * len(ids),
                "value": ["1.0"] * len(ids),
                "unit": ["mg/dL"] * len(ids),
            }
        ).write_parquet(folder / site / name)
    (folder / "_SUCCESS.parquet").write_bytes(b"")  # a marker, not data
    got = read_labs(folder).collect()
    # files in path order; source_row counts through them; the folder names are columns
    assert got["patient_id"].to_list() == ["N1", "N2", "N3", "S1"]
    assert got["source_row"].to_list() == [1, 2, 3, 4]
    assert got["site"].to_list() == ["north", "north", "north", "south"]
    assert got["sample_date"].dtype == pl.Datetime("us")
    with pytest.raises(InputDataError, match=r"holds no \.parquet files"):
        read_labs(_empty_folder(tmp_path))


def _empty_folder(tmp_path: Path) -> Path:
    empty = tmp_path / "empty"
    empty.mkdir()
    return empty


def test_duckdb_table_and_query(tmp_path: Path) -> None:
    db = tmp_path / "cohort.duckdb"
    con = duckdb.connect(str(db))
    con.execute("CREATE TABLE events (pid VARCHAR, d DATE, code VARCHAR)")
    con.execute(
        "INSERT INTO events VALUES ('A', DATE '2021-01-01', 'HD'), "
        "('B', DATE '2021-02-01', 'transplant')"
    )
    con.close()
    mapping = {"pid": "patient_id", "d": "event_date", "code": "event"}
    got = read_events(db, table="events", columns=mapping).collect()
    assert isinstance(got, pl.DataFrame)
    assert got["event_date"].to_list() == [dt.date(2021, 1, 1), dt.date(2021, 2, 1)]
    queried = read_events(
        db, query="SELECT * FROM events WHERE pid = 'B'", columns=mapping
    ).collect()
    assert queried["event"].to_list() == ["transplant"]
    with pytest.raises(InputDataError, match=r"no table 'event'.*did you mean 'events'"):
        read_events(db, table="event", columns=mapping)
    with pytest.raises(InputDataError, match="query failed"):
        read_events(db, query="SELECT * FROM nowhere", columns=mapping)


def test_unusable_sources_give_one_line_errors(tmp_path: Path) -> None:
    with pytest.raises(InputDataError, match=r"missing\.csv: file not found"):
        read_labs(tmp_path / "missing.csv")
    path = write(
        tmp_path / "labs.csv", "patient,sample_date,analyte,value,unit\nA,2020-01-01,c,1,mg/dL\n"
    )
    with pytest.raises(
        InputDataError, match=r"missing required column 'patient_id' \(did you mean 'patient'\?\)"
    ):
        read_labs(path)
    with pytest.raises(InputDataError, match=r"column map names 'PATIENT'.*did you mean 'patient'"):
        read_labs(path, columns={"PATIENT": "patient_id"})
    bad_dates = write(
        tmp_path / "dates.csv",
        "patient_id,sample_date,analyte,value,unit\nA,soon,c,1,mg/dL\nA,later,c,1,mg/dL\n",
    )
    with pytest.raises(
        InputDataError, match=r"date column 'sample_date' cannot be parsed \(got 'soon'\)"
    ):
        read_labs(bad_dates)
    write(tmp_path / "labs.xlsx", "not a table")
    with pytest.raises(ConfigError, match=r"cannot tell the format from suffix '\.xlsx'"):
        read_labs(tmp_path / "labs.xlsx")


def test_date_inference() -> None:
    # day-first is the only reading of 14/03/2020; month-first of 03/14/2020
    assert (
        infer_date_format(pl.Series(["14/03/2020", "01/02/2020"]), name="t", column="d")
        == "%d/%m/%Y"
    )
    assert (
        infer_date_format(pl.Series(["03/14/2020", "01/02/2020"]), name="t", column="d")
        == "%m/%d/%Y"
    )
    assert (
        infer_date_format(pl.Series(["2020-01-01", "2020-01-02 10:30:00"]), name="t", column="d")
        == "iso"
    )
    assert infer_date_format(pl.Series(["01JAN2020"]), name="t", column="d") == "%d%b%Y"
    with pytest.raises(InputDataError, match=r"t: date column 'd' is ambiguous.*set date_format"):
        infer_date_format(pl.Series(["03/04/2020", "05/06/2021"]), name="t", column="d")


def test_stated_date_format_and_row_level_failures(tmp_path: Path) -> None:
    path = write(
        tmp_path / "l.csv",
        "patient_id,sample_date,analyte,value,unit\n"
        "A,03/04/2020,creatinine,1,mg/dL\nA,31/31/2020,creatinine,1,mg/dL\n",
    )
    got = read_labs(path, date_format="%d/%m/%Y").collect()
    assert got["sample_date"].to_list() == [dt.datetime(2020, 4, 3), None]
    assert got["sample_date_as_read"].to_list() == [None, "31/31/2020"]
    out = harmonize_tables(got, pl.DataFrame({"patient_id": ["A"]}))
    assert out.rejected["reason"].to_list() == ["unparseable_date"]


def test_read_many_stacks_sources(tmp_path: Path) -> None:
    a = write(
        tmp_path / "a.csv",
        "patient_id,sample_date,analyte,value,unit\nA,2020-01-01,creatinine,1,mg/dL\n",
    )
    b = write(
        tmp_path / "b.csv", "PID;DRAWN;TEST;RESULT;UNIT\nA;2020-01-01;creatinine;88.4;umol/L\n"
    )
    frame = read_many(
        [FileSource(path=str(a)), FileSource(path=str(b), delimiter=";", columns=SITE_B_MAP)]
    )
    out = harmonize_tables(frame, pl.DataFrame({"patient_id": ["A"]}))
    # the two laboratories' results of the same day fold into one (mean of 1.0 and 1.0)
    assert out.labs["value"].to_list() == pytest.approx([1.0])
    assert out.merged["detail"].to_list() == ["folded into row a:1 (mean)"]


def _loinc_check_digit(body: str) -> int:
    # LOINC Users' Guide: mod-10 check digit (from memory; the same as Luhn): double every
    # other digit from the right, starting with the rightmost, sum the digits, take the
    # distance to the next multiple of 10.
    total = 0
    for position, char in enumerate(reversed(body)):
        digit = int(char) * (2 if position % 2 == 0 else 1)
        total += digit // 10 + digit % 10
    return (10 - total % 10) % 10


def test_loinc_table() -> None:
    table = loinc_table()
    assert table.height == len(LOINC_CODES) == table["code"].n_unique()
    assert set(table["analyte"]) == set(units.ANALYTES)
    assert set(table["provenance"]) <= {"checked", "from memory"}
    for code in table["code"]:
        body, check = code.split("-")
        assert _loinc_check_digit(body) == int(check), code
    # every typical unit is a known unit of its analyte
    for row in table.iter_rows(named=True):
        assert units.conversion_factor(row["analyte"], row["typical_unit"]) > 0
