"""Delta-adjusted multiple imputation with a tipping point, and eGFR set to a stated
value at kidney failure."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest
from statsmodels.regression.mixed_linear_model import MixedLM

from kidneycohort.models.joint import (
    delta_adjusted_slopes,
    simulate_joint_cohort,
    stated_value_at_kidney_failure,
)
from kidneycohort.models.joint._dropout_sensitivity import rubin


@pytest.fixture(scope="module")
def cohort() -> tuple[pl.DataFrame, pl.DataFrame, pl.DataFrame]:
    return simulate_joint_cohort(300, seed=21)


def test_rubin_rules_by_hand():
    # Rubin 1987 (from memory): Q = mean, T = W + (1 + 1/m) B,
    # df = (m - 1)(1 + W / ((1 + 1/m) B))^2; here W = 1, B = 1, m = 3
    mean, total, df, p = rubin(np.array([1.0, 2.0, 3.0]), np.array([1.0, 1.0, 1.0]))
    assert mean == 2.0
    assert total == pytest.approx(1.0 + 4.0 / 3.0)
    assert df == pytest.approx(2.0 * (1.0 + 0.75) ** 2)
    from scipy import stats

    assert p == pytest.approx(2 * stats.t.sf(2.0 / np.sqrt(7.0 / 3.0), 6.125))


@pytest.fixture(scope="module")
def delta_result(cohort):
    egfr, patients, endpoints = cohort
    return delta_adjusted_slopes(
        egfr,
        patients,
        endpoints,
        reference_group="placebo",
        deltas=(0.0, -2.0, -4.0, -8.0),
        imputations=5,
        seed=4,
    )


def test_delta_zero_is_close_to_the_observed_data_analysis(cohort, delta_result):
    # common practice: imputation under MAR from the observed-data model reproduces the
    # observed-data analysis up to Monte Carlo error (Carpenter & Kenward 2013, ch. 10)
    egfr, patients, _ = cohort
    rows = egfr.join(patients, on="patient_id").sort("patient_id", "years_from_index")
    years = rows["years_from_index"].to_numpy()
    observed = _statsmodels_slope_difference(
        years,
        rows["egfr"].to_numpy(),
        rows["patient_id"].to_numpy(),
        (rows["group"] == "active").to_numpy().astype(float),
    )
    row = delta_result.table.filter(pl.col("delta") == 0.0)
    assert abs(row["estimate"][0] - observed) < 0.5 * row["se"][0]
    assert delta_result.imputed_values > 0


def test_delta_moves_the_difference_monotonically_and_the_tipping_point_brackets_alpha(
    delta_result,
):
    # from memory: the shift is applied to the non-reference arm only, so a more
    # negative delta lowers its imputed slope and the difference
    table = delta_result.table.sort("delta")
    assert np.all(np.diff(table["estimate"].to_numpy()) > 0)
    tipping = delta_result.tipping_point
    assert tipping is not None and -8.0 < tipping < 0.0
    below = table.filter(pl.col("delta") < tipping)["p"].to_numpy()
    above = table.filter(pl.col("delta") > tipping)["p"].to_numpy()
    # bisection: the evaluated deltas nearest the tipping point straddle alpha
    assert below[-1] >= 0.05 > above[0] or below[-1] < 0.05 <= above[0]
    assert "tipping" not in delta_result.note
    assert f"{tipping:.2f}" in delta_result.methods_text()


def test_no_change_of_conclusion_gives_no_tipping_point(cohort):
    egfr, patients, endpoints = cohort
    # positive deltas make the active arm look better still: the grid agrees, and so do
    # its four doublings outwards (1, 2, 4, 8 per year)
    result = delta_adjusted_slopes(
        egfr, patients, endpoints, reference_group="placebo", deltas=(0.5, 1.0), imputations=3
    )
    assert result.tipping_point is None
    assert result.table["delta"].max() == 8.0
    assert result.note and "did not change" in result.methods_text()


def _statsmodels_slope_difference(years, response, patient, active):
    design = np.column_stack([np.ones_like(years), years])
    wide = np.hstack([design * (1 - active)[:, None], design * active[:, None]])
    fit = MixedLM(response, wide, groups=patient, exog_re=design).fit(reml=False)
    return fit.fe_params[3] - fit.fe_params[1]


def test_stated_value_at_kidney_failure_adds_one_value_per_failure(cohort):
    # reference: statsmodels MixedLM (ML) on the observed values and on the values with
    # 10 added at each kidney failure, built here independently of the module
    egfr, patients, endpoints = cohort
    result = stated_value_at_kidney_failure(egfr, patients, endpoints, reference_group="placebo")
    failures = endpoints.filter(pl.col("endpoint") == "kidney_failure", pl.col("event") == 1)
    assert result.added_values == failures.height
    added = failures.select(
        "patient_id", pl.col("years").alias("years_from_index"), pl.lit(10.0).alias("egfr")
    )
    table = result.table
    assert table["analysis"].to_list() == ["observed", "stated_value"]
    for row, values in enumerate(
        [egfr.drop("equation"), pl.concat([egfr.drop("equation"), added])]
    ):
        rows = values.join(patients, on="patient_id").sort("patient_id", "years_from_index")
        expected = _statsmodels_slope_difference(
            rows["years_from_index"].to_numpy(),
            rows["egfr"].to_numpy(),
            rows["patient_id"].to_numpy(),
            (rows["group"] == "active").to_numpy().astype(float),
        )
        assert table["estimate"][row] == pytest.approx(expected, abs=2e-3)
    assert table["estimate"][1] != pytest.approx(table["estimate"][0], abs=1e-3)
    assert "10 mL/min" in result.methods_text()
