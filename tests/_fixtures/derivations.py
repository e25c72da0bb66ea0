"""Small hand-built tables in the contract layouts for the derivation tests."""

from __future__ import annotations

import datetime as dt

import numpy as np
import polars as pl
from hypothesis import strategies as st

from kidneycohort import schemas
from kidneycohort._frames import conform

INDEX = dt.date(2021, 1, 1)
EQ = "ckd_epi_2021_cr"


def egfr_table(
    rows: list[tuple],
    equation: str = EQ,
) -> pl.DataFrame:
    """``rows`` of (patient_id, day_from_index, egfr[, creatinine[, setting[, hour]]])."""
    pid, day, value, creat, setting, hour = [], [], [], [], [], []
    for r in rows:
        pid.append(r[0])
        day.append(r[1])
        value.append(r[2])
        creat.append(r[3] if len(r) > 3 else None)
        setting.append(r[4] if len(r) > 4 else "outpatient")
        hour.append(r[5] if len(r) > 5 else 8)
    dates = [INDEX + dt.timedelta(days=d) for d in day]
    df = pl.DataFrame(
        {
            "patient_id": pid,
            "sample_date": dates,
            "sample_datetime": [
                dt.datetime.combine(d, dt.time(h)) for d, h in zip(dates, hour, strict=True)
            ],
            "years_from_index": [d / schemas.DAYS_PER_YEAR for d in day],
            "equation": equation,
            "egfr": pl.Series(value, dtype=pl.Float64),
            "creatinine_mg_dl": pl.Series(creat, dtype=pl.Float64),
            "setting": setting,
        }
    )
    return conform(df, schemas.EGFR)


def uacr_labs(rows: list[tuple]) -> pl.DataFrame:
    """``rows`` of (patient_id, day_from_index, value_mg_g[, reported_unit[, setting]])."""
    dates = [INDEX + dt.timedelta(days=r[1]) for r in rows]
    df = pl.DataFrame(
        {
            "patient_id": [r[0] for r in rows],
            "sample_date": dates,
            "analyte": "uacr",
            "value": pl.Series([r[2] for r in rows], dtype=pl.Float64),
            "unit": "mg/g",
            "reported_unit": [r[3] if len(r) > 3 else "mg/g" for r in rows],
            "setting": [r[4] if len(r) > 4 else "outpatient" for r in rows],
        }
    )
    return conform(df, schemas.LABS)


def patients_table(ids: list[str], index: dt.date | None = INDEX) -> pl.DataFrame:
    return pl.DataFrame(
        {"patient_id": ids, "index_date": pl.Series([index] * len(ids), dtype=pl.Date)}
    )


def random_cohort(
    seed: int, n_patients: int = 40, equations: tuple[str, ...] = (EQ,)
) -> pl.DataFrame:
    """A seeded random eGFR table: irregular visits, declines, dips, some inpatient rows."""
    rng = np.random.default_rng(seed)
    rows = []
    for p in range(n_patients):
        n = int(rng.integers(1, 12))
        days = np.sort(rng.choice(np.arange(-500, 1500), size=n, replace=False))
        start = rng.uniform(10, 110)
        slope = rng.normal(-2, 4)
        for d in days:
            value = max(start + slope * d / 365.25 + rng.normal(0, 4), 1.0)
            creat = 90.0 / value
            setting = "inpatient" if rng.random() < 0.1 else "outpatient"
            rows.append((f"P{p:03d}", int(d), float(value), float(creat), setting))
    out = egfr_table(rows, equations[0])
    for eq in equations[1:]:
        out = pl.concat([out, out.with_columns(equation=pl.lit(eq), egfr=pl.col("egfr") * 0.95)])
    return out


seeds = st.integers(min_value=0, max_value=10_000)
