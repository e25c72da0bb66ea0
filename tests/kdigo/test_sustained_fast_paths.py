"""The packed-integer fast paths of the stage derivation give the same answer as the
general paths (multi-column sort, grouped as-of join), and stages come out in patient,
equation, axis and stage order so that transitions need no sort."""

from __future__ import annotations

import polars as pl
import pytest
from polars.testing import assert_frame_equal

from kidneycohort.kdigo import (
    SustainRule,
    _sustained,
    category_results,
    ckd_status,
    sustained_stages,
    transition_matrix,
    transitions,
)
from tests._fixtures.derivations import egfr_table, patients_table, random_cohort, uacr_labs

ORDER = ["patient_id", "equation", "axis", "stage_number"]


def _cohort() -> tuple[pl.DataFrame, pl.DataFrame]:
    egfr = random_cohort(11, n_patients=50, equations=("ckd_epi_2021_cr", "mdrd_175"))
    # same-day repeats in other categories exercise the tie rule (mean of the tied values)
    repeats = egfr.filter(pl.col("patient_id") < "P010").with_columns(egfr=pl.col("egfr") * 1.3)
    labs = uacr_labs(
        [
            (f"P{p:03d}", d, 10.0 + 7.0 * ((p * 7 + d) % 90))
            for p in range(30)
            for d in (0, 50, 140, 300, 300)
        ]
    )
    return pl.concat([egfr, repeats]).sample(fraction=1.0, shuffle=True, seed=2), labs


PATIENTS = patients_table([f"P{p:03d}" for p in range(50)])


def _all_outputs(egfr: pl.DataFrame, labs: pl.DataFrame) -> list[pl.DataFrame]:
    rule = SustainRule(confirm_after_days=80, confirm_within_days=400)
    stages = sustained_stages(egfr, labs, PATIENTS, rule=rule)
    return [
        stages,
        category_results(egfr, labs, PATIENTS, rule=rule),
        ckd_status(egfr, labs, PATIENTS).sort("patient_id", "equation", nulls_last=True),
        transitions(stages),
        transition_matrix(stages),
    ]


def test_general_paths_match_packed_paths(monkeypatch):
    egfr, labs = _cohort()
    packed = _all_outputs(egfr, labs)
    # no key fits in zero bits: every packed shortcut falls back to the general path
    monkeypatch.setattr(_sustained, "_PACKED_KEY_BITS", 0)
    general = _all_outputs(egfr, labs)
    for fast, slow in zip(packed, general, strict=True):
        assert_frame_equal(fast, slow)
    assert packed[0].height > 100 and packed[3].height > 10


def test_stages_arrive_sorted_and_transitions_do_not_depend_on_order():
    egfr, labs = _cohort()
    stages = sustained_stages(egfr, labs, PATIENTS)
    # null equation (albuminuria) sorts like the empty string, i.e. first
    assert_frame_equal(
        stages,
        stages.with_columns(_e=pl.col("equation").fill_null(""))
        .sort("patient_id", "_e", "axis", "stage_number")
        .drop("_e"),
    )
    shuffled = stages.sample(fraction=1.0, shuffle=True, seed=4)
    assert_frame_equal(transitions(shuffled), transitions(stages))
    assert_frame_equal(transition_matrix(shuffled), transition_matrix(stages))


@pytest.mark.parametrize("after", [89.0, 89.5, 90.0])
def test_confirmation_time_is_compared_exactly(after):
    # a result 90 days later confirms for any rule up to 90 days; 89 days later only
    # for a rule of at most 89 days ("at least confirm_after_days later")
    rows = [("a", 0, 50.0), ("a", 90, 50.0), ("b", 0, 50.0), ("b", 89, 50.0)]
    res = category_results(egfr_table(rows), rule=SustainRule(confirm_after_days=after))
    expected = [True, False, after <= 89, False]
    assert res["confirmed"].to_list() == expected


@pytest.mark.parametrize("chunk_rows", [1, 40, 400])
def test_stages_by_patient_chunks_equal_the_whole_cohort(monkeypatch, chunk_rows):
    """Large inputs are derived in ranges of patient ids (the partition rule); the
    concatenated stages equal those of the whole cohort row for row, including a
    patient with results on one axis only and the ties of the same-day repeats."""
    egfr, labs = _cohort()
    rule = SustainRule(confirm_after_days=80, confirm_within_days=400)
    whole = sustained_stages(egfr, labs, PATIENTS, rule=rule)
    monkeypatch.setattr(_sustained, "_CHUNK_ROWS", chunk_rows)
    assert _sustained._patient_chunks(egfr, labs, PATIENTS) is not None
    chunked = sustained_stages(egfr, labs, PATIENTS, rule=rule)
    assert_frame_equal(chunked, whole)
    assert_frame_equal(transition_matrix(chunked), transition_matrix(whole))
