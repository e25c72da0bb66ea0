"""What ``kidneycohort validate`` finds before a run: a bounded look at the data.

Reading only the first rows of each file (``PREVIEW_ROWS``), harmonised with the study's
own rules, it finds what a run would otherwise stop at late, and reports every problem
at once, one line each:

* a file that cannot be read, has no data rows, or whose column map does not fit;
* a table whose every row is rejected (a wrong date format, a data cut before every
  sample, a wrong unit...), with the top reasons;
* a default unit that is not a unit of the analyte it is applied to;
* a group column with a single group where a comparison needs two, patients without a
  group, a group whose every patient was rejected, a reference group not in the data.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any, Final

import polars as pl

from kidneycohort.errors import KidneyCohortError, did_you_mean
from kidneycohort.io import FileSource, read_source
from kidneycohort.pipeline.config import StudyConfig
from kidneycohort.pipeline.sources import SOURCE_TABLES

__all__ = ["COMPARISON_STEPS", "PREVIEW_ROWS", "preview_problems"]

PREVIEW_ROWS: Final = 20_000
"""Rows read from the top of each file (a bounded scan)."""

COMPARISON_STEPS: Final = frozenset({"cox", "slope_model", "trial_tables", "cohort_tables"})
"""Steps that compare groups, so need at least two."""

_UNKNOWN_UNIT: Final = re.compile(r"^unit '(?P<unit>.*)' is not a unit of (?P<analyte>\S+)$")


def _where(table: str, specs: list[FileSource], i: int) -> str:
    return f"data.{table}[{i}]" if len(specs) > 1 else f"data.{table}"


def _read_head(spec: FileSource, kind: str, where: str, rows: int) -> tuple[Any, str | None]:
    if not Path(spec.path).is_file():
        return None, (
            f"{where}.path: file '{spec.path}' not found; paths are relative to the config file"
        )
    try:
        frame = read_source(spec, kind).head(rows).collect()  # type: ignore[arg-type]
    except KidneyCohortError as exc:
        return None, f"{where}: {exc}"
    except pl.exceptions.PolarsError as exc:
        first = (str(exc).strip().splitlines() or [type(exc).__name__])[0]
        return None, f"{where}: {spec.path}: cannot be read ({first})"
    if frame.height == 0 and kind != "events":  # no events at all can be true
        return None, f"{where}: {spec.path}: no data rows (a header only)"
    return frame, None


def _read_all(config: StudyConfig, rows: int) -> tuple[dict[str, pl.DataFrame], list[str]]:
    frames: dict[str, pl.DataFrame] = {}
    problems: list[str] = []
    for table, (name, kind) in SOURCE_TABLES.items():
        specs = config.data.specs(table)
        parts = []
        for i, spec in enumerate(specs):
            frame, problem = _read_head(spec, kind, _where(table, specs, i), rows)
            if problem:
                problems.append(problem)
            elif frame is not None:
                parts.append(frame)
        if parts:
            frames[name] = parts[0] if len(parts) == 1 else pl.concat(parts, how="diagonal_relaxed")
    return frames, problems


def _default_units(config: StudyConfig, rejected: pl.DataFrame) -> list[str]:
    """A source's default unit that is not a unit of an analyte it was applied to."""
    problems = []
    specs = config.data.specs("labs")
    for i, spec in enumerate(specs):
        unit = spec.defaults.get("unit")
        if unit is None:
            continue
        details = rejected.filter(
            (pl.col("table") == "labs")
            & (pl.col("source") == spec.source_name())
            & (pl.col("reason") == "unknown_unit")
        )["detail"]
        analytes = sorted(
            {
                m["analyte"]
                for d in details.drop_nulls().unique().to_list()
                if (m := _UNKNOWN_UNIT.match(d)) and m["unit"] == unit
            }
        )
        if analytes:
            problems.append(
                f"{_where('labs', specs, i)}.defaults.unit: '{unit}' is not a unit of "
                f"{', '.join(analytes)}; give a unit of the analyte"
            )
    return problems


def _group_problems(config: StudyConfig, raw: pl.DataFrame, used: pl.DataFrame) -> list[str]:
    column = config.study.group_column
    comparing = sorted(COMPARISON_STEPS & {s.name for s in config.steps})
    if column is None or not comparing:
        return []
    if column not in used.columns:
        return [
            f"study.group_column: '{column}' is not a column of the patients"
            f"{did_you_mean(column, used.columns)}; map it in data.patients.columns or set "
            "study.group_column: null to analyse the whole cohort"
        ]
    problems = []
    values = used[column].cast(pl.String)
    missing = int((values.is_null() | (values.str.strip_chars() == "")).sum())
    if missing:
        problems.append(f"study.group_column: {missing} patients have no '{column}' value")
    groups = sorted(
        values.drop_nulls().filter(values.drop_nulls().str.strip_chars() != "").unique()
    )
    if column in raw.columns:
        emptied = sorted(set(raw[column].cast(pl.String).drop_nulls()) - set(groups))
        for group in emptied:
            problems.append(
                f"study.group_column: group '{group}' has no usable patient (every one "
                "was rejected in harmonize)"
            )
    if len(groups) < 2:
        problems.append(
            f"study.group_column: only {len(groups)} group ({', '.join(groups) or 'none'}) in "
            f"'{column}', but {', '.join(comparing)} compare two or more; set "
            "study.group_column: null to analyse the whole cohort"
        )
    reference = config.study.reference_group
    if reference is not None and reference not in groups:
        problems.append(
            f"study.reference_group: '{reference}' is not a group of '{column}' "
            f"(groups: {', '.join(groups) or 'none'}){did_you_mean(reference, groups)}"
        )
    return problems


def preview_problems(config: StudyConfig, rows: int = PREVIEW_ROWS) -> list[str]:
    """Every problem a run of ``config`` would stop at that the first ``rows`` rows of
    each file show; one line each, empty when none (see the module docstring)."""
    if config.data.source is not None:
        return []
    frames, problems = _read_all(config, rows)
    if problems or "raw_labs" not in frames or "patients" not in frames:
        return problems
    if "harmonize" not in {s.name for s in config.steps}:
        return problems
    from kidneycohort.harmonize import harmonize_tables

    try:
        result = harmonize_tables(
            frames["raw_labs"],
            frames["patients"],
            frames.get("events"),
            rule=config.sections.get("harmonize"),  # type: ignore[arg-type]
        )
    except KidneyCohortError as exc:
        return [str(exc)]
    problems += _default_units(config, result.rejected)
    scope = f" (in the first {rows:,} rows of each file)"
    problems += [f"{line}{scope}" for line in result.unusable(("labs", "patients", "events"))]
    problems += _group_problems(config, frames["patients"], result.patients)
    return problems
