"""The driver's side of the spark engine: partition the patients, run, gather.

The sources are staged as Parquet with their row positions, read by Spark, packed into
one row per patient (that patient's rows of every source table) and spread over
``execution.partitions`` partitions by a hash of the patient id. Every partition runs
the partition-safe steps (:mod:`._partition`); the driver then takes each step in recipe
order: it reads the step's per-patient tables back from the partition files, sums the
row accounting, runs the step's cohort-level part and writes the run folder exactly as
the polars engine does.
"""

from __future__ import annotations

import builtins
import functools
import json
import logging
import os
import re
import shutil
import sys
from collections.abc import Mapping
from pathlib import Path
from typing import TYPE_CHECKING, Any

import polars as pl

from kidneycohort import errors
from kidneycohort._frames import as_float
from kidneycohort.errors import ConfigError
from kidneycohort.pipeline.config import ExecutionSection, StudyConfig
from kidneycohort.pipeline.registry import Step, StepContext
from kidneycohort.pipeline.sources import SOURCE_TABLES
from kidneycohort.pipeline.spark._datasets import DatasetSource, dataset_sources, spark_rows
from kidneycohort.pipeline.spark._partition import (
    KEY,
    ROW,
    SUMMARY_SCHEMA,
    PartitionJob,
    run_partition,
)
from kidneycohort.pipeline.spark._plan import PartitionPlan, partition_plan
from kidneycohort.run_folder import ExecutionRecord

if TYPE_CHECKING:
    from pyspark.sql import Column, DataFrame, SparkSession

__all__ = ["PartitionedRun", "partition_expression", "run_partitions", "spark_session"]

logger = logging.getLogger("kidneycohort.pipeline")

_STAGING = ".spark_inputs"


def spark_session(execution: ExecutionSection) -> SparkSession:
    """The active Spark session, or a new one on ``execution.master``.

    Raises
    ------
    ConfigError
        pyspark is not installed, or Spark cannot start (no Java runtime).
    """
    try:
        from pyspark.sql import SparkSession
    except ImportError:
        raise ConfigError(
            "execution.engine: 'spark' needs pyspark (pip install -e '.[spark]') and a "
            "Java runtime; or set execution.engine: polars"
        ) from None
    active = SparkSession.getActiveSession()
    if active is not None:
        return active
    # executors run the same interpreter (and so the same kidneycohort) as the driver
    os.environ.setdefault("PYSPARK_PYTHON", sys.executable)
    builder = (
        SparkSession.builder.master(execution.master)
        .appName("kidneycohort")
        .config("spark.sql.session.timeZone", "UTC")
        .config("spark.ui.showConsoleProgress", "false")
    )
    try:
        return builder.getOrCreate()
    except Exception as exc:
        first = (str(exc).strip() or type(exc).__name__).splitlines()[0]
        raise ConfigError(
            f"execution.master: cannot start Spark on '{execution.master}' ({first}); "
            "Spark needs a Java runtime (JAVA_HOME or java on PATH)"
        ) from None


def partition_expression(key: Column) -> Column:
    """The expression whose hash picks a patient's partition (the patient id as text)."""
    return key


def _stage(tables: Mapping[str, Any], inputs: tuple[str, ...], folder: Path) -> dict[str, Path]:
    """Write each source table the driver read, with its row positions, for Spark."""
    folder.mkdir(parents=True, exist_ok=True)
    staged = {}
    for name in inputs:
        table = tables[name]
        if not isinstance(table, pl.DataFrame):
            continue
        path = folder / f"{name}.parquet"
        table.with_row_index(ROW).with_columns(pl.col(ROW).cast(pl.Int64)).write_parquet(path)
        staged[name] = path
    return staged


def _datasets(config: StudyConfig, tables: Mapping[str, Any]) -> dict[str, list[DatasetSource]]:
    """The source tables Spark reads from Parquet folders (left unread by the driver)."""
    out = {}
    for table, (name, kind) in SOURCE_TABLES.items():
        if isinstance(tables.get(name), pl.LazyFrame):
            out[name] = dataset_sources(config.data.specs(table), kind)
    return out


def _packed(
    spark: SparkSession, staged: Mapping[str, Path], datasets: Mapping[str, list[DatasetSource]]
) -> DataFrame:
    """One row per patient key: that patient's rows of every source table."""
    from pyspark.sql import functions as F

    parts: list[tuple[str, DataFrame, str]] = [
        (name, spark.read.parquet(str(path)), "patient_id") for name, path in staged.items()
    ]
    for name, sources in datasets.items():
        parts += [(f"{name}#{i}", spark_rows(spark, s), s.key) for i, s in enumerate(sources)]
    packed: DataFrame | None = None
    for column, frame, key in parts:
        rows = F.struct(*[F.col(f"`{c}`") for c in frame.columns])
        grouped = frame.groupBy(F.col(f"`{key}`").cast("string").alias(KEY)).agg(
            F.collect_list(rows).alias(column)
        )
        packed = grouped if packed is None else packed.join(grouped, on=KEY, how="full_outer")
    assert packed is not None
    return packed


def _spark_schema() -> str:
    names = {"int32": "int", "int64": "long", "string": "string", "double": "double"}
    return ", ".join(f"{f.name} {names[str(f.type)]}" for f in SUMMARY_SCHEMA)


def run_partitions(config: StudyConfig, tables: Mapping[str, Any], run_dir: Path) -> PartitionedRun:
    """Run the partition-safe steps of ``config`` on Spark; the driver's handle on them.

    ``tables`` holds the source tables as read; ``run_dir`` is the run folder being
    written (per-patient tables go to ``patient_partitions/<table>/part-NNNNN.parquet``).
    """
    inputs = tuple(name for name, _ in SOURCE_TABLES.values() if name in tables)
    plan = partition_plan(config.steps, inputs)
    execution = config.execution
    datasets = _datasets(config, tables)
    spark = spark_session(execution)
    # every patient's rows stay in one of exactly `partitions` partitions, and the
    # grouping and joining shuffles use as many; the session's own values come back
    settings = {
        "spark.sql.adaptive.coalescePartitions.enabled": "false",
        "spark.sql.shuffle.partitions": str(execution.partitions),
    }
    before = {key: spark.conf.get(key, None) for key in settings}
    for key, value in settings.items():
        spark.conf.set(key, value)
    job = PartitionJob(
        steps=plan.steps,
        patient_tables=plan.patient_tables,
        inputs={name: dict(tables[name].collect_schema()) for name in inputs},
        datasets=datasets,
        sections={"study": config.study, **config.sections},
        seed=config.study.seed,
        run_dir=str(run_dir),
    )
    staging = run_dir / _STAGING
    try:
        staged = _stage(tables, inputs, staging)
        packed = _packed(spark, staged, datasets)
        from pyspark.sql import functions as F

        spread = packed.repartition(execution.partitions, partition_expression(F.col(KEY)))
        summary = spread.mapInArrow(functools.partial(run_partition, job), _spark_schema())
        try:
            result = pl.from_arrow(summary.toArrow())
        except Exception as exc:
            logger.debug("partition task failure: %s", exc)
            raise RuntimeError(
                f"spark engine: a partition task failed outside a step ({_cause(exc)})"
            ) from None
    finally:
        shutil.rmtree(staging, ignore_errors=True)
        for key, old in before.items():
            if old is None:
                spark.conf.unset(key)
            else:
                spark.conf.set(key, old)
    assert isinstance(result, pl.DataFrame)
    record = ExecutionRecord(
        engine="spark",
        master=spark.sparkContext.master,
        partitions=execution.partitions,
        spark_version=spark.version,
    )
    logger.info(
        "spark engine: %d partition-safe steps on %d partitions (%s), %d patients",
        len(plan.steps),
        execution.partitions,
        record.master,
        int(result.filter(pl.col("step") == plan.steps[0].name)["patients"].sum())
        if plan.steps
        else 0,
    )
    return PartitionedRun(plan, result, run_dir, record)


def _cause(exc: Exception) -> str:
    """The Python error inside a Spark task failure (its last ``...Error: ...`` line)."""
    lines = [line.strip() for line in str(exc).splitlines()]
    found = [line for line in lines if re.match(r"^[\w.]+(Error|Exception): ", line)]
    return found[-1] if found else (lines[0] if lines and lines[0] else type(exc).__name__)


def _summed(records: list[dict[str, Any]], keys: list[str]) -> list[dict[str, Any]]:
    if not records:
        return []
    frame = pl.DataFrame(records)
    summed = frame.group_by(keys, maintain_order=True).agg(pl.exclude(keys).sum())
    return summed.to_dicts()


def _rebuilt(error_class: str, message: str) -> Exception:
    """The exception a step raised in a partition, as the same class where possible."""
    found = getattr(errors, error_class, None) or getattr(builtins, error_class, None)
    if isinstance(found, type) and issubclass(found, Exception):
        try:
            return found(message)
        except TypeError:
            pass
    return RuntimeError(f"{error_class}: {message}")


class PartitionedRun:
    """What the partitions made, step by step, for the driver to finish.

    Attributes
    ----------
    plan : PartitionPlan
        The partition-safe steps and their per-patient tables.
    summary : polars.DataFrame
        One row per step and partition (``SUMMARY_SCHEMA``).
    record : ExecutionRecord
        Engine, master and partition count, for the manifest.
    """

    def __init__(
        self, plan: PartitionPlan, summary: pl.DataFrame, run_dir: Path, record: ExecutionRecord
    ) -> None:
        self.plan = plan
        self.summary = summary
        self.run_dir = run_dir
        self.record = record

    def covers(self, step: Step) -> bool:
        """The step's per-patient part ran on the partitions."""
        return step.name in self.plan.patient_tables

    def _rows(self, step: Step) -> pl.DataFrame:
        return self.summary.filter(pl.col("step") == step.name).sort("partition")

    def executor_figures(self, step: Step) -> tuple[float | None, float | None]:
        """Seconds summed over the partition tasks and the highest worker peak (MiB)."""
        rows = self._rows(step)
        if rows.height == 0:
            return None, None
        seconds = as_float(rows["seconds"].sum(), "task seconds")
        return round(seconds, 3), as_float(rows["peak_rss_mib"].max(), "task peak memory")

    def _raise_failure(self, rows: pl.DataFrame, step: Step) -> None:
        failed = rows.filter(pl.col("error").is_not_null())
        if failed.height == 0:
            return
        first = failed.row(0, named=True)
        patients = int(failed["patients"].sum())
        where = (
            f"raised on {failed.height} of {self.record.partitions} partitions, {patients} patients"
        )
        raise _rebuilt(first["error_class"], f"{first['error']} ({where})")

    def _load(self, name: str) -> pl.DataFrame | None:
        folder = self.run_dir / "patient_partitions" / name
        pieces = sorted(folder.glob("part-*.parquet"))
        if not pieces:
            return None
        table = pl.concat([pl.read_parquet(p) for p in pieces], how="vertical_relaxed")
        if "patient_id" in table.columns:
            # the order the polars engine gives: by patient, then as the step made them
            table = table.sort("patient_id", maintain_order=True)
        return table

    def run(self, step: Step, context: StepContext) -> dict[str, Any]:
        """The step on the driver: its per-patient tables from the partitions, the
        accounting summed over them, then its cohort-level part."""
        rows = self._rows(step)
        self._raise_failure(rows, step)
        assert step.patient_wise is not None
        if rows.height == 0:
            # no patient reached any partition: the whole (empty) cohort on the driver
            return dict(step.run(context))
        made: dict[str, Any] = {}
        for name in self.plan.patient_tables[step.name]:
            table = self._load(name)
            if table is None:
                raise RuntimeError(f"step '{step.name}': no partition file of table '{name}'")
            made[name] = table
        parts = [json.loads(text) for text in rows["accounting"]]
        context.accounting.extend(_summed([r for p in parts for r in p["accounting"]], ["table"]))
        for key, target in (
            ("by_reason", context.accounting_by_reason),
            ("merged", context.merged_by_reason),
        ):
            summed = _summed([r for p in parts for r in p[key]], ["table", "reason"])
            target.extend(sorted(summed, key=lambda r: (r["table"], r["reason"])))
        if step.patient_wise.cohort is not None:
            made.update(step.patient_wise.cohort(context, made))
        return made
