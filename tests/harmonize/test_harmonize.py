"""Tests of kidneycohort.harmonize: reasons, conversions, qualifiers, accounting."""

from __future__ import annotations

import datetime as dt

import polars as pl
import pytest
from polars.testing import assert_frame_equal

from kidneycohort import schemas
from kidneycohort.errors import AccountingError, ConfigError, InputDataError
from kidneycohort.harmonize import (
    DEFAULT_PLAUSIBLE_RANGES,
    REASON_CODES,
    HarmonizeRule,
    harmonize_tables,
)
from kidneycohort.harmonize._accounting import _account
from tests._fixtures import harmonize as fx

ONE_PATIENT = pl.DataFrame(
    {
        "patient_id": ["A"],
        "sex": ["female"],
        "birth_date": [dt.date(1970, 1, 1)],
        "death_date": [dt.date(2022, 12, 31)],
    }
)


def lab(
    value: str | None = "1.0",
    unit: str | None = "mg/dL",
    analyte: str | None = "creatinine",
    date: str | None = "2020-01-01",
    patient: str | None = "A",
) -> pl.DataFrame:
    return pl.DataFrame(
        {
            "patient_id": [patient],
            "sample_date": [date],
            "analyte": [analyte],
            "value": [value],
            "unit": [unit],
        },
        schema={c: pl.String for c in ("patient_id", "sample_date", "analyte", "value", "unit")},
    )


def test_reason_codes_fixture_table() -> None:
    # the fixture names the one reason each dirty row must get
    out = harmonize_tables(fx.dirty_labs(), fx.patients_with_bad_rows(), data_cut_date=fx.DATA_CUT)
    got = pl.concat([out.rejected, out.merged]).filter(pl.col("table") == "labs")
    assert dict(zip(got["source_row"], got["reason"], strict=True)) == fx.expected_reasons()
    patients = pl.concat([out.rejected, out.merged]).filter(pl.col("table") == "patients")
    assert sorted(zip(patients["source_row"], patients["reason"], strict=True)) == [
        (7, "duplicate_patient_id"),
        (8, "duplicate_patient_id"),
        (9, "missing_patient_id"),
        (10, "death_before_birth"),
        (11, "exact_duplicate"),
    ]
    assert out.rejected.schema == pl.Schema(schemas.REJECTED)
    assert out.labs.schema == pl.Schema(schemas.LABS)


# One minimal case per reason code: (labs, patients, events, rule) -> the single bad row.
EVENTS_OK = {"patient_id": "A", "event_date": "2021-01-01", "event": "dialysis"}


def _event(**fields: str | None) -> pl.DataFrame:
    row = {**EVENTS_OK, **fields}
    return pl.DataFrame({k: [v] for k, v in row.items()}, schema={k: pl.String for k in row})


REASON_CASES: dict[str, tuple[str, dict]] = {
    "missing_patient_id": ("labs", {"labs": lab(patient=None)}),
    "missing_date": ("labs", {"labs": lab(date=None)}),
    "unparseable_date": ("labs", {"labs": pl.concat([lab(), lab(date="2020-13-45")])}),
    "unknown_patient": ("labs", {"labs": lab(patient="B")}),
    "patient_rejected": (
        "labs",
        {
            "labs": lab(),
            "patients": pl.DataFrame({"patient_id": ["A", "A"], "sex": ["female", "male"]}),
        },
    ),
    "before_birth": ("labs", {"labs": lab(date="1969-12-31")}),
    "after_death": ("labs", {"labs": lab(date="2023-01-01")}),
    "after_data_cut": (
        "labs",
        {"labs": lab(date="2021-06-02"), "rules": {"data_cut_date": dt.date(2021, 6, 1)}},
    ),
    "implausible_date": ("labs", {"labs": lab(date="2999-01-01")}),
    "implausible_age": (
        "patients",
        {"patients": pl.DataFrame({"patient_id": ["A"], "age_at_index": [130.0]})},
    ),
    "unknown_analyte": ("labs", {"labs": lab(analyte="2161-8")}),  # urine creatinine
    "missing_value": ("labs", {"labs": lab(value="  ")}),
    # SDTM: LBSTAT = "NOT DONE" rows reach harmonise with this result text
    "not_done": ("labs", {"labs": lab(value="NOT DONE: haemolysed")}),
    # ISO 8601 partial date (SDTM --DTC), left unimputed by the source's rule
    "partial_date": ("labs", {"labs": pl.concat([lab(), lab(date="2020-06", value="1.3")])}),
    "not_a_result": ("labs", {"labs": lab(value="haemolysed")}),
    "qualified_value": (
        "labs",
        {"labs": lab(value="<0.3"), "rules": {"qualified_values": "reject"}},
    ),
    "missing_unit": ("labs", {"labs": lab(unit=None)}),
    "unknown_unit": ("labs", {"labs": lab(unit="mg/g")}),
    "implausible_value": ("labs", {"labs": lab(value="0.05")}),
    "duplicate_patient_id": (
        "patients",
        {"patients": pl.DataFrame({"patient_id": ["A", "A"], "sex": ["female", "male"]})},
    ),
    "death_before_birth": (
        "patients",
        {
            "patients": pl.DataFrame(
                {
                    "patient_id": ["A"],
                    "birth_date": [dt.date(2000, 1, 1)],
                    "death_date": [dt.date(1999, 1, 1)],
                }
            )
        },
    ),
    "invalid_number": (
        "patients",
        {"patients": pl.DataFrame({"patient_id": ["A"], "height_cm": ["tall"]})},
    ),
    "unknown_event": ("events", {"events": _event(event="hospitalised")}),
    "exact_duplicate": ("labs", {"labs": pl.concat([lab(), lab()])}),
    "same_day_collapsed": ("labs", {"labs": pl.concat([lab(), lab(value="1.2")])}),
}


def test_every_reason_code_has_a_case() -> None:
    assert set(REASON_CASES) == set(REASON_CODES)


@pytest.mark.parametrize("code", sorted(REASON_CASES))
def test_reason_code_case(code: str) -> None:
    table, case = REASON_CASES[code]
    out = harmonize_tables(
        case.get("labs", lab()),
        case.get("patients", ONE_PATIENT),
        case.get("events"),
        **case.get("rules", {}),
    )
    not_used = pl.concat([out.rejected, out.merged]).filter(pl.col("table") == table)
    assert set(not_used["reason"]) == {code}
    assert not_used["detail"][0]  # a readable detail is always written


def test_unit_conversion_factors() -> None:
    # 1 mg/dL creatinine = 88.4 umol/L (KDIGO 2012 CKD guideline units; molar mass of
    # creatinine C4H7N3O = 113.12 g/mol, 10 000/113.12 = 88.40): 88.4 umol/L -> 1 mg/dL.
    # UACR 1 mg/mmol = 1000/113.12 = 8.84 mg/g (KDIGO 2012: A2 3-30 mg/mmol ~ 30-300 mg/g).
    # Cystatin C 1 mg/dL = 10 mg/L (SI prefixes). Common practice.
    labs = pl.DataFrame(
        {
            "patient_id": ["A"] * 6,
            "sample_date": [f"2020-01-0{d}" for d in range(1, 7)],
            "analyte": ["creatinine", "creatinine", "uacr", "uacr", "cystatin_c", "creatinine"],
            "value": ["88.4", "0.0884", "3", "30", "0.11", "11"],
            "unit": ["umol/L", "mmol/L", "mg/mmol", "mg/g", "mg/dL", "mg/L"],
        }
    )
    out = harmonize_tables(labs, ONE_PATIENT)
    assert out.labs["value"].to_list() == pytest.approx(
        [1.0, 1.0, 3 * 1000 / 113.12, 30.0, 1.1, 1.1], rel=1e-3
    )
    assert out.labs["unit"].to_list() == ["mg/dL", "mg/dL", "mg/g", "mg/g", "mg/L", "mg/dL"]
    assert out.labs["reported_unit"].to_list() == labs["unit"].to_list()
    assert out.labs["reported_value"].to_list() == labs["value"].to_list()


@pytest.mark.parametrize(
    ("text", "value", "qualifier"),
    [
        ("1.2", 1.2, None),
        (" 0,9 ", 0.9, None),
        ("1.2 H", 1.2, None),
        ("1.2H", 1.2, None),
        ("0.6 (L)", 0.6, None),
        ("2.5*", 2.5, None),
        ("<0.2", 0.2, "<"),
        ("< 0.2", 0.2, "<"),
        ("<=0.2", 0.2, "<"),
        ("≤0,2", 0.2, "<"),
        (">15", 15.0, ">"),
        ("≥ 15", 15.0, ">"),
        (".8", 0.8, None),
        ("1.2e0", 1.2, None),
    ],
)
def test_result_text_rules(text: str, value: float, qualifier: str | None) -> None:
    out = harmonize_tables(lab(value=text), ONE_PATIENT)
    assert out.labs["value"].item() == pytest.approx(value)
    assert out.labs["qualifier"].item() == qualifier
    assert out.labs["reported_value"].item() == text.strip()


@pytest.mark.parametrize("text", ["see comment", "1.2.3", "1,2.3", "1.2 mg", "pos", "--", "H"])
def test_text_that_is_not_a_result(text: str) -> None:
    out = harmonize_tables(lab(value=text), ONE_PATIENT)
    assert out.labs.height == 0
    assert out.rejected["reason"].to_list() == ["not_a_result"]


def test_decimal_comma_can_be_switched_off() -> None:
    out = harmonize_tables(lab(value="0,9"), ONE_PATIENT, decimal_comma=False)
    assert out.rejected["reason"].to_list() == ["not_a_result"]


def test_loinc_and_site_names_map_to_analytes() -> None:
    labs = pl.concat(
        [
            lab(analyte=a, unit=u, value=v)
            for a, u, v in [
                ("2160-0", "mg/dL", "1.0"),
                ("14682-9", "umol/L", "80"),
                ("33863-2", "mg/L", "1.0"),
                ("9318-7", "mg/g", "10"),
                ("S-Creatinine", "mg/dL", "1.0"),
                ("Cys C", "mg/L", "1.0"),
                ("LABX-ACR", "mg/mmol", "2"),
            ]
        ]
    ).with_columns(pl.Series("sample_date", [f"2020-01-0{d}" for d in range(1, 8)]))
    out = harmonize_tables(labs, ONE_PATIENT, analyte_names={"labx-acr": "uacr"})
    assert out.labs["analyte"].to_list() == [
        "creatinine",
        "creatinine",
        "cystatin_c",
        "uacr",
        "creatinine",
        "cystatin_c",
        "uacr",
    ]


@pytest.mark.parametrize(
    ("rule", "value", "kept_row"),
    [("mean", 1.0, 1), ("first", 0.8, 1), ("last", 1.2, 3), ("min", 0.8, 1), ("max", 1.2, 3)],
)
def test_same_day_rules(rule: str, value: float, kept_row: int) -> None:
    labs = pl.DataFrame(
        {
            "patient_id": ["A"] * 3,
            "sample_date": ["2020-01-01 08:00", "2020-01-01 12:00", "2020-01-01 18:00"],
            "analyte": ["creatinine"] * 3,
            "value": ["0.8", "1.0", "1.2"],
            "unit": ["mg/dL"] * 3,
        }
    )
    out = harmonize_tables(labs, ONE_PATIENT, same_day_rule=rule)
    assert out.labs["value"].item() == pytest.approx(value)  # (0.8 + 1.0 + 1.2) / 3 = 1.0
    assert out.labs["source_row"].item() == kept_row
    assert out.labs["n_collapsed"].item() == 3
    assert out.merged["reason"].to_list() == ["same_day_collapsed"] * 2
    assert out.accounting.row(0, named=True)["rows_merged"] == 2


def test_same_day_rule_none_keeps_all() -> None:
    labs = pl.concat([lab(value="1.0"), lab(value="1.2")])
    out = harmonize_tables(labs, ONE_PATIENT, same_day_rule="none")
    assert out.labs["value"].to_list() == [1.0, 1.2]
    assert out.merged.height == 0


def test_plausible_range_in_another_unit() -> None:
    # 2000 umol/L = 22.6 mg/dL: inside the default 0.1-30 mg/dL, outside 20-1500 umol/L
    assert harmonize_tables(lab(value="2000", unit="umol/L"), ONE_PATIENT).labs.height == 1
    ranges = {**DEFAULT_PLAUSIBLE_RANGES, "creatinine": {"low": 20, "high": 1500, "unit": "umol/L"}}
    out = harmonize_tables(lab(value="2000", unit="umol/L"), ONE_PATIENT, plausible_ranges=ranges)
    assert out.rejected["reason"].to_list() == ["implausible_value"]
    assert "22.6244 mg/dL outside 0.2262-16.9683 mg/dL" in out.rejected["detail"].item()


def test_accounting_identity_is_asserted_inside_the_stage() -> None:
    rejected = pl.DataFrame(schema=schemas.REJECTED)
    with pytest.raises(AccountingError, match="labs: rows read 5 != used 4"):
        _account("labs", 5, 4, rejected, rejected)


def test_accounting_columns_contract() -> None:
    out = harmonize_tables(fx.dirty_labs(), fx.patients(), data_cut_date=fx.DATA_CUT)
    assert out.accounting.columns == [
        "table",
        "rows_read",
        "rows_used",
        "rows_rejected",
        "rows_merged",
    ]
    assert out.accounting_by_reason.columns[:1] == ["table"]
    assert {"reason", "rows"} <= set(out.accounting_by_reason.columns)
    labs_row = out.accounting.filter(pl.col("table") == "labs").row(0, named=True)
    assert labs_row["rows_read"] == len(fx.LAB_ROWS)
    assert out.accounting_by_reason.filter(pl.col("table") == "labs")["rows"].sum() == (
        labs_row["rows_rejected"] + labs_row["rows_merged"]
    )


def test_patients_cleaned_and_covariates_kept() -> None:
    patients = fx.patients()
    out = harmonize_tables(lab(patient="P2"), patients)
    assert out.patients["patient_id"].to_list() == ["P1", "P2", "P3", "P4", "P5", "P6"]
    assert out.patients["sex"].to_list() == ["female", "male", "male", "female", "female", None]
    assert out.patients["arm"].to_list() == ["A", "B", "A", "B", "A", "B"]


def test_unknown_sex_code_is_an_error_naming_it() -> None:
    # one sex vocabulary: a code outside it is an error, never a silently missing sex
    patients = fx.patients().with_columns(pl.col("sex").replace({"F": "U"}))
    with pytest.raises(InputDataError, match=r"patients.sex: sex code\(s\) 'U' not recognised"):
        harmonize_tables(lab(patient="P2"), patients)
    # mapped in the options, the code is accepted
    out = harmonize_tables(lab(patient="P2"), patients, sex_codes={"U": "female"})
    assert out.patients["sex"][0] == "female"


def test_site_sex_codes() -> None:
    patients = pl.DataFrame({"patient_id": ["A", "B"], "sex": ["1", "2"]})
    out = harmonize_tables(lab(), patients, sex_codes={"1": "male", "2": "female"})
    assert out.patients["sex"].to_list() == ["male", "female"]


def test_events_cleaned() -> None:
    events = pl.concat(
        [
            _event(),
            _event(event="HD", event_date="2021-02-01"),
            _event(event="Kidney transplant", event_date="2022-01-01"),
            _event(event_date="2023-02-01"),
            _event(event_date="1960-01-01"),
        ]
    )
    out = harmonize_tables(lab(), ONE_PATIENT, events, event_codes={"hd": "dialysis"})
    assert out.events is not None
    assert out.events["event"].to_list() == ["dialysis", "dialysis", "transplant"]
    assert out.events.schema["event_date"] == pl.Date
    assert out.rejected.filter(pl.col("table") == "events")["reason"].to_list() == [
        "after_death",
        "before_birth",
    ]
    assert out.accounting.filter(pl.col("table") == "events").row(0)[1:] == (5, 3, 2, 0)


def test_pandas_input_and_numeric_values() -> None:
    labs = pl.DataFrame(
        {
            "patient_id": ["A"],
            "sample_date": [dt.datetime(2020, 1, 1, 9)],
            "analyte": ["creatinine"],
            "value": [1.1],
            "unit": ["mg/dL"],
        }
    )
    out = harmonize_tables(labs.to_pandas(), ONE_PATIENT.to_pandas())
    assert out.labs["value"].item() == pytest.approx(1.1)
    assert out.labs["sample_datetime"].item() == dt.datetime(2020, 1, 1, 9)


def test_harmonising_harmonised_labs_changes_nothing() -> None:
    first = harmonize_tables(fx.dirty_labs(), fx.patients(), data_cut_date=fx.DATA_CUT)
    again = harmonize_tables(first.labs, first.patients, data_cut_date=fx.DATA_CUT)
    assert_frame_equal(again.labs, first.labs)
    assert_frame_equal(again.patients, first.patients)
    assert again.rejected.height == 0 and again.merged.height == 0


def test_bad_rules_and_inputs() -> None:
    with pytest.raises(
        ConfigError, match=r"unknown rule 'same_day_rul'.*did you mean 'same_day_rule'"
    ):
        harmonize_tables(lab(), ONE_PATIENT, same_day_rul="mean")
    with pytest.raises(ConfigError, match="same_day_rule"):
        harmonize_tables(lab(), ONE_PATIENT, rule=HarmonizeRule(), same_day_rule="median")
    with pytest.raises(InputDataError, match="labs: missing required column 'unit'"):
        harmonize_tables(lab().drop("unit").with_columns(units=pl.lit("x")), ONE_PATIENT)
    with pytest.raises(InputDataError, match="patients: expected a polars or pandas"):
        harmonize_tables(lab(), [1, 2])
    with pytest.raises(InputDataError, match="date column 'sample_date' cannot be parsed"):
        harmonize_tables(pl.concat([lab(date="yesterday")] * 3), ONE_PATIENT)
