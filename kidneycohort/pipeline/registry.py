"""Step registry: named library stages with the tables they need and make.

A step is a thin adapter around one library function. It declares the tables it reads
(``needs``), the tables it writes (``makes``) and, optionally, the config section whose
typed options it takes. The runner checks a whole recipe against these declarations
before any data is read (the same check kedro makes when a pipeline is built).
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Iterable, Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from pydantic import BaseModel

from kidneycohort.errors import ConfigError, did_you_mean
from kidneycohort.run_folder import FILES, RunFile, RunFolder

__all__ = [
    "PatientWise",
    "Step",
    "StepContext",
    "StepFunction",
    "StepRegistry",
    "default_registry",
    "patient_then_cohort",
]

logger = logging.getLogger(__name__)


@dataclass
class StepContext:
    """What a step receives: its input tables, its options and the run's settings.

    Attributes
    ----------
    tables : dict
        The tables named in the step's ``needs`` (and any of its ``optional_needs`` that
        an earlier step made), as polars DataFrames or fitted objects.
    options : pydantic.BaseModel or None
        The validated options of the step's config section.
    sections : dict
        Every validated config section, by name (a step may read another's options,
        e.g. the primary equation chosen in ``egfr``).
    run_dir : pathlib.Path
        The run folder being written (a temporary folder until the run succeeds).
    seed : int
        The study seed (for any resampling a step does).
    accounting : list of dict
        Row-accounting records a step adds for the manifest.
    accounting_by_reason : list of dict
        Rejected-row counts by reason (``table, reason, rows``) for the manifest; they
        add up to each table's ``rows_rejected``.
    merged_by_reason : list of dict
        Counts of rows merged into another row, by reason (``table, reason, rows``).
    folder : RunFolder or None
        For a step that reads the folder (``reads_folder``): the run folder as written so
        far, with the run's manifest up to this step.
    """

    tables: dict[str, Any]
    options: BaseModel | None
    sections: Mapping[str, BaseModel]
    run_dir: Path
    seed: int
    accounting: list[dict[str, Any]] = field(default_factory=list)
    accounting_by_reason: list[dict[str, Any]] = field(default_factory=list)
    merged_by_reason: list[dict[str, Any]] = field(default_factory=list)
    folder: RunFolder | None = None


StepFunction = Callable[[StepContext], Mapping[str, Any]]

CohortFunction = Callable[[StepContext, Mapping[str, Any]], Mapping[str, Any]]


@dataclass(frozen=True)
class PatientWise:
    """How a partition-safe step splits into per-patient work and a cohort-level rest.

    A step declared with ``patient_wise=PatientWise(...)`` promises the partition rule:
    ``per_patient`` gives the same rows on any partition of patients as on the whole
    cohort, so an engine may run it on each partition and concatenate the rows.

    Parameters
    ----------
    per_patient : callable
        ``per_patient(context) -> {table: frame}``: the step's per-patient tables, from
        the rows of the patients it is given. Row accounting it records is summed over
        partitions.
    cohort : callable or None
        ``cohort(context, per_patient_tables) -> {table: value}``: the step's remaining
        tables (counts, matrices, checks over the whole cohort), from the concatenated
        per-patient tables and the summed accounting in ``context``.
    """

    per_patient: StepFunction
    cohort: CohortFunction | None = None

    def tables(self, makes: tuple[str, ...], cohort_makes: tuple[str, ...]) -> tuple[str, ...]:
        """The per-patient tables among ``makes``."""
        return tuple(name for name in makes if name not in cohort_makes)


def patient_then_cohort(
    per_patient: StepFunction, cohort: CohortFunction | None = None
) -> StepFunction:
    """One step function from its per-patient part and its cohort-level rest (the way
    the polars engine runs a :class:`PatientWise` step: the whole cohort as one
    partition)."""

    def run(context: StepContext) -> dict[str, Any]:
        made = dict(per_patient(context))
        if cohort is not None:
            made.update(cohort(context, made))
        return made

    run.__doc__ = per_patient.__doc__
    return run


@dataclass(frozen=True)
class Step:
    """One registered pipeline step.

    Parameters
    ----------
    name : str
        The name recipes use.
    run : callable
        ``run(context) -> {table_name: table}``; must return exactly ``makes`` (a value
        of ``None`` says the run has no data for that output: it is neither kept nor
        written).
    needs : tuple of str
        Tables that must exist before the step runs.
    makes : tuple of str
        Tables the step returns. Names that are run-folder files (see
        :mod:`kidneycohort.run_folder`) are written as soon as the step ends.
    section : str or None
        The config section holding this step's options (several steps may share one).
    options : type of pydantic.BaseModel or None
        The model that validates the section; the same object the library function takes.
    optional_needs : tuple of str
        Tables used when an earlier step made them (e.g. ``events``).
    description : str
        One line for the config reference and ``--help``.
    extra_sections : mapping of str to model
        Further config sections the step reads (e.g. ``value_filter`` for baseline and
        slopes); each is validated by its model and handed over in ``context.sections``.
    check : callable or None
        ``check(study_config)`` run at validation time for rules that span sections
        (e.g. the primary equation is one of the equations computed); raises
        :class:`~kidneycohort.errors.ConfigError`.
    reads_folder : bool
        The step reads the finished table files (e.g. the report): the runner writes
        ``tables/tables.xlsx`` and applies the output options before it runs.
    files : tuple of RunFile
        Run-folder files this step adds to the contract (:data:`kidneycohort.run_folder.FILES`),
        for steps outside the library; a name in ``makes`` that contains ``/`` must be
        declared in the contract or here.
    patient_wise : PatientWise or None
        The step is partition-safe: its per-patient part may run on partitions of
        patients (see :class:`PatientWise`).
    cohort_makes : tuple of str
        With ``patient_wise``: the names in ``makes`` its cohort part returns.
    cohort_level : bool
        The step works on whole-cohort tables (models, tables, figures, the report): an
        engine that partitions patients runs it on the driver. A step that is neither
        ``patient_wise`` nor ``cohort_level`` is refused by such an engine.
    """

    name: str
    run: StepFunction
    needs: tuple[str, ...] = ()
    makes: tuple[str, ...] = ()
    section: str | None = None
    options: type[BaseModel] | None = None
    optional_needs: tuple[str, ...] = ()
    description: str = ""
    extra_sections: Mapping[str, type[BaseModel]] = field(default_factory=dict)
    check: Callable[[Any], None] | None = None
    reads_folder: bool = False
    files: tuple[RunFile, ...] = ()
    patient_wise: PatientWise | None = None
    cohort_makes: tuple[str, ...] = ()
    cohort_level: bool = False

    def section_models(self) -> dict[str, type[BaseModel] | None]:
        """Every config section this step reads -> the model validating it."""
        out: dict[str, type[BaseModel] | None] = dict(self.extra_sections)
        if self.section:
            out[self.section] = self.options
        return out


class StepRegistry:
    """A name -> :class:`Step` map with did-you-mean lookups.

    The default registry (:func:`default_registry`) holds the library's stages; tests and
    extensions can build their own and pass it to the runner.
    """

    def __init__(self, steps: Iterable[Step] = ()) -> None:
        self._steps: dict[str, Step] = {}
        for step in steps:
            self.add(step)

    def add(self, step: Step) -> Step:
        """Register ``step``; a second step of the same name is a programming error."""
        if step.name in self._steps:
            raise ValueError(f"step '{step.name}' is already registered")
        declared = {f.name for f in step.files}
        for entry in step.files:
            if entry.name in FILES:
                raise ValueError(f"step '{step.name}': file '{entry.name}' is already declared")
        for name in step.makes:
            if "/" in name and name not in FILES and name not in declared:
                raise ValueError(
                    f"step '{step.name}': '{name}' is not a declared run-folder file; "
                    "declare it with files=[RunFile(...)]"
                )
        sections = self.sections()
        for name, model in step.section_models().items():
            if name in sections and sections[name] is not model:
                raise ValueError(
                    f"step '{step.name}': section '{name}' is already validated by "
                    f"{sections[name]!r}; steps sharing a section share its model"
                )
        self._steps[step.name] = step
        return step

    def register(
        self,
        name: str,
        *,
        needs: Iterable[str] = (),
        makes: Iterable[str] = (),
        section: str | None = None,
        options: type[BaseModel] | None = None,
        optional_needs: Iterable[str] = (),
        description: str = "",
        extra_sections: Mapping[str, type[BaseModel]] | None = None,
        check: Callable[[Any], None] | None = None,
        reads_folder: bool = False,
        files: Iterable[RunFile] = (),
        cohort_level: bool = False,
    ) -> Callable[[StepFunction], StepFunction]:
        """Decorator form of :meth:`add` (for a partition-safe step, see
        :meth:`register_patient_wise`)."""

        def decorate(func: StepFunction) -> StepFunction:
            self.add(
                Step(
                    name=name,
                    run=func,
                    needs=tuple(needs),
                    makes=tuple(makes),
                    section=section,
                    options=options,
                    optional_needs=tuple(optional_needs),
                    description=description or (func.__doc__ or "").strip().split("\n")[0],
                    extra_sections=dict(extra_sections or {}),
                    check=check,
                    reads_folder=reads_folder,
                    files=tuple(files),
                    cohort_level=cohort_level,
                )
            )
            return func

        return decorate

    def register_patient_wise(
        self,
        name: str,
        *,
        per_patient: StepFunction,
        cohort: CohortFunction | None = None,
        cohort_makes: Iterable[str] = (),
        **fields: Any,
    ) -> Step:
        """Register a partition-safe step from its per-patient part and cohort rest.

        ``fields`` are the other :class:`Step` fields (``needs``, ``makes``, ...). The
        step's ``run`` is :func:`patient_then_cohort` of the two parts.
        """
        description = (
            fields.pop("description", "") or ((per_patient.__doc__ or "").strip().split("\n")[0])
        )
        for key in ("needs", "makes", "optional_needs", "files"):
            if key in fields:
                fields[key] = tuple(fields[key])
        step = Step(
            name=name,
            run=patient_then_cohort(per_patient, cohort),
            description=description,
            patient_wise=PatientWise(per_patient, cohort),
            cohort_makes=tuple(cohort_makes),
            **fields,
        )
        missing = [n for n in step.cohort_makes if n not in step.makes]
        if missing:
            raise ValueError(f"step '{name}': cohort_makes {missing} are not in makes")
        return self.add(step)

    def get(self, name: str, where: str = "recipe steps") -> Step:
        """Return the step called ``name`` or raise :class:`ConfigError` naming ``where``."""
        try:
            return self._steps[name]
        except KeyError:
            raise ConfigError(
                f"{where}: unknown step '{name}'{did_you_mean(name, self._steps)}; "
                f"known steps: {', '.join(sorted(self._steps))}"
            ) from None

    def sections(self) -> dict[str, type[BaseModel] | None]:
        """Config section name -> options model, over all registered steps."""
        out: dict[str, type[BaseModel] | None] = {}
        for step in self._steps.values():
            out.update(step.section_models())
        return out

    def __iter__(self) -> Iterator[Step]:
        return iter(self._steps.values())

    def __contains__(self, name: object) -> bool:
        return name in self._steps

    def __len__(self) -> int:
        return len(self._steps)


_DEFAULT: StepRegistry | None = None


def default_registry() -> StepRegistry:
    """The registry of the library's stages (built on first use)."""
    global _DEFAULT
    if _DEFAULT is None:
        from kidneycohort.pipeline import steps

        _DEFAULT = steps.build_registry()
    return _DEFAULT
