"""Tests of kidneycohort.egfr: ages, pairing, body size, age bands, reasons, invariance."""

from __future__ import annotations

import datetime as dt
import math

import numpy as np
import polars as pl
import pytest
from polars.testing import assert_frame_equal

from kidneycohort import equations, schemas
from kidneycohort.egfr import EGFR_REASON_CODES, AgeBand, EgfrRule, compute_egfr, egfr_wide
from kidneycohort.errors import ConfigError, InputDataError
from kidneycohort.harmonize import harmonize_tables
from tests._fixtures import harmonize as fx


def labs_of(rows: list[tuple[str, dt.date, str, float]]) -> pl.DataFrame:
    """Harmonised-style labs from (patient, date, analyte, value in standard unit)."""
    std = {"creatinine": "mg/dL", "cystatin_c": "mg/L", "uacr": "mg/g"}
    return pl.DataFrame(
        {
            "patient_id": [r[0] for r in rows],
            "sample_date": [r[1] for r in rows],
            "analyte": [r[2] for r in rows],
            "value": [r[3] for r in rows],
            "unit": [std[r[2]] for r in rows],
        }
    )


ADULT = pl.DataFrame(
    {
        "patient_id": ["M"],
        "sex": ["male"],
        "birth_date": [dt.date(1980, 1, 1)],
        "index_date": [dt.date(2020, 1, 1)],
    }
)


def test_ckd_epi_2021_by_hand_at_exact_age() -> None:
    # Inker 2021 NEJM (doi:10.1056/NEJMoa2102953): 142 x min(Scr/0.9,1)^-0.302 x
    # max(Scr/0.9,1)^-1.200 x 0.9938^age for men. Scr 0.9, age 40 (1980-01-01 ->
    # 2020-01-01 = 14 610 days = 40 x 365.25): 142 x 0.9938^40 = 110.72.
    out = compute_egfr(labs_of([("M", dt.date(2020, 1, 1), "creatinine", 0.9)]), ADULT)
    assert out["age_years"].item() == 40.0
    assert out["years_from_index"].item() == 0.0
    assert out["egfr"].item() == pytest.approx(142 * 0.9938**40, rel=1e-9)
    assert out["egfr_unit"].item() == "mL/min/1.73m2"
    assert out.schema == pl.Schema(schemas.EGFR)


def test_cockcroft_gault_by_hand() -> None:
    # Cockcroft & Gault 1976 Nephron: (140 - age) x weight / (72 x Scr) x 0.85 if female
    patients = pl.DataFrame(
        {
            "patient_id": ["F"],
            "sex": ["female"],
            "birth_date": [dt.date(1950, 1, 1)],
            "weight_kg": [60.0],
        }
    )
    sample = dt.date(2020, 1, 1)
    age = (sample - dt.date(1950, 1, 1)).days / 365.25
    out = compute_egfr(labs_of([("F", sample, "creatinine", 1.2)]), patients, ["cockcroft_gault"])
    assert out["egfr"].item() == pytest.approx((140 - age) * 60 / (72 * 1.2) * 0.85, rel=1e-9)
    assert out["egfr_unit"].item() == "mL/min"


def test_age_from_age_at_index() -> None:
    patients = pl.DataFrame(
        {
            "patient_id": ["M"],
            "sex": ["male"],
            "age_at_index": [50.0],
            "index_date": [dt.date(2020, 1, 1)],
        }
    )
    out = compute_egfr(labs_of([("M", dt.date(2021, 1, 1), "creatinine", 1.0)]), patients)
    # 2020 is a leap year: 366 days after the index date
    assert out["age_years"].item() == pytest.approx(50 + 366 / 365.25)
    assert out["years_from_index"].item() == pytest.approx(366 / 365.25)


def test_cohort_egfr_equals_equation_library_row_by_row() -> None:
    rng = np.random.default_rng(20240601)
    n = 60
    ids = [f"Q{i:02d}" for i in range(n)]
    births = [dt.date(1930, 1, 1) + dt.timedelta(days=int(d)) for d in rng.integers(0, 25000, n)]
    patients = pl.DataFrame(
        {
            "patient_id": ids,
            "sex": rng.choice(["female", "male"], n).tolist(),
            "birth_date": births,
            "weight_kg": rng.uniform(45, 110, n).round(1),
        }
    )
    dates = [dt.date(2019, 1, 1) + dt.timedelta(days=int(d)) for d in rng.integers(0, 900, n)]
    rows = [
        (i, d, "creatinine", float(v))
        for i, d, v in zip(ids, dates, rng.uniform(0.4, 6.0, n).round(2), strict=True)
    ]
    rows += [
        (i, d, "cystatin_c", float(v))
        for i, d, v in zip(
            ids[::2], dates[::2], rng.uniform(0.5, 4.0, n).round(2)[::2], strict=True
        )
    ]
    chosen = [
        "ckd_epi_2021_cr",
        "ckd_epi_2021_crcys",
        "ckd_epi_2012_cys",
        "ekfc_cr",
        "cockcroft_gault",
        "mdrd_175",
    ]
    out = compute_egfr(labs_of(rows), patients, chosen)
    by_id = {r["patient_id"]: r for r in patients.to_dicts()}
    checked = 0
    for row in out.to_dicts():
        person = by_id[row["patient_id"]]
        age = (row["sample_date"] - person["birth_date"]).days / 365.25
        spec = equations.REGISTRY[row["equation"]]
        given = {
            "age": age,
            "sex": person["sex"],
            "weight_kg": person["weight_kg"],
            "creatinine_mg_dl": row["creatinine_mg_dl"],
            "cystatin_c_mg_l": row["cystatin_c_mg_l"],
        }
        if any(given[k] is None for k in spec.inputs):
            assert row["egfr"] is None
            continue
        expected = equations.evaluate(row["equation"], **{k: given[k] for k in spec.inputs})
        if math.isnan(expected):
            assert row["egfr"] is None
        else:
            assert row["egfr"] == pytest.approx(expected, rel=1e-12)
            checked += 1
    assert checked > 200
    combined = out.filter(pl.col("equation") == "ckd_epi_2021_crcys")
    assert combined["egfr"].is_not_null().sum() == n // 2  # only real same-day pairs


def test_pairing_window_and_no_fabrication() -> None:
    rows = [
        ("M", dt.date(2020, 1, 1), "creatinine", 1.0),
        ("M", dt.date(2020, 1, 3), "cystatin_c", 1.1),
        ("M", dt.date(2020, 6, 1), "creatinine", 1.2),
    ]
    same_day = compute_egfr(labs_of(rows), ADULT, ["ckd_epi_2021_crcys"])
    assert same_day["egfr"].null_count() == 3
    # creatinine rows in labs order, then the cystatin C result nothing was paired with
    assert same_day["egfr_reason"].to_list() == [
        "no_cystatin_c_in_window",
        "no_cystatin_c_in_window",
        "no_creatinine_in_window",
    ]
    windowed = compute_egfr(labs_of(rows), ADULT, ["ckd_epi_2021_crcys"], pairing_window_days=2)
    assert windowed.height == 2
    first = windowed.row(0, named=True)
    assert (first["creatinine_mg_dl"], first["cystatin_c_mg_l"]) == (1.0, 1.1)
    age = (dt.date(2020, 1, 1) - dt.date(1980, 1, 1)).days / 365.25
    assert first["egfr"] == pytest.approx(
        equations.evaluate(
            "ckd_epi_2021_crcys", creatinine_mg_dl=1.0, cystatin_c_mg_l=1.1, age=age, sex="male"
        )
    )
    assert windowed["egfr_reason"].to_list() == [None, "no_cystatin_c_in_window"]


CHILD = pl.DataFrame(
    {
        "patient_id": ["K"],
        "sex": ["female"],
        "birth_date": [dt.date(2010, 1, 1)],
        "height_cm": [130.0],
    }
)


def test_height_from_measurements_nearest_in_window() -> None:
    # Schwartz 2009 JASN bedside equation: 0.413 x height (cm) / Scr (mg/dL)
    labs = labs_of(
        [
            ("K", dt.date(2020, 3, 1), "creatinine", 0.5),
            ("K", dt.date(2020, 9, 1), "creatinine", 0.5),
        ]
    )
    heights = pl.DataFrame(
        {
            "patient_id": ["K", "K"],
            "measurement_date": [dt.date(2020, 2, 20), dt.date(2020, 3, 20)],
            "height_cm": [140.0, 141.0],
        }
    )
    out = compute_egfr(
        labs, CHILD, ["schwartz_bedside"], measurements=heights, body_size_window_days=30
    )
    # March: nearest is 9 days before (140 cm); September: none within 30 days -> patients'
    assert out["egfr"].to_list() == pytest.approx([0.413 * 140 / 0.5, 0.413 * 130 / 0.5])
    no_height = compute_egfr(
        labs,
        CHILD.drop("height_cm"),
        ["schwartz_bedside"],
        measurements=heights,
        body_size_window_days=30,
    )
    assert no_height["egfr_reason"].to_list() == [None, "missing_height"]


def test_default_is_adult_only_and_age_bands_choose_equations() -> None:
    labs = labs_of(
        [
            ("K", dt.date(2020, 3, 1), "creatinine", 0.5),
            ("M", dt.date(2020, 3, 1), "creatinine", 1.0),
        ]
    )
    patients = pl.concat([CHILD, ADULT], how="diagonal_relaxed")
    default = compute_egfr(labs, patients)
    assert default["egfr_reason"].to_list() == ["age_below_validated_range", None]
    rule = EgfrRule(
        by_age=[
            AgeBand(max_age=18, equations=["ckid_u25_cr"]),
            AgeBand(min_age=18, equations=["ckd_epi_2021_cr"]),
        ]
    )
    banded = compute_egfr(labs, patients, rule=rule)
    assert banded.select("patient_id", "equation").rows() == [
        ("K", "ckid_u25_cr"),
        ("M", "ckd_epi_2021_cr"),
    ]
    assert banded["egfr"].null_count() == 0


def test_missing_inputs_named_in_reasons() -> None:
    patients = pl.DataFrame(
        {"patient_id": ["S", "A"], "sex": [None, "male"], "birth_date": [dt.date(1970, 1, 1), None]}
    )
    labs = labs_of(
        [
            ("S", dt.date(2020, 1, 1), "creatinine", 1.0),
            ("A", dt.date(2020, 1, 1), "creatinine", 1.0),
            ("Z", dt.date(2020, 1, 1), "creatinine", 1.0),
        ]
    )
    out = compute_egfr(labs, patients)
    assert dict(zip(out["patient_id"], out["egfr_reason"], strict=True)) == {
        "S": "missing_sex",
        "A": "missing_age",
        "Z": "missing_age",
    }
    assert set(out["egfr_reason"]) <= set(EGFR_REASON_CODES)


def test_measurement_window() -> None:
    labs = labs_of(
        [
            ("M", dt.date(2019, 6, 1), "creatinine", 1.0),
            ("M", dt.date(2020, 6, 1), "creatinine", 1.0),
        ]
    )
    out = compute_egfr(labs, ADULT, window_start_years=0.0, window_end_years=2.0)
    assert out["egfr_reason"].to_list() == ["outside_measurement_window", None]


def test_partition_invariance_harmonise_then_egfr() -> None:
    chosen = ["ckd_epi_2021_cr", "ckd_epi_2021_crcys", "cockcroft_gault"]
    whole_h = harmonize_tables(fx.dirty_labs(), fx.patients(), data_cut_date=fx.DATA_CUT)
    whole = compute_egfr(whole_h.labs, whole_h.patients, chosen)
    parts = []
    for half in (["P1", "P3", "P5"], ["P2", "P4", "P6"]):
        in_half = pl.col("patient_id").is_in(half)
        h = harmonize_tables(
            fx.dirty_labs().filter(in_half),
            fx.patients().filter(in_half),
            data_cut_date=fx.DATA_CUT,
        )
        parts.append(compute_egfr(h.labs, h.patients, chosen))
    combined = pl.concat(parts).sort("patient_id", "sample_datetime", "equation")
    assert_frame_equal(combined, whole.sort("patient_id", "sample_datetime", "equation"))


def test_wide_view() -> None:
    rows = [
        ("M", dt.date(2020, 1, 1), "creatinine", 0.9),
        ("M", dt.date(2020, 1, 1), "cystatin_c", 1.0),
    ]
    long = compute_egfr(labs_of(rows), ADULT, ["ckd_epi_2021_cr", "ckd_epi_2012_cys"])
    wide = compute_egfr(labs_of(rows), ADULT, ["ckd_epi_2021_cr", "ckd_epi_2012_cys"], wide=True)
    assert wide.height == 1
    assert wide["ckd_epi_2021_cr"].item() == pytest.approx(142 * 0.9938**40)
    assert (
        wide["ckd_epi_2012_cys"].item()
        == long.filter(pl.col("equation") == "ckd_epi_2012_cys")["egfr"].item()
    )
    assert egfr_wide(long).columns == wide.columns


def test_bad_input() -> None:
    labs = labs_of([("M", dt.date(2020, 1, 1), "creatinine", 80.0)]).with_columns(
        unit=pl.lit("umol/L")
    )
    with pytest.raises(InputDataError, match="creatinine unit 'umol/L' is not the standard"):
        compute_egfr(labs, ADULT)
    good = labs_of([("M", dt.date(2020, 1, 1), "creatinine", 1.0)])
    with pytest.raises(ConfigError, match="did you mean 'ckd_epi_2021_cr'"):
        compute_egfr(good, ADULT, ["ckd_epi_2021"])
    with pytest.raises(ConfigError, match="unknown rule 'pairing_window'"):
        compute_egfr(good, ADULT, pairing_window=3)
    with pytest.raises(InputDataError, match="labs: missing required column 'analyte'"):
        compute_egfr(good.drop("analyte"), ADULT)


def _one_sample(**patient: object) -> tuple[pl.DataFrame, pl.DataFrame]:
    labs = pl.DataFrame(
        {
            "patient_id": ["a"],
            "sample_date": [dt.date(2020, 1, 1)],
            "analyte": ["creatinine"],
            "value": [0.9],
            "unit": ["mg/dL"],
        }
    )
    people = pl.DataFrame({"patient_id": ["a"], **{k: [v] for k, v in patient.items()}})
    return labs, people


def test_one_equation_given_as_text_is_one_equation() -> None:
    labs, people = _one_sample(sex="male", birth_date=dt.date(1980, 1, 1))
    out = compute_egfr(labs, people, "ckd_epi_2021_cr")
    assert out["equation"].to_list() == ["ckd_epi_2021_cr"]
    # CKD-EPI 2021 at creatinine 0.9, male, exactly 40 (the doctest of compute_egfr)
    assert out["egfr"][0] == pytest.approx(110.7, abs=0.05)


def test_sex_codes_of_the_vocabulary_and_unknown_codes() -> None:
    # one sex vocabulary for every public function: "M"/"F" work as in harmonise
    labs, people = _one_sample(sex="M", birth_date=dt.date(1980, 1, 1))
    coded = compute_egfr(labs, people, "ckd_epi_2021_cr")["egfr"][0]
    labs, people = _one_sample(sex="male", birth_date=dt.date(1980, 1, 1))
    assert coded == compute_egfr(labs, people, "ckd_epi_2021_cr")["egfr"][0]
    labs, people = _one_sample(sex="2", birth_date=dt.date(1980, 1, 1))
    with pytest.raises(InputDataError, match=r"patients.sex: sex code\(s\) '2' not recognised"):
        compute_egfr(labs, people, "ckd_epi_2021_cr")


def test_age_from_dates_wins_over_an_empty_age_column() -> None:
    # an age_at_index column that exists but is empty must not hide the dates' age
    labs, people = _one_sample(
        sex="male", birth_date=dt.date(1980, 1, 1), index_date=dt.date(2019, 1, 1)
    )
    people = people.with_columns(age_at_index=pl.lit(None, pl.Float64))
    out = compute_egfr(labs, people, "ckd_epi_2021_cr")
    assert out["age_years"][0] == pytest.approx(40.0, abs=1e-9)
    assert out["egfr"][0] == pytest.approx(110.7, abs=0.05)
