"""Hand-built patient timelines for the endpoint tests.

Each timeline is written in days from an index date, so the expected event day can be
read off the scenario by hand.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import polars as pl

INDEX = dt.date(2020, 1, 1)
DATA_CUT = dt.date(2024, 12, 31)
EQUATION = "ckd_epi_2021_cr"


def day(n: int | None) -> dt.date | None:
    """The date ``n`` days after the index date (None stays None)."""
    return None if n is None else INDEX + dt.timedelta(days=n)


@dataclass
class Timeline:
    """One invented patient: eGFR values and dates as days after index."""

    patient_id: str
    values: Sequence[tuple[int, float]] = ()
    baseline: float | None = 100.0
    death: int | None = None
    kfrt: int | None = None
    end_of_followup: int | None = None
    events: Sequence[tuple[int, str, int | None]] = field(default_factory=tuple)
    index: dt.date | None = INDEX


def build(timelines: Sequence[Timeline]) -> dict[str, pl.DataFrame]:
    """egfr, baseline, patients and events tables of the given timelines."""
    egfr_rows, base_rows, pat_rows, ev_rows = [], [], [], []
    for t in timelines:
        for d, value in t.values:
            egfr_rows.append(
                {
                    "patient_id": t.patient_id,
                    "sample_date": day(d),
                    "equation": EQUATION,
                    "egfr": value,
                }
            )
        if t.baseline is not None:
            base_rows.append(
                {
                    "patient_id": t.patient_id,
                    "equation": EQUATION,
                    "baseline_egfr": t.baseline,
                    "baseline_date": INDEX,
                    "baseline_n_values": 1,
                    "baseline_method": "hand_built",
                    "baseline_reason": None,
                }
            )
        pat_rows.append(
            {
                "patient_id": t.patient_id,
                "index_date": t.index,
                "death_date": day(t.death),
                "kfrt_date": day(t.kfrt),
                "end_of_followup": day(t.end_of_followup),
            }
        )
        for d, kind, end in t.events:
            ev_rows.append(
                {
                    "patient_id": t.patient_id,
                    "event_date": day(d),
                    "event": kind,
                    "end_date": day(end),
                }
            )
    return {
        "egfr": pl.DataFrame(
            egfr_rows,
            schema={
                "patient_id": pl.String,
                "sample_date": pl.Date,
                "equation": pl.String,
                "egfr": pl.Float64,
            },
        ),
        "baseline": pl.DataFrame(
            base_rows,
            schema={
                "patient_id": pl.String,
                "equation": pl.String,
                "baseline_egfr": pl.Float64,
                "baseline_date": pl.Date,
                "baseline_n_values": pl.Int32,
                "baseline_method": pl.String,
                "baseline_reason": pl.String,
            },
        ),
        "patients": pl.DataFrame(
            pat_rows,
            schema={
                "patient_id": pl.String,
                "index_date": pl.Date,
                "death_date": pl.Date,
                "kfrt_date": pl.Date,
                "end_of_followup": pl.Date,
            },
        ),
        "events": pl.DataFrame(
            ev_rows,
            schema={
                "patient_id": pl.String,
                "event_date": pl.Date,
                "event": pl.String,
                "end_date": pl.Date,
            },
        ),
    }


def derive(timelines: list[Timeline], definitions: list[Any], rule: dict[str, Any]) -> pl.DataFrame:
    """Endpoints of hand-built timelines under ``rule`` (fields of ``EndpointRule``)."""
    from kidneycohort.endpoints import EndpointRule, derive_endpoints

    t = build(timelines)
    return derive_endpoints(
        t["egfr"],
        t["baseline"],
        t["patients"],
        t["events"],
        definitions,
        equation=EQUATION,
        data_cut=DATA_CUT,
        rule=EndpointRule(**rule),
    )
