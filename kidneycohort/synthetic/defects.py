"""Known defects injected into a clean cohort (the scenario's ``dirty`` block).

Each lab-row defect falls on a distinct clean row (no row carries two defects) of a
patient whose sex is kept, so that a harmonise stage's row accounting can be checked
against exact counts:

============================  =============================================================
defect                        what is written
============================  =============================================================
``unknown_unit``              the unit becomes ``U/L`` (an enzyme unit, no unit of these analytes)
``implausible_value``         the reported value becomes negative
``text_result``               the value becomes a free-text remark ("haemolysed", ...)
``duplicate_export``          a verbatim second copy of the row (same sample id) is added
``orphan_patient``            the row's ``patient_id`` is one absent from ``patients``
``date_before_birth``         the sample date moves to 1-3650 days before the birth date
``missing_sex``               (patients table) ``sex`` is set to null; their labs are intact
============================  =============================================================
"""

from __future__ import annotations

from typing import Final

import numpy as np
import polars as pl

from kidneycohort.errors import ConfigError
from kidneycohort.synthetic.scenario import Dirty

__all__ = [
    "DEFECTS_SCHEMA",
    "LAB_DEFECTS",
    "TEXT_RESULTS",
    "UNKNOWN_UNIT",
    "defect_counts",
    "inject_defects",
]

UNKNOWN_UNIT: Final = "U/L"
TEXT_RESULTS: Final = ("see comment", "haemolysed", "insufficient sample", "cancelled")
LAB_DEFECTS: Final = (
    "unknown_unit",
    "implausible_value",
    "text_result",
    "orphan_patient",
    "date_before_birth",
    "duplicate_export",
)
DEFECTS_SCHEMA: Final = {
    "defect": pl.String,
    "table": pl.String,
    "patient_id": pl.String,
    "sample_id": pl.Int64,
    "column": pl.String,
    "original": pl.String,
    "written": pl.String,
}


def inject_defects(
    rng: np.random.Generator,
    dirty: Dirty,
    patients: pl.DataFrame,
    labs: pl.DataFrame,
    orphan_ids: pl.Series,
) -> tuple[pl.DataFrame, pl.DataFrame, pl.DataFrame]:
    """Return (patients, labs, defects) with ``dirty``'s counts of each defect.

    ``labs`` must carry ``sample_id``; ``orphan_ids`` gives at least
    ``dirty.orphan_patient`` ids that are not in ``patients``.

    Raises
    ------
    ConfigError
        When the cohort is too small for the requested counts.
    """
    n_patients = patients.height
    if dirty.missing_sex > n_patients:
        raise ConfigError(
            f"dirty.missing_sex: asked for {dirty.missing_sex} patients but the cohort has "
            f"{n_patients}; lower it or raise --patients"
        )
    sexless = np.sort(rng.choice(n_patients, size=dirty.missing_sex, replace=False))
    sexless_ids = patients["patient_id"].gather(sexless)
    eligible = np.flatnonzero(~labs["patient_id"].is_in(sexless_ids.implode()).to_numpy())
    wanted = {name: getattr(dirty, name) for name in LAB_DEFECTS}
    total = sum(wanted.values())
    if total > eligible.size:
        raise ConfigError(
            f"dirty: asked for {total} defective lab rows but only {eligible.size} clean rows "
            "are available; lower the counts or raise --patients"
        )
    picked = rng.choice(eligible, size=total, replace=False)
    rows: dict[str, np.ndarray] = {}
    start = 0
    for name in LAB_DEFECTS:
        rows[name] = np.sort(picked[start : start + wanted[name]])
        start += wanted[name]

    row = pl.int_range(pl.len(), dtype=pl.Int64)
    original = labs
    births = labs.select("patient_id").join(
        patients.select("patient_id", "birth_date"),
        on="patient_id",
        how="left",
        maintain_order="left",
    )["birth_date"]

    texts = np.array(TEXT_RESULTS)[
        rng.integers(0, len(TEXT_RESULTS), size=rows["text_result"].size)
    ]
    negative = "-" + original["value"].gather(rows["implausible_value"])
    orphan = orphan_ids.head(rows["orphan_patient"].size)
    days_before = rng.integers(1, 3651, size=rows["date_before_birth"].size)
    time_of_day = original["sample_date"].gather(rows["date_before_birth"]).dt.time()
    moved = (
        pl.DataFrame(
            {
                "b": births.gather(rows["date_before_birth"]),
                "d": days_before,
                "t": time_of_day,
            }
        )
        .select(
            (pl.col("b") - pl.duration(days=pl.col("d"))).dt.combine(pl.col("t")).alias("moved")
        )["moved"]
        .cast(pl.Datetime("us"))
    )
    updates = {
        ("unit", "unknown_unit"): pl.Series(
            [UNKNOWN_UNIT] * rows["unknown_unit"].size, dtype=pl.String
        ),
        ("value", "implausible_value"): negative,
        ("value", "text_result"): pl.Series(texts, dtype=pl.String),
        ("patient_id", "orphan_patient"): orphan,
        ("sample_date", "date_before_birth"): moved,
    }
    dirty_labs = labs.with_columns(_row=row)
    for (column, defect), new in updates.items():
        dtype = labs.schema[column]
        lookup = pl.DataFrame(
            {"_row": rows[defect], "_new": new}, schema={"_row": pl.Int64, "_new": dtype}
        )
        dirty_labs = (
            dirty_labs.join(lookup, on="_row", how="left", maintain_order="left")
            .with_columns(pl.coalesce("_new", column).alias(column))
            .drop("_new")
        )
    copies = original.gather(rows["duplicate_export"])
    dirty_labs = pl.concat([dirty_labs.drop("_row"), copies]).sort(
        ["patient_id", "sample_date", "analyte", "sample_id"], maintain_order=True
    )

    dirty_patients = patients.with_columns(
        sex=pl.when(pl.int_range(pl.len()).is_in(pl.Series(sexless).implode()))
        .then(None)
        .otherwise(pl.col("sex"))
    )

    def record(defect: str, column: str | None, at: np.ndarray, written: pl.Series) -> pl.DataFrame:
        before = original[column].gather(at) if column else pl.Series([None] * at.size)
        return pl.DataFrame(
            {
                "defect": [defect] * at.size,
                "table": ["labs"] * at.size,
                "patient_id": original["patient_id"].gather(at),
                "sample_id": original["sample_id"].gather(at),
                "column": [column] * at.size,
                "original": before.cast(pl.String),
                "written": written.cast(pl.String),
            },
            schema=DEFECTS_SCHEMA,
        )

    records = [
        record(defect, column, rows[defect], new) for (column, defect), new in updates.items()
    ]
    records.append(
        record(
            "duplicate_export",
            None,
            rows["duplicate_export"],
            pl.Series(["copy"] * rows["duplicate_export"].size),
        )
    )
    records.append(
        pl.DataFrame(
            {
                "defect": ["missing_sex"] * sexless.size,
                "table": ["patients"] * sexless.size,
                "patient_id": sexless_ids,
                "sample_id": pl.Series([None] * sexless.size, dtype=pl.Int64),
                "column": ["sex"] * sexless.size,
                "original": patients["sex"].gather(sexless),
                "written": pl.Series([None] * sexless.size, dtype=pl.String),
            },
            schema=DEFECTS_SCHEMA,
        )
    )
    defects = pl.concat(records).sort(["defect", "patient_id", "sample_id"], nulls_last=True)
    return dirty_patients, dirty_labs, defects


def defect_counts(defects: pl.DataFrame) -> dict[str, int]:
    """Count of each defect kind (every kind present, zero when none were injected)."""
    table = defects.group_by("defect").len()
    counts = dict(zip(table["defect"].to_list(), table["len"].to_list(), strict=True))
    return {name: int(counts.get(name, 0)) for name in (*LAB_DEFECTS, "missing_sex")}
