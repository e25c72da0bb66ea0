"""Registry, dispatch, reasons, bad input, solvers, body size and the CLI listing."""

from __future__ import annotations

import json
import math
import warnings

import numpy as np
import pandas as pd
import polars as pl
import pytest
from click.testing import CliRunner

from kidneycohort import equations as eq
from kidneycohort.cli import cli
from kidneycohort.equations._core import bisect_log
from kidneycohort.errors import (
    DataQualityWarning,
    EquationWarning,
    InputDataError,
    UnknownEquationError,
)

EXPECTED_IDS = {
    "ckd_epi_2021_cr",
    "ckd_epi_2021_crcys",
    "ckd_epi_2012_cys",
    "ckd_epi_2012_crcys",
    "ckd_epi_2009_cr",
    "mdrd_175",
    "mdrd_186",
    "ekfc_cr",
    "ekfc_cys",
    "fas_cr",
    "bis1_cr",
    "lmr_cr",
    "cockcroft_gault",
    "schwartz_bedside",
    "ckid_u25_cr",
    "ckid_u25_cys",
}

# Typical adult-range inputs used to exercise every equation at once.
TYPICAL = {
    "creatinine_mg_dl": 1.1,
    "cystatin_c_mg_l": 1.0,
    "height_cm": 150.0,
    "weight_kg": 70.0,
    "sex": "female",
}


def typical_inputs(spec: eq.EquationSpec) -> dict[str, object]:
    age = spec.min_age + 1 if spec.max_age is None else (spec.min_age + spec.max_age) / 2
    return {name: TYPICAL.get(name, age) for name in spec.inputs}


def test_registry_holds_exactly_the_documented_ids() -> None:
    assert set(eq.REGISTRY) == EXPECTED_IDS
    for spec in eq.REGISTRY.values():
        assert spec.kind in {"creatinine", "cystatin_c", "combined", "clearance"}
        assert spec.reference and spec.doi and spec.population
        assert set(spec.inputs) <= {
            "creatinine_mg_dl",
            "cystatin_c_mg_l",
            "age",
            "sex",
            "height_cm",
            "weight_kg",
        }
        assert spec.function.__doc__ and ".. math::" in spec.function.__doc__
    assert eq.REGISTRY["cockcroft_gault"].output_unit == "mL/min"


@pytest.mark.parametrize("equation_id", sorted(EXPECTED_IDS))
def test_every_id_evaluates_and_matches_its_own_function(equation_id: str) -> None:
    spec = eq.get_equation(equation_id)
    inputs = typical_inputs(spec)
    value = eq.evaluate(equation_id, **inputs)
    assert isinstance(value, float)
    assert math.isfinite(value) and value > 0
    assert spec.function(**inputs) == value


def test_frozen_spec() -> None:
    spec = eq.REGISTRY["ckd_epi_2021_cr"]
    with pytest.raises(AttributeError):
        spec.min_age = 0  # type: ignore[misc]


def test_unknown_id_suggests_the_closest() -> None:
    with pytest.raises(UnknownEquationError, match="did you mean 'ckd_epi_2021_cr'"):
        eq.evaluate("ckd_epi_2021_creat", creatinine_mg_dl=1.0, age=50, sex="male")
    with pytest.raises(KeyError):  # also catchable as a KeyError
        eq.get_equation("mdrd")


def test_missing_required_input_is_an_error_naming_it() -> None:
    with pytest.raises(InputDataError, match="cockcroft_gault: evaluate needs 'weight_kg'"):
        eq.evaluate("cockcroft_gault", creatinine_mg_dl=1.0, age=50, sex="male")


def test_non_numeric_values_are_an_error_naming_the_argument() -> None:
    with pytest.raises(InputDataError, match=r"creatinine_mg_dl: expected numbers.*'high'"):
        eq.evaluate("ckd_epi_2021_cr", creatinine_mg_dl=["high", "1.0"], age=50, sex="male")
    with pytest.raises(InputDataError, match="age: expected numbers"):
        eq.evaluate("ckd_epi_2021_cr", creatinine_mg_dl=1.0, age=pl.Series(["x"]), sex="male")


def test_different_lengths_are_an_error() -> None:
    with pytest.raises(InputDataError, match="different lengths"):
        eq.evaluate("ckd_epi_2021_cr", creatinine_mg_dl=[1.0, 1.1], age=[50, 60, 70], sex="male")


def test_reason_codes_per_element() -> None:
    result = eq.evaluate_with_reason(
        "ckd_epi_2021_cr",
        creatinine_mg_dl=[1.0, None, -1.0, 1.0, 1.0, 1.0, np.inf, 1.0],
        age=[50, 50, 50, 50, 17, 50, 50, -3],
        sex=["male", "male", "male", " F ", "female", None, "female", "male"],
    )
    assert result.reasons.tolist() == [
        "",
        "missing_input",
        "nonpositive_value",
        "",
        "age_below_validated_range",
        "missing_input",
        "invalid_value",
        "invalid_value",
    ]
    assert np.isfinite(result.values[[0, 3]]).all()
    assert np.isnan(result.values[[1, 2, 4, 5, 6, 7]]).all()
    # " F " is the sex vocabulary's female: the same value as "female" (one vocabulary)
    same = eq.evaluate("ckd_epi_2021_cr", creatinine_mg_dl=1.0, age=50, sex="female")
    assert result.values[3] == pytest.approx(float(same))


def test_unknown_sex_code_is_an_error_naming_it() -> None:
    # an unknown code is never a silent missing value (one sex vocabulary everywhere)
    with pytest.raises(InputDataError, match=r"sex code\(s\) 'other' not recognised"):
        eq.evaluate("ckd_epi_2021_cr", creatinine_mg_dl=[1.0, 1.0], age=50, sex=["male", "other"])
    with pytest.raises(InputDataError, match=r"sex code\(s\) 'X' not recognised"):
        eq.evaluate("ckd_epi_2021_cr", creatinine_mg_dl=1.0, age=50, sex="X")


def test_reasons_above_range_and_outside_domain() -> None:
    kids = eq.evaluate_with_reason("schwartz_bedside", creatinine_mg_dl=0.6, height_cm=170, age=19)
    assert kids == (pytest.approx(float("nan"), nan_ok=True), "age_above_validated_range")
    # Cockcroft-Gault: (140 - age) <= 0 has no clearance (Cockcroft & Gault 1976 formula)
    old = eq.evaluate_with_reason(
        "cockcroft_gault", creatinine_mg_dl=1.0, age=140, weight_kg=60, sex="male"
    )
    assert math.isnan(old.values) and old.reasons == "outside_equation_domain"


def test_outside_age_opt_in_gives_the_formula_value() -> None:
    # 2021 creatinine formula at 16, computed by hand (Inker 2021 coefficients, from
    # memory: arithmetic re-check of the implementation; coefficients recalled, not an independent
    # check)
    assert math.isnan(eq.evaluate("ckd_epi_2021_cr", creatinine_mg_dl=0.8, age=16, sex="male"))
    got = eq.evaluate(
        "ckd_epi_2021_cr", creatinine_mg_dl=0.8, age=16, sex="male", allow_outside_age=True
    )
    assert got == pytest.approx(142 * (0.8 / 0.9) ** -0.302 * 0.9938**16, rel=1e-12)
    ok = eq.evaluate_with_reason(
        "ckd_epi_2021_cr", creatinine_mg_dl=0.8, age=16, sex="male", allow_outside_age=True
    )
    assert ok.reasons == ""


def test_sex_spellings_are_trimmed_and_case_folded() -> None:
    values = eq.evaluate(
        "ckd_epi_2021_cr", creatinine_mg_dl=1.0, age=50, sex=np.array([" Female", "MALE", "f"])
    )
    # "f" is the vocabulary's female (the same codes harmonise accepts)
    assert np.isfinite(values).all() and values[0] == values[2] != values[1]


def test_race_coefficient_only_on_request() -> None:
    plain = eq.evaluate("ckd_epi_2009_cr", creatinine_mg_dl=1.0, age=50, sex="male")
    ignored = eq.evaluate(
        "ckd_epi_2009_cr", creatinine_mg_dl=1.0, age=50, sex="male", black_race=True
    )
    assert ignored == plain
    with pytest.warns(EquationWarning, match="CKD-EPI 2021"):
        applied = eq.evaluate(
            "ckd_epi_2009_cr",
            creatinine_mg_dl=1.0,
            age=50,
            sex="male",
            black_race=[True, False, None],
            apply_race_coefficient=True,
        )
    # Levey 2009: x 1.159 if Black; a missing race flag cannot be computed
    assert applied[0] == pytest.approx(plain * 1.159, rel=1e-12)
    assert applied[1] == pytest.approx(plain, rel=1e-12)
    assert math.isnan(applied[2])
    with pytest.raises(InputDataError, match="needs black_race"):
        eq.evaluate(
            "ckd_epi_2009_cr",
            creatinine_mg_dl=1.0,
            age=50,
            sex="male",
            apply_race_coefficient=True,
        )


def test_race_flag_is_ignored_by_race_free_equations() -> None:
    plain = eq.evaluate("ckd_epi_2021_cr", creatinine_mg_dl=1.0, age=50, sex="male")
    flagged = eq.evaluate(
        "ckd_epi_2021_cr",
        creatinine_mg_dl=1.0,
        age=50,
        sex="male",
        black_race=True,
        apply_race_coefficient=True,
    )
    assert flagged == plain


def test_numpy_pandas_polars_and_lists_agree() -> None:
    creatinine = [0.6, 1.4, None, 2.0]
    age = [45.0, 70.0, 50.0, 30.0]
    sex = ["female", "male", "male", None]
    as_list = eq.evaluate("ekfc_cr", creatinine_mg_dl=creatinine, age=age, sex=sex)
    as_numpy = eq.evaluate(
        "ekfc_cr",
        creatinine_mg_dl=np.array(creatinine, dtype=float),
        age=np.array(age),
        sex=np.array(sex, dtype=object),
    )
    as_pandas = eq.evaluate(
        "ekfc_cr",
        creatinine_mg_dl=pd.Series(creatinine, dtype="Float64"),
        age=pd.Series(age),
        sex=pd.Series(sex, dtype="category"),
    )
    as_polars = eq.evaluate(
        "ekfc_cr",
        creatinine_mg_dl=pl.Series(creatinine),
        age=pl.Series(age),
        sex=pl.Series(sex, dtype=pl.Categorical),
    )
    for other in (as_numpy, as_pandas, as_polars):
        np.testing.assert_array_equal(as_list, other)
    assert np.isfinite(as_list[:2]).all() and np.isnan(as_list[2:]).all()


# ----------------------------------------------------------------------------- solvers


def _solve(spec: eq.EquationSpec, marker: str, target: np.ndarray, given: dict) -> np.ndarray:
    solver = eq.solve_creatinine if marker == "creatinine_mg_dl" else eq.solve_cystatin_c
    other = {k: v for k, v in given.items() if k not in (marker, "age", "sex")}
    return solver(spec.id, target, age=given["age"], sex=given.get("sex"), **other)


@pytest.mark.parametrize("equation_id", sorted(EXPECTED_IDS))
def test_evaluate_of_solve_returns_the_target(equation_id: str) -> None:
    spec = eq.get_equation(equation_id)
    rng = np.random.default_rng(7)
    n = 400
    high = spec.max_age if spec.max_age is not None else 95
    given = {
        "age": rng.uniform(spec.min_age, high, n),
        "sex": np.where(rng.random(n) < 0.5, "female", "male"),
        "creatinine_mg_dl": rng.uniform(0.3, 6, n),
        "cystatin_c_mg_l": rng.uniform(0.5, 4, n),
        "height_cm": rng.uniform(80, 190, n),
        "weight_kg": rng.uniform(15, 120, n),
    }
    given = {k: v for k, v in given.items() if k in spec.inputs}
    target = rng.uniform(8, 130, n)
    for marker in ("creatinine_mg_dl", "cystatin_c_mg_l"):
        if marker not in spec.inputs:
            continue
        solved = _solve(spec, marker, target, given)
        assert np.isfinite(solved).all() and (solved > 0).all()
        with warnings.catch_warnings():
            # a low target with high cystatin C needs creatinine beyond the plausible
            # range, which the unit-slip check rightly flags; the inverse is still exact
            warnings.simplefilter("ignore", DataQualityWarning)
            back = eq.evaluate(equation_id, **{**given, marker: solved})
        np.testing.assert_allclose(back, target, rtol=1e-9)


def test_solve_scalar_and_closed_form_by_hand() -> None:
    # Inker 2021: above the knot eGFR = 142 (S/0.7)^-1.2 0.9938^age 1.012 (female),
    # so S = 0.7 (eGFR / (142 0.9938^age 1.012))^(-1/1.2). From memory: an arithmetic
    # re-check of the implementation; coefficients recalled, not an independent check.
    got = eq.solve_creatinine("ckd_epi_2021_cr", 45.0, age=60, sex="female")
    assert isinstance(got, float)
    assert got == pytest.approx(0.7 * (45.0 / (142 * 0.9938**60 * 1.012)) ** (-1 / 1.2), rel=1e-12)


def test_solve_invalid_targets_and_inputs_give_nan() -> None:
    got = eq.solve_creatinine(
        "ckd_epi_2021_cr", [60.0, -5.0, np.nan, 60.0], age=[50, 50, 50, 10], sex="male"
    )
    assert np.isfinite(got[0]) and np.isnan(got[1:]).all()
    with pytest.raises(InputDataError, match="does not use cystatin_c_mg_l"):
        eq.solve_cystatin_c("ckd_epi_2021_cr", 60.0, age=50, sex="male")
    with pytest.raises(InputDataError, match="needs 'cystatin_c_mg_l'"):
        eq.solve_creatinine("ckd_epi_2021_crcys", 60.0, age=50, sex="male")


def test_bisection_agrees_with_the_closed_form() -> None:
    spec = eq.REGISTRY["ckd_epi_2021_cr"]
    age = np.array([30.0, 55.0, 80.0])
    female = np.array([True, False, True])
    target = np.array([120.0, 60.0, 12.0])
    by_bisection = bisect_log(
        lambda s: spec.kernel(creatinine_mg_dl=s, age=age, female=female), target
    )
    closed = eq.solve_creatinine(
        "ckd_epi_2021_cr", target, age=age, sex=np.where(female, "female", "male")
    )
    np.testing.assert_allclose(by_bisection, closed, rtol=1e-12)


# ----------------------------------------------------------------------------- body size


def test_body_surface_area_and_deindexing() -> None:
    # DuBois & DuBois 1916: 0.007184 W^0.425 H^0.725; Mosteller 1987: sqrt(H W / 3600).
    # From memory: arithmetic re-check of the implementation; coefficients recalled, not an
    # independent check. 1.73 m2 (de-indexing) re-read in KDIGO 2012 (bsa.standard).
    assert eq.bsa_dubois(170, 70) == pytest.approx(0.007184 * 70**0.425 * 170**0.725, rel=1e-12)
    assert eq.bsa_mosteller(170, 70) == pytest.approx(math.sqrt(170 * 70 / 3600), rel=1e-12)
    # both give about 1.81 m2 for 170 cm / 70 kg (published tables, from memory)
    assert 1.79 < eq.bsa_dubois(170, 70) < 1.83
    np.testing.assert_allclose(
        eq.deindex_egfr([60.0, 60.0], [2.0, 1.5]), [60 * 2.0 / 1.73, 60 * 1.5 / 1.73]
    )
    assert eq.index_gfr(eq.deindex_egfr(45.0, 2.1), 2.1) == pytest.approx(45.0)
    assert np.isnan(eq.bsa_mosteller([170, -1, np.nan], 70)[1:]).all()


# ----------------------------------------------------------------------------- listing and CLI


def test_registry_table_columns() -> None:
    table = eq.registry_table()
    assert table.columns == ["id", "label", "inputs", "ages", "unit", "population", "reference"]
    assert all(dtype == pl.String for dtype in table.dtypes)
    assert set(table["id"]) == EXPECTED_IDS
    row = table.filter(pl.col("id") == "bis1_cr").row(0, named=True)
    assert (
        row["ages"] == "70+" and "doi:10.7326/0003-4819-157-7-201210020-00003" in row["reference"]
    )
    assert table.filter(pl.col("id") == "ckid_u25_cr")["ages"].item() == "1 to <25"


def test_cli_lists_equations_as_table() -> None:
    result = CliRunner().invoke(cli, ["equations", "--format", "table"])
    assert result.exit_code == 0, result.output
    for equation_id in EXPECTED_IDS:
        assert equation_id in result.output
    assert "mL/min/1.73 m2" in result.output


def test_cli_lists_equations_as_json() -> None:
    result = CliRunner().invoke(cli, ["equations", "--format", "json"])
    assert result.exit_code == 0, result.output
    rows = json.loads(result.output)
    assert {r["id"] for r in rows} == EXPECTED_IDS
    assert all(
        set(r) == {"id", "label", "inputs", "ages", "unit", "population", "reference"} for r in rows
    )
    assert {r["unit"] for r in rows} == {"mL/min/1.73 m2", "mL/min"}


def test_cli_sources_table_lists_constants_and_counts_recalled() -> None:
    from kidneycohort.provenance import CONSTANTS, RECALLED_CAUTION, status_counts

    # wide terminal so that no id is folded across lines
    result = CliRunner(env={"COLUMNS": "400"}).invoke(cli, ["equations", "--sources"])
    assert result.exit_code == 0, result.output
    for constant in CONSTANTS:
        assert constant.id in result.output
    counts = status_counts()
    assert counts["recalled"] == sum(c.status == "recalled" for c in CONSTANTS) > 0
    footer = (
        f"{len(CONSTANTS)} constants: {counts['re-read']} re-read, {counts['derived']} "
        f"derived, {counts['recalled']} recalled."
    )
    flat = " ".join(result.output.split())
    assert footer in flat
    assert RECALLED_CAUTION in flat
    assert "Inker 2021, doi:10.1056/NEJMoa2102953" in flat
    # the plain listing is unchanged: equations, not constants
    plain = CliRunner(env={"COLUMNS": "400"}).invoke(cli, ["equations"])
    assert "ckd_epi_2021_cr" in plain.output and "recalled" not in plain.output


def test_cli_sources_as_json() -> None:
    from kidneycohort.provenance import CONSTANTS, PUBLICATIONS, RECALLED_CAUTION

    result = CliRunner().invoke(cli, ["equations", "--sources", "--format", "json"])
    assert result.exit_code == 0, result.output
    payload = json.loads(result.output)
    assert set(payload) == {"constants", "publications", "counts", "caution"}
    rows = payload["constants"]
    assert [r["id"] for r in rows] == [c.id for c in CONSTANTS]
    assert set(rows[0]) == {"id", "value", "unit", "publication", "where", "status", "note", "code"}
    recalled = [r for r in rows if r["status"] == "recalled"]
    assert payload["counts"]["recalled"] == len(recalled) > 0
    assert sum(payload["counts"].values()) == len(rows)
    assert payload["caution"] == RECALLED_CAUTION
    assert {p["key"] for p in payload["publications"]} == {p.key for p in PUBLICATIONS}
    schwartz = next(r for r in rows if r["id"] == "schwartz_bedside.k")
    assert (schwartz["value"], schwartz["status"]) == (str(eq.pediatric.BEDSIDE_K), "re-read")


def test_a_value_plausible_only_in_the_other_unit_warns_once() -> None:
    # 88 umol/L is 1.0 mg/dL (88.4 umol/L per mg/dL, KDIGO 2012); 88 mg/dL is impossible
    with pytest.warns(DataQualityWarning, match=r"creatinine_mg_dl: 2 value\(s\).*umol/L") as seen:
        eq.evaluate("ckd_epi_2021_cr", creatinine_mg_dl=[88.0, 1.0, 120.0], age=50, sex="male")
    assert len(seen) == 1
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # ordinary values in the right unit: no warning
        eq.evaluate("ckd_epi_2021_cr", creatinine_mg_dl=[0.6, 4.5, 12.0], age=50, sex="male")
