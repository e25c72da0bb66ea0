"""Study-wide facts as the steps read them: equations, the primary equation, the group.

A fact of the study (the primary equation, the group column and reference group) is
read here, in one place, so that every step agrees.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping
from typing import Any

import polars as pl

from kidneycohort.errors import ConfigError, did_you_mean
from kidneycohort.pipeline.registry import StepContext

__all__ = [
    "check_data_cut",
    "check_primary",
    "group_column",
    "primary_equation",
    "records",
    "reference_group",
    "section",
    "study_data_cut",
    "study_equations",
]


def records(frame: pl.DataFrame, keys: tuple[str, ...]) -> list[dict[str, Any]]:
    """Rows of ``frame`` as dicts of ``keys`` (those present), for the manifest."""
    return frame.select([k for k in keys if k in frame.columns]).to_dicts()


def section(ctx: StepContext, name: str, model: type[Any]) -> Any:
    """The validated config section ``name``, or the model's defaults when absent."""
    value = ctx.sections.get(name)
    return value if isinstance(value, model) else model()


def study_equations(sections: Mapping[str, Any]) -> list[str]:
    """Every equation the study's ``egfr`` section computes, in first-mention order."""
    egfr = sections.get("egfr")
    if egfr is None:
        return []
    return list(egfr.all_equations())


def primary_equation(
    sections: Mapping[str, Any],
    tables: Mapping[str, Any] | None = None,
    *,
    study: Any | None = None,
) -> str:
    """The study's primary eGFR equation: ``study.primary_equation``, else the first one.

    The first equation of ``egfr.equations`` (or of the first age band) is the default;
    without an ``egfr`` section the first equation in the ``egfr`` table is used.
    """
    study = study if study is not None else sections.get("study")
    chosen = getattr(study, "primary_equation", None)
    if chosen:
        return str(chosen)
    equations = study_equations(sections)
    if equations:
        return equations[0]
    if tables is not None and isinstance(tables.get("egfr"), pl.DataFrame):
        found = tables["egfr"]["equation"].drop_nulls().unique().sort().to_list()
        if found:
            return str(found[0])
    raise ConfigError("study.primary_equation: no equation chosen; set egfr.equations")


def check_primary(config: Any) -> None:
    """The primary equation is one of the equations the study computes."""
    equations = study_equations(config.sections)
    chosen = config.study.primary_equation
    if chosen is not None and chosen not in equations:
        raise ConfigError(
            f"study.primary_equation: '{chosen}' is not one of the equations computed "
            f"(egfr.equations: {', '.join(equations)}){did_you_mean(chosen, equations)}; "
            "add it to egfr.equations or choose one of them"
        )


def group_column(ctx: StepContext) -> str | None:
    """The patients column naming the arm or exposure group (None: the whole cohort)."""
    return getattr(ctx.sections.get("study"), "group_column", "group")


def reference_group(ctx: StepContext) -> str | None:
    """The group differences and hazard ratios are taken against (None: first, sorted)."""
    return getattr(ctx.sections.get("study"), "reference_group", None)


def study_data_cut(ctx: StepContext) -> dt.date:
    """The study's data cut (checked to be set before the run by :func:`check_data_cut`)."""
    value = getattr(ctx.sections.get("study"), "data_cut", None)
    if value is None:
        raise ConfigError("study.data_cut: required by this recipe; add the data-cut date")
    return value


def check_data_cut(config: Any) -> None:
    """Steps that censor at the data cut need ``study.data_cut``."""
    if config.study.data_cut is None:
        raise ConfigError(
            "study.data_cut: required by the endpoint steps; add the date of the data cut "
            "(nothing after it is used, every endpoint is censored at it)"
        )
