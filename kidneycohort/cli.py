"""The ``kidneycohort`` command line: the only module that prints.

Exit codes: 0 success, 2 bad input or config (one-line message naming the file, column
or config field), 1 internal error (with a pointer to the log when a run folder exists).
"""

from __future__ import annotations

import json
import logging
import shutil
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any, TypeVar

import click

from kidneycohort._allocator import configure_allocator
from kidneycohort.cautions import SHORT_CAUTION
from kidneycohort.errors import KidneyCohortError

__all__ = [
    "EXIT_BAD_INPUT",
    "EXIT_INTERNAL",
    "EXIT_OK",
    "F",
    "cli",
    "demo_cmd",
    "design_cmd",
    "equations_cmd",
    "main",
    "run_cmd",
    "synth_cmd",
    "validate_cmd",
]

F = TypeVar("F", bound=Callable[..., Any])

EXIT_OK, EXIT_INTERNAL, EXIT_BAD_INPUT = 0, 1, 2


def _first_line(exc: BaseException) -> str:
    """The first line of an exception's message (a terminal gets one line)."""
    lines = str(exc).strip().splitlines()
    return lines[0] if lines else ""


def _guarded(func: F) -> F:
    """Turn our errors into one-line messages and exit codes; never a traceback."""

    def wrapper(*args: Any, **kwargs: Any) -> Any:
        try:
            return func(*args, **kwargs)
        except KidneyCohortError as exc:
            for line in str(exc).splitlines() or [""]:
                click.echo(f"error: {line}", err=True)
            sys.exit(EXIT_BAD_INPUT)
        except click.exceptions.Exit:
            raise
        except Exception as exc:
            log_hint = getattr(exc, "log_path", None)
            where = f" (details in {log_hint})" if log_hint else ""
            click.echo(
                f"internal error: {type(exc).__name__}: {_first_line(exc)}{where}; "
                "please report it",
                err=True,
            )
            logging.getLogger("kidneycohort").debug("internal error", exc_info=True)
            sys.exit(EXIT_INTERNAL)

    wrapper.__name__ = func.__name__
    wrapper.__doc__ = func.__doc__
    return wrapper  # type: ignore[return-value]


@click.group(
    context_settings={"help_option_names": ["-h", "--help"]},
    epilog=SHORT_CAUTION,
)
@click.version_option(package_name="kidneycohort")
def cli() -> None:
    """kidneycohort: kidney-function cohort analysis from lab tables to endpoint tables."""


@cli.command("equations")
@click.option(
    "--format",
    "fmt",
    type=click.Choice(["table", "json"]),
    default="table",
    show_default=True,
    help="Readable table, or JSON for machines.",
)
@click.option(
    "--sources",
    is_flag=True,
    help="List the published constants instead: value, publication, where, and whether "
    "each was re-read or recalled.",
)
@_guarded
def equations_cmd(fmt: str, sources: bool) -> None:
    """List the GFR-estimating equations: id, inputs, ages, unit and reference."""
    if sources:
        _print_sources(fmt)
        return
    from kidneycohort.equations import registry_table

    table = registry_table()
    if fmt == "json":
        click.echo(json.dumps(table.to_dicts(), indent=2))
        return
    from rich.console import Console
    from rich.table import Table

    out = Table(title="GFR-estimating equations", caption=SHORT_CAUTION, show_lines=True)
    for column in ("id", "inputs", "ages", "unit", "reference"):
        out.add_column(column, overflow="fold")
    for row in table.iter_rows(named=True):
        out.add_row(row["id"], row["inputs"], row["ages"], row["unit"], row["reference"])
    Console(width=max(120, shutil.get_terminal_size().columns)).print(out)


def _print_sources(fmt: str) -> None:
    from kidneycohort.provenance import (
        PUBLICATIONS,
        RECALLED_CAUTION,
        constants_table,
        status_counts,
    )

    table = constants_table()
    counts = status_counts()
    footer = (
        f"{table.height} constants: {counts['re-read']} re-read, {counts['derived']} "
        f"derived, {counts['recalled']} recalled."
    )
    if fmt == "json":
        payload = {
            "constants": table.to_dicts(),
            "publications": [
                {
                    "key": p.key,
                    "authors": p.authors,
                    "title": p.title,
                    "journal": p.journal,
                    "year": p.year,
                    "doi": p.doi,
                }
                for p in PUBLICATIONS
            ],
            "counts": counts,
            "caution": RECALLED_CAUTION,
        }
        click.echo(json.dumps(payload, indent=2, ensure_ascii=False))
        return
    from rich.console import Console
    from rich.table import Table

    out = Table(
        title="Published constants and their sources",
        caption=f"{footer} {RECALLED_CAUTION}",
        show_lines=False,
    )
    for column in ("id", "value", "publication", "where", "status"):
        out.add_column(column, overflow="fold")
    for row in table.iter_rows(named=True):
        out.add_row(row["id"], row["value"], row["publication"], row["where"], row["status"])
    Console(width=max(120, shutil.get_terminal_size().columns)).print(out)


@cli.command("synth")
@click.argument("scenario", type=click.Path(path_type=Path))
@click.option(
    "--out",
    "out_dir",
    type=click.Path(path_type=Path),
    required=True,
    help="Folder to write patients, labs, events and truth/ into.",
)
@click.option("--patients", type=int, default=None, help="Override the scenario's size.")
@click.option("--seed", type=int, default=None, help="Override the scenario's seed.")
@click.option(
    "--format",
    "fmt",
    type=click.Choice(["parquet", "csv", "duckdb", "omop", "sdtm"]),
    default="parquet",
    show_default=True,
    help="omop: also an OMOP CDM v5.4 database in omop/ (DuckDB file, CSV, psql load "
    "script); sdtm: also CDISC SDTM datasets in sdtm/ (XPT and Dataset-JSON).",
)
@_guarded
def synth_cmd(
    scenario: Path, out_dir: Path, patients: int | None, seed: int | None, fmt: str
) -> None:
    """Generate a synthetic cohort with known truth from a SCENARIO file."""
    from kidneycohort.synthetic import write_cohort

    summary = write_cohort(scenario, out_dir, patients=patients, seed=seed, fmt=fmt)
    for key, value in summary.items():
        click.echo(f"{key}: {value}")


# ---- configured runs: validate, run, demo ------------------------------------------------
_SET_HELP = "Override a config value: --set key.path=value (repeatable; value read as YAML)."


class _RichProgress:
    """A progress display on a terminal: one line per step, rows and elapsed time."""

    def __init__(self) -> None:
        from rich.console import Console

        self.console = Console(stderr=True)
        self.progress: Any = None
        self.tasks: dict[str, Any] = {}

    def start(self, steps: list[str]) -> None:
        from rich.progress import Progress, SpinnerColumn, TextColumn, TimeElapsedColumn

        self.progress = Progress(
            SpinnerColumn(),
            TextColumn("{task.description:<22}"),
            TextColumn("{task.fields[rows]}"),
            TimeElapsedColumn(),
            console=self.console,
        )
        self.progress.start()
        for name in steps:
            self.tasks[name] = self.progress.add_task(name, total=1, start=False, rows="")

    def step_started(self, name: str) -> None:
        self.progress.start_task(self.tasks[name])

    def step_finished(self, name: str, seconds: float, rows_out: int | None) -> None:
        rows = f"{rows_out:>10,} rows" if rows_out is not None else ""
        self.progress.update(self.tasks[name], completed=1, rows=rows)
        self.progress.stop_task(self.tasks[name])

    def finish(self, ok: bool) -> None:
        if self.progress is not None:
            self.progress.stop()


def _setup_output(quiet: bool, verbose: bool) -> Any:
    """Rich progress on a terminal, plain log lines otherwise; ``--quiet`` silences both."""
    package_logger = logging.getLogger("kidneycohort")
    for handler in list(package_logger.handlers):
        if getattr(handler, "_kidneycohort_cli", False):
            package_logger.removeHandler(handler)
    interactive = sys.stderr.isatty() and not quiet
    handler = logging.StreamHandler(sys.stderr)
    handler._kidneycohort_cli = True  # type: ignore[attr-defined]
    handler.setFormatter(logging.Formatter("%(levelname)s %(message)s"))
    if quiet:
        handler.setLevel(logging.ERROR)
    elif interactive and not verbose:
        handler.setLevel(logging.WARNING)
    else:
        handler.setLevel(logging.DEBUG if verbose else logging.INFO)
    package_logger.addHandler(handler)
    package_logger.setLevel(logging.DEBUG if verbose else logging.INFO)
    return _RichProgress() if interactive else None


def _load(config_path: Path, overrides: tuple[str, ...]) -> Any:
    from kidneycohort.pipeline import load_config

    return load_config(config_path, overrides=list(overrides))


def _guarded_run(func: F) -> F:
    """Like :func:`_guarded`, and a failed run points to its log."""

    def wrapper(*args: Any, **kwargs: Any) -> Any:
        try:
            return func(*args, **kwargs)
        except KidneyCohortError as exc:
            log_hint = getattr(exc, "log_path", None)
            where = f" (log: {log_hint})" if log_hint else ""
            click.echo(f"error: {exc}{where}", err=True)
            sys.exit(EXIT_BAD_INPUT)
        except click.exceptions.Exit:
            raise
        except Exception as exc:
            log_hint = getattr(exc, "log_path", None)
            where = f" (details in {log_hint})" if log_hint else ""
            click.echo(
                f"internal error: {type(exc).__name__}: {_first_line(exc)}{where}; "
                "please report it",
                err=True,
            )
            sys.exit(EXIT_INTERNAL)

    wrapper.__name__ = func.__name__
    wrapper.__doc__ = func.__doc__
    return wrapper  # type: ignore[return-value]


_READER_COLUMNS = frozenset({"source_row", "source", "assumption"})


@cli.command("validate")
@click.argument("config", type=click.Path(path_type=Path))
@click.option("--set", "overrides", multiple=True, metavar="KEY=VALUE", help=_SET_HELP)
@click.option("--no-data", is_flag=True, help="Check the config only, not the files it names.")
@_guarded
def validate_cmd(config: Path, overrides: tuple[str, ...], no_data: bool) -> None:
    """Check a study CONFIG, its recipe and its input files without running anything.

    Reads file headers and the first rows of each file (a bounded scan): every key and
    type, every step's inputs, every file and column the config names, tables whose
    every row would be rejected, groups a comparison needs. Every problem is one line.
    Exit code 0 when the config would run, 2 otherwise.
    """
    from kidneycohort.errors import InputDataError
    from kidneycohort.pipeline import check_inputs
    from kidneycohort.pipeline.preview import preview_problems

    study = _load(config, overrides)
    problems = [] if no_data else preview_problems(study)
    if problems:
        raise InputDataError("\n".join(problems))
    columns = {} if no_data else check_inputs(study)
    click.echo(f"config {config}: valid")
    click.echo(f"recipe {study.recipe.name}: {' -> '.join(s.name for s in study.steps)}")
    for table, names in columns.items():
        # the columns as the stages will see them (after the config's column map), without
        # the reader's own bookkeeping columns
        shown = [n for n in names if n not in _READER_COLUMNS and not n.endswith("_as_read")]
        click.echo(f"data.{table}: read as {', '.join(shown)}")
    click.echo(f"run folder: {study.output.dir} (unless run --out names another)")


@cli.command("run")
@click.argument("config", type=click.Path(path_type=Path))
@click.option(
    "--out",
    "out_dir",
    type=click.Path(path_type=Path),
    default=None,
    help="Run folder (default: output.dir of the config).",
)
@click.option("--set", "overrides", multiple=True, metavar="KEY=VALUE", help=_SET_HELP)
@click.option(
    "--force",
    is_flag=True,
    help="Replace a previous run folder (one with manifest.json, holding no input) once "
    "the run succeeds; a file or any other folder is never replaced.",
)
@click.option("--quiet", "-q", is_flag=True, help="No progress display or log lines.")
@click.option("--verbose", "-v", is_flag=True, help="Debug log lines.")
@_guarded_run
def run_cmd(
    config: Path,
    out_dir: Path | None,
    overrides: tuple[str, ...],
    force: bool,
    quiet: bool,
    verbose: bool,
) -> None:
    """Run a study CONFIG and write its run folder (tables, models, figures, report).

    The folder is written to a temporary place and moved into place only when every
    step succeeded; a failed run leaves RUN_DIR.failed with run.log (the traceback of a
    failure is there, the terminal gets one line). One run at a time owns a run folder
    (a lock file .RUN_DIR.lock beside it); SIGTERM stops a run like Ctrl-C. Exit codes:
    0 ok, 2 bad config or input, 1 internal error.
    """
    from kidneycohort.pipeline import run_pipeline

    progress = _setup_output(quiet, verbose)
    study = _load(config, overrides)
    result = run_pipeline(study, out_dir=out_dir, force=force, progress=progress)
    if not quiet:
        click.echo(f"run folder: {result.run_dir}")
        if result.warnings:
            click.echo(f"{len(result.warnings)} warning(s): see {result.run_dir / 'warnings.txt'}")
        click.echo(SHORT_CAUTION)


@cli.command("demo")
@click.option(
    "--out",
    "out_dir",
    type=click.Path(path_type=Path),
    default=Path("demo_run"),
    show_default=True,
    help="Run folder to write.",
)
@click.option(
    "--study",
    type=click.Choice(["trial", "cohort"]),
    default="trial",
    show_default=True,
    help="trial: two-arm trial (configs/demo_trial.yaml); cohort: health-record cohort "
    "(configs/demo_cohort.yaml).",
)
@click.option(
    "--patients",
    type=int,
    default=None,
    help="Study size (default: 500 for the trial, 3000 for the cohort).",
)
@click.option("--set", "overrides", multiple=True, metavar="KEY=VALUE", help=_SET_HELP)
@click.option("--force", is_flag=True, help="Replace an existing demo run folder.")
@click.option("--quiet", "-q", is_flag=True, help="No progress display or log lines.")
@_guarded_run
def demo_cmd(
    out_dir: Path,
    study: str,
    patients: int | None,
    overrides: tuple[str, ...],
    force: bool,
    quiet: bool,
) -> None:
    """Generate a synthetic study and run its demo config on it.

    --study trial (default) runs configs/demo_trial.yaml on an invented two-arm trial;
    --study cohort runs configs/demo_cohort.yaml on an invented health-record cohort.
    The synthetic input tables go to OUT_inputs/ beside the run folder; the run folder
    holds the tables, figures and report.html. --set overrides the demo config as for
    `run` (e.g. --set figures.formats=[png]). Takes about half a minute.
    """
    from kidneycohort.pipeline.demo import run_demo

    progress = _setup_output(quiet, False)
    result, inputs = run_demo(
        out_dir,
        study=study,  # type: ignore[arg-type]
        patients=patients,
        force=force,
        progress=progress,
        overrides=overrides,
    )
    if not quiet:
        click.echo(f"synthetic inputs: {inputs}")
        click.echo(f"run folder: {result.run_dir}")
        report = result.run_dir / "report.html"
        if report.exists():
            click.echo(f"report: {report}")
        click.echo(SHORT_CAUTION)


@cli.command("report")
@click.argument("run_dir", type=click.Path(path_type=Path))
@click.option(
    "--pdf", is_flag=True, help="Also print the report to report.pdf (headless Chromium)."
)
@_guarded
def report_cmd(run_dir: Path, pdf: bool) -> None:
    """Render RUN_DIR/report.html again from the run folder (and, with --pdf, report.pdf).

    The PDF is printed by headless Chromium or Chrome (found on PATH, or named by the
    KIDNEYCOHORT_CHROMIUM environment variable); without one, --pdf exits with code 2.
    """
    from kidneycohort.report import print_pdf, require_browser, write_report

    browser = require_browser() if pdf else None  # fails before anything is written
    html = write_report(run_dir)
    click.echo(f"report: {html}")
    if pdf:
        click.echo(f"pdf: {print_pdf(html, browser=browser)}")
    click.echo(SHORT_CAUTION)


class _TrialBar:
    """A progress bar of simulated trials on stderr: redrawn in place on a terminal,
    a line per tenth of the design otherwise."""

    def __init__(self, quiet: bool) -> None:
        self.quiet = quiet
        self.interactive = sys.stderr.isatty()
        self.last_tenth = -1

    def __call__(self, done: int, total: int) -> None:
        if self.quiet or total <= 0:
            return
        share = done / total
        if self.interactive:
            filled = int(share * 30)
            bar = "#" * filled + "-" * (30 - filled)
            click.echo(f"\rtrials [{bar}] {done}/{total}", err=True, nl=done >= total)
        elif int(share * 10) > self.last_tenth:
            self.last_tenth = int(share * 10)
            click.echo(f"trials: {done}/{total}", err=True)


@cli.command("design")
@click.argument("config", type=click.Path(path_type=Path))
@click.option(
    "--out",
    "out_dir",
    type=click.Path(path_type=Path),
    default=None,
    help="Design folder (default: output.dir of the config).",
)
@click.option(
    "--workers",
    type=click.IntRange(min=1),
    default=None,
    help="Processes (default: design.workers); results do not depend on it.",
)
@click.option("--set", "overrides", multiple=True, metavar="KEY=VALUE", help=_SET_HELP)
@click.option(
    "--force", is_flag=True, help="Start afresh in a folder holding another design's results."
)
@click.option("--quiet", "-q", is_flag=True, help="No progress bar or log lines.")
@_guarded
def design_cmd(
    config: Path,
    out_dir: Path | None,
    workers: int | None,
    overrides: tuple[str, ...],
    force: bool,
    quiet: bool,
) -> None:
    """Simulate a trial design CONFIG: power, type I error, bias, coverage, events.

    Every simulated trial is generated by the synthetic cohort engine and analysed by
    the study code (eGFR, baseline, endpoints, the exact slope engine, Cox). A stopped
    design started again with the same config and folder continues where it stopped.
    Exit codes: 0 ok, 2 bad config, 1 internal error.
    """
    from kidneycohort.design import simulate_power

    _setup_output(quiet, False)
    result = simulate_power(
        config,
        out=out_dir,
        workers=workers,
        overrides=list(overrides),
        progress=_TrialBar(quiet),
        force=force,
    )
    if not quiet:
        click.echo(f"design folder: {result.folder}")
        click.echo(f"power table: {result.folder / 'tables' / 'power.md'}")
        click.echo(f"report: {result.folder / 'report.html'}")
        click.echo(SHORT_CAUTION)


def main() -> None:
    """Console entry point."""
    # before any command imports polars: freed memory leaves the resident size at once
    configure_allocator()
    cli()


if __name__ == "__main__":  # pragma: no cover
    main()
