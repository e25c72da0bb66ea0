"""Bad input: not-estimable fits say so with a reason code and carry no numbers;
unusable input raises a one-line error naming what is wrong."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import polars as pl
import pytest

from kidneycohort.errors import ConfigError, InputDataError
from kidneycohort.models.joint import JointSlopeModel, simulate_joint_cohort
from kidneycohort.models.joint._rule import SUMMARY_COLUMNS


@pytest.fixture(scope="module")
def cohort() -> tuple[pl.DataFrame, pl.DataFrame, pl.DataFrame]:
    return simulate_joint_cohort(150, seed=3)


def _not_estimable(table: pl.DataFrame, model: str, reason: str) -> None:
    rows = table.filter(pl.col("model") == model)
    assert rows.height > 0
    assert not rows["estimable"].any()
    assert (rows["reason"] == reason).all()
    assert rows["estimate"].null_count() == rows.height
    assert rows["se"].null_count() == rows.height
    assert rows["p"].null_count() == rows.height
    assert all(len(note) > 10 and "\n" not in note for note in rows["note"])


def test_summary_has_the_stated_columns(cohort):
    model = JointSlopeModel(reference_group="placebo").fit(*cohort)
    assert tuple(model.summary().columns) == SUMMARY_COLUMNS
    assert model.summary()["estimable"].all()


def test_no_dropout_events_is_not_estimable_but_the_mixed_model_is(cohort):
    egfr, patients, endpoints = cohort
    censored = endpoints.with_columns(pl.lit(0, dtype=pl.Int8).alias("event"))
    model = JointSlopeModel(reference_group="placebo").fit(egfr, patients, censored)
    table = model.summary()
    _not_estimable(table, "joint", "no_dropout_events")
    assert table.filter(pl.col("model") == "mixed")["estimable"].all()
    assert model.diagnostics_["converged"] is False


def test_too_few_events_is_not_estimable(cohort):
    egfr, patients, endpoints = cohort
    first = endpoints.filter(pl.col("event") == 1)["patient_id"].unique().sort()[:2]
    few = endpoints.with_columns(
        pl.when(pl.col("patient_id").is_in(first.to_list()))
        .then(pl.col("event"))
        .otherwise(0)
        .cast(pl.Int8)
        .alias("event")
    )
    table = (
        JointSlopeModel(reference_group="placebo", min_events=5).fit(egfr, patients, few).summary()
    )
    _not_estimable(table, "joint", "too_few_events")


def test_too_few_patients_is_not_estimable(cohort):
    egfr, patients, endpoints = cohort
    keep = patients["patient_id"].sort()[:6].to_list()
    table = (
        JointSlopeModel(reference_group="placebo")
        .fit(egfr.filter(pl.col("patient_id").is_in(keep)), patients, endpoints)
        .summary()
    )
    _not_estimable(table, "joint", "too_few_patients")
    _not_estimable(table, "mixed", "too_few_patients")


def test_non_converging_fit_is_not_estimable(cohort):
    # one L-BFGS-B iteration per stage and an unreachable tolerance cannot converge
    egfr, patients, endpoints = cohort
    model = JointSlopeModel(reference_group="placebo", max_iterations=1, tolerance=1e-300).fit(
        egfr, patients, endpoints
    )
    _not_estimable(model.summary(), "joint", "not_converged")
    assert model.diagnostics_["converged"] is False


@pytest.mark.parametrize(
    ("change", "words"),
    [
        ("missing_column", "egfr"),
        ("unknown_endpoint", "kidney_faliure"),
        ("unknown_reference", "placebos"),
        ("missing_group_column", "arm"),
    ],
)
def test_unusable_input_raises_one_line(cohort, change, words):
    egfr, patients, endpoints = cohort
    options = {"reference_group": "placebo"}
    if change == "missing_column":
        egfr = egfr.drop("egfr")
    elif change == "unknown_endpoint":
        options["dropout_endpoints"] = ("kidney_faliure",)
    elif change == "unknown_reference":
        options["reference_group"] = "placebos"
    else:
        options["group_column"] = "arm"
    with pytest.raises(InputDataError) as caught:
        JointSlopeModel(**options).fit(egfr, patients, endpoints)
    message = str(caught.value)
    assert words in message and "\n" not in message


def test_bad_option_raises_config_error():
    with pytest.raises(ConfigError, match="association"):
        JointSlopeModel(association="random_intercept")
    with pytest.raises(ConfigError, match="hazard_piece"):
        JointSlopeModel(hazard_piece=3)


def test_methods_text_names_the_method(cohort):
    model = JointSlopeModel(0.5, baseline_hazard="weibull", reference_group="placebo")
    text = model.methods_text()
    assert "Gauss-Hermite" in text and "Weibull" in text and "0.5 years" in text


def test_modules_stay_under_600_lines():
    # DEVELOPERS.md: no module is over 600 lines
    import kidneycohort.models.joint as package

    for path in Path(package.__file__).parent.glob("*.py"):
        assert len(path.read_text().splitlines()) <= 600, path.name


def test_rows_after_dropout_are_excluded_with_a_reason(cohort):
    egfr, patients, endpoints = cohort
    late = egfr.head(1).with_columns(pl.lit(50.0).alias("years_from_index"))
    model = JointSlopeModel(reference_group="placebo").fit(
        pl.concat([egfr, late]), patients, endpoints
    )
    reasons = dict(model.excluded_.select("reason", "n_rows").iter_rows())
    assert reasons.get("after_dropout") == 1
    assert int(model.data_.n_values.sum()) == egfr.height
    assert np.isfinite(model.diagnostics_["loglik"])


def test_values_the_value_filter_marked_and_limits_are_not_modelled(cohort):
    """The joint model uses the values the baselines and slopes use: rows the study's
    value filter marked (``excluded``, as the pipeline step passes them) and qualified
    results ("<20", a limit, not a value) are left out, each counted under its reason."""
    egfr, patients, endpoints = cohort
    row = pl.int_range(pl.len())
    marked = egfr.with_columns(
        (row % 9 == 4).alias("excluded"),
        pl.when(row % 9 == 4).then(pl.lit("setting_inpatient")).alias("exclusion_reason"),
    )
    model = JointSlopeModel(reference_group="placebo").fit(marked, patients, endpoints)
    reasons = dict(model.excluded_.select("reason", "n_rows").iter_rows())
    assert reasons == {"setting_inpatient": egfr.filter(row % 9 == 4).height}
    assert int(model.data_.n_values.sum()) == egfr.height - reasons["setting_inpatient"]
    limits = egfr.with_columns((row % 13 == 6).alias("qualified"))
    model = JointSlopeModel(reference_group="placebo").fit(limits, patients, endpoints)
    reasons = dict(model.excluded_.select("reason", "n_rows").iter_rows())
    assert reasons == {"qualified_value": egfr.filter(row % 13 == 6).height}
