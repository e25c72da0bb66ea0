"""Tiny registered steps and files for testing the pipeline framework on its own."""

from __future__ import annotations

from pathlib import Path

import polars as pl
from pydantic import BaseModel, ConfigDict, Field

from kidneycohort.errors import InputDataError
from kidneycohort.pipeline import StepContext, StepRegistry
from kidneycohort.run_folder import RunFile


class ScaleOptions(BaseModel):
    """Options of the test step that rescales lab values."""

    model_config = ConfigDict(extra="forbid")
    factor: float = Field(1.0, description="Multiply each value by this.")
    keep_analytes: list[str] = Field(default_factory=lambda: ["creatinine"])


class CountOptions(BaseModel):
    """Options of the test step that counts rows."""

    by: str = "patient_id"


SCALED_LABS = {
    "patient_id": pl.String(),
    "sample_date": pl.Date(),
    "analyte": pl.String(),
    "value": pl.Float64(),
}


def build_test_registry() -> StepRegistry:
    """Steps: scale (raw_labs -> scaled_labs), count (-> tables/lab_counts), boom, warn.

    The steps declare their own run-folder files, as a step outside the library must.
    """
    registry = StepRegistry()

    @registry.register(
        "scale",
        needs=["raw_labs"],
        makes=["scaled_labs"],
        section="scale",
        options=ScaleOptions,
        files=[RunFile("scaled_labs", "per_patient", SCALED_LABS, "Rescaled lab values.")],
    )
    def scale(ctx: StepContext) -> dict[str, pl.DataFrame]:
        """Keep chosen analytes and multiply their values."""
        opts = ctx.options
        assert isinstance(opts, ScaleOptions)
        raw = ctx.tables["raw_labs"]
        keep = raw.filter(pl.col("analyte").is_in(opts.keep_analytes))
        ctx.accounting.append(
            {
                "table": "labs",
                "rows_read": raw.height,
                "rows_used": keep.height,
                "rows_rejected": raw.height - keep.height,
                "rows_merged": 0,
            }
        )
        ctx.accounting_by_reason.append(
            {"table": "labs", "reason": "analyte_not_kept", "rows": raw.height - keep.height}
        )
        labs = keep.select(
            "patient_id",
            pl.col("sample_date").dt.date(),
            "analyte",
            (pl.col("value").cast(pl.Float64) * opts.factor).alias("value"),
        )
        return {"scaled_labs": labs}

    @registry.register(
        "count",
        needs=["scaled_labs"],
        makes=["tables/lab_counts", "models/lab_means"],
        section="count",
        options=CountOptions,
        files=[
            RunFile("tables/lab_counts", "shared_table", None, "Rows per patient."),
            RunFile("models/lab_means", "model", None, "Mean value per patient."),
        ],
    )
    def count(ctx: StepContext) -> dict[str, pl.DataFrame]:
        """Rows and mean value per patient."""
        labs = ctx.tables["scaled_labs"]
        by = ctx.options.by  # type: ignore[union-attr]
        counts = labs.group_by(by).agg(pl.len().alias("n")).sort(by)
        means = labs.group_by(by).agg(pl.col("value").mean().alias("mean")).sort(by)
        return {"tables/lab_counts": counts, "models/lab_means": means}

    @registry.register("boom", needs=["scaled_labs"], makes=["never"])
    def boom(ctx: StepContext) -> dict[str, pl.DataFrame]:
        """Fail on purpose (an interrupted run)."""
        raise RuntimeError("step failed on purpose")

    @registry.register("bad_data", needs=["scaled_labs"], makes=["never2"])
    def bad_data(ctx: StepContext) -> dict[str, pl.DataFrame]:
        """Raise a user-facing input error."""
        raise InputDataError("labs: column 'value' holds 'abc'; fix the extract")

    @registry.register("warn", needs=["scaled_labs"], makes=["nothing_written"])
    def warn(ctx: StepContext) -> dict[str, object]:
        """Issue a warning the runner must capture."""
        import warnings

        from kidneycohort.errors import StatisticalWarning

        warnings.warn("few events: estimate unstable", StatisticalWarning, stacklevel=1)
        return {"nothing_written": ctx.tables["scaled_labs"].height}

    return registry


def write_study(folder: Path, steps: list[str], extra: str = "") -> Path:
    """Write patients/labs CSVs, a recipe and a config into ``folder``; return the config."""
    (folder / "data").mkdir(parents=True, exist_ok=True)
    (folder / "pipelines").mkdir(exist_ok=True)
    (folder / "data" / "patients.csv").write_text("SUBJ,sex\nP1,F\nP2,M\nP3,F\n", encoding="utf-8")
    (folder / "data" / "labs.csv").write_text(
        "SUBJ,sample_date,analyte,value,unit\n"
        "P1,2020-01-01,creatinine,1.0,mg/dL\n"
        "P1,2020-06-01,creatinine,1.2,mg/dL\n"
        "P2,2020-01-03,creatinine,0.8,mg/dL\n"
        "P2,2020-01-03,uacr,25,mg/g\n"
        "P3,2020-02-01,creatinine,2.0,mg/dL\n",
        encoding="utf-8",
    )
    step_lines = "".join(f"  - {s}\n" for s in steps)
    (folder / "pipelines" / "tiny.yaml").write_text(
        "name: tiny\ndescription: test recipe\nsteps:\n"
        + step_lines
        + "defaults:\n  scale:\n    factor: 2.0\n",
        encoding="utf-8",
    )
    config = folder / "study.yaml"
    config.write_text(
        "study:\n  name: Tiny study\n  recipe: tiny\n  seed: 11\n"
        "data:\n"
        "  patients:\n    path: data/patients.csv\n    columns: {SUBJ: patient_id}\n"
        "  labs:\n    path: data/labs.csv\n    columns: {SUBJ: patient_id}\n"
        "output:\n  dir: out/run\n" + extra,
        encoding="utf-8",
    )
    return config
