"""Small invented tables for the harmonise and eGFR tests (made-up study, made-up sites)."""

from __future__ import annotations

import datetime as dt

import polars as pl


def patients() -> pl.DataFrame:
    """Six invented patients; P5 died in 2021; P6 has no sex recorded."""
    return pl.DataFrame(
        {
            "patient_id": ["P1", "P2", "P3", "P4", "P5", "P6"],
            "sex": ["F", "male", "M", "female", "f", None],
            "birth_date": [
                dt.date(1960, 5, 1),
                dt.date(1950, 1, 15),
                dt.date(1975, 3, 3),
                dt.date(2010, 7, 7),
                dt.date(1940, 2, 2),
                dt.date(1980, 1, 1),
            ],
            "index_date": [dt.date(2020, 1, 1)] * 6,
            "death_date": [None, None, None, None, dt.date(2021, 6, 30), None],
            "height_cm": [165.0, 180.0, 175.0, 150.0, 160.0, 170.0],
            "weight_kg": [70.0, 85.0, 90.0, 45.0, 60.0, 75.0],
            "arm": ["A", "B", "A", "B", "A", "B"],
        }
    )


# one row per lab reason code, plus clean rows; (patient, date, analyte, value, unit, reason)
LAB_ROWS: list[tuple[str | None, str | None, str | None, str | None, str | None, str | None]] = [
    ("P1", "2020-01-10", "creatinine", "0.9", "mg/dL", None),
    ("P1", "2020-01-10", "creatinine", "0.9", "mg/dL", "exact_duplicate"),
    ("P1", "2020-01-10 15:00", "creatinine", "1.1", "mg/dL", "same_day_collapsed"),
    ("P2", "2020-02-01", "14682-9", "88,4", "µmol/L", None),
    ("P2", "2020-02-01", "cystatin C", "1.2 H", "mg/L", None),
    ("P2", "2020-03-01", "uacr", "3.0", "mg/mmol", None),
    ("P3", "2020-02-02", "creatinine", "<0.2", "mg/dL", None),
    ("P3", "2020-02-03", "cystatin_c", ">8", "mg/L", None),
    (None, "2020-01-01", "creatinine", "1.0", "mg/dL", "missing_patient_id"),
    ("P1", None, "creatinine", "1.0", "mg/dL", "missing_date"),
    ("P1", "31.31.2020", "creatinine", "1.0", "mg/dL", "unparseable_date"),
    ("P1", "2020-04-01", "potassium", "4.1", "mmol/L", "unknown_analyte"),
    ("P1", "2020-04-02", "creatinine", None, "mg/dL", "missing_value"),
    ("P1", "2020-04-03", "creatinine", "see comment", "mg/dL", "not_a_result"),
    ("P1", "2020-04-04", "creatinine", "1.0", None, "missing_unit"),
    ("P1", "2020-04-05", "creatinine", "1.0", "mmol/mol", "unknown_unit"),
    ("P1", "2020-04-06", "creatinine", "88", "mg/dL", "implausible_value"),
    ("P9", "2020-04-07", "creatinine", "1.0", "mg/dL", "unknown_patient"),
    ("PX", "2020-04-07", "creatinine", "1.0", "mg/dL", "patient_rejected"),
    ("P4", "2009-01-01", "creatinine", "0.5", "mg/dL", "before_birth"),
    ("P5", "2021-07-01", "creatinine", "1.4", "mg/dL", "after_death"),
    ("P1", "2024-01-01", "creatinine", "1.0", "mg/dL", "after_data_cut"),
]
DATA_CUT = dt.date(2023, 12, 31)


def dirty_labs() -> pl.DataFrame:
    """Raw labs with one row for each lab reason code (and the clean rows)."""
    return pl.DataFrame(
        {
            "patient_id": [r[0] for r in LAB_ROWS],
            "sample_date": [r[1] for r in LAB_ROWS],
            "analyte": [r[2] for r in LAB_ROWS],
            "value": [r[3] for r in LAB_ROWS],
            "unit": [r[4] for r in LAB_ROWS],
        }
    )


def expected_reasons() -> dict[int, str]:
    """1-based source row -> expected reason code."""
    return {i + 1: r[5] for i, r in enumerate(LAB_ROWS) if r[5] is not None}


def patients_with_bad_rows() -> pl.DataFrame:
    """The clean patients plus a duplicated id PX (conflicting rows) and bad rows."""
    extra = pl.DataFrame(
        {
            "patient_id": ["PX", "PX", None, "PD", "P1"],
            "sex": ["F", "M", "F", "M", "F"],
            "birth_date": [
                dt.date(1970, 1, 1),
                dt.date(1970, 1, 1),
                dt.date(1970, 1, 1),
                dt.date(1990, 1, 1),
                dt.date(1960, 5, 1),
            ],
            "index_date": [dt.date(2020, 1, 1)] * 5,
            "death_date": [None, None, None, dt.date(1980, 1, 1), None],
            "height_cm": [160.0, 160.0, 150.0, 150.0, 165.0],
            "weight_kg": [60.0, 60.0, 50.0, 50.0, 70.0],
            "arm": ["A", "A", "A", "A", "A"],
        }
    )
    return pl.concat([patients(), extra])
