"""KFRE 4-variable equation: hand calculations, monotonicity, applicability, inputs.

Coefficients, centring values and baseline survivals are recalled, not re-read (Tangri
2011 JAMA 305:1553, 4-variable model; Tangri 2016 JAMA 315:164, regional recalibration;
``kidneycohort equations --sources`` lists their status). The hand calculations type the
same recalled numbers as the code: they are arithmetic re-checks of the implementation
(a wrong sign, centre or baseline survival in the code shows up), not an independent
check of the coefficients. No published worked example could be re-read to add one.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import polars as pl
import pytest

from kidneycohort.errors import ConfigError, InputDataError
from kidneycohort.kfre import add_kfre_risk, kfre_inputs, kfre_risk
from tests._fixtures.derivations import EQ, INDEX, egfr_table, uacr_labs


def test_hand_computed_risk_70_year_old_man():
    # Arithmetic re-check of the implementation; coefficients recalled, not an independent
    # check. Age 70, male, eGFR 30, UACR 300 mg/g; linear predictor by hand:
    #   -0.2201 * (70/10 - 7.036)    =  0.0079236
    #   +0.2467 * (1 - 0.5642)       =  0.1075119
    #   -0.5567 * (30/5 - 7.222)     =  0.6802874
    #   +0.4510 * (ln 300 - 5.137)   =  0.4510 * 0.5667825 = 0.2556189
    #   sum = 1.0513418, exp(sum) = 2.861488
    # 2-year North American: 1 - 0.9750 ** 2.861488 = 0.069885
    # 5-year North American: 1 - 0.9240 ** 2.861488 = 0.202426
    # 2-year non-North American: 1 - 0.9832 ** 2.861488 = 0.047325
    # 5-year non-North American: 1 - 0.9365 ** 2.861488 = 0.171162
    assert float(kfre_risk(70, 1, 30, 300, 2)) == pytest.approx(0.069885, abs=2e-6)
    assert float(kfre_risk(70, 1, 30, 300, 5)) == pytest.approx(0.202426, abs=2e-6)
    assert float(kfre_risk(70, 1, 30, 300, 2, "non_north_american")) == pytest.approx(
        0.047325, abs=2e-6
    )
    assert float(kfre_risk(70, 1, 30, 300, 5, "non_north_american")) == pytest.approx(
        0.171162, abs=2e-6
    )


def test_hand_computed_risk_55_year_old_woman():
    # Arithmetic re-check of the implementation; coefficients recalled, not an independent
    # check. Age 55, female, eGFR 45, UACR 50 mg/g:
    #   -0.2201 * (5.5 - 7.036) = 0.3380736; +0.2467 * (0 - 0.5642) = -0.1391881
    #   -0.5567 * (9 - 7.222) = -0.9898126; +0.4510 * (ln 50 - 5.137) = -0.5524646
    #   sum = -1.3433917, exp = 0.2609591; 5-year NA: 1 - 0.9240 ** 0.2609591 = 0.020416
    assert float(kfre_risk(55, 0, 45, 50, 5)) == pytest.approx(0.020416, abs=2e-6)


def test_risk_rises_with_albuminuria_and_falls_with_egfr():
    # direction of the effects (Tangri 2011: higher albuminuria and lower eGFR predict
    # kidney failure) and 5-year risk above 2-year risk; holds whatever the exact values
    acr = np.array([10.0, 30.0, 300.0, 3000.0])
    assert np.all(np.diff(kfre_risk(60, 1, 40, acr, 5)) > 0)
    gfr = np.array([10.0, 20.0, 40.0, 59.0])
    assert np.all(np.diff(kfre_risk(60, 1, gfr, 100, 5)) < 0)
    assert np.all(kfre_risk(60, 1, gfr, 100, 2) < kfre_risk(60, 1, gfr, 100, 5))


def test_table_enforces_applicability():
    # Tangri 2011 abstract: developed in CKD stages 3 to 5 (eGFR 10-59, re-read); adults
    inputs = pl.DataFrame(
        {
            "patient_id": list("abcdefg"),
            "age_years": [70.0, 17.0, 70.0, 70.0, 70.0, None, 18.0],
            "sex": ["male", "male", "female", "male", "other", "male", "Female"],
            "egfr": [30.0, 30.0, 60.0, 30.0, 30.0, 30.0, 59.9],
            "uacr_mg_g": [300.0, 300.0, 300.0, 0.0, 300.0, 300.0, 30.0],
        }
    )
    out = add_kfre_risk(inputs)
    assert out["kfre_reason"].to_list() == [
        None,
        "not_adult",
        "egfr_not_below_60",
        "uacr_not_positive",
        "sex_unknown",
        "missing_input",
        None,
    ]
    assert out["kfre_2y"][0] == pytest.approx(float(kfre_risk(70, 1, 30, 300, 2)), rel=1e-12)
    assert out["kfre_5y"][6] == pytest.approx(float(kfre_risk(18, 0, 59.9, 30, 5)), rel=1e-12)
    assert out["kfre_2y"].null_count() == 5
    assert out["kfre_region"].unique().to_list() == ["north_american"]
    with pytest.raises(ConfigError, match="did you mean 'north_american'"):
        add_kfre_risk(inputs, region="north_america")  # type: ignore[arg-type]
    with pytest.raises(InputDataError, match="uacr_mg_g"):
        add_kfre_risk(inputs.drop("uacr_mg_g"))


def test_inputs_at_a_chosen_time_take_latest_values():
    egfr = egfr_table([("a", -400, 40.0), ("a", -30, 35.0), ("a", 200, 28.0), ("b", -10, 50.0)])
    labs = uacr_labs([("a", -100, 500.0), ("a", 150, 900.0)])
    patients = pl.DataFrame(
        {
            "patient_id": ["a", "b"],
            "sex": ["male", "female"],
            "birth_date": [dt.date(1951, 1, 1), dt.date(1961, 1, 1)],
            "index_date": [INDEX, INDEX],
        }
    )
    at_index = kfre_inputs(egfr, labs, patients, EQ).sort("patient_id")
    assert at_index["egfr"].to_list() == [35.0, 50.0]
    assert at_index["uacr_mg_g"].to_list() == [500.0, None]
    assert at_index["age_years"][0] == pytest.approx((INDEX - dt.date(1951, 1, 1)).days / 365.25)
    later = kfre_inputs(egfr, labs, patients, EQ, at_years=1.0).sort("patient_id")
    assert later["egfr"].to_list() == [28.0, None]  # b's value is older than 365 days
    assert later["uacr_mg_g"][0] == 900.0
    risks = add_kfre_risk(at_index)
    assert risks["kfre_reason"].to_list() == [None, "missing_input"]
    with pytest.raises(InputDataError, match="did you mean 'ckd_epi_2021_cr'"):
        kfre_inputs(egfr, labs, patients, "ckd_epi_2021_c")
