"""Per-patient derivations one range of patients at a time (kidneycohort._batches)."""

from __future__ import annotations

import datetime as dt

import numpy as np
import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from polars.testing import assert_frame_equal

from kidneycohort._batches import by_patient_ranges, patient_range_cuts
from kidneycohort.baseline import BaselineRule, egfr_baseline
from kidneycohort.errors import InputDataError
from kidneycohort.kfre import kfre_at_baseline
from kidneycohort.slopes import egfr_slopes
from kidneycohort.value_filter import ValueFilterRule
from tests._fixtures.derivations import random_cohort, uacr_labs


def _rows(seed: int, n_rows: int) -> pl.DataFrame:
    rng = np.random.default_rng(seed)
    ids = rng.integers(0, 30, n_rows)
    return pl.DataFrame(
        {
            "patient_id": [f"p{i:02d}" if i else None for i in ids],
            "equation": rng.choice(["a", "b"], n_rows).tolist(),
            "value": rng.normal(size=n_rows),
        }
    )


def _first_seen(tables):
    # a per-patient derivation in first-seen order of (patient, equation)
    return (
        tables["rows"]
        .group_by("patient_id", "equation", maintain_order=True)
        .agg(pl.col("value").sum(), pl.len().alias("n"), pl.col("value").cum_sum().alias("run"))
    )


@given(
    seed=st.integers(0, 10_000),
    n_rows=st.integers(0, 300),
    max_rows=st.integers(1, 400),
)
@settings(max_examples=60, deadline=None)
def test_any_split_gives_the_whole_result_row_for_row(seed, n_rows, max_rows) -> None:
    rows = _rows(seed, n_rows)
    whole = _first_seen({"rows": rows})
    batched = by_patient_ranges(
        _first_seen,
        {"rows": rows},
        order_of="rows",
        keys=["patient_id", "equation"],
        max_rows=max_rows,
    )
    assert_frame_equal(batched, whole)


@given(seed=st.integers(0, 10_000), max_rows=st.integers(1, 120))
@settings(max_examples=40, deadline=None)
def test_order_of_another_table(seed, max_rows) -> None:
    """Rows in the order of a cohort table (one row per patient, some without rows); a
    table without patient ids is given whole to every range."""
    rows = _rows(seed, 100)
    rng = np.random.default_rng(seed + 1)
    cohort = pl.DataFrame({"patient_id": [f"p{i:02d}" for i in rng.permutation(40)]})
    weights = pl.DataFrame({"equation": ["a", "b"], "w": [1.0, 2.0]})

    def derive(tables):
        totals = (
            tables["rows"]
            .join(tables["weights"], on="equation")
            .group_by("patient_id")
            .agg((pl.col("value") * pl.col("w")).sum().alias("total"))
        )
        return tables["cohort"].join(totals, on="patient_id", how="left", maintain_order="left")

    frames = {"rows": rows, "cohort": cohort, "weights": weights}
    whole = derive(frames)
    batched = by_patient_ranges(
        derive, frames, order_of="cohort", keys=["patient_id"], max_rows=max_rows
    )
    assert_frame_equal(batched, whole)


def test_cuts_keep_each_patient_in_one_range_and_balance_rows() -> None:
    frame = pl.DataFrame({"patient_id": [f"p{i // 10:03d}" for i in range(1000)]})
    cuts = patient_range_cuts([frame], 250)
    assert cuts.to_list() == ["p025", "p050", "p075"]
    assert patient_range_cuts([frame], 1000).len() == 0


def test_a_check_failing_in_one_range_only_derives_the_whole_cohort() -> None:
    rows = _rows(1, 200)

    def derive(tables):
        if tables["rows"].filter(pl.col("equation") == "a").height < 40:
            raise InputDataError("rows: too few rows of equation 'a'")
        return _first_seen(tables)

    batched = by_patient_ranges(
        derive,
        {"rows": rows},
        order_of="rows",
        keys=["patient_id", "equation"],
        max_rows=20,
        whole_on=(InputDataError,),
    )
    assert_frame_equal(batched, _first_seen({"rows": rows}))


# ---- the pipeline's per-patient stages, split as the steps split them -----------------
EQUATIONS = ("ckd_epi_2021_cr", "ekfc_cr")


def _egfr() -> pl.DataFrame:
    # shuffled: the whole-cohort order is first-seen, not sorted
    egfr = random_cohort(5, n_patients=60, equations=EQUATIONS)
    return egfr.sample(fraction=1.0, shuffle=True, seed=3)


@pytest.mark.parametrize("max_rows", [1, 37, 250])
def test_baseline_and_slopes_by_ranges_equal_the_whole_cohort(max_rows) -> None:
    egfr = _egfr()
    value_filter = ValueFilterRule()  # AKI flags look back over earlier rows of a patient
    for derive in (
        lambda t: egfr_baseline(
            t["egfr"], rule=BaselineRule(method="mean_in_window"), value_filter=value_filter
        ),
        lambda t: egfr_slopes(t["egfr"], value_filter=value_filter),
    ):
        whole = derive({"egfr": egfr})
        batched = by_patient_ranges(
            derive,
            {"egfr": egfr},
            order_of="egfr",
            keys=["patient_id", "equation"],
            max_rows=max_rows,
        )
        assert_frame_equal(batched, whole)
        assert whole.height == 120


@pytest.mark.parametrize("max_rows", [1, 50, 400])
def test_kfre_by_ranges_equals_the_whole_cohort(max_rows) -> None:
    egfr = _egfr()
    ids = [f"P{p:03d}" for p in range(60)]
    rng = np.random.default_rng(8)
    cohort = pl.DataFrame(
        {
            "patient_id": [ids[i] for i in rng.permutation(60)],
            "sex": rng.choice(["female", "male"], 60).tolist(),
            "age_at_index": rng.uniform(30, 85, 60),
            "index_date": [dt.date(2021, 1, 1)] * 60,
            "group": rng.choice(["x", "y"], 60).tolist(),
        }
    )
    labs = uacr_labs(
        [
            (ids[int(p)], -int(d), float(v))
            for p, d, v in rng.uniform(0, 1, (90, 3)) * [60, 400, 900]
        ]
    )

    def derive(t):
        return kfre_at_baseline(
            t["egfr"],
            t["labs"],
            t["cohort"],
            equation="ckd_epi_2021_cr",
            value_filter=ValueFilterRule(),
        )

    frames = {"egfr": egfr, "labs": labs, "cohort": cohort}
    whole = derive(frames)
    batched = by_patient_ranges(
        derive,
        frames,
        order_of="cohort",
        keys=["patient_id"],
        max_rows=max_rows,
        whole_on=(InputDataError,),
    )
    assert_frame_equal(batched, whole)
    assert whole["kfre_2y"].is_not_null().sum() > 5


@given(seed=st.integers(0, 10_000), max_rows=st.integers(1, 60))
@settings(max_examples=40, deadline=None)
def test_canonical_order_by_patient_ranges_is_the_whole_sort(seed, max_rows) -> None:
    """Per-patient files are sorted by all their columns; sorted a range of patient ids
    at a time (large tables) the rows come out the same, missing ids and ties included."""
    from kidneycohort.run_folder import _writer

    rows = _rows(seed, 150).with_columns(
        day=pl.Series(np.random.default_rng(seed).integers(0, 3, 150))
    )
    whole = rows.sort(rows.columns, nulls_last=False, maintain_order=True)
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(_writer, "BATCH_ROWS", max_rows)
        assert_frame_equal(_writer.canonical_order(rows), whole)
