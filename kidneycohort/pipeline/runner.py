"""Run a validated study config: steps in order, into an atomic run folder.

The run is written to a hidden temporary folder beside the target and renamed into
place only when every step has succeeded. A failure renames the temporary folder to
``<name>.failed``: it keeps ``run.log`` and ``error.txt`` and has no ``manifest.json``,
so it can never be mistaken for a finished run.
"""

from __future__ import annotations

import logging
import time
import uuid
import warnings
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Protocol

import polars as pl

from kidneycohort.errors import KidneyCohortError
from kidneycohort.pipeline import manifest as manifest_mod
from kidneycohort.pipeline import run_folder
from kidneycohort.pipeline.config import StudyConfig
from kidneycohort.pipeline.registry import Step, StepContext
from kidneycohort.pipeline.sources import input_records, read_sources
from kidneycohort.pipeline.standard_sources import write_results_after_run

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
        Every table the run held at the end (including in-memory ones).
    manifest : dict
        The manifest as written.
    warnings : list of str
        The warnings captured during the run.
    """

    run_dir: Path
    tables: dict[str, Any]
    manifest: dict[str, Any]
    warnings: list[str] = field(default_factory=list)


def _rows(value: Any) -> int | None:
    if isinstance(value, pl.DataFrame):
        return value.height
    return None


def _format_warning(w: warnings.WarningMessage) -> str:
    return f"{w.category.__name__}: {w.message}"


def _study_summary(config: StudyConfig) -> dict[str, Any]:
    from kidneycohort.pipeline.steps import primary_equation, study_equations

    equations = study_equations(config.sections)
    return {
        "name": config.study.name,
        "description": config.study.description,
        "recipe": config.recipe.name,
        "primary_equation": primary_equation(config.sections, study=config.study)
        if equations or config.study.primary_equation
        else None,
        "equations": equations,
    }


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
    tmp = run_folder.prepare(target, force)

    handler = logging.FileHandler(tmp / "run.log", encoding="utf-8")
    handler.setFormatter(logging.Formatter(_LOG_FORMAT))
    handler.setLevel(logging.DEBUG)
    package_logger = logging.getLogger("kidneycohort")
    old_level = package_logger.level
    package_logger.addHandler(handler)
    if package_logger.getEffectiveLevel() > logging.INFO:
        package_logger.setLevel(logging.INFO)

    captured: list[warnings.WarningMessage] = []
    step_records: list[dict[str, Any]] = []
    accounting: list[dict[str, Any]] = []
    by_reason: list[dict[str, Any]] = []
    merged: list[dict[str, Any]] = []
    tables: dict[str, Any] = {}
    inputs: list[dict[str, Any]] = []
    run_id = uuid.uuid4().hex
    ok = False
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            logger.info(
                "study '%s', recipe '%s': %d steps -> %s",
                config.study.name,
                config.recipe.name,
                len(config.steps),
                target,
            )
            progress.start(["read"] + [s.name for s in config.steps])
            progress.step_started("read")
            started = time.perf_counter()
            tables.update((reader or read_sources)(config))
            inputs = input_records(config, tables)
            seconds = time.perf_counter() - started
            step_records.append(
                {
                    "name": "read",
                    "seconds": round(seconds, 3),
                    "rows_out": _rows(tables.get("raw_labs")),
                }
            )
            logger.info(
                "step read: %s rows of labs in %.2f s", _rows(tables.get("raw_labs")), seconds
            )
            progress.step_finished("read", seconds, _rows(tables.get("raw_labs")))

            def manifest_now() -> dict[str, Any]:
                return manifest_mod.build_manifest(
                    config=config.resolved(),
                    overrides=config.overrides,
                    inputs=inputs,
                    seed=config.study.seed,
                    accounting=accounting,
                    accounting_by_reason=by_reason,
                    merged_by_reason=merged,
                    steps=step_records,
                    warnings=[_format_warning(w) for w in caught],
                    study=_study_summary(config),
                    run_id=run_id,
                )

            for step in config.steps:
                if step.reads_folder:
                    _finish_tables(tmp, tables, config)
                record = _run_step(step, config, tables, tmp, progress)
                step_records.append(record.pop("_record"))
                accounting.extend(record["accounting"])
                by_reason.extend(record["accounting_by_reason"])
                merged.extend(record["merged_by_reason"])
                # steps after this one (figures, report) read the folder as it stands
                manifest_mod.write_manifest(tmp, manifest_now())
            _finish_tables(tmp, tables, config)
            captured = list(caught)
            for w in captured:
                logger.warning("%s", _format_warning(w))
            final = manifest_now()
        warning_lines = [_format_warning(w) for w in captured]
        (tmp / "warnings.txt").write_text(
            "".join(line + "\n" for line in warning_lines), encoding="utf-8"
        )
        final["outputs"] = manifest_mod.output_records(tmp)
        manifest_mod.write_manifest(tmp, final)
        logger.info("run complete: %s", target)
        ok = True
    except BaseException as exc:
        logger.error("run failed: %s: %s", type(exc).__name__, exc, exc_info=True)
        handler.close()
        package_logger.removeHandler(handler)
        (tmp / "error.txt").write_text(f"{type(exc).__name__}: {exc}\n", encoding="utf-8")
        manifest_path = tmp / "manifest.json"
        if manifest_path.exists():
            manifest_path.unlink()
        failed = run_folder.abandon(tmp, target)
        progress.finish(False)
        if isinstance(exc, Exception):
            exc.log_path = str(failed / "run.log")  # type: ignore[attr-defined]
        raise
    finally:
        if ok:
            handler.close()
            package_logger.removeHandler(handler)
        package_logger.setLevel(old_level)
    run_folder.commit(tmp, target)
    # an OMOP source may take the finished run's outputs back (results_schema)
    write_results_after_run(config.data.source, target)
    progress.finish(True)
    return RunResult(run_dir=target, tables=tables, manifest=final, warnings=warning_lines)


# Per-patient files that carry the patient's group, so that figures and tables by arm
# or exposure read one file; the in-memory stage results are left as the stage made them.
GROUPED_FILES = ("baseline", "slopes", "endpoints", "baseline_categories", "kfre")


def _finish_tables(run_dir: Path, tables: Mapping[str, Any], config: StudyConfig) -> None:
    """Apply the output options to ``tables/``: the workbook, and Markdown kept or not.

    Run before a step that reads the finished folder (the report) and again at the end
    (the workbook is byte-identical for the same tables).
    """
    if config.output.xlsx:
        run_folder.write_workbook(run_dir, tables)
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


def _run_step(
    step: Step,
    config: StudyConfig,
    tables: dict[str, Any],
    run_dir: Path,
    progress: ProgressObserver,
) -> dict[str, Any]:
    progress.step_started(step.name)
    started = time.perf_counter()
    given = {n: tables[n] for n in step.needs}
    given.update({n: tables[n] for n in step.optional_needs if n in tables})
    context = StepContext(
        tables=given,
        options=config.sections.get(step.section) if step.section else None,
        sections={"study": config.study, **config.sections},
        run_dir=run_dir,
        seed=config.study.seed,
    )
    logger.debug("step %s: starting with %s", step.name, sorted(given))
    try:
        made = dict(step.run(context))
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
        tables[name] = made[name]
        run_folder.write_table(run_dir, name, _with_group(name, made[name], tables))
    seconds = time.perf_counter() - started
    rows_out = _rows(made[step.makes[0]]) if step.makes else None
    logger.info("step %s: %s rows in %.2f s", step.name, rows_out, seconds)
    progress.step_finished(step.name, seconds, rows_out)
    return {
        "_record": {"name": step.name, "seconds": round(seconds, 3), "rows_out": rows_out},
        "accounting": context.accounting,
        "accounting_by_reason": context.accounting_by_reason,
        "merged_by_reason": context.merged_by_reason,
    }
