"""The library's stages as pipeline steps.

Each step is a small adapter: it takes its tables and typed options from the
:class:`~kidneycohort.pipeline.registry.StepContext`, calls the stage function with
them, and returns the tables it declared. No derivation happens here, so a table in a
run folder equals the stage function's result on the same inputs.

Table names: ``patients``, ``raw_labs``, ``events`` (read from the sources);
``cohort`` and ``cohort_events`` (harmonised patients and events); run-folder tables
as named in :mod:`kidneycohort.pipeline.run_folder`.
"""

from __future__ import annotations

import logging
from typing import Any

import polars as pl

from kidneycohort import schemas
from kidneycohort.pipeline.registry import StepContext, StepRegistry

logger = logging.getLogger(__name__)


def _records(frame: pl.DataFrame, keys: tuple[str, ...]) -> list[dict[str, Any]]:
    return frame.select([k for k in keys if k in frame.columns]).to_dicts()


def _add_harmonize(registry: StepRegistry) -> None:
    from kidneycohort.harmonize import HarmonizeRules, harmonize

    @registry.register(
        "harmonize",
        needs=["raw_labs", "patients"],
        optional_needs=["events"],
        makes=["labs", "rejected_rows", "cohort", "cohort_events"],
        section="harmonize",
        options=HarmonizeRules,
        description="Raw labs -> labs in standard units; every unused row with a reason.",
    )
    def harmonize_step(ctx: StepContext) -> dict[str, Any]:
        """Harmonise labs, patients and events (kidneycohort.harmonize.harmonize)."""
        result = harmonize(
            ctx.tables["raw_labs"],
            ctx.tables["patients"],
            ctx.tables.get("events"),
            rules=ctx.options,  # type: ignore[arg-type]
        )
        ctx.accounting.extend(
            _records(
                result.accounting,
                ("table", "rows_read", "rows_used", "rows_rejected", "rows_merged"),
            )
        )
        ctx.accounting_by_reason.extend(
            _records(result.accounting_by_reason, ("table", "outcome", "reason", "rows"))
        )
        # rejected_rows.csv lists every input row not used as it stands: rejected rows
        # and rows merged into another (duplicates, same-day results), by reason code
        unused = pl.concat(
            [
                result.rejected.select(list(schemas.REJECTED)),
                result.merged.select(list(schemas.REJECTED)),
            ],
            how="vertical_relaxed",
        )
        return {
            "labs": result.labs,
            "rejected_rows": unused,
            "cohort": result.patients,
            "cohort_events": result.events,
        }


def _add_baseline_and_slopes(registry: StepRegistry) -> None:
    from kidneycohort.aki import ValueFilter
    from kidneycohort.baseline import BaselineRule, baseline
    from kidneycohort.slopes import SlopeRule, egfr_slopes

    @registry.register(
        "baseline",
        needs=["egfr"],
        makes=["baseline"],
        section="baseline",
        options=BaselineRule,
        extra_sections={"value_filter": ValueFilter},
        description="Baseline eGFR per patient and equation (kidneycohort.baseline).",
    )
    def baseline_step(ctx: StepContext) -> dict[str, Any]:
        """Baseline eGFR per patient and equation."""
        value_filter = ctx.sections.get("value_filter")
        return {
            "baseline": baseline(
                ctx.tables["egfr"],
                rule=ctx.options,
                value_filter=value_filter,  # type: ignore[arg-type]
            )
        }

    @registry.register(
        "slopes",
        needs=["egfr"],
        makes=["slopes"],
        section="slopes",
        options=SlopeRule,
        extra_sections={"value_filter": ValueFilter},
        description="Per-patient least-squares eGFR slopes (kidneycohort.slopes).",
    )
    def slopes_step(ctx: StepContext) -> dict[str, Any]:
        """Per-patient eGFR slopes."""
        value_filter = ctx.sections.get("value_filter")
        return {
            "slopes": egfr_slopes(
                ctx.tables["egfr"],
                rule=ctx.options,
                value_filter=value_filter,  # type: ignore[arg-type]
            )
        }


_STAGES = (_add_harmonize, _add_baseline_and_slopes)


def build_registry() -> StepRegistry:
    """A registry holding every library stage as a step."""
    registry = StepRegistry()
    for add in _STAGES:
        add(registry)
    return registry
