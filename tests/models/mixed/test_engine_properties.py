"""Invariances of the mixed-model engine (hypothesis): the fit does not depend on the
order of patients or rows, and blocks computed on chunks of patients and combined are
the blocks of the whole (the partition rule; common practice for sufficient
statistics: they add over independent clusters)."""

from __future__ import annotations

import warnings

import numpy as np
import polars as pl
from hypothesis import Phase, given, settings
from hypothesis import strategies as st

from kidneycohort.errors import StatisticalWarning
from kidneycohort.models.mixed._blocks import (
    PatientBlocks,
    combine_blocks,
    patient_blocks_from_frame,
)
from kidneycohort.models.mixed._engine import fit_mixed_model
from kidneycohort.models.mixed._result import MixedModelFit
from tests._fixtures.mixed_engine import simulate_values

DESIGN = {
    "response": "egfr",
    "fixed": ["intercept", "t1", "t2", "act", "act_t2"],
    "random": ["intercept", "t"],
}
PER_BLOCK = (
    "n_values",
    "random_cross",
    "random_fixed",
    "random_response",
)
PER_GROUP = ("fixed_cross", "fixed_response", "response_square", "group_values")

# 30 or more patients: on a dozen, the likelihood can be so flat that two exact
# optimisations agree only to about 1e-6, which is rounding, not order dependence
# no shrinking: a failing cohort is printed by its seed and size already, and shrinking
# refits hundreds of models
QUICK = (Phase.explicit, Phase.reuse, Phase.generate)
cohorts = st.builds(
    lambda n, seed: simulate_values(n, seed, min_values=1, max_values=7, residual_sd=(2.0, 4.0)),
    st.integers(30, 60),
    st.integers(0, 10_000),
)


def _blocks(frame: pl.DataFrame) -> PatientBlocks:
    return patient_blocks_from_frame(frame, residual_group="arm", **DESIGN)


def _fit(blocks: PatientBlocks) -> MixedModelFit:
    """The fit; a boundary warning is recorded (the fits compared must agree on it)."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", StatisticalWarning)
        fit = fit_mixed_model(blocks, residual_variance_by_group=True, fallback=False)
    assert all("at the boundary" in str(w.message) for w in caught)
    assert len(caught) == (1 if fit.convergence.boundary else 0)
    return fit


def _same_blocks(left: PatientBlocks, right: PatientBlocks) -> None:
    assert left.patient_ids.to_list() == right.patient_ids.to_list()
    assert left.residual_groups == right.residual_groups
    np.testing.assert_array_equal(left.residual_group, right.residual_group)
    for name in PER_BLOCK + PER_GROUP:
        np.testing.assert_allclose(
            getattr(left, name), getattr(right, name), rtol=1e-12, atol=1e-9, err_msg=name
        )


def _same_fit(left: MixedModelFit, right: MixedModelFit) -> None:
    """Equal up to rounding: coefficients within 1e-6 of their SE, their covariance
    within 1e-6 and that of the random effects within 1e-5 on the correlation scale,
    residual variances to 1e-6, likelihoods to 1e-8."""
    assert left.convergence.boundary == right.convergence.boundary
    se = np.sqrt(np.diag(left.fixed_covariance))
    np.testing.assert_array_less(np.abs(left.fixed_effects - right.fixed_effects), 1e-6 * se)
    np.testing.assert_allclose(
        left.fixed_covariance / np.outer(se, se),
        right.fixed_covariance / np.outer(se, se),
        atol=1e-6,
    )
    scale = np.sqrt(np.outer(*[np.diag(left.random_covariance)] * 2)) + 1e-12
    np.testing.assert_allclose(
        left.random_covariance / scale, right.random_covariance / scale, atol=1e-5
    )
    for group, variance in left.residual_variances.items():
        np.testing.assert_allclose(variance, right.residual_variances[group], rtol=1e-6)
    np.testing.assert_allclose(left.log_likelihood, right.log_likelihood, rtol=1e-10, atol=1e-8)


def _sorted_order(blocks: PatientBlocks) -> PatientBlocks:
    """The same blocks with patients in id order."""
    order = np.argsort(blocks.patient_ids.to_numpy(), kind="stable")
    sort = {name: getattr(blocks, name)[..., order] for name in PER_BLOCK}
    return PatientBlocks(
        patient_ids=blocks.patient_ids.gather(order),
        fixed_names=blocks.fixed_names,
        random_names=blocks.random_names,
        residual_groups=blocks.residual_groups,
        residual_group=blocks.residual_group[order],
        fixed_cross=blocks.fixed_cross,
        fixed_response=blocks.fixed_response,
        response_square=blocks.response_square,
        group_values=blocks.group_values,
        **sort,
    )


@settings(max_examples=10, phases=QUICK)
@given(cohorts, st.randoms(use_true_random=False))
def test_row_order_changes_nothing(frame: pl.DataFrame, random) -> None:
    order = list(range(frame.height))
    random.shuffle(order)
    shuffled = frame[order]
    whole, again = _blocks(frame), _blocks(shuffled)
    _same_blocks(whole, again)
    _same_fit(_fit(whole), _fit(again))


@settings(max_examples=10, phases=QUICK)
@given(cohorts, st.randoms(use_true_random=False))
def test_patient_order_and_labels_change_nothing(frame: pl.DataFrame, random) -> None:
    """Relabelling patients reorders them in the blocks; estimates and each patient's
    BLUP stay the same."""
    ids = frame["patient_id"].unique().sort().to_list()
    relabelled = ids.copy()
    random.shuffle(relabelled)
    renamed = frame.with_columns(
        pl.col("patient_id").replace_strict(dict(zip(ids, relabelled, strict=True)))
    )
    first, second = _fit(_blocks(frame)), _fit(_blocks(renamed))
    _same_fit(first, second)
    back = dict(zip(relabelled, ids, strict=True))
    mine = first.random_effects.sort("patient_id")
    theirs = second.random_effects.with_columns(pl.col("patient_id").replace_strict(back)).sort(
        "patient_id"
    )
    np.testing.assert_allclose(
        mine.drop("patient_id").to_numpy(),
        theirs.drop("patient_id").to_numpy(),
        rtol=1e-5,
        atol=1e-6,
    )


@settings(max_examples=10, phases=QUICK)
@given(cohorts, st.integers(2, 5), st.randoms(use_true_random=False))
def test_chunked_blocks_add_up_to_the_whole(frame: pl.DataFrame, chunks: int, random) -> None:
    """Blocks of disjoint chunks of patients, combined in any order, are the blocks of
    all rows (per-patient parts concatenated, group sums added), and give the same fit;
    a chunk may lack one arm's patients."""
    ids = frame["patient_id"].unique().to_list()
    random.shuffle(ids)
    cut = sorted(random.sample(range(1, len(ids)), chunks - 1))
    pieces = [ids[a:b] for a, b in zip([0, *cut], [*cut, len(ids)], strict=True)]
    parts = [_blocks(frame.filter(pl.col("patient_id").is_in(p))) for p in pieces]
    combined = combine_blocks(parts)
    whole = _blocks(frame)
    _same_blocks(_sorted_order(combined), whole)
    _same_fit(_fit(combined), _fit(whole))
