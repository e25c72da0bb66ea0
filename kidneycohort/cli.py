"""The ``kidneycohort`` command line: the only module that prints.

Exit codes: 0 success, 2 bad input or config (one-line message naming the file, column
or config field), 1 internal error (with a pointer to the log when a run folder exists).
"""

from __future__ import annotations

import json
import logging
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any, TypeVar

import click

from kidneycohort.cautions import SHORT_CAUTION
from kidneycohort.errors import KidneyCohortError

F = TypeVar("F", bound=Callable[..., Any])

EXIT_OK, EXIT_INTERNAL, EXIT_BAD_INPUT = 0, 1, 2


def _guarded(func: F) -> F:
    """Turn our errors into one-line messages and exit codes; never a traceback."""

    def wrapper(*args: Any, **kwargs: Any) -> Any:
        try:
            return func(*args, **kwargs)
        except KidneyCohortError as exc:
            click.echo(f"error: {exc}", err=True)
            sys.exit(EXIT_BAD_INPUT)
        except click.exceptions.Exit:
            raise
        except Exception as exc:
            log_hint = getattr(exc, "log_path", None)
            where = f" (details in {log_hint})" if log_hint else ""
            click.echo(
                f"internal error: {type(exc).__name__}: {exc}{where}; please report it",
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
@_guarded
def equations_cmd(fmt: str) -> None:
    """List the GFR-estimating equations: id, inputs, ages, unit and reference."""
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
    Console(width=max(120, click.get_terminal_size()[0])).print(out)


@cli.command("synth")
@click.argument("scenario", type=click.Path(path_type=Path))
@click.option("--out", "out_dir", type=click.Path(path_type=Path), required=True,
              help="Folder to write patients, labs, events and truth/ into.")
@click.option("--patients", type=int, default=None, help="Override the scenario's size.")
@click.option("--seed", type=int, default=None, help="Override the scenario's seed.")
@click.option("--format", "fmt", type=click.Choice(["parquet", "csv", "duckdb"]),
              default="parquet", show_default=True)
@_guarded
def synth_cmd(scenario: Path, out_dir: Path, patients: int | None, seed: int | None,
              fmt: str) -> None:
    """Generate a synthetic cohort with known truth from a SCENARIO file."""
    from kidneycohort.synthetic import write_cohort

    summary = write_cohort(scenario, out_dir, patients=patients, seed=seed, fmt=fmt)
    for key, value in summary.items():
        click.echo(f"{key}: {value}")


def main() -> None:
    """Console entry point."""
    cli()


if __name__ == "__main__":  # pragma: no cover
    main()
