"""KDIGO 2012 categories, grid, sustained stages, transitions, CKD and progression."""

from __future__ import annotations

import math

import numpy as np
import polars as pl
import pytest
from hypothesis import given, settings
from polars.testing import assert_frame_equal

from kidneycohort import schemas
from kidneycohort.baseline import egfr_baseline
from kidneycohort.errors import ConfigError, InputDataError, UnknownUnitError
from kidneycohort.kdigo import (
    RISK_GRID,
    SustainRule,
    albuminuria_category,
    category_results,
    ckd_status,
    gfr_category,
    kdigo_progression,
    kdigo_risk_expr,
    risk_grid,
    sustained_stages,
    time_to_first_worsening,
    transition_matrix,
    transitions,
)
from kidneycohort.slopes import egfr_slopes
from kidneycohort.value_filter import ValueFilterRule
from tests._fixtures.derivations import (
    EQ,
    egfr_table,
    patients_table,
    random_cohort,
    seeds,
    uacr_labs,
)


def test_gfr_boundaries_exactly_as_kdigo_2012_table_5():
    # KDIGO 2012 Table 5: G1 >= 90, G2 60-89, G3a 45-59, G3b 30-44, G4 15-29, G5 < 15;
    # non-integer values below a threshold belong to the lower category (59.5 is G3a)
    values = [120, 90, 89.99, 89.5, 60, 59.999, 59.5, 45, 44.9, 30, 29.99, 15, 14.99, 0]
    expected = ["G1", "G1", "G2", "G2", "G2", "G3a", "G3a", "G3a", "G3b", "G3b", "G4", "G4"]
    expected += ["G5", "G5"]
    assert gfr_category(values).tolist() == expected
    # floating-point noise of an equation is not a category change
    assert gfr_category([60 - 1e-12, 90 - 1e-11]).tolist() == ["G2", "G1"]
    assert gfr_category([math.nan, -1.0]).tolist() == [None, None]


def test_albuminuria_boundaries_kdigo_2012_table_6():
    # KDIGO 2012 Table 6: A1 < 30 mg/g (< 3 mg/mmol), A2 30-300 (3-30), A3 > 300 (> 30)
    assert albuminuria_category([0, 29.99, 30, 299.9, 300, 300.01]).tolist() == [
        "A1",
        "A1",
        "A2",
        "A2",
        "A2",
        "A3",
    ]
    assert albuminuria_category([2.99, 3, 30, 30.01], unit="mg/mmol{creat}").tolist() == [
        "A1",
        "A2",
        "A2",
        "A3",
    ]
    with pytest.raises(UnknownUnitError, match="mg/g or mg/mmol"):
        albuminuria_category([1.0], unit="mg/L")


def test_risk_grid_kdigo_2012_figure_2():
    # KDIGO 2012 Figure 2 (from memory: green low for G1-G2 A1; yellow for G1-G2 A2 and
    # G3a A1; orange for G1-G2 A3, G3a A2, G3b A1; red elsewhere)
    grid = risk_grid()
    assert grid.height == 18
    counts = grid.group_by("risk").len().sort("risk")
    assert dict(zip(counts["risk"], counts["len"], strict=True)) == {
        "high": 4,
        "low": 2,
        "moderately increased": 3,
        "very high": 9,
    }
    assert RISK_GRID[("G3a", "A1")] == "moderately increased"
    assert RISK_GRID[("G3b", "A1")] == "high"
    assert RISK_GRID[("G3a", "A3")] == "very high"
    cells = pl.DataFrame({"g": ["G2", "G4", None], "a": ["A3", "A1", "A2"]})
    assert cells.select(kdigo_risk_expr("g", "a"))["g"].to_list() == ["high", "very high", None]


# a patient in G3a with one acute dip to G4 that must not count
DIP = [
    ("dip", -100, 56.0),
    ("dip", 0, 55.0),
    ("dip", 100, 25.0),
    ("dip", 200, 54.0),
    ("dip", 300, 53.0),
    ("dip", 400, 52.0),
]
# a patient moving G3a -> G3b, confirmed 90+ days on, then improving back to G3a
MOVE = [
    ("move", -200, 50.0),
    ("move", -100, 48.0),
    ("move", 0, 47.0),
    ("move", 100, 40.0),
    ("move", 200, 38.0),
    ("move", 300, 37.0),
    ("move", 400, 50.0),
    ("move", 500, 52.0),
]


def test_transient_dip_is_not_a_transition():
    stages = sustained_stages(egfr_table(DIP))
    assert stages["category"].to_list() == ["G3a"]
    assert transitions(stages).height == 0
    res = category_results(egfr_table(DIP))
    # day 0 is not confirmed: the first value 90+ days later is the dip (first-value rule)
    assert res["confirmed"].to_list() == [True, False, False, True, True, False]


def test_sustained_sequence_transitions_and_dates():
    stages = sustained_stages(egfr_table(MOVE))
    assert stages["category"].to_list() == ["G3a", "G3b", "G3a"]
    assert stages["start_years"].to_list() == pytest.approx(
        [-200 / 365.25, 100 / 365.25, 400 / 365.25]
    )
    assert stages["end_years"].to_list() == pytest.approx(
        [100 / 365.25, 400 / 365.25, 500 / 365.25]
    )
    assert stages["n_results"].to_list() == [3, 3, 2]
    assert stages["is_last"].to_list() == [False, False, True]
    trans = transitions(stages)
    assert trans.schema == pl.Schema(schemas.TRANSITIONS)
    assert trans.select("from_category", "to_category", "direction").rows() == [
        ("G3a", "G3b", "worsening"),
        ("G3b", "G3a", "improvement"),
    ]
    assert [d.isoformat() for d in trans["transition_date"]] == ["2021-04-11", "2022-02-05"]


def test_unconfirmed_start_is_stage_zero():
    rows = [("z", 0, 95.0), ("z", 30, 70.0), ("z", 130, 72.0), ("z", 160, 71.0)]
    stages = sustained_stages(egfr_table(rows))
    assert stages["stage_number"].to_list() == [0, 1]
    assert stages["category"].to_list() == [None, "G2"]
    single = sustained_stages(egfr_table([("s", 10, 50.0)]))
    assert single["stage_number"].to_list() == [0]


def test_confirm_within_days_and_excluded_values():
    rows = [("a", 0, 50.0), ("a", 400, 50.0)]
    assert category_results(egfr_table(rows))["confirmed"][0] is True
    strict = category_results(egfr_table(rows), rule=SustainRule(confirm_within_days=365))
    assert strict["confirmed"][0] is False
    rows = [("b", 0, 50.0), ("b", 95, 50.0, None, "inpatient"), ("b", 300, 80.0)]
    res = category_results(egfr_table(rows), value_filter=ValueFilterRule(exclude_aki=False))
    assert res["used"].to_list() == [True, False, True]
    assert res["confirmed"].to_list() == [False, None, False]
    with pytest.raises(ConfigError, match="confirm_after_days"):
        SustainRule(confirm_after_days=-1)


def _reference_confirmed(df: pl.DataFrame, days: float) -> list[bool]:
    """Plain-Python reading of the rule: the first value >= days later has the same category."""
    out = []
    rows = df.sort("patient_id", "years_from_index").rows(named=True)
    for i, r in enumerate(rows):
        t = r["years_from_index"] * 365.25
        later = [
            s
            for s in rows[i + 1 :]
            if s["patient_id"] == r["patient_id"]
            and s["years_from_index"] * 365.25 >= t + days - 1e-6
        ]
        cat = gfr_category([r["egfr"]])[0]
        out.append(bool(later) and gfr_category([later[0]["egfr"]])[0] == cat)
    return out


def test_confirmation_matches_a_plain_reading_of_the_rule():
    df = random_cohort(5, n_patients=60)
    res = category_results(df).sort("patient_id", "years_from_index")
    assert res["confirmed"].to_list() == _reference_confirmed(df, 90)


def test_transition_matrix_rates_per_100_person_years():
    stages = sustained_stages(egfr_table(MOVE + DIP))
    m = transition_matrix(stages)
    assert m.height == 30  # 6 x 5 ordered pairs of G categories (no A results here)
    cell = m.filter((pl.col("from_category") == "G3a") & (pl.col("to_category") == "G3b")).row(
        0, named=True
    )
    # person-time in G3a: move (-200 -> 100) + (400 -> 500) days, dip -100 -> 400 days
    py = (300 + 100 + 500) / 365.25
    assert cell["n_transitions"] == 1
    assert cell["person_years_in_from"] == pytest.approx(py)
    assert cell["rate_per_100_person_years"] == pytest.approx(100 / py)
    back = m.filter((pl.col("from_category") == "G3b") & (pl.col("to_category") == "G3a"))
    assert back["rate_per_100_person_years"][0] == pytest.approx(100 / (300 / 365.25))
    assert m["n_transitions"].sum() == 2


def test_time_to_first_worsening():
    stages = sustained_stages(egfr_table(MOVE + DIP + [("pre", -300, 50.0), ("pre", -100, 50.0)]))
    t = time_to_first_worsening(stages).sort("patient_id")
    assert t["patient_id"].to_list() == ["dip", "move", "pre"]
    assert t["category_at_index"].to_list() == ["G3a", "G3a", "G3a"]
    assert t["event"].to_list() == [0, 1, 0]
    assert t["years"].to_list() == pytest.approx([400 / 365.25, 100 / 365.25, 0.0])
    assert t["reason"].to_list() == ["censored_at_last_value", "worsening", "no_values_after_index"]
    assert t["to_category"].to_list() == [None, "G3b", None]


def test_albuminuria_axis_and_reported_units():
    # 3 mg/mmol = 26.52 mg/g: A2 on the mg/mmol thresholds, A1 on the mg/g ones
    labs = uacr_labs(
        [("u", -100, 26.52, "mg/mmol"), ("u", 0, 26.52, "mg/mmol"), ("u", 100, 400.0, "mg/g")]
    )
    pts = patients_table(["u"])
    res = category_results(labs=labs, patients=pts)
    assert res["category"].to_list() == ["A2", "A2", "A3"]
    assert res["equation"].to_list() == [None, None, None]
    by_mg_g = category_results(
        labs=labs, patients=pts, rule=SustainRule(albuminuria_thresholds="mg/g")
    )
    assert by_mg_g["category"].to_list() == ["A1", "A1", "A3"]
    stages = sustained_stages(labs=labs, patients=pts)
    assert stages["axis"].to_list() == ["A"]
    assert stages["category"].to_list() == ["A2"]
    with pytest.raises(InputDataError, match="give an egfr table"):
        sustained_stages()


def test_ckd_definition_needs_more_than_three_months():
    rows = [
        ("once", 0, 50.0),
        ("once", 200, 70.0),
        ("short", 0, 50.0),
        ("short", 89, 50.0),
        ("pair", 0, 58.0),
        ("pair", 95, 41.0),  # G3a then G3b: both below 60, so CKD although categories differ
    ]
    labs = uacr_labs(
        [("alb", 0, 45.0), ("alb", 120, 300.0), ("pair", -400, 40.0), ("pair", -300, 35.0)]
    )
    out = ckd_status(egfr_table(rows), labs, patients_table(["once", "short", "pair", "alb"]))
    got = {r["patient_id"]: r for r in out.iter_rows(named=True)}
    assert got["once"]["ckd"] is False
    assert got["short"]["ckd"] is False
    assert got["pair"]["ckd"] is True
    assert got["pair"]["ckd_basis"] == "egfr_and_albuminuria"
    assert got["pair"]["ckd_onset_years"] == pytest.approx(-400 / 365.25)
    assert got["alb"]["ckd"] is True
    assert got["alb"]["equation"] is None
    assert got["alb"]["ckd_basis"] == "albuminuria_a2_plus"


def test_certain_drop_needs_category_drop_and_25_percent():
    rows = [
        # baseline 58 (G3a); 44 is G3b but only a 24.1 % fall: not certain
        ("near", 0, 58.0),
        ("near", 100, 44.0),
        ("near", 200, 44.0),
        # 43 is G3b and 25.9 % below 58: certain drop at day 100
        ("drop", 0, 58.0),
        ("drop", 100, 43.0),
        ("drop", 200, 43.5),
        # a one-off fall to 30 (G3b, 48 %) that is not confirmed
        ("dip", 0, 58.0),
        ("dip", 100, 30.0),
        ("dip", 200, 57.0),
    ]
    df = egfr_table(rows)
    out = kdigo_progression(df, egfr_baseline(df), egfr_slopes(df)).sort("patient_id")
    got = {r["patient_id"]: r for r in out.iter_rows(named=True)}
    assert got["near"]["certain_drop"] is False
    assert got["dip"]["certain_drop"] is False
    assert got["drop"]["certain_drop"] is True
    assert got["drop"]["certain_drop_years"] == pytest.approx(100 / 365.25)
    assert got["drop"]["certain_drop_pct_decline"] == pytest.approx(100 * 15 / 58)
    assert got["drop"]["baseline_category"] == "G3a"
    assert got["drop"]["rapid_progression"] is None  # slope needs a year of values
    with pytest.raises(InputDataError, match="decline_fraction"):
        kdigo_progression(df, egfr_baseline(df), decline_fraction=25)


def _partitioned(fn, df: pl.DataFrame, seed: int) -> pl.DataFrame:
    part = df["patient_id"].unique().sort().sample(fraction=0.5, seed=seed).implode()
    return pl.concat(
        [
            fn(df.filter(pl.col("patient_id").is_in(part))),
            fn(df.filter(~pl.col("patient_id").is_in(part))),
        ]
    )


@settings(max_examples=10, deadline=None)
@given(seed=seeds)
def test_partition_and_row_order_invariance(seed):
    df = random_cohort(seed, n_patients=30, equations=(EQ, "other"))
    vf = ValueFilterRule()
    order = ["patient_id", "equation", "axis", "stage_number"]

    def stages_of(d: pl.DataFrame) -> pl.DataFrame:
        return sustained_stages(d, value_filter=vf)

    whole = stages_of(df).sort(order)
    assert_frame_equal(whole, _partitioned(stages_of, df, seed).sort(order))
    shuffled = stages_of(df.sample(fraction=1.0, shuffle=True, seed=seed)).sort(order)
    assert_frame_equal(whole, shuffled)
    first = time_to_first_worsening(whole).sort("patient_id", "equation")
    assert_frame_equal(first, time_to_first_worsening(shuffled).sort("patient_id", "equation"))
    # person-years add up to the time each patient spends in some sustained category
    m = transition_matrix(whole)
    in_category = whole.filter(pl.col("category").is_not_null())
    total = (in_category["end_years"] - in_category["start_years"]).sum()
    per_from = m.group_by("equation", "from_category").agg(pl.col("person_years_in_from").first())
    assert per_from["person_years_in_from"].sum() == pytest.approx(total)
    assert np.all(m["n_transitions"].to_numpy() >= 0)
