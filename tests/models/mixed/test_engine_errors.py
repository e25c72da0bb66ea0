"""Bad input, the fallback sequence and boundary fits of the mixed-model engine: every
failure is one line naming its cause."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from kidneycohort.errors import ConfigError, ConvergenceError, InputDataError, StatisticalWarning
from kidneycohort.models.mixed._blocks import combine_blocks, patient_blocks_from_frame
from kidneycohort.models.mixed._engine import (
    MixedModelRule,
    RandomEffectsStep,
    fallback_steps,
    fit_mixed_model,
    fit_patient_mixed_model,
)
from tests._fixtures.mixed_engine import simulate_values

ONE_SLOPE = {"response": "egfr", "fixed": ["intercept", "t"], "random": ["intercept", "t"]}


@pytest.fixture(scope="module")
def values() -> pl.DataFrame:
    return simulate_values(40, 3)


def _fit(frame: pl.DataFrame, **arguments):
    return fit_patient_mixed_model(frame, **{**ONE_SLOPE, **arguments})


@pytest.mark.parametrize(
    ("change", "arguments", "message"),
    [
        (
            lambda f: f.with_columns(t=pl.lit(1.0)),
            {},
            r"fixed effects: column 't' is a linear combination of 'intercept' \(collinear",
        ),
        (
            lambda f: f.with_columns(t=pl.lit(0.0)),
            {},
            r"fixed effects: column 't' is zero in every row \(no variation",
        ),
        (
            lambda f: f.group_by("patient_id").first(),
            {},
            r"every patient \(40\) has a single value",
        ),
        (
            lambda f: f.with_columns(age_months=12 * pl.col("age")),
            {"fixed": ["intercept", "t", "age", "age_months"]},
            r"column 'age_months' is a linear combination of 'age'",
        ),
        (
            lambda f: f.filter(pl.col("act") == 0),
            {"fixed": ["intercept", "t", "act", "act_t"]},
            r"column 'act' is zero in every row \(no variation, or a group or category with no patients\)",
        ),
        (
            lambda f: f.with_columns(
                t2=pl.col("t") * 2,
            ),
            {"random": ["intercept", "t", "t2"]},
            r"random effects: column 't2' is a linear combination of 't'",
        ),
        (
            lambda f: f.with_columns(egfr=pl.when(pl.col("t") < 0.1).then(None).otherwise("egfr")),
            {},
            r"response: \d+ missing or infinite values; drop them first",
        ),
        (
            lambda f: f.with_columns(age=pl.when(pl.col("t") < 0.1).then(np.nan).otherwise("age")),
            {"fixed": ["intercept", "t", "age"]},
            r"fixed design: column 'age' has \d+ missing or infinite values",
        ),
        (
            lambda f: f.with_columns(
                patient_id=pl.when(pl.col("t") < 0.1).then(None).otherwise("patient_id")
            ),
            {},
            r"patient ids: \d+ rows have no patient id",
        ),
        (
            lambda f: f,
            {"fixed": ["intercept", "tt"]},
            r"missing required column 'tt' \(did you mean 't'\?\)",
        ),
        (
            lambda f: f,
            {"fixed": ["intercept", "arm"]},
            r"fixed-effect column 'arm' has type String",
        ),
        (
            lambda f: f.with_columns(
                arm=pl.when(pl.col("t") < 1).then(pl.lit("x")).otherwise("arm")
            ),
            {"residual_variance_by": "arm"},
            r"a patient's values fall in more than one residual-variance group",
        ),
    ],
    ids=[
        "time_constant",
        "time_zero",
        "one_value_each",
        "collinear_covariates",
        "group_without_patients",
        "collinear_random_effects",
        "missing_response",
        "missing_covariate",
        "missing_patient",
        "unknown_column",
        "text_column",
        "residual_group_within_patient",
    ],
)
def test_bad_input_is_one_line_naming_the_cause(values, change, arguments, message) -> None:
    """Common practice (what, got what, what to do)."""
    with pytest.raises(InputDataError, match=message) as caught:
        _fit(change(values), **arguments)
    assert "\n" not in str(caught.value)


def test_bad_options_are_config_errors(values) -> None:
    with pytest.raises(
        ConfigError, match=r"fit_mixed_model.method: .*'reml' or 'ml' \(got 'remll'\)"
    ):
        _fit(values, method="remll")
    with pytest.raises(ConfigError, match=r"MixedModelRule.covariance: .*'unstructured'"):
        MixedModelRule(covariance="full")
    with pytest.raises(ConfigError, match=r"unknown rule 'methd' \(did you mean 'method'\?\)"):
        _fit(values, methd="ml")
    with pytest.raises(ConfigError, match=r"fit_mixed_model.confidence"):
        _fit(values, confidence=1.5)


def test_combining_blocks_refuses_overlaps_and_different_designs(values) -> None:
    ids = values["patient_id"].unique().sort()
    first = values.filter(pl.col("patient_id").is_in(ids.head(25).implode()))
    second = values.filter(pl.col("patient_id").is_in(ids.tail(20).implode()))
    blocks = [patient_blocks_from_frame(part, **ONE_SLOPE) for part in (first, second)]
    with pytest.raises(InputDataError, match=r"patient '.+' is in more than one part"):
        combine_blocks(blocks)
    other = patient_blocks_from_frame(
        second, response="egfr", fixed=["intercept"], random=["intercept"]
    )
    with pytest.raises(InputDataError, match="parts have different design columns"):
        combine_blocks([blocks[0], other])
    with pytest.raises(InputDataError, match="no blocks given"):
        combine_blocks([])


def test_fallback_sequence_warns_at_each_step_then_fails_in_one_line(values) -> None:
    """The stated sequence for three random effects: unstructured, diagonal, then the
    first two, then the first alone. A tolerance no fit can reach makes every step fail,
    so each move is announced and the end is a one-line ConvergenceError."""
    frame = values.with_columns(t_squared=pl.col("t") ** 2)
    steps = fallback_steps(["intercept", "t", "t_squared"], "unstructured")
    assert [s.label for s in steps] == ["unstructured", "diagonal", "intercept + t", "intercept"]
    with pytest.warns(StatisticalWarning) as warned, pytest.raises(ConvergenceError) as failed:
        _fit(frame, random=["intercept", "t", "t_squared"], tolerance=1e-300)
    moves = [str(w.message) for w in warned if "refitting with" in str(w.message)]
    assert len(moves) == 3
    assert "the 'unstructured' fit failed" in moves[0] and "'diagonal' random effects" in moves[0]
    assert "'intercept' random effects" in moves[2]
    assert "no random-effects structure could be fitted" in str(failed.value)
    assert "\n" not in str(failed.value)
    with pytest.raises(ConvergenceError):
        _fit(frame, random=["intercept", "t", "t_squared"], tolerance=1e-300, fallback=False)


def test_an_explicit_step_can_merge_random_effects(values) -> None:
    """Blocks transform exactly under Z* = Z T: random effects on (t1, t2) merged into
    one slope on t1 + t2 = t give the fit with a random slope on t directly."""
    direct = _fit(values)
    merged = fit_patient_mixed_model(
        values,
        response="egfr",
        fixed=["intercept", "t"],
        random=["intercept", "t1", "t2"],
        steps=[
            RandomEffectsStep(
                "intercept and slope",
                "unstructured",
                {"intercept": {"intercept": 1.0}, "t": {"t1": 1.0, "t2": 1.0}},
            )
        ],
    )
    assert merged.structure == "intercept and slope"
    assert merged.random_names == ("intercept", "t")
    np.testing.assert_allclose(merged.fixed_effects, direct.fixed_effects, rtol=1e-9)
    np.testing.assert_allclose(merged.random_covariance, direct.random_covariance, rtol=1e-6)
    assert merged.log_likelihood == pytest.approx(direct.log_likelihood, abs=1e-8)


def test_a_singular_fit_is_reported_not_refitted() -> None:
    """30 invented patients without slope variation: the REML estimate of the
    random-effects covariance is singular (correlation 1). R lme4 1.1-31, run once on
    these rows: "boundary (singular) fit", isSingular TRUE, REML criterion 709.428093,
    variances 16.391 and 0.010392, correlation 0.9999996, residual 3.43837. The engine
    keeps the structure, reports the boundary and warns once."""
    rng = np.random.default_rng(1)
    patient = np.repeat(np.arange(30), 5)
    t = np.tile(np.arange(5.0), 30)
    egfr = 50 + rng.normal(0, 5, 30)[patient] - t + rng.normal(0, 2, patient.size)
    frame = pl.DataFrame({"patient_id": patient, "t": t, "egfr": egfr})
    with pytest.warns(StatisticalWarning, match="at the boundary of the parameter space") as warned:
        fit = _fit(frame)
    assert len(warned) == 1
    assert fit.structure == "unstructured"
    assert fit.convergence.converged
    assert fit.convergence.boundary == (
        "random-effects covariance singular at 't' (it is a linear combination of the "
        "effects before it: a correlation of +/-1 for two effects)",
    )
    assert fit.deviance <= 709.428093 + 1e-6
    components = fit.variance_components_table()
    assert components["variance"].to_list() == pytest.approx(
        [16.391, 0.010392, 0.4127, 3.43837], rel=1e-3
    )
    assert components["sd_or_correlation"][2] == pytest.approx(1.0, abs=1e-6)
    assert "at the boundary" in fit.describe()


def test_fit_from_blocks_accepts_options_object(values) -> None:
    blocks = patient_blocks_from_frame(values, **ONE_SLOPE)
    fit = fit_mixed_model(blocks, MixedModelRule(method="ml", confidence=0.9))
    assert (fit.method, fit.confidence) == ("ml", 0.9)
    assert fit.attempts == ("unstructured: converged",)
