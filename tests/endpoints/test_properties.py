"""Properties of the endpoint derivation on random invented cohorts (hypothesis)."""

from __future__ import annotations

from typing import Any

import polars as pl
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from polars.testing import assert_frame_equal

from kidneycohort.endpoints import Death, EndpointRule, derive_endpoints, usual_kidney_composite
from tests._fixtures.endpoints import DATA_CUT, EQUATION, INDEX, Timeline, build

CUT_DAY = (DATA_CUT - INDEX).days
DEFS = [*usual_kidney_composite(), Death()]
COMPONENTS = {"egfr_decline_40", "egfr_below_15", "kidney_failure", "kidney_death"}
KEY = ["endpoint", "patient_id"]


def rarely(strategy: st.SearchStrategy[Any]) -> st.SearchStrategy[Any]:
    """``strategy`` one time in four, else None (keeps most patients event-free)."""
    return st.integers(0, 3).flatmap(lambda k: strategy if k == 0 else st.none())


maybe_day = rarely(st.integers(-60, CUT_DAY + 200))
events = st.lists(
    st.one_of(
        st.tuples(
            st.integers(-30, CUT_DAY + 100),
            st.just("dialysis"),
            st.one_of(st.none(), st.integers(1, 200)),
        ),
        st.tuples(
            st.integers(-30, CUT_DAY + 100),
            st.sampled_from(["transplant", "kidney_death", "death"]),
            st.none(),
        ),
    ),
    max_size=2,
)


@st.composite
def timeline(draw: st.DrawFn, pid: str) -> Timeline:
    # Values on a coarse day grid so that same-day repeats happen.
    values = draw(
        st.lists(
            st.tuples(st.integers(-60, CUT_DAY + 60).map(lambda d: d - d % 15), st.floats(4, 130)),
            max_size=12,
        )
    )
    evs = [(d, kind, None if end is None else d + end) for d, kind, end in draw(events)]
    return Timeline(
        pid,
        values,
        baseline=draw(
            st.integers(0, 7).flatmap(lambda k: st.none() if k == 0 else st.floats(20, 120))
        ),
        death=draw(maybe_day),
        kfrt=draw(rarely(st.integers(-30, CUT_DAY + 100))),
        end_of_followup=draw(rarely(st.integers(0, CUT_DAY + 100))),
        events=evs,
    )


@st.composite
def cohort(draw: st.DrawFn) -> list[Timeline]:
    n = draw(st.integers(1, 8))
    return [draw(timeline(f"h{k:02d}")) for k in range(n)]


rules_strategy = st.builds(
    EndpointRule,
    confirmation=st.sampled_from(["next_value", "sustained_to_end"]),
    confirm_after_days=st.sampled_from([28, 30, 90]),
    unconfirmed_last_value=st.sampled_from(["censor", "event_if_death_or_failure", "event"]),
    event_date=st.sampled_from(["first_qualifying", "confirming"]),
    grace_period_days=st.sampled_from([0, 90]),
    lab_censoring=st.sampled_from(["last_assessment", "end_of_followup"]),
    min_dialysis_days=st.sampled_from([0, 90]),
)
SETTINGS = settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])


def _derive(tables: dict[str, pl.DataFrame], rule: EndpointRule) -> pl.DataFrame:
    return derive_endpoints(
        tables["egfr"],
        tables["baseline"],
        tables["patients"],
        tables["events"],
        DEFS,
        equation=EQUATION,
        data_cut=DATA_CUT,
        rule=rule,
    )


@SETTINGS
@given(cohort(), rules_strategy)
def test_end_date_within_start_and_data_cut(timelines: list[Timeline], rule: EndpointRule) -> None:
    out = _derive(build(timelines), rule)
    assert out.height == len(timelines) * len(DEFS)
    evaluable = out.filter(pl.col("event").is_not_null())
    assert (evaluable["end_date"] >= evaluable["start_date"]).all()
    assert (evaluable["end_date"] <= DATA_CUT).all()
    assert (evaluable["years"] >= 0).all()
    # an event is never also competing; every row says why it ended
    assert evaluable.filter((pl.col("event") == 1) & (pl.col("competing") == 1)).height == 0
    assert out["reason"].null_count() == 0
    not_evaluable = out.filter(pl.col("event").is_null())
    assert not_evaluable["end_date"].null_count() == not_evaluable.height


@SETTINGS
@given(cohort(), rules_strategy)
def test_composite_time_is_the_minimum_of_its_components(
    timelines: list[Timeline], rule: EndpointRule
) -> None:
    out = _derive(build(timelines), rule)
    parts = out.filter(pl.col("endpoint").is_in(COMPONENTS))
    comp = out.filter(pl.col("endpoint") == "kidney_composite").select(
        "patient_id", "end_date", "event", "competing"
    )
    expected = parts.group_by("patient_id").agg(
        pl.col("event").is_null().any().alias("any_missing"),
        pl.col("end_date").filter(pl.col("event") == 1).min().alias("first_event"),
        pl.col("end_date").min().alias("first_end"),
    )
    joined = comp.join(expected, on="patient_id")
    for row in joined.iter_rows(named=True):
        if row["any_missing"]:
            assert row["event"] is None
        elif row["first_event"] is not None:
            assert (row["event"], row["end_date"]) == (1, row["first_event"])
        else:
            assert (row["event"], row["end_date"]) == (0, row["first_end"])
        if rule.lab_censoring == "end_of_followup" and not row["any_missing"]:
            # With a common follow-up end, the composite time is the plain minimum.
            assert row["end_date"] == row["first_end"]


@SETTINGS
@given(cohort(), rules_strategy, st.randoms(use_true_random=False))
def test_row_order_does_not_matter(timelines: list[Timeline], rule: EndpointRule, rnd: Any) -> None:
    tables = build(timelines)
    shuffled = {
        name: frame.sample(fraction=1.0, shuffle=True, seed=rnd.randint(0, 2**31))
        for name, frame in tables.items()
    }
    assert_frame_equal(_derive(tables, rule), _derive(shuffled, rule))


@SETTINGS
@given(cohort(), rules_strategy, st.randoms(use_true_random=False))
def test_partition_of_patients_does_not_matter(
    timelines: list[Timeline], rule: EndpointRule, rnd: Any
) -> None:
    whole = _derive(build(timelines), rule)
    groups: dict[int, list[Timeline]] = {}
    for t in timelines:
        groups.setdefault(rnd.randint(0, 2), []).append(t)
    pieces = pl.concat([_derive(build(g), rule) for g in groups.values()])
    assert_frame_equal(whole.sort(KEY), pieces.sort(KEY))
