"""The albuminuria timeline: urine albumin/creatinine ratio results placed in time.

UACR (mg/g after harmonisation) measures kidney damage; it drives the KDIGO albuminuria
categories, the baseline UACR and the Kidney Failure Risk Equation. This module places
each result relative to the patient's index date, the one layout those stages read.
"""

from __future__ import annotations

import polars as pl

from kidneycohort import schemas
from kidneycohort._frames import FrameLike, follows_input, require_columns, to_polars
from kidneycohort.errors import InputDataError

__all__ = ["uacr_timeline"]


@follows_input
def uacr_timeline(labs: FrameLike, patients: FrameLike | None = None) -> pl.DataFrame:
    """UACR results (mg/g) placed in time relative to each patient's index date.

    Parameters
    ----------
    labs : polars or pandas DataFrame
        Harmonised ``schemas.LABS`` rows; those with ``analyte == "uacr"`` are kept
        (``value`` already in mg/g). A ``years_from_index`` column, when present, is
        used; otherwise ``patients`` must give ``index_date``.
    patients : polars or pandas DataFrame, optional
        ``patient_id`` and ``index_date``.

    Returns
    -------
    polars.DataFrame
        ``patient_id``, ``sample_date``, ``years_from_index``
        (:math:`\\text{days}/365.25`), ``uacr_mg_g``, ``reported_unit``, ``setting``,
        ``index_date`` (null when the patient has none), one row per UACR result.

    Raises
    ------
    InputDataError
        When a needed column is missing.
    """
    df = to_polars(labs, "labs")
    require_columns(df, ("patient_id", "analyte", "value"), "labs")
    df = df.filter(pl.col("analyte").cast(pl.String) == "uacr").with_columns(
        pl.col("patient_id").cast(pl.String), pl.col("value").cast(pl.Float64)
    )
    if "years_from_index" in df.columns:
        df = df.with_columns(
            pl.col("years_from_index").cast(pl.Float64), index_date=pl.lit(None, pl.Date)
        )
    else:
        pts = None if patients is None else to_polars(patients, "patients")
        if pts is None or "index_date" not in pts.columns:
            raise InputDataError(
                "labs: no 'years_from_index' column, and no patients table with "
                "'index_date' to place UACR results in time; pass patients=..."
            )
        require_columns(df, ("sample_date",), "labs")
        require_columns(pts, ("patient_id",), "patients")
        df = df.join(
            pts.select(pl.col("patient_id").cast(pl.String), pl.col("index_date").cast(pl.Date)),
            on="patient_id",
            how="left",
            maintain_order="left",
        ).with_columns(
            years_from_index=(pl.col("sample_date").cast(pl.Date) - pl.col("index_date"))
            .dt.total_days()
            .cast(pl.Float64)
            / schemas.DAYS_PER_YEAR
        )
    return df.select(
        "patient_id",
        (pl.col("sample_date") if "sample_date" in df.columns else pl.lit(None))
        .cast(pl.Date)
        .alias("sample_date"),
        "years_from_index",
        pl.col("value").alias("uacr_mg_g"),
        (pl.col("reported_unit") if "reported_unit" in df.columns else pl.lit(None))
        .cast(pl.String)
        .alias("reported_unit"),
        (pl.col("setting") if "setting" in df.columns else pl.lit(None))
        .cast(pl.String)
        .alias("setting"),
        "index_date",
    )
