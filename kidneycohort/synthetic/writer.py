"""Write a synthetic cohort to a folder: canonical tables plus ``truth/``.

Output is byte-identical for the same scenario and seed with Parquet and CSV: rows are
sorted, Parquet compression (zstd level 3), row-group size and statistics are fixed, and
no timestamp is written anywhere. A DuckDB database file holds the same rows but its
own file layout is not promised to be byte-stable; its truth/ is Parquet.
"""

from __future__ import annotations

import json
import logging
from pathlib import Path
from typing import Any, Literal

import polars as pl
import yaml

from kidneycohort.errors import ConfigError
from kidneycohort.synthetic.cohort import SyntheticCohort, generate_cohort

__all__ = [
    "CSV_DATETIME_FORMAT",
    "FORMATS",
    "PARQUET_OPTIONS",
    "Format",
    "write_cohort",
    "write_frames",
    "write_table",
]

logger = logging.getLogger(__name__)

Format = Literal["parquet", "csv", "duckdb", "omop", "sdtm"]
FORMATS: tuple[str, ...] = ("parquet", "csv", "duckdb", "omop", "sdtm")
PARQUET_OPTIONS: dict[str, Any] = {
    "compression": "zstd",
    "compression_level": 3,
    "statistics": False,
    "row_group_size": 512 * 1024,
}
CSV_DATETIME_FORMAT = "%Y-%m-%d %H:%M:%S"


def write_table(frame: pl.DataFrame, path: Path, fmt: str) -> Path:
    """Write one frame as ``path`` + ``.parquet`` or ``.csv`` with the fixed settings."""
    if fmt == "csv":
        target = path.with_suffix(".csv")
        frame.write_csv(target, datetime_format=CSV_DATETIME_FORMAT)
    else:
        target = path.with_suffix(".parquet")
        frame.write_parquet(target, **PARQUET_OPTIONS)
    return target


def write_cohort(
    scenario_path: str | Path,
    out_dir: str | Path,
    *,
    patients: int | None = None,
    seed: int | None = None,
    fmt: str = "parquet",
) -> dict[str, object]:
    """Generate the scenario's cohort and write it to ``out_dir``.

    Writes ``patients``, ``labs`` and ``events`` (``.parquet``/``.csv``, or one
    ``cohort.duckdb``; ``omop`` adds an OMOP CDM database in ``omop/`` and ``sdtm`` CDISC
    SDTM datasets in ``sdtm/``, each beside the canonical Parquet files) and ``truth/`` (``patients``, ``samples``, ``events``,
    ``defects``, ``defect_counts.json``, ``scenario.yaml``).

    Returns
    -------
    dict
        A short summary for the command line: rows per table and files written.

    Raises
    ------
    ConfigError
        Bad scenario file, unknown ``fmt``, or an output folder that cannot be created.
    """
    if fmt not in FORMATS:
        raise ConfigError(f"--format: unknown format {fmt!r}; use one of {', '.join(FORMATS)}")
    cohort = generate_cohort(scenario_path, patients=patients, seed=seed)
    out = Path(out_dir)
    try:
        (out / "truth").mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise ConfigError(f"--out: cannot create folder {out}: {exc.strerror}") from None
    files = write_frames(cohort, out, fmt)
    logger.info("wrote %d files to %s", len(files), out)
    return {
        "scenario": cohort.scenario.name,
        "seed": cohort.scenario.seed,
        "patients": cohort.patients.height,
        "labs": cohort.labs.height,
        "events": cohort.events.height,
        "defects injected": sum(cohort.defect_counts.values()),
        "files": len(files),
        "out": str(out),
    }


def write_frames(cohort: SyntheticCohort, out: Path, fmt: str) -> list[Path]:
    """Write an already generated cohort (see :func:`write_cohort`); returns the files."""
    files: list[Path] = []
    tables = {"patients": cohort.patients, "labs": cohort.labs, "events": cohort.events}
    if fmt in ("omop", "sdtm"):
        # the standard layouts; the canonical Parquet files are written beside them
        files += _write_standard_layout(cohort, out, fmt)
        files += [write_table(frame, out / name, "parquet") for name, frame in tables.items()]
    elif fmt == "duckdb":
        files.append(_write_duckdb(tables, out / "cohort.duckdb"))
    else:
        files += [write_table(frame, out / name, fmt) for name, frame in tables.items()]
    truth_fmt = "csv" if fmt == "csv" else "parquet"
    files += [write_table(f, out / "truth" / name, truth_fmt) for name, f in cohort.truth.items()]
    counts = out / "truth" / "defect_counts.json"
    counts.write_text(json.dumps(cohort.defect_counts, indent=2) + "\n", encoding="utf-8")
    resolved = out / "truth" / "scenario.yaml"
    resolved.write_text(
        yaml.safe_dump(cohort.scenario.to_plain(), sort_keys=False, allow_unicode=True),
        encoding="utf-8",
    )
    return [*files, counts, resolved]


def _write_standard_layout(cohort: SyntheticCohort, out: Path, fmt: str) -> list[Path]:
    if fmt == "omop":
        from kidneycohort.synthetic._omop_writer import write_omop

        return write_omop(cohort, out)[0]
    from kidneycohort.synthetic._sdtm_writer import write_sdtm

    return write_sdtm(cohort, out)[0]


def _write_duckdb(tables: dict[str, pl.DataFrame], path: Path) -> Path:
    import duckdb

    path.unlink(missing_ok=True)
    with duckdb.connect(str(path)) as con:
        for name, frame in tables.items():
            arrow_table = frame.to_arrow()  # noqa: F841 - read by name in the SQL below
            con.execute(f"CREATE TABLE {name} AS SELECT * FROM arrow_table")
    return path
