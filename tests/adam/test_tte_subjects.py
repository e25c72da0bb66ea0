"""ADTTE keeps every randomised subject and carries treatment, flags and source records.

Regression: not-evaluable subjects (no baseline eGFR) used to be left out of ADTTE, so a
decline parameter counted fewer subjects than were randomised, and no treatment
variables were carried. The invented trial below has 8 randomised subjects (4 per arm),
2 of them without a baseline, and one screened subject never randomised.
"""

from __future__ import annotations

import datetime as dt

import polars as pl
import pytest
from polars.testing import assert_frame_equal

from kidneycohort.adam import ADAM_IG_LABELS, adtte_dataset
from kidneycohort.endpoints import usual_kidney_composite
from kidneycohort.errors import InputDataError
from tests._fixtures.endpoints import INDEX, Timeline, derive

DEFS = usual_kidney_composite()
T = Timeline
TIMELINES = [
    T("r01", [(90, 100), (180, 55), (208, 58)]),  # confirmed 40 % decline at day 180
    T("r02", [(90, 100), (400, 95)]),
    T("r03", [(180, 80)], death=211),  # death: competing for the decline
    T("r04", [(180, 90)], baseline=None),  # no baseline: not evaluable for the decline
    T("r05", [(90, 98), (365, 97)], kfrt=500),  # dialysis start at day 500
    T("r06", [(180, 85)], baseline=None),  # no baseline
    T("r07", [(90, 99)]),
    T("r08", [(120, 101)]),
    T("s09", [], index=None),  # screened, never randomised: no index date
]
ARMS = {"r01": "placebo", "r02": "active", "r03": "placebo", "r04": "active"}
ARMS |= {"r05": "placebo", "r06": "active", "r07": "placebo", "r08": "active"}


@pytest.fixture(scope="module")
def endpoints() -> pl.DataFrame:
    return derive(TIMELINES, DEFS, {})


@pytest.fixture(scope="module")
def subjects() -> pl.DataFrame:
    ids = [t.patient_id for t in TIMELINES]
    return pl.DataFrame(
        {
            "patient_id": ids,
            "group": [ARMS.get(i) for i in ids],
            # r08 was randomised to active but took placebo (actual treatment differs)
            "actual_group": [ARMS.get(i) if i != "r08" else "placebo" for i in ids],
            "index_date": [t.index for t in TIMELINES],
            # r07 never took a dose: randomised (ITT) but not in the safety population
            "first_dose_date": [
                t.index if t.index is not None and t.patient_id != "r07" else None
                for t in TIMELINES
            ],
        }
    )


def test_every_randomised_subject_is_in_every_parameter(
    endpoints: pl.DataFrame, subjects: pl.DataFrame
) -> None:
    ds = adtte_dataset(endpoints, DEFS, subjects=subjects, arm_order=["placebo", "active"])
    adtte = ds.data
    counts = adtte.group_by("PARAMCD", "TRTP").len().sort("PARAMCD", "TRTP")
    # 4 randomised per arm in every parameter (before the fix: 3 per arm for DEC40)
    assert counts["len"].to_list() == [4] * 2 * len(DEFS)
    assert "s09" not in adtte["USUBJID"].to_list()
    dec = adtte.filter(pl.col("PARAMCD") == "DEC40").sort("USUBJID")
    r04 = dec.filter(pl.col("USUBJID") == "r04").row(0, named=True)
    # censored at the origin date, the reason in the censoring description
    assert (r04["ADT"], r04["CNSR"], r04["AVAL"]) == (INDEX, 1, 1.0)
    assert r04["CNSDTDSC"] == "origin date: not evaluable, no baseline eGFR for the study equation"
    assert (r04["SRCDOM"], r04["SRCVAR"]) == ("ADSL", "RANDDT")


def test_treatment_flags_and_parameter_numbers(
    endpoints: pl.DataFrame, subjects: pl.DataFrame
) -> None:
    adtte = adtte_dataset(endpoints, DEFS, subjects=subjects, arm_order=["placebo", "active"]).data
    one = adtte.filter(pl.col("PARAMCD") == "KFRT").sort("USUBJID")
    assert one["TRTP"].to_list() == [ARMS[f"r0{i}"] for i in range(1, 9)]
    assert one["TRTPN"].to_list() == [1 if ARMS[f"r0{i}"] == "placebo" else 2 for i in range(1, 9)]
    assert one.filter(pl.col("USUBJID") == "r08")[["TRTA", "TRTAN"]].row(0) == ("placebo", 1)
    assert one["ITTFL"].to_list() == ["Y"] * 8
    assert one.filter(pl.col("SAFFL") == "N")["USUBJID"].to_list() == ["r07"]
    # PARAMN numbers the definitions in their order (ADaM IG: PARAMN 1:1 with PARAMCD)
    pairs = adtte.select("PARAMN", "PARAMCD").unique().sort("PARAMN")
    assert pairs["PARAMCD"].to_list() == [d.paramcd for d in DEFS]
    assert pairs["PARAMN"].to_list() == list(range(1, len(DEFS) + 1))
    # kidney failure of r05 at day 500 comes from ADSL.KFRTDT
    r05 = one.filter(pl.col("USUBJID") == "r05").row(0, named=True)
    assert (r05["CNSR"], r05["ADT"]) == (0, INDEX + dt.timedelta(days=500))
    assert (r05["SRCDOM"], r05["SRCVAR"]) == ("ADSL", "KFRTDT")


def test_source_sequence_points_at_the_egfr_record(endpoints: pl.DataFrame) -> None:
    records = pl.DataFrame(
        {
            "USUBJID": ["r01", "r01", "r01", "r01"],
            "ADT": [INDEX + dt.timedelta(days=d) for d in (90, 180, 180, 208)],
            "ASEQ": [11, 12, 13, 14],
        }
    )
    adtte = adtte_dataset(endpoints, DEFS, egfr_records=records).data
    r01 = adtte.filter((pl.col("USUBJID") == "r01") & (pl.col("PARAMCD") == "DEC40")).row(
        0, named=True
    )
    # the decline was reached on day 180: the first record of that day is ASEQ 12
    assert (r01["SRCDOM"], r01["SRCVAR"], r01["SRCSEQ"]) == ("ADEGFR", "ADT", 12)
    # censoring at the data cut points at ADSL, not at an eGFR record
    kfrt = adtte.filter((pl.col("USUBJID") == "r01") & (pl.col("PARAMCD") == "KFRT"))
    assert kfrt[["SRCDOM", "SRCVAR", "SRCSEQ"]].row(0) == ("ADSL", "DCUTDT", None)


def test_labels_are_the_adam_ig_labels(endpoints: pl.DataFrame) -> None:
    ds = adtte_dataset(endpoints, DEFS)
    for v in ds.variables:
        assert len(v.name) <= 8 and len(v.label) <= 40  # SAS TS-140 (XPORT v5)
        if v.name in ADAM_IG_LABELS:
            # ADaM IG v1.3 / BDS-TTE v1.0 labels (from memory; the pilot-marked ones
            # re-read in the CDISC ADaM pilot example datasets)
            assert v.label == ADAM_IG_LABELS[v.name]
    assert ds.variable("CNSR").label == "Censor"
    assert ds.variable("STARTDT").label == "Time to Event Origin Date for Subject"
    assert ds.variable("CMPEVFL").standard is False


def test_rows_do_not_depend_on_the_subject_order(
    endpoints: pl.DataFrame, subjects: pl.DataFrame
) -> None:
    forward = adtte_dataset(endpoints, DEFS, subjects=subjects, arm_order=["placebo", "active"])
    backward = adtte_dataset(
        endpoints.reverse(), DEFS, subjects=subjects.reverse(), arm_order=["placebo", "active"]
    )
    assert_frame_equal(forward.data, backward.data)


def test_an_arm_missing_from_the_order_is_named(
    endpoints: pl.DataFrame, subjects: pl.DataFrame
) -> None:
    with pytest.raises(InputDataError, match=r"arm 'placebo' is not in the arm order \['active'\]"):
        adtte_dataset(endpoints, DEFS, subjects=subjects, arm_order=["active"])
