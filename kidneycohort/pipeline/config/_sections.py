"""The fixed sections of a study config (study, data, output), recipes, and the resolved
config a run takes.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, model_validator

from kidneycohort.io.maps import FileSource
from kidneycohort.pipeline.registry import Step
from kidneycohort.pipeline.standard_sources import StandardSource

__all__ = [
    "FIXED_SECTIONS",
    "STUDY_FACTS",
    "DataSection",
    "ExecutionSection",
    "OutputSection",
    "Recipe",
    "StudyConfig",
    "StudySection",
]

FIXED_SECTIONS = ("study", "data", "output", "execution")


# ---- fixed sections -------------------------------------------------------------------
class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid")


class StudySection(_Strict):
    """Who the study is, which recipe runs it, and the facts every step reads.

    The data cut, the group column, the reference group and the primary equation are
    facts of the study, said once here; a stage section that repeats one is an error.
    """

    name: str = Field(description="Study name; used in the report title and the manifest.")
    recipe: str = Field(
        description="Recipe to run: a name from `pipelines/` (e.g. `trial_endpoints`) or a "
        "path to a recipe YAML, relative to the config file."
    )
    primary_equation: str | None = Field(
        None,
        description="The eGFR equation endpoints, models and tables use (one of "
        "`egfr.equations`); default the first of them.",
    )
    data_cut: dt.date | None = Field(
        None,
        description="Data-cut date: nothing dated after it is used by any step (lab results, "
        "events), and every endpoint is censored at it. Required by the endpoint steps.",
    )
    group_column: str | None = Field(
        "group",
        description="Patients column naming the arm or exposure group that every table, "
        "model and figure compares; null analyses the whole cohort as one group.",
    )
    reference_group: str | None = Field(
        None,
        description="Group every difference and hazard ratio is taken against (default: "
        "the first group in sorted order).",
    )
    seed: int = Field(
        0,
        ge=0,
        lt=2**63,
        description="Seed for any resampling a step does (0 to 2^63 - 1); recorded.",
    )
    description: str = Field("", description="Free text shown in the report header.")

    @model_validator(mode="after")
    def _reference_needs_a_group(self) -> StudySection:
        if self.group_column is None and self.reference_group is not None:
            raise ValueError(
                "a reference group needs a group column; set group_column or remove "
                "reference_group (without a group the whole cohort is analysed as one)"
            )
        return self


STUDY_FACTS: dict[str, str] = {
    "data_cut": "data_cut",
    "data_cut_date": "data_cut",
    "group_column": "group_column",
    "reference_group": "reference_group",
    "equation": "primary_equation",
    "primary_equation": "primary_equation",
}
"""Option names of stage rules that carry a study-wide fact -> the ``study`` key that
sets it. The config sets each under ``study`` only; the loader fills the stage rules."""


class DataSection(_Strict):
    """The input tables of the study (see docs/data_contract.md).

    Each entry is a :class:`kidneycohort.io.FileSource` (the readers' own option model),
    or a list of them for a table split over several files (e.g. one lab extract per
    site). Paths are relative to the config file. Instead of the files, ``source`` names
    a database or dataset folder in a standard layout (OMOP CDM, CDISC SDTM).
    """

    patients: FileSource | None = Field(None, description="One row per patient.")
    labs: FileSource | list[FileSource] | None = Field(
        None, description="Long lab results (one row per result); a list stacks several files."
    )
    events: FileSource | list[FileSource] | None = Field(
        None, description="Optional long events: dialysis, transplant, death, ..."
    )
    source: StandardSource | None = Field(
        None,
        description="A source in a standard layout instead of the files: `kind: omop` (an "
        "OMOP CDM v5.4 database, PostgreSQL or DuckDB) or `kind: sdtm` (CDISC SDTM "
        "datasets); see kidneycohort.io.omop.OmopSource and kidneycohort.io.sdtm.SdtmSource.",
    )

    @model_validator(mode="after")
    def _files_or_source(self) -> DataSection:
        files = self.patients is not None or self.labs is not None or self.events is not None
        if self.source is not None and files:
            raise ValueError("give either source or the patients/labs/events files, not both")
        if self.source is None and (self.patients is None or self.labs is None):
            raise ValueError("patients and labs are required (or a source)")
        return self

    def specs(self, table: str) -> list[FileSource]:
        """The sources of ``table`` ("patients", "labs" or "events") as a list."""
        value = getattr(self, table)
        if value is None:
            return []
        return list(value) if isinstance(value, list) else [value]


class OutputSection(_Strict):
    """Where the run folder goes and what it holds."""

    dir: Path | None = Field(
        None,
        description="Run folder, relative to the config file; `kidneycohort run --out` "
        "overrides it. Default: `runs/<config file name>` beside the config.",
    )
    xlsx: bool = Field(True, description="Also write `tables/tables.xlsx`, a sheet per table.")
    markdown: bool = Field(True, description="Also write each table as `tables/<name>.md`.")


class ExecutionSection(_Strict):
    """Which engine runs the steps: polars on this machine, or Apache Spark.

    With ``spark``, the per-patient steps run on partitions of patients (each partition
    through the same step code as with polars) and the cohort-level steps on the driver;
    the run folder is the same. Spark is an optional extra: ``pip install -e '.[spark]'``
    and a Java runtime.
    """

    engine: Literal["polars", "spark"] = Field(
        "polars",
        description="`polars` (one machine) or `spark` (per-patient steps on partitions "
        "of patients, cohort-level steps on the driver).",
    )
    master: str = Field(
        "local[2]",
        min_length=1,
        description="Spark master URL (`local[N]`, `spark://host:7077`, `yarn`, ...); "
        "used by the spark engine only, and only when no Spark session is active.",
    )
    partitions: int = Field(
        8,
        ge=1,
        le=1_000_000,
        description="Number of patient partitions the spark engine splits the cohort into "
        "(every patient's rows stay in one partition).",
    )


class Recipe(_Strict):
    """A recipe: ordered steps and the default options of their sections."""

    name: str = Field(description="Recipe name.")
    description: str = Field("", description="What the recipe produces.")
    steps: list[str] = Field(description="Step names, in the order they run.")
    defaults: dict[str, dict[str, Any]] = Field(
        default_factory=dict,
        description="Section name -> default options; the study config overrides them.",
    )


# ---- the resolved config ----------------------------------------------------------------
@dataclass
class StudyConfig:
    """A validated study config, ready to run.

    Attributes
    ----------
    study, data, output, execution : pydantic models
        The fixed sections (data paths already resolved against the config folder).
    sections : dict
        Stage section name -> validated options model.
    recipe : Recipe
        The recipe, as read.
    steps : list of Step
        The recipe's steps, looked up in the registry.
    config_path : pathlib.Path or None
        The config file.
    recipe_path : pathlib.Path
        The recipe file used.
    overrides : list of str
        The ``--set`` overrides applied, as given.
    """

    study: StudySection
    data: DataSection
    output: OutputSection
    sections: dict[str, BaseModel]
    recipe: Recipe
    steps: list[Step]
    config_path: Path | None
    recipe_path: Path
    overrides: list[str] = field(default_factory=list)
    execution: ExecutionSection = field(default_factory=lambda: ExecutionSection())

    def resolved(self) -> dict[str, Any]:
        """The config as run: every section with its defaults filled in (JSON-ready)."""
        out: dict[str, Any] = {
            "study": self.study.model_dump(mode="json"),
            "data": self.data.model_dump(mode="json", exclude_none=True),
            "output": self.output.model_dump(mode="json"),
            "execution": self.execution.model_dump(mode="json"),
        }
        for name, model in self.sections.items():
            out[name] = model.model_dump(mode="json")
        out["recipe_steps"] = list(self.recipe.steps)
        return out
