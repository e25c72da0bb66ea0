"""The configured dropout analysis: the three analyses as tables in their contracts,
each part that cannot be estimated a row that says so, and the shared table."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from kidneycohort.models.joint import (
    DropoutAnalysisRule,
    JointCohortTruth,
    StatedValuePart,
    TippingPointPart,
    delta_adjusted_slopes,
    dropout_analysis,
    simulate_joint_cohort,
)
from kidneycohort.schemas import DROPOUT_SENSITIVITY, DROPOUT_SLOPES
from kidneycohort.tables import dropout_table


@pytest.fixture(scope="module")
def cohort() -> tuple[pl.DataFrame, pl.DataFrame, pl.DataFrame]:
    return simulate_joint_cohort(240, seed=5)


@pytest.fixture(scope="module")
def result(cohort):
    rule = DropoutAnalysisRule(
        reference_group="placebo", tipping_point=TippingPointPart(imputations=5)
    )
    return dropout_analysis(*cohort, rule=rule)


def test_tables_follow_their_contracts_and_every_analysis_has_its_methods(result) -> None:
    assert dict(result.slopes.schema) == DROPOUT_SLOPES
    assert dict(result.sensitivity.schema) == DROPOUT_SENSITIVITY
    assert set(result.slopes["model"]) == {"joint", "mixed"}
    assert set(result.sensitivity["analysis"]) == {
        "delta_adjusted",
        "stated_value_at_kidney_failure",
    }
    assert result.sensitivity["estimable"].all()
    assert len(result.methods) == 3
    assert "Rubin" in result.methods[1] and "10 mL/min" in result.methods[2]


def test_delta_zero_row_equals_the_function_called_directly(cohort, result) -> None:
    direct = delta_adjusted_slopes(
        *cohort, deltas=(0.0, -1.0, -2.0, -3.0, -5.0), imputations=5, reference_group="placebo"
    )
    ours = result.sensitivity.filter(pl.col("analysis") == "delta_adjusted").sort("delta")
    np.testing.assert_allclose(ours["estimate"], direct.table.sort("delta")["estimate"])


def test_a_grid_that_agrees_is_extended_until_the_conclusion_changes() -> None:
    # a grid of delta = 0 alone: the search doubles outwards (-2, -4, ...) and bisects;
    # at the tipping point the pooled p equals alpha within the bisection's bracket
    # (Rubin's rules; the p values move monotonically with delta)
    rule = DropoutAnalysisRule(
        reference_group="placebo",
        joint_model=False,
        stated_value=None,
        tipping_point=TippingPointPart(deltas=(0.0,), imputations=5),
    )
    # a clear difference (-3.5 vs -1.5 per year, SD 1.5) so that delta = 0 is significant
    clear = simulate_joint_cohort(
        240, seed=5, truth=JointCohortTruth(slopes={"placebo": -3.5, "active": -1.5})
    )
    table = dropout_analysis(*clear, rule=rule).sensitivity.sort("delta")
    assert table.filter(pl.col("delta") == 0.0)["p"][0] < 0.05
    assert "extension" in table["step"].to_list()
    # the bisection steps lie inside the bracket the extension found, and only the grid
    # and the extension reach the shared table
    outer = table.filter(pl.col("step") != "bisection")["delta"].sort()
    bisection = table.filter(pl.col("step") == "bisection")["delta"]
    assert bisection.len() > 0
    assert ((bisection > outer[0]) & (bisection < outer[1])).all()
    shown = dropout_table(pl.DataFrame(schema=DROPOUT_SLOPES), table)
    assert shown.height == outer.len()
    tipping = table["tipping_point"][0]
    assert tipping is not None and tipping < 0
    below = table.filter(pl.col("delta") <= tipping)["p"]
    above = table.filter(pl.col("delta") > tipping)["p"]
    assert (below >= 0.05).all() and (above < 0.05).all()


def test_one_group_is_not_estimable_and_prints_no_number(cohort) -> None:
    egfr, patients, endpoints = cohort
    rule = DropoutAnalysisRule(
        group_column=None, joint_model=False, tipping_point=TippingPointPart(imputations=2)
    )
    table = dropout_analysis(egfr, patients, endpoints, rule=rule).sensitivity
    assert table.height == 2
    assert not table["estimable"].any()
    assert set(table["reason"]) == {"one_group"}
    assert table["estimate"].null_count() == 2 and table["p"].null_count() == 2
    assert all("two groups" in note for note in table["note"])


def test_no_kidney_failure_says_nothing_was_added(cohort) -> None:
    egfr, patients, endpoints = cohort
    censored = endpoints.with_columns(
        pl.when(pl.col("endpoint") == "kidney_failure")
        .then(0)
        .otherwise(pl.col("event"))
        .cast(endpoints["event"].dtype)
        .alias("event")
    )
    rule = DropoutAnalysisRule(
        reference_group="placebo",
        joint_model=False,
        tipping_point=None,
        stated_value=StatedValuePart(),
    )
    table = dropout_analysis(egfr, patients, censored, rule=rule).sensitivity
    stated = table.filter(pl.col("step") == "stated_value")
    assert "nothing was added" in stated["note"][0]
    observed = table.filter(pl.col("step") == "observed")
    assert stated["estimate"][0] == pytest.approx(observed["estimate"][0])


def test_shared_table_prints_differences_and_ne_for_what_is_not_estimable(cohort, result) -> None:
    shown = dropout_table(result.slopes, result.sensitivity)
    assert shown.columns == [
        "analysis",
        "assumption",
        "contrast",
        "quantity",
        "estimate_ci",
        "p",
        "note",
    ]
    # group means are in the model table only; the shared table shows differences
    assert set(shown["contrast"]) <= {"active - placebo", "all"}
    assert "bisection" not in " ".join(shown["assumption"])
    egfr, patients, endpoints = cohort
    censored = endpoints.with_columns(pl.lit(0).cast(endpoints["event"].dtype).alias("event"))
    rule = DropoutAnalysisRule(reference_group="placebo", tipping_point=None, stated_value=None)
    no_events = dropout_analysis(egfr, patients, censored, rule=rule)
    printed = dropout_table(no_events.slopes, no_events.sensitivity)
    joint = printed.filter(pl.col("analysis").str.starts_with("Joint"))
    assert (joint["estimate_ci"] == "NE").all() and (joint["note"].str.len_chars() > 10).all()
