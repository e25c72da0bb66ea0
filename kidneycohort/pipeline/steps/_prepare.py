"""Steps that prepare the data: harmonise the sources, compute eGFR."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import polars as pl

from kidneycohort import schemas
from kidneycohort.errors import InputDataError
from kidneycohort.pipeline.registry import StepContext, StepRegistry
from kidneycohort.pipeline.steps._facts import check_primary, records

__all__ = ["add_egfr", "add_harmonize"]


def add_harmonize(registry: StepRegistry) -> None:
    """Step ``harmonize``: raw tables -> labs, patients, events, rejected rows."""
    from kidneycohort.harmonize import HarmonizeRule, harmonize_tables, unusable_tables

    def harmonize_step(ctx: StepContext) -> dict[str, Any]:
        """Harmonise labs, patients and events (kidneycohort.harmonize)."""
        # taken out of the context: harmonize_tables frees the raw labs once read
        result = harmonize_tables(
            ctx.tables.pop("raw_labs"),
            ctx.tables["patients"],
            ctx.tables.get("events"),
            rule=ctx.options,  # type: ignore[arg-type]
        )
        ctx.accounting.extend(
            records(
                result.accounting,
                ("table", "rows_read", "rows_used", "rows_rejected", "rows_merged"),
            )
        )
        by_reason = result.accounting_by_reason
        ctx.accounting_by_reason.extend(
            records(by_reason.filter(pl.col("outcome") == "rejected"), ("table", "reason", "rows"))
        )
        ctx.merged_by_reason.extend(
            records(by_reason.filter(pl.col("outcome") == "merged"), ("table", "reason", "rows"))
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

    def harmonize_check(ctx: StepContext, made: Mapping[str, Any]) -> dict[str, Any]:
        """A cohort without one usable lab or patient row stops the run (the rows read
        and the top reasons, over all patients)."""
        counts = {"table": pl.String, "rows_read": pl.Int64, "rows_used": pl.Int64}
        nothing = unusable_tables(
            pl.DataFrame([{k: r[k] for k in counts} for r in ctx.accounting], schema=counts),
            pl.DataFrame(
                ctx.accounting_by_reason,
                schema={"table": pl.String, "reason": pl.String, "rows": pl.Int64},
            ),
        )
        if nothing:
            raise InputDataError("; ".join(nothing))
        return {}

    registry.register_patient_wise(
        "harmonize",
        per_patient=harmonize_step,
        cohort=harmonize_check,
        needs=["raw_labs", "patients"],
        optional_needs=["events"],
        makes=["labs", "rejected_rows", "cohort", "cohort_events"],
        section="harmonize",
        options=HarmonizeRule,
        description="Raw labs -> labs in standard units; every unused row with a reason.",
    )


def add_egfr(registry: StepRegistry) -> None:
    """Step ``egfr``: every chosen equation for every sample."""
    from kidneycohort.egfr import EgfrRule, compute_egfr

    def egfr_step(ctx: StepContext) -> dict[str, Any]:
        """eGFR by each chosen equation for every creatinine / cystatin C sample."""
        egfr = compute_egfr(ctx.tables["labs"], ctx.tables["cohort"], rule=ctx.options)  # type: ignore[arg-type]
        return {"egfr": egfr}

    registry.register_patient_wise(
        "egfr",
        per_patient=egfr_step,
        needs=["labs", "cohort"],
        makes=["egfr"],
        section="egfr",
        options=EgfrRule,
        check=check_primary,
        description="eGFR by each chosen equation for every sample (kidneycohort.egfr).",
    )
