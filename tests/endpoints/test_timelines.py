"""Hand-built timelines for kidney endpoints.

Each case is a made-up patient whose expected event flag, date and reason were worked
out by hand from the rule it exercises. The rules themselves follow the decline
end-point definitions of Levey 2014 (Am J Kidney Dis 64:821, doi:10.1053/j.ajkd.2014.07.030):
a decline counts when a repeat value at least 4 weeks later still meets it; values after
kidney failure do not count; death before confirmation is an explicit analysis-plan
choice. Where a rule has no single published source it is marked "common practice".
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from typing import Any

import polars as pl
import pytest
from polars.testing import assert_frame_equal

from kidneycohort import schemas
from kidneycohort.endpoints import (
    Composite,
    Death,
    EgfrBelow,
    EgfrDecline,
    KidneyDeath,
    KidneyFailure,
    derive_endpoints,
    usual_kidney_composite,
)
from tests._fixtures.endpoints import DATA_CUT, EQUATION, INDEX, Timeline, build, day, derive

CUT_DAY = (DATA_CUT - INDEX).days  # 1826: 2020-01-01 -> 2024-12-31

DEFS = usual_kidney_composite()  # decline 40, below 15, kidney failure, kidney death, composite
DEC = "egfr_decline_40"
LT15 = "egfr_below_15"
KF = "kidney_failure"
KD = "kidney_death"
COMP = "kidney_composite"


@dataclass
class Case:
    """A timeline and what each named endpoint must give: (event, end day, reason, competing)."""

    id: str
    timeline: Timeline
    expected: dict[str, tuple[int | None, int | None, str, int | None]]
    definitions: list[Any] = field(default_factory=lambda: DEFS)
    rule: dict[str, Any] = field(default_factory=dict)


T = Timeline
CASES = [
    # 1. A 45 % dip at day 180 that rebounds at the next visit is not confirmed (Levey 2014).
    Case(
        "rebound_after_dip",
        T("p01", [(90, 100), (180, 55), (210, 90), (400, 95)]),
        {DEC: (0, 400, "last_assessment", 0), COMP: (0, 400, "last_assessment", 0)},
    ),
    # 2. Decline at the last visit, no death or kidney failure: cannot be confirmed.
    Case(
        "decline_at_last_visit",
        T("p02", [(90, 100), (180, 55)]),
        {DEC: (0, 180, "last_assessment", 0)},
    ),
    # 3. Same, with the plan counting an unconfirmed last value as an event.
    Case(
        "decline_at_last_visit_counted",
        T("p03", [(90, 100), (180, 55)]),
        {DEC: (1, 180, "unconfirmed_last_value", 0)},
        rule={"unconfirmed_last_value": "event"},
    ),
    # 4. Same, with 'censor': the death 20 days later is then a competing event.
    Case(
        "decline_at_last_visit_censor_rule",
        T("p04", [(90, 100), (180, 55)], death=200),
        {DEC: (0, 200, "death", 1)},
        rule={"unconfirmed_last_value": "censor"},
    ),
    # 5. Confirmation exactly 28 days later.
    Case(
        "confirmed_exactly_28_days",
        T("p05", [(90, 100), (180, 55), (208, 58)]),
        {DEC: (1, 180, "confirmed", 0), COMP: (1, 180, DEC, 0)},
    ),
    # 6. Repeat one day short (27 days) and nothing later: not confirmed.
    Case(
        "repeat_one_day_short",
        T("p06", [(90, 100), (180, 55), (207, 58)]),
        {DEC: (0, 207, "last_assessment", 0)},
    ),
    # 7. One day short, then a rebound: the next value >= 28 days later (day 240) decides.
    Case(
        "one_day_short_then_rebound",
        T("p07", [(180, 55), (207, 58), (240, 90)]),
        {DEC: (0, 240, "last_assessment", 0)},
    ),
    # 8. Values inside the 28 days are skipped: day 235 confirms day 180.
    Case(
        "confirmed_past_short_repeat",
        T("p08", [(180, 55), (207, 58), (235, 50)]),
        {DEC: (1, 180, "confirmed", 0)},
    ),
    # 9. Event dated at the confirming value by configuration.
    Case(
        "event_at_confirming_date",
        T("p09", [(180, 55), (208, 58)]),
        {DEC: (1, 208, "confirmed", 0)},
        rule={"event_date": "confirming"},
    ),
    # 10. Two values on one day are averaged (common practice): (50 + 60) / 2 = 55 qualifies.
    Case(
        "equal_dates_mean_qualifies",
        T("p10", [(180, 50), (180, 60), (210, 58), (210, 58)]),
        {DEC: (1, 180, "confirmed", 0)},
    ),
    # 11. Same-day values 50 and 90 average 70: not qualifying; day 210 (55) is unconfirmed.
    Case(
        "equal_dates_mean_does_not_qualify",
        T("p11", [(180, 50), (180, 90), (210, 55)]),
        {DEC: (0, 210, "last_assessment", 0)},
    ),
    # 12. Death 20 days after the qualifying value, before any repeat: counted (within 30 days).
    Case(
        "death_before_confirmation",
        T("p12", [(90, 100), (180, 55)], death=200),
        {DEC: (1, 180, "unconfirmed_then_death", 0), KD: (0, 200, "death", 1)},
    ),
    # 13. Death on the day of the qualifying value.
    Case(
        "death_same_day_as_value",
        T("p13", [(180, 55)], death=180),
        {DEC: (1, 180, "unconfirmed_then_death", 0)},
    ),
    # 14. Death exactly 30 days later still counts; 31 days later it is competing.
    Case(
        "death_30_days_later",
        T("p14", [(180, 55)], death=210),
        {DEC: (1, 180, "unconfirmed_then_death", 0)},
    ),
    Case("death_31_days_later", T("p15", [(180, 55)], death=211), {DEC: (0, 211, "death", 1)}),
    # 15. Kidney failure 10 days after a qualifying value, before a repeat.
    Case(
        "kidney_failure_before_confirmation",
        T("p16", [(180, 55)], events=[(190, "dialysis", None)]),
        {DEC: (1, 180, "unconfirmed_then_kidney_failure", 0), KF: (1, 190, "dialysis", 0)},
    ),
    # 16. Kidney failure with no lab decline: decline censored (at the last value before it).
    Case(
        "kidney_failure_without_decline",
        T("p17", [(90, 100), (180, 70)], events=[(300, "transplant", None)]),
        {
            DEC: (0, 180, "kidney_failure", 0),
            KF: (1, 300, "transplant", 0),
            COMP: (1, 300, KF, 0),
        },
    ),
    # 17. Values after kidney failure (patient kfrt_date) do not count for decline.
    Case(
        "values_after_kidney_failure_ignored",
        T("p18", [(180, 80), (230, 10), (260, 10)], kfrt=200),
        {
            DEC: (0, 180, "kidney_failure", 0),
            LT15: (0, 180, "kidney_failure", 0),
            KF: (1, 200, "kfrt_date", 0),
        },
    ),
    # 18. A 20-day dialysis episode is acute: not kidney failure, its values set aside.
    Case(
        "acute_dialysis_episode",
        T("p19", [(110, 10), (115, 10), (200, 95), (400, 95)], events=[(100, "dialysis", 120)]),
        {
            DEC: (0, 400, "last_assessment", 0),
            LT15: (0, 400, "last_assessment", 0),
            KF: (0, CUT_DAY, "data_cut", 0),
        },
    ),
    # 19. A 90-day episode meets the chronic-dialysis minimum (common practice: 90 days).
    Case(
        "dialysis_90_days",
        T("p20", [], events=[(100, "dialysis", 190)]),
        {KF: (1, 100, "dialysis", 0)},
    ),
    # 20. A 30-day episode ended by death counts as kidney failure.
    Case(
        "short_dialysis_ended_by_death",
        T("p21", [], death=130, events=[(100, "dialysis", 130)]),
        {KF: (1, 100, "dialysis", 0), KD: (0, 130, "death", 1)},
    ),
    # 21. Missing baseline: the decline (and the composite) cannot be evaluated; eGFR < 15 can.
    Case(
        "missing_baseline",
        T("p22", [(180, 10), (210, 10)], baseline=None),
        {
            DEC: (None, None, "no_baseline", None),
            LT15: (1, 180, "confirmed", 0),
            COMP: (None, None, "no_baseline", None),
        },
    ),
    # 22. Values only before index never trigger: censored at time zero.
    Case(
        "values_only_before_index",
        T("p23", [(-30, 40), (-10, 40)]),
        {DEC: (0, 0, "no_post_index_assessment", 0), LT15: (0, 0, "no_post_index_assessment", 0)},
    ),
    # 23. A low value on the index date itself does not trigger.
    Case(
        "value_on_index_date", T("p24", [(0, 50), (60, 95)]), {DEC: (0, 60, "last_assessment", 0)}
    ),
    # 24. Grace period: a dip at day 60 confirmed at day 100 counts without a grace period...
    Case(
        "dip_without_grace",
        T("p25", [(60, 55), (100, 55), (200, 95)]),
        {DEC: (1, 60, "confirmed", 0)},
    ),
    # 25. ...and is skipped with a 90-day grace period (day 100 then rebounds at day 200).
    Case(
        "dip_inside_grace",
        T("p26", [(60, 55), (100, 55), (200, 95)]),
        {DEC: (0, 200, "last_assessment", 0)},
        rule={"grace_period_days": 90},
    ),
    # 26. Composite where two components fire on the same day: both are named.
    Case(
        "composite_two_components_same_day",
        T("p27", [(180, 10), (210, 10)]),
        {
            DEC: (1, 180, "confirmed", 0),
            LT15: (1, 180, "confirmed", 0),
            COMP: (1, 180, f"{DEC}+{LT15}", 0),
        },
    ),
    # 27. Kidney failure and kidney death on one day.
    Case(
        "composite_failure_and_kidney_death_same_day",
        T("p28", [], events=[(300, "dialysis", None), (300, "kidney_death", None)]),
        {
            KF: (1, 300, "dialysis", 0),
            KD: (1, 300, "kidney_death", 0),
            COMP: (1, 300, f"{KF}+{KD}", 0),
        },
    ),
    # 28. Death from another cause competes with kidney death; all-cause death is the event.
    Case(
        "other_death_competes",
        T("p29", [], death=500),
        {KD: (0, 500, "death", 1), "death": (1, 500, "death", 0)},
        definitions=[KidneyDeath(), Death()],
    ),
    # 29. A death after the data cut is not used: censored at the cut.
    Case(
        "death_after_data_cut",
        T("p30", [], death=CUT_DAY + 5),
        {"death": (0, CUT_DAY, "data_cut", 0)},
        definitions=[Death()],
    ),
    # 30. end_of_followup before the cut ends follow-up; a later death is not used.
    Case(
        "end_of_followup_before_cut",
        T("p31", [], death=800, end_of_followup=700),
        {"death": (0, 700, "end_of_followup", 0)},
        definitions=[Death()],
    ),
    # 31. Lab censoring at end of follow-up instead of the last assessment.
    Case(
        "lab_censoring_end_of_followup",
        T("p32", [(180, 80)], end_of_followup=700),
        {DEC: (0, 700, "end_of_followup", 0)},
        rule={"lab_censoring": "end_of_followup"},
    ),
    # 32. ...and at kidney-failure onset when that comes first.
    Case(
        "lab_censoring_at_kidney_failure",
        T("p33", [(180, 80)], kfrt=400),
        {DEC: (0, 400, "kidney_failure", 0), COMP: (1, 400, KF, 0)},
        rule={"lab_censoring": "end_of_followup"},
    ),
    # 33. Sustained to the end: a later value back above 60 undoes the decline.
    Case(
        "sustained_to_end_broken",
        T("p34", [(180, 55), (210, 58), (400, 65)]),
        {DEC: (0, 400, "last_assessment", 0)},
        rule={"confirmation": "sustained_to_end"},
    ),
    Case(
        "sustained_to_end_kept",
        T("p35", [(180, 55), (210, 58), (400, 50)]),
        {DEC: (1, 180, "sustained", 0)},
        rule={"confirmation": "sustained_to_end"},
    ),
    # 34. The same broken pattern is confirmed under 'next_value' (day 210 confirms day 180).
    Case(
        "next_value_ignores_later_rebound",
        T("p36", [(180, 55), (210, 58), (400, 65)]),
        {DEC: (1, 180, "confirmed", 0)},
    ),
    # 35. eGFR < 15 and at least 40 % below baseline: 14 from a baseline of 20 is only a 30 % fall.
    Case(
        "below_15_without_enough_decline",
        T("p37", [(180, 14), (210, 14)], baseline=20.0),
        {
            LT15: (1, 180, "confirmed", 0),
            "egfr_below_15_and_decline_40": (0, 210, "last_assessment", 0),
        },
        definitions=[EgfrBelow(threshold=15), EgfrBelow(threshold=15, and_decline_percent=40)],
    ),
    # 36. A repeat 120 days later is outside a 60-day confirmation window.
    Case(
        "outside_confirmation_window",
        T("p38", [(180, 55), (300, 55)]),
        {DEC: (0, 300, "last_assessment", 0)},
        rule={"confirm_within_days": 60},
    ),
    # 37. Prevalent kidney failure (transplant before index): kidney endpoints not evaluable.
    Case(
        "kidney_failure_before_index",
        T("p39", [(180, 55)], events=[(-100, "transplant", None)]),
        {
            DEC: (None, None, "kidney_failure_before_index", None),
            KF: (None, None, "kidney_failure_before_index", None),
            "death": (0, CUT_DAY, "data_cut", 0),
        },
        definitions=[EgfrDecline(percent=40), KidneyFailure(), Death()],
    ),
    # 38. A confirming value after the data cut is not used.
    Case(
        "confirmation_after_data_cut",
        T("p40", [(1800, 55), (CUT_DAY + 30, 55)]),
        {DEC: (0, 1800, "last_assessment", 0)},
    ),
    # 39. Exactly 40 % down (100 -> 60) meets "at least 40 %".
    Case("exactly_40_percent", T("p41", [(180, 60), (210, 60)]), {DEC: (1, 180, "confirmed", 0)}),
    # 40. 57 % decline (about a doubling of creatinine): 44 from 100 is 56 % and does not count.
    Case(
        "fifty_seven_percent",
        T("p42", [(180, 44), (210, 43), (240, 43)]),
        {"egfr_decline_57": (1, 210, "confirmed", 0)},
        definitions=[EgfrDecline(percent=57)],
    ),
    # 41. No index date: nothing can be evaluated.
    Case(
        "no_index_date",
        T("p43", [(180, 55)], index=None),
        {"death": (None, None, "no_index_date", None)},
        definitions=[Death()],
    ),
    # 42. Death before confirmation under the cause-specific rule: censored at the last
    # eGFR assessment (day 180), not a competing event (common practice in analysis plans
    # with cause-specific hazards; case 4 is the same patient under the competing rule).
    Case(
        "death_censored_at_last_assessment",
        T("p44", [(90, 100), (180, 55)], death=200),
        {DEC: (0, 180, "death_censored_at_last_assessment", 0)},
        rule={
            "unconfirmed_last_value": "censor",
            "death_before_event": "censor_at_last_assessment",
        },
    ),
    # 43. ...and a death with no eGFR after the index date: censored at the index date.
    Case(
        "death_censored_without_assessment",
        T("p45", [], death=300),
        {LT15: (0, 0, "death_censored_at_last_assessment", 0)},
        rule={"death_before_event": "censor_at_last_assessment"},
    ),
]


def test_at_least_25_hand_built_cases() -> None:
    assert len(CASES) >= 25
    assert len({c.timeline.patient_id for c in CASES}) == len(CASES)


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_hand_built_timeline(case: Case) -> None:
    result = derive([case.timeline], case.definitions, case.rule)
    assert result.columns == list(schemas.ENDPOINTS)
    for endpoint, (event, end_day, reason, competing) in case.expected.items():
        row = result.filter(pl.col("endpoint") == endpoint)
        assert row.height == 1, endpoint
        got = row.row(0, named=True)
        expected_end = day(end_day) if case.timeline.index is not None else None
        assert (got["event"], got["end_date"], got["reason"], got["competing"]) == (
            event,
            expected_end,
            reason,
            competing,
        ), endpoint
        if end_day is None:
            assert got["years"] is None
        else:
            # years = days / 365.25 (Julian year; common practice in survival tables)
            assert got["years"] == pytest.approx(end_day / 365.25, abs=1e-12)


def test_cases_together_equal_cases_alone() -> None:
    """Partition rule: the default-rule cases derived as one cohort give the same rows."""
    same = [c for c in CASES if not c.rule and c.definitions is DEFS]
    together = derive([c.timeline for c in same], DEFS, {})
    alone = pl.concat([derive([c.timeline], DEFS, {}) for c in same])
    key = ["endpoint", "patient_id"]
    assert_frame_equal(together.sort(key), alone.sort(key))


def test_one_row_per_patient_per_endpoint_in_definition_order() -> None:
    result = derive([c.timeline for c in CASES[:6]], DEFS, {})
    assert result.height == 6 * len(DEFS)
    assert result["endpoint"].unique(maintain_order=True).to_list() == [d.name for d in DEFS]


def test_pandas_input_gives_the_same_table() -> None:
    t = build([c.timeline for c in CASES[:10]])
    kwargs = {"equation": EQUATION, "data_cut": "2024-12-31"}
    from_polars = derive_endpoints(
        t["egfr"], t["baseline"], t["patients"], t["events"], DEFS, **kwargs
    )
    from_pandas = derive_endpoints(
        t["egfr"].to_pandas(),
        t["baseline"].to_pandas(),
        t["patients"].to_pandas(),
        t["events"].to_pandas(),
        DEFS,
        **kwargs,
    )
    # tables in, the same kind out: pandas back for pandas input, same content
    assert type(from_pandas).__module__.startswith("pandas")
    assert_frame_equal(from_polars, pl.from_pandas(from_pandas), check_dtypes=False)


def test_definitions_from_config_mappings() -> None:
    """The YAML keys are the model field names."""
    config = [
        {"kind": "egfr_decline", "percent": 40, "rule": {"confirm_after_days": 90}},
        {"kind": "kidney_failure"},
        {
            "kind": "composite",
            "name": "decline_or_failure",
            "paramcd": "DECKF",
            "components": ["egfr_decline_40", "kidney_failure"],
        },
    ]
    timeline = T("c01", [(180, 55), (210, 58), (300, 50)])
    result = derive([timeline], config, {})
    # With 90 days, day 210 no longer confirms day 180 (only 30 days); day 300 does (120 days).
    assert result.filter(pl.col("endpoint") == "egfr_decline_40")["event"].to_list() == [1]
    assert result.filter(pl.col("endpoint") == "egfr_decline_40")["end_date"].to_list() == [
        day(180)
    ]
    timeline = T("c02", [(180, 55), (210, 58), (250, 90)])
    result = derive([timeline], config, {})
    # No value is 90 days after day 180 or 210, and day 250 rebounds: not an event.
    assert result.filter(pl.col("endpoint") == "decline_or_failure")["event"].to_list() == [0]


def test_composite_of_composites() -> None:
    defs = [
        EgfrDecline(percent=40),
        KidneyFailure(),
        Composite(
            name="kidney_part", paramcd="KPART", components=["egfr_decline_40", "kidney_failure"]
        ),
        Death(),
        Composite(name="kidney_or_death", paramcd="KDTH", components=["kidney_part", "death"]),
    ]
    result = derive([T("c03", [(180, 80)], death=400)], defs, {})
    row = result.filter(pl.col("endpoint") == "kidney_or_death").row(0, named=True)
    assert (row["event"], row["end_date"], row["reason"]) == (1, day(400), "death")
    row = result.filter(pl.col("endpoint") == "kidney_part").row(0, named=True)
    assert (row["event"], row["competing"], row["end_date"]) == (0, 1, day(400))


def test_data_cut_accepts_iso_string_and_datetime() -> None:
    t = build([CASES[0].timeline])
    a = derive_endpoints(
        t["egfr"],
        t["baseline"],
        t["patients"],
        t["events"],
        DEFS,
        equation=EQUATION,
        data_cut="2024-12-31",
    )
    b = derive_endpoints(
        t["egfr"],
        t["baseline"],
        t["patients"],
        t["events"],
        DEFS,
        equation=EQUATION,
        data_cut=dt.datetime(2024, 12, 31, 13, 0),
    )
    assert_frame_equal(a, b)
