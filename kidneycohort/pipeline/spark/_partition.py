"""The work of one partition of patients, on a Spark executor.

Each partition arrives as one row per patient key holding that patient's rows of every
source table (lists of structs). They are unpacked into polars tables in their original
row order, and the partition-safe steps run on them in recipe order through the very
functions the polars engine calls. Per-patient tables are written as one Parquet file
per partition; the task returns a few summary rows (rows, seconds, memory, accounting,
or the error a step raised) for the driver.

This module imports pyarrow and polars only; Spark calls :func:`run_partition` through
``mapInArrow``.
"""

from __future__ import annotations

import json
import resource
import sys
import time
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import polars as pl
import pyarrow as pa
from pydantic import BaseModel

from kidneycohort.pipeline.registry import Step, StepContext
from kidneycohort.pipeline.spark._datasets import (
    DatasetSource,
    concat_sources,
    normalised,
    raw_schema,
)

__all__ = [
    "KEY",
    "ROW",
    "SUMMARY_SCHEMA",
    "PartitionJob",
    "piece_path",
    "run_partition",
    "unpack",
]

KEY = "_kc_patient_key"
"""Column of the packed rows: the patient id as text (the partitioning key)."""

ROW = "_kc_row"
"""Column added to every source table: its row's position as read (restores the order)."""

SUMMARY_SCHEMA = pa.schema(
    [
        ("partition", pa.int32()),
        ("patients", pa.int64()),
        ("step", pa.string()),
        ("tables", pa.string()),
        ("seconds", pa.float64()),
        ("peak_rss_mib", pa.float64()),
        ("accounting", pa.string()),
        ("error_class", pa.string()),
        ("error", pa.string()),
    ]
)
"""One row per step and partition that ran it (``error`` set on the step that failed)."""


@dataclass(frozen=True)
class PartitionJob:
    """What every partition task needs, shipped to the executors once.

    Attributes
    ----------
    steps : tuple of Step
        The partition-safe steps, in recipe order.
    patient_tables : dict
        Step name -> its per-patient tables (written per partition).
    inputs : dict
        Source table -> its polars schema as read (restored after Spark).
    datasets : dict
        Source table read by Spark from Parquet folders -> its folders (the packed
        column of folder ``i`` is ``<table>#<i>``).
    sections : dict
        The validated config sections, with ``study``.
    seed : int
        The study seed.
    run_dir : str
        The run folder being written (pieces go under ``patient_partitions/``).
    """

    steps: tuple[Step, ...]
    patient_tables: dict[str, tuple[str, ...]]
    inputs: dict[str, dict[str, pl.DataType]]
    datasets: dict[str, list[DatasetSource]]
    sections: dict[str, BaseModel]
    seed: int
    run_dir: str


def piece_path(run_dir: str | Path, table: str, partition: int) -> Path:
    """Where partition ``partition`` writes its rows of per-patient table ``table``."""
    return Path(run_dir) / "patient_partitions" / table / f"part-{partition:05d}.parquet"


def _rows(packed: pl.DataFrame, column: str, schema: Mapping[str, pl.DataType]) -> pl.DataFrame:
    rows = packed.select(pl.col(column)).explode(column).filter(pl.col(column).is_not_null())
    if rows.height == 0:
        return pl.DataFrame(schema=dict(schema))
    return rows.unnest(column)


def unpack(packed: pl.DataFrame, job: PartitionJob) -> dict[str, Any]:
    """The source tables of a partition from its packed rows, in their order as read."""
    out: dict[str, Any] = {}
    for name, schema in job.inputs.items():
        if name in job.datasets:
            parts = [
                normalised(_rows(packed, f"{name}#{i}", raw_schema(source)), source)
                for i, source in enumerate(job.datasets[name])
            ]
            out[name] = concat_sources(parts, schema)
            continue
        rows = _rows(packed, name, {**schema, ROW: pl.Int64()}).sort(ROW).drop(ROW)
        out[name] = rows.select(pl.col(c).cast(t) for c, t in schema.items())
    return out


def _peak_mib() -> float:
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    # Linux reports KiB, macOS bytes
    return round(peak / (1024 * 1024 if sys.platform == "darwin" else 1024), 1)


def _run_step(
    job: PartitionJob, step: Step, tables: dict[str, Any], partition: int
) -> dict[str, Any]:
    """One partition-safe step on this partition's tables; returns its summary row."""
    given = {n: tables[n] for n in step.needs}
    given.update({n: tables[n] for n in step.optional_needs if n in tables})
    context = StepContext(
        tables=given,
        options=job.sections.get(step.section) if step.section else None,
        sections=job.sections,
        run_dir=Path(job.run_dir),
        seed=job.seed,
    )
    assert step.patient_wise is not None
    made = dict(step.patient_wise.per_patient(context))
    rows: dict[str, int] = {}
    for name in job.patient_tables[step.name]:
        table = made[name]
        if not isinstance(table, pl.DataFrame):
            raise TypeError(
                f"step '{step.name}': per-patient table '{name}' is a "
                f"{type(table).__name__}, not a polars DataFrame"
            )
        path = piece_path(job.run_dir, name, partition)
        path.parent.mkdir(parents=True, exist_ok=True)
        table.write_parquet(path)
        tables[name] = table
        rows[name] = table.height
    accounting = {
        "accounting": context.accounting,
        "by_reason": context.accounting_by_reason,
        "merged": context.merged_by_reason,
    }
    return {"tables": json.dumps(rows), "accounting": json.dumps(accounting, default=str)}


def run_partition(job: PartitionJob, batches: Iterator[pa.RecordBatch]) -> Iterator[pa.RecordBatch]:
    """Run the job's steps on one partition (the function Spark maps over partitions).

    An exception raised by a step is caught and reported in the summary (its class and
    message, the step and the partition's patient count); later steps do not run here.
    """
    from pyspark import TaskContext

    collected = list(batches)
    packed = pl.from_arrow(pa.Table.from_batches(collected)) if collected else None
    if not isinstance(packed, pl.DataFrame) or packed.height == 0:
        return
    context = TaskContext.get()
    partition = context.partitionId() if context is not None else 0
    # patients: ids in the patients table (lab rows of unknown ids are counted apart)
    listed = [c for c in packed.columns if c == "patients" or c.startswith("patients#")]
    held = pl.any_horizontal(pl.col(c).list.len() > 0 for c in listed)
    people = packed.filter(held) if listed else packed
    patients = int(people[KEY].drop_nulls().n_unique())
    tables = unpack(packed, job)
    del packed, collected
    rows = []
    for step in job.steps:
        started = time.perf_counter()
        row: dict[str, Any] = {"partition": partition, "patients": patients, "step": step.name}
        try:
            row.update(_run_step(job, step, tables, partition))
        except Exception as exc:
            message = str(exc).strip() or type(exc).__name__
            row.update(error_class=type(exc).__name__, error=message.splitlines()[0])
        row.update(seconds=time.perf_counter() - started, peak_rss_mib=_peak_mib())
        rows.append(row)
        if row.get("error") is not None:
            break
    yield pa.RecordBatch.from_pylist(rows, schema=SUMMARY_SCHEMA)
