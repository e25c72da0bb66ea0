"""ADaM time-to-event export: layout, codes and a check with lifelines' estimators."""

from __future__ import annotations

import datetime as dt

import numpy as np
import polars as pl
import pytest
from lifelines import AalenJohansenFitter, KaplanMeierFitter

from kidneycohort.adam import ADAM_TTE_COLUMNS, to_adam_tte
from kidneycohort.endpoints import EgfrDecline, usual_kidney_composite
from kidneycohort.errors import ConfigError, InputDataError
from tests._fixtures.endpoints import INDEX, Timeline, derive

DEFS = usual_kidney_composite()
T = Timeline
# Five invented patients, worked by hand for the 40 % decline endpoint:
# q01 confirmed at day 180; q02 rebound, censored at day 400; q03 death 20 days after an
# unconfirmed decline (counted) at day 180; q04 death at day 211 without decline
# (competing); q05 decline at the last visit, censored at day 180.
COHORT = [
    T("q01", [(90, 100), (180, 55), (208, 58)]),
    T("q02", [(90, 100), (180, 55), (210, 90), (400, 95)]),
    T("q03", [(180, 55)], death=200),
    T("q04", [(180, 80)], death=211),
    T("q05", [(90, 100), (180, 55)]),
    T("q06", [(180, 55)], baseline=None),  # not evaluable for the decline
]


@pytest.fixture(scope="module")
def endpoints() -> pl.DataFrame:
    return derive(COHORT, DEFS, {})


def test_layout_and_codes(endpoints: pl.DataFrame) -> None:
    adam = to_adam_tte(endpoints, DEFS, study_id="DEMO-KIDNEY-01")
    assert adam.schema == pl.Schema(ADAM_TTE_COLUMNS)
    assert set(adam["PARAMCD"].unique()) == {"DEC40", "LT15", "KFRT", "KDEATH", "KIDCOMP"}
    assert adam["PARAMCD"].str.len_chars().max() <= 8  # ADaM: PARAMCD at most 8 characters
    # one row per subject per parameter; q06 has no baseline: kept, censored at the origin
    assert adam.group_by("USUBJID", "PARAMCD").len()["len"].max() == 1
    dec = adam.filter(pl.col("PARAMCD") == "DEC40").sort("USUBJID")
    assert dec["USUBJID"].to_list() == ["q01", "q02", "q03", "q04", "q05", "q06"]
    # CNSR: 0 event, 1 censored (ADaM BDS-TTE convention)
    assert dec["CNSR"].to_list() == [0, 1, 0, 1, 1, 1]
    # AVAL = ADT - STARTDT + 1 days: day 180 -> 181, day 400 -> 401, day 211 -> 212; q06 at
    # its origin -> 1
    assert dec["AVAL"].to_list() == [181.0, 401.0, 181.0, 212.0, 181.0, 1.0]
    assert dec["ADT"].to_list() == [
        INDEX + dt.timedelta(days=d) for d in (180, 400, 180, 211, 180, 0)
    ]
    assert (
        dec["CNSDTDSC"][5] == "origin date: not evaluable, no baseline eGFR for the study equation"
    )
    assert dec["CMPEVFL"].to_list() == ["N", "N", "N", "Y", "N", "N"]
    assert dec["CNSDTDSC"].to_list()[1:2] == ["last eGFR assessment"]
    assert dec["CNSDTDSC"].to_list()[3] == "death (competing event)"
    assert dec["CNSDTDSC"][0] is None
    assert dec["EVNTDESC"][2] == "eGFR criterion met, death before confirmation"
    assert dec["PARAM"][0] == "Time to confirmed eGFR decline of at least 40% from baseline (days)"
    assert (adam["STUDYID"] == "DEMO-KIDNEY-01").all()


def test_years_and_day_counting(endpoints: pl.DataFrame) -> None:
    years = to_adam_tte(endpoints, DEFS, time_unit="years").filter(pl.col("PARAMCD") == "DEC40")
    assert years["AVAL"].to_list() == pytest.approx(
        [180 / 365.25, 400 / 365.25, 180 / 365.25, 211 / 365.25, 180 / 365.25, 0.0]
    )
    assert years["PARAM"][0].endswith("(years)")
    plain = to_adam_tte(endpoints, DEFS, count_start_day=False).filter(pl.col("PARAMCD") == "DEC40")
    assert plain["AVAL"].to_list() == [180.0, 400.0, 180.0, 211.0, 180.0, 0.0]


def test_kaplan_meier_and_aalen_johansen_read_the_export(endpoints: pl.DataFrame) -> None:
    """lifelines reads CNSR/CMPEVFL as intended.

    By hand (Kaplan 1958 product limit): at AVAL 181 two events among five at risk ->
    S = 1 - 2/5 = 0.6, unchanged by later censoring. Aalen-Johansen: decline CIF = 0.4;
    the competing death at 212 with two at risk and S(212-) = 0.6 gives CIF = 0.6 * 1/2 = 0.3.
    """
    dec = to_adam_tte(endpoints, DEFS).filter(
        (pl.col("PARAMCD") == "DEC40") & (pl.col("USUBJID") != "q06")
    )
    t = dec["AVAL"].to_numpy()
    km = KaplanMeierFitter().fit(t, event_observed=1 - dec["CNSR"].to_numpy())
    assert km.survival_function_at_times(400).iloc[0] == pytest.approx(0.6, abs=1e-12)
    code = np.where(
        dec["CNSR"].to_numpy() == 0, 1, np.where(dec["CMPEVFL"].to_numpy() == "Y", 2, 0)
    )
    aj1 = AalenJohansenFitter(calculate_variance=False).fit(t, code, event_of_interest=1)
    aj2 = AalenJohansenFitter(calculate_variance=False).fit(t, code, event_of_interest=2)
    assert aj1.cumulative_density_.iloc[-1, 0] == pytest.approx(0.4, abs=1e-12)
    assert aj2.cumulative_density_.iloc[-1, 0] == pytest.approx(0.3, abs=1e-12)


def test_composite_event_description_names_components() -> None:
    out = derive([T("q10", [(180, 10), (210, 10)])], DEFS, {})
    adam = to_adam_tte(out, DEFS).filter(pl.col("PARAMCD") == "KIDCOMP")
    assert adam["EVNTDESC"][0] == (
        "confirmed eGFR decline of at least 40% from baseline and "
        "confirmed eGFR below 15 mL/min/1.73m2"
    )


def test_bad_arguments(endpoints: pl.DataFrame) -> None:
    with pytest.raises(InputDataError, match=r"endpoint 'egfr_below_15' has no definition"):
        to_adam_tte(endpoints, [EgfrDecline(percent=40)])
    with pytest.raises(
        ConfigError, match=r"time_unit: expected 'days' or 'years', got 'day' \(did you mean 'days'"
    ):
        to_adam_tte(endpoints, DEFS, time_unit="day")  # type: ignore[arg-type]
    with pytest.raises(InputDataError, match=r"endpoints: missing required column 'competing'"):
        to_adam_tte(endpoints.drop("competing"), DEFS)


def test_death_censored_at_the_last_assessment_is_described_and_not_competing() -> None:
    # q04 dies at day 211 without a decline: under the cause-specific rule it is censored
    # at its last eGFR assessment (day 180), not flagged as a competing event
    endpoints = derive(COHORT, DEFS, {"death_before_event": "censor_at_last_assessment"})
    adam = to_adam_tte(endpoints, DEFS)
    q04 = adam.filter((pl.col("PARAMCD") == "DEC40") & (pl.col("USUBJID") == "q04"))
    assert q04["CNSR"][0] == 1 and q04["CMPEVFL"][0] == "N"
    assert q04["ADT"][0] == INDEX + dt.timedelta(days=180)
    assert q04["CNSDTDSC"][0] == (
        "death before an event: censored at the last eGFR assessment (cause-specific)"
    )
    assert q04["SRCDOM"][0] == "ADEGFR"
