"""Which table goes to which file of a run folder, with which columns.

Every file a run can write is declared once here, under the table name the pipeline
steps use: its path(s), its column contract (from :mod:`kidneycohort.schemas`) and what
it holds. The writer refuses a table that is not declared or does not match its contract,
and the reader opens files only through these declarations, so figures, the report and
the user's own code read the same layout the steps wrote.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Final, Literal

import polars as pl

from kidneycohort import schemas

__all__ = [
    "FILES",
    "RunFile",
    "check_layout",
    "declared",
    "file_for",
    "is_written",
]

FileKind = Literal["per_patient", "rejected_rows", "analysis_dataset", "model", "shared_table"]


@dataclass(frozen=True)
class RunFile:
    """One run-folder file (or pair of files) and its contract.

    Attributes
    ----------
    name
        The table name steps make (``"egfr"``, ``"models/hazard_ratios"``,
        ``"tables/endpoint_table"``).
    kind
        ``per_patient`` (Parquet, rows sorted by every column so reruns are
        byte-identical), ``rejected_rows`` (CSV), ``analysis_dataset`` (CSV and Parquet in
        the dataset's own order), ``model`` (Parquet), ``shared_table`` (CSV + Markdown
        and a sheet of ``tables/tables.xlsx``; cells are formatted text).
    schema
        Columns and types every such file has (in this order); None where the layout
        is defined elsewhere (formatted tables; the CDISC dataset).
    optional
        Columns that may follow the schema (e.g. the ``group`` a run adds to
        per-patient tables).
    description
        What the file holds, for the documentation.
    """

    name: str
    kind: FileKind
    schema: Mapping[str, pl.DataType] | None
    description: str
    optional: tuple[str, ...] = field(default=())

    @property
    def files(self) -> tuple[str, ...]:
        """Paths relative to the run folder."""
        if self.kind == "per_patient" or self.kind == "model":
            return (f"{self.name}.parquet",)
        if self.kind == "rejected_rows":
            return (f"{self.name}.csv",)
        if self.kind == "analysis_dataset":
            return (f"{self.name}.csv", f"{self.name}.parquet")
        return (f"{self.name}.csv", f"{self.name}.md")


def _files(*entries: RunFile) -> dict[str, RunFile]:
    return {e.name: e for e in entries}


_GROUP = ("group",)

FILES: Final[dict[str, RunFile]] = _files(
    RunFile("labs", "per_patient", schemas.LABS, "Harmonised lab results in standard units."),
    RunFile(
        "rejected_rows",
        "rejected_rows",
        schemas.REJECTED,
        "Every input row not used, with its reason code (rejected or merged).",
    ),
    RunFile("egfr", "per_patient", schemas.EGFR, "eGFR per sample and equation."),
    RunFile("baseline", "per_patient", schemas.BASELINE, "Baseline eGFR per patient.", _GROUP),
    RunFile(
        "baseline_categories",
        "per_patient",
        schemas.BASELINE_CATEGORIES,
        "KDIGO G and A categories and prognosis at baseline.",
        _GROUP,
    ),
    RunFile(
        "slopes", "per_patient", schemas.SLOPES, "Per-patient least-squares eGFR slopes.", _GROUP
    ),
    RunFile(
        "model_slopes",
        "per_patient",
        schemas.MODEL_SLOPES,
        "Per-patient model-based eGFR slopes (shrunken, with SE) from the slope model.",
    ),
    RunFile("stages", "per_patient", schemas.STAGES, "Sustained KDIGO category stages."),
    RunFile("transitions", "per_patient", schemas.TRANSITIONS, "Transitions between stages."),
    RunFile(
        "endpoints", "per_patient", schemas.ENDPOINTS, "Time-to-event rows per endpoint.", _GROUP
    ),
    RunFile(
        "kfre",
        "per_patient",
        schemas.KFRE_AT_BASELINE,
        "Kidney Failure Risk Equation at the index date.",
        _GROUP,
    ),
    RunFile(
        "adam_tte",
        "analysis_dataset",
        None,
        "The endpoints as a CDISC ADaM time-to-event dataset (layout: kidneycohort.adam).",
    ),
    RunFile("models/survival_curves", "model", schemas.SURVIVAL_CURVES, "Survival curves."),
    RunFile("models/at_risk", "model", schemas.AT_RISK, "Numbers at risk under the curves."),
    RunFile("models/hazard_ratios", "model", schemas.HAZARD_RATIOS, "Cox hazard ratios."),
    RunFile("models/incidence_rates", "model", schemas.INCIDENCE_RATES, "Exact incidence rates."),
    RunFile(
        "models/competing_hazard_ratios",
        "model",
        schemas.COMPETING_HAZARDS,
        "Fine–Gray (subdistribution) and cause-specific hazard ratios per endpoint.",
    ),
    RunFile(
        "models/competing_tests",
        "model",
        schemas.COMPETING_TESTS,
        "Gray's test per endpoint analysed with competing risks, and its methods text.",
    ),
    RunFile(
        "models/dropout_slopes",
        "model",
        schemas.DROPOUT_SLOPES,
        "Slope contrasts of the joint model of eGFR and dropout beside the mixed model alone.",
    ),
    RunFile(
        "models/dropout_sensitivity",
        "model",
        schemas.DROPOUT_SENSITIVITY,
        "Slope difference under dropout not at random: delta-adjusted tipping point and eGFR "
        "set to a stated value at kidney failure.",
    ),
    RunFile(
        "models/dropout_methods",
        "model",
        {"paragraph": pl.String()},
        "Methods paragraphs of the dropout analyses, as they ran.",
    ),
    RunFile("models/kdigo_grid", "model", schemas.KDIGO_GRID_COUNTS, "Patients per KDIGO cell."),
    RunFile(
        "models/transition_counts",
        "model",
        schemas.TRANSITION_COUNTS,
        "Category transitions drawn in the heat map.",
    ),
    RunFile("models/slope_summary", "model", schemas.SLOPE_SUMMARY, "Slope-model contrasts."),
    RunFile("models/trajectories", "model", schemas.TRAJECTORIES, "Slope-model mean trajectories."),
    RunFile(
        "models/slope_model_fit",
        "model",
        schemas.SLOPE_MODEL_FIT,
        "How the slope model was fitted: engine, structure, convergence.",
    ),
    *(
        RunFile(f"tables/{name}", "shared_table", None, text)
        for name, text in (
            ("endpoint_table", "Events, rates and hazard ratios per endpoint."),
            ("slope_table", "Slope-model contrasts, formatted."),
            ("baseline_characteristics", "Baseline characteristics by group (Table 1)."),
            ("incidence_rates", "Incidence rates with ratios and differences."),
            ("kdigo_grid", "Patients per KDIGO G x A cell at baseline."),
            ("transition_matrix", "KDIGO G transitions between sustained stages."),
            ("kfre_summary", "KFRE risk at baseline by group."),
            (
                "competing_risks",
                "Subdistribution (Fine–Gray) and cause-specific hazard ratios side by side.",
            ),
            (
                "dropout_analysis",
                "The slope difference under each dropout assumption (joint model, mixed "
                "model alone, delta-adjusted imputation, eGFR set at kidney failure).",
            ),
        )
    ),
)
"""Every file a run can write, by table name."""


def declared(name: str) -> RunFile | None:
    """The declaration of table ``name``, or None for a table that stays in memory."""
    return FILES.get(name)


def file_for(name: str) -> list[str]:
    """Run-folder files (relative paths) that table ``name`` is written to; [] if none."""
    entry = FILES.get(name)
    return list(entry.files) if entry else []


def is_written(name: str) -> bool:
    """Whether table ``name`` is a run-folder file."""
    return name in FILES


def check_layout(entry: str | RunFile, table: pl.DataFrame) -> None:
    """Raise ``TypeError`` when ``table`` does not match the contract of a file.

    The columns of the schema must come first, in order and with their types; only the
    declared optional columns may follow. A mismatch is a bug in the step that made the
    table, never a user error.
    """
    if isinstance(entry, str):
        entry = FILES[entry]
    name = entry.name
    if entry.schema is None:
        return
    want = list(entry.schema.items())
    have = list(table.schema.items())
    head, tail = have[: len(want)], [c for c, _ in have[len(want) :]]
    extra = [c for c in tail if c not in entry.optional]
    if head != want or extra:
        raise TypeError(
            f"run folder: table '{name}' does not match its contract "
            f"(expected {[c for c, _ in want]} + optional {list(entry.optional)}, "
            f"got {[f'{c}: {t}' for c, t in have]})"
        )
