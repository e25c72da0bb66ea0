"""Run a validated study config: steps in order, into an atomic run folder.

The run is written to a hidden temporary folder beside the target and renamed into
place only when every step has succeeded. A failure renames the temporary folder to
``<name>.failed``: it keeps ``run.log`` and ``error.txt`` and has no ``manifest.json``,
so it can never be mistaken for a finished run.
"""

from __future__ import annotations

import functools
import logging
import shutil
import time
import uuid
import warnings
from collections.abc import Callable, Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Protocol

import polars as pl

from kidneycohort.errors import KidneyCohortError
from kidneycohort.pipeline import placement
from kidneycohort.pipeline._failures import disk_error, is_disk_error, sigterm_as_interrupt
from kidneycohort.pipeline._peak_memory import StepPeakMemory
from kidneycohort.pipeline.config import StudyConfig
from kidneycohort.pipeline.registry import Step, StepContext, StepFunction
from kidneycohort.pipeline.sources import input_records, read_sources
from kidneycohort.pipeline.standard_sources import write_results_after_run
from kidneycohort.run_folder import (
    FILES,
    AccountingRecord,
    ExecutionRecord,
    Manifest,
    ReasonCount,
    RunFile,
    RunFolder,
    StepRecord,
    StudyFacts,
    output_records,
    package_versions,
    write_manifest,
    write_table,
    write_workbook,
)
from kidneycohort.run_folder._manifest import own_version, utc_now_text

__all__ = ["GROUPED_FILES", "ProgressObserver", "RunResult", "run_files", "run_pipeline"]

logger = logging.getLogger("kidneycohort.pipeline")

_LOG_FORMAT = "%(asctime)s %(levelname)s %(name)s: %(message)s"


class ProgressObserver(Protocol):
    """What the runner tells a progress display (the command line implements it)."""

    def start(self, steps: list[str]) -> None:
        """The run begins with these steps."""

    def step_started(self, name: str) -> None:
        """A step begins."""

    def step_finished(self, name: str, seconds: float, rows_out: int | None) -> None:
        """A step ended."""

    def finish(self, ok: bool) -> None:
        """The run ended (successfully or not)."""


class _Silent:
    def start(self, steps: list[str]) -> None:
        pass

    def step_started(self, name: str) -> None:
        pass

    def step_finished(self, name: str, seconds: float, rows_out: int | None) -> None:
        pass

    def finish(self, ok: bool) -> None:
        pass


@dataclass
class RunResult:
    """What a finished run hands back.

    Attributes
    ----------
    run_dir : pathlib.Path
        The run folder, in place.
    tables : dict
        The tables the run held at the end: ``cohort``, the shared tables and models,
        in-memory objects, and per-row tables a last step made. Per-row tables no
        later step read (labs, eGFR, stages, ...) were released after their last use;
        read them from the run folder.
    manifest : Manifest
        The manifest as written.
    warnings : list of str
        The warnings captured during the run.
    """

    run_dir: Path
    tables: dict[str, Any]
    manifest: Manifest
    warnings: list[str] = field(default_factory=list)


def _rows(value: Any) -> int | None:
    if isinstance(value, pl.DataFrame):
        return value.height
    return None


def _format_warning(w: warnings.WarningMessage) -> str:
    return f"{w.category.__name__}: {w.message}"


def _study_facts(config: StudyConfig) -> StudyFacts:
    from kidneycohort.pipeline.steps import primary_equation, study_equations

    equations = study_equations(config.sections)
    return StudyFacts(
        name=config.study.name,
        description=config.study.description,
        recipe=config.recipe.name,
        primary_equation=primary_equation(config.sections, study=config.study)
        if equations or config.study.primary_equation
        else None,
        equations=equations,
    )


@dataclass
class _RunState:
    """What a run has gathered so far; :meth:`manifest` describes it at any moment."""

    config: StudyConfig
    tables: dict[str, Any] = field(default_factory=dict)
    inputs: list[dict[str, Any]] = field(default_factory=list)
    steps: list[StepRecord] = field(default_factory=list)
    accounting: list[dict[str, Any]] = field(default_factory=list)
    by_reason: list[dict[str, Any]] = field(default_factory=list)
    merged: list[dict[str, Any]] = field(default_factory=list)
    caught: list[warnings.WarningMessage] = field(default_factory=list)
    run_id: str = field(default_factory=lambda: uuid.uuid4().hex)
    execution: ExecutionRecord = field(default_factory=ExecutionRecord)

    def manifest(self) -> Manifest:
        config = self.config
        return Manifest(
            kidneycohort_version=own_version(),
            created_utc=utc_now_text(),
            run_id=self.run_id,
            config=config.resolved(),
            overrides=list(config.overrides),
            inputs=self.inputs,
            packages=package_versions(),
            seed=config.study.seed,
            accounting=[AccountingRecord.model_validate(a) for a in self.accounting],
            accounting_by_reason=[ReasonCount.model_validate(r) for r in self.by_reason],
            merged_by_reason=[ReasonCount.model_validate(r) for r in self.merged],
            steps=list(self.steps),
            warnings=[_format_warning(w) for w in self.caught],
            study=_study_facts(config),
            execution=self.execution,
        )


@contextmanager
def _run_log(run_dir: Path, *, file_only: bool = False) -> Iterator[None]:
    """Log the package at INFO (or lower) into ``run_dir/run.log`` while the run lasts.

    ``file_only`` sends the records to the log file alone (not to the terminal's
    handlers): a failure's traceback belongs in ``run.log``.
    """
    handler = logging.FileHandler(run_dir / "run.log", encoding="utf-8")
    handler.setFormatter(logging.Formatter(_LOG_FORMAT))
    handler.setLevel(logging.DEBUG)
    package_logger = logging.getLogger("kidneycohort")
    old_level, old_propagate = package_logger.level, package_logger.propagate
    old_handlers = list(package_logger.handlers)
    if file_only:
        for other in old_handlers:
            package_logger.removeHandler(other)
        package_logger.propagate = False
    package_logger.addHandler(handler)
    if package_logger.getEffectiveLevel() > logging.INFO:
        package_logger.setLevel(logging.INFO)
    try:
        yield
    finally:
        handler.close()
        package_logger.removeHandler(handler)
        package_logger.setLevel(old_level)
        if file_only:
            for other in old_handlers:
                package_logger.addHandler(other)
            package_logger.propagate = old_propagate


def run_pipeline(
    config: StudyConfig,
    *,
    out_dir: str | Path | None = None,
    force: bool = False,
    progress: ProgressObserver | None = None,
    reader: Callable[[StudyConfig], Mapping[str, Any]] | None = None,
) -> RunResult:
    """Run every step of ``config``'s recipe and write the run folder.

    Parameters
    ----------
    config : StudyConfig
        From :func:`kidneycohort.pipeline.load_config` (already validated).
    out_dir : str or Path, optional
        The run folder; default ``config.output.dir``.
    force : bool
        Replace an existing run folder (only once the new run has succeeded).
    progress : ProgressObserver, optional
        Told when each step starts and ends; the runner also logs each step.
    reader : callable, optional
        ``reader(config) -> {table: frame}`` for the source tables; default reads the
        configured files (:func:`kidneycohort.pipeline.sources.read_sources`).

    Returns
    -------
    RunResult

    Raises
    ------
    KidneyCohortError
        Bad input found while running (the failed folder keeps the log); the
        exception carries ``log_path``.
    Exception
        Any internal failure, also with ``log_path`` set.
    """
    target = Path(out_dir) if out_dir is not None else Path(config.output.dir or "run")
    target = target.resolve()
    progress = progress or _Silent()
    tmp = placement.prepare(target, force, protected_paths(config))
    state = _RunState(config)
    try:
        with _run_log(tmp), sigterm_as_interrupt():
            for stale in placement.remove_stale(target):
                logger.info("removed the unfinished folder of a run that died: %s", stale)
            _execute(state, tmp, progress, reader or read_sources)
            final = state.manifest()
            warning_lines = list(final.warnings)
            (tmp / "warnings.txt").write_text(
                "".join(line + "\n" for line in warning_lines), encoding="utf-8"
            )
            # the manifest is written last: a folder with one is a finished run
            final.outputs = output_records(tmp)
            write_manifest(tmp, final)
            logger.info("run complete: %s", target)
    except BaseException as exc:
        if is_disk_error(exc, target):
            _discard(tmp, target, progress)
            raise disk_error(target, exc) from None
        _fail(tmp, target, exc, progress)
        raise
    try:
        placement.commit(tmp, target)
    except OSError as exc:
        _discard(tmp, target, progress)
        raise disk_error(target, exc) from None
    # an OMOP source may take the finished run's outputs back (results_schema)
    write_results_after_run(config.data.source, target)
    progress.finish(True)
    return RunResult(run_dir=target, tables=state.tables, manifest=final, warnings=warning_lines)


def _fail(tmp: Path, target: Path, exc: BaseException, progress: ProgressObserver) -> None:
    """Keep the failed run's log and error beside the target; never a manifest.

    The traceback goes to ``run.log`` only (the terminal gets one line from the CLI).
    When the log or error file cannot be written (a full disk), the temporary folder is
    removed whole: nothing half-written stays behind.
    """
    progress.finish(False)
    try:
        (tmp / "manifest.json").unlink(missing_ok=True)
        with _run_log(tmp, file_only=True):
            logger.error("run failed: %s: %s", type(exc).__name__, exc, exc_info=exc)
        (tmp / "error.txt").write_text(f"{type(exc).__name__}: {exc}\n", encoding="utf-8")
        failed = placement.abandon(tmp, target)
    except OSError:
        shutil.rmtree(tmp, ignore_errors=True)
        placement.release(target)
        return
    if isinstance(exc, Exception):
        exc.log_path = str(failed / "run.log")  # type: ignore[attr-defined]


def _discard(tmp: Path, target: Path, progress: ProgressObserver) -> None:
    """Remove a run's temporary folder whole (the disk is full or not writable)."""
    progress.finish(False)
    shutil.rmtree(tmp, ignore_errors=True)
    placement.release(target)


def protected_paths(config: StudyConfig) -> list[Path]:
    """The config, its recipe and every input file: a run folder may never hold one."""
    paths = [p for p in (config.config_path, config.recipe_path) if p is not None]
    for table in ("patients", "labs", "events"):
        paths.extend(Path(spec.path) for spec in config.data.specs(table))
    source = config.data.source
    for attr in ("path", "folder"):
        value = getattr(source, attr, None) if source is not None else None
        if value:
            paths.append(Path(value))
    return paths


def _execute(
    state: _RunState,
    run_dir: Path,
    progress: ProgressObserver,
    reader: Callable[[StudyConfig], Mapping[str, Any]],
) -> None:
    """Read the sources, then run every step, gathering what the manifest records."""
    config = state.config
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        logger.info(
            "study '%s', recipe '%s': %d steps -> %s",
            config.study.name,
            config.recipe.name,
            len(config.steps),
            run_dir,
        )
        spark = config.execution.engine == "spark"
        progress.start(["read", *(["spark_partitions"] if spark else []), *_names(config.steps)])
        progress.step_started("read")
        started, cpu_started = time.perf_counter(), time.process_time()
        with StepPeakMemory() as memory:
            state.tables.update(reader(config))
            state.inputs = input_records(config, state.tables)
        seconds = time.perf_counter() - started
        rows = _rows(state.tables.get("raw_labs"))
        state.steps.append(
            StepRecord(
                name="read",
                seconds=round(seconds, 3),
                rows_out=rows,
                peak_rss_mib=memory.peak_mib,
                cpu_seconds=round(time.process_time() - cpu_started, 3),
            )
        )
        logger.info("step read: %s rows of labs in %.2f s", rows, seconds)
        progress.step_finished("read", seconds, rows)
        partitioned = _spark_partitions(state, run_dir, progress) if spark else None
        last_use = _last_use(config.steps)
        for index, step in enumerate(config.steps):
            folder = None
            if step.reads_folder:
                _finish_tables(run_dir, state.tables, config)
                state.caught = list(caught)
                folder = RunFolder(run_dir, manifest=state.manifest())
            # tables this step reads last are handed over: the step holds the only
            # reference and may free one as soon as it has read it (the raw labs)
            hand_over = functools.partial(_release, state.tables, last_use, index, config)
            _run_step(step, state, run_dir, progress, folder, partitioned, hand_over)
            _release(state.tables, last_use, index, config)
        _finish_tables(run_dir, state.tables, config)
        state.caught = list(caught)
    for w in state.caught:
        logger.warning("%s", _format_warning(w))


# Tables kept to the end of a run whatever the steps need: the patients (``cohort``) and
# every table the run folder's workbook or a caller reads back from ``RunResult.tables``.
_KEPT = frozenset({"cohort"})


def _last_use(steps: list[Step]) -> dict[str, int]:
    """For each table, the index of the last step that reads (or else makes) it."""
    last: dict[str, int] = {}
    for index, step in enumerate(steps):
        for name in (*step.needs, *step.optional_needs, *step.makes):
            last[name] = index
    return last


def _release(
    tables: dict[str, Any], last_use: Mapping[str, int], index: int, config: StudyConfig
) -> None:
    """Drop the per-row tables no later step reads (they are in the run folder already).

    Kept: ``cohort``, shared tables and models (small; the workbook and callers read
    them) and objects that are not data frames. Lab-level and per-patient tables of a
    million patients are gigabytes; holding them to the end set the run's peak.
    """
    files = run_files(config)
    for name in [n for n, i in last_use.items() if i == index]:
        table = tables.get(name)
        if (
            name in _KEPT
            or not isinstance(table, pl.DataFrame)
            or name.startswith(("tables/", "models/"))
            or (name in files and files[name].kind == "shared_table")
        ):
            continue
        del tables[name]
        logger.debug("released table %s after step %s", name, config.steps[index].name)


def run_files(config: StudyConfig) -> dict[str, RunFile]:
    """The run-folder contract plus the files the recipe's own steps declare."""
    return {**FILES, **{f.name: f for step in config.steps for f in step.files}}


# Per-patient files that carry the patient's group, so that figures and tables by arm
# or exposure read one file; the in-memory stage results are left as the stage made them.
GROUPED_FILES = ("baseline", "slopes", "endpoints", "baseline_categories", "kfre")


def _finish_tables(run_dir: Path, tables: Mapping[str, Any], config: StudyConfig) -> None:
    """Apply the output options to ``tables/``: the workbook, and Markdown kept or not.

    Run before a step that reads the finished folder (the report) and again at the end
    (the workbook is byte-identical for the same tables).
    """
    if config.output.xlsx:
        write_workbook(run_dir, tables, run_files(config))
    if not config.output.markdown:
        for md in (run_dir / "tables").glob("*.md"):
            md.unlink()


def _with_group(name: str, table: Any, tables: Mapping[str, Any]) -> Any:
    cohort = tables.get("cohort")
    if (
        name not in GROUPED_FILES
        or not isinstance(table, pl.DataFrame)
        or "group" in table.columns
        or not isinstance(cohort, pl.DataFrame)
        or "group" not in cohort.columns
        or "patient_id" not in table.columns
    ):
        return table
    groups = cohort.select(
        pl.col("patient_id").cast(table.schema["patient_id"]), pl.col("group").cast(pl.String)
    ).unique("patient_id", keep="first", maintain_order=True)
    return table.join(groups, on="patient_id", how="left", maintain_order="left")


def _names(steps: list[Step]) -> list[str]:
    return [s.name for s in steps]


def _spark_partitions(state: _RunState, run_dir: Path, progress: ProgressObserver) -> Any:
    """The spark engine's pass over partitions of patients (pyspark imported here only)."""
    from kidneycohort.pipeline.spark._engine import run_partitions

    progress.step_started("spark_partitions")
    started = time.perf_counter()
    with StepPeakMemory() as memory:
        partitioned = run_partitions(state.config, state.tables, run_dir)
    seconds = time.perf_counter() - started
    state.execution = partitioned.record
    state.steps.append(
        StepRecord(name="spark_partitions", seconds=round(seconds, 3), peak_rss_mib=memory.peak_mib)
    )
    logger.info("step spark_partitions: %.2f s", seconds)
    progress.step_finished("spark_partitions", seconds, None)
    return partitioned


def _run_step(
    step: Step,
    state: _RunState,
    run_dir: Path,
    progress: ProgressObserver,
    folder: RunFolder | None,
    partitioned: Any = None,
    hand_over: Callable[[], None] | None = None,
) -> None:
    progress.step_started(step.name)
    started, cpu_started = time.perf_counter(), time.process_time()
    on_partitions = partitioned is not None and partitioned.covers(step)
    run: StepFunction = functools.partial(partitioned.run, step) if on_partitions else step.run
    with StepPeakMemory() as memory:
        made = _call_step(step, state, run_dir, folder, run, hand_over)
    seconds = time.perf_counter() - started
    cpu_seconds = time.process_time() - cpu_started
    executor = partitioned.executor_figures(step) if on_partitions else (None, None)
    rows_out = _rows(made[step.makes[0]]) if step.makes else None
    logger.info(
        "step %s: %s rows in %.2f s, peak %s MiB", step.name, rows_out, seconds, memory.peak_mib
    )
    progress.step_finished(step.name, seconds, rows_out)
    state.steps.append(
        StepRecord(
            name=step.name,
            seconds=round(seconds, 3),
            rows_out=rows_out,
            peak_rss_mib=memory.peak_mib,
            cpu_seconds=round(cpu_seconds, 3),
            executor_seconds=executor[0],
            executor_peak_rss_mib=executor[1],
        )
    )


def _call_step(
    step: Step,
    state: _RunState,
    run_dir: Path,
    folder: RunFolder | None,
    run: StepFunction,
    hand_over: Callable[[], None] | None = None,
) -> dict[str, Any]:
    """Run one step, check what it made against its declaration, write its tables.

    ``hand_over`` drops from the run's tables those the step is the last to read (after
    they were given to it), so the step's context holds their only reference.
    """
    config, tables = state.config, state.tables
    given = {n: tables[n] for n in step.needs}
    given.update({n: tables[n] for n in step.optional_needs if n in tables})
    if hand_over is not None:
        hand_over()
    context = StepContext(
        tables=given,
        options=config.sections.get(step.section) if step.section else None,
        sections={"study": config.study, **config.sections},
        run_dir=run_dir,
        seed=config.study.seed,
        folder=folder,
    )
    logger.debug("step %s: starting with %s", step.name, sorted(given))
    try:
        made = dict(run(context))
    except KidneyCohortError as exc:
        # keep the user's one-line message, but say which step found the problem
        exc.args = (f"step '{step.name}': {exc}", *exc.args[1:])
        raise
    missing = [n for n in step.makes if n not in made]
    extra = [n for n in made if n not in step.makes]
    if missing or extra:
        raise RuntimeError(
            f"step '{step.name}' declared makes={list(step.makes)} but returned "
            f"{sorted(made)} (missing {missing}, undeclared {extra})"
        )
    for name in step.makes:
        if made[name] is None:  # an output this run has no data for: not written
            continue
        tables[name] = made[name]
        write_table(run_dir, name, _with_group(name, made[name], tables), run_files(config))
    state.accounting.extend(context.accounting)
    state.by_reason.extend(context.accounting_by_reason)
    state.merged.extend(context.merged_by_reason)
    return made
