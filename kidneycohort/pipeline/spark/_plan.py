"""Which steps an engine that partitions patients runs where, checked before any data.

A :class:`~kidneycohort.pipeline.registry.PatientWise` step runs its per-patient part on
every partition of patients; a ``cohort_level`` step runs on the driver, on the whole
cohort's tables. A step that is neither may give different rows on a partition of
patients than on the whole cohort, so the engine refuses it rather than run it wrongly.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass

from kidneycohort.errors import ConfigError
from kidneycohort.pipeline.registry import Step

__all__ = ["PartitionPlan", "partition_plan"]


@dataclass(frozen=True)
class PartitionPlan:
    """The steps run on partitions of patients, in recipe order, and their tables.

    Attributes
    ----------
    steps : tuple of Step
        The partition-safe steps, in recipe order.
    inputs : tuple of str
        The source tables every partition receives (its patients' rows only).
    patient_tables : dict
        Step name -> the per-patient tables it writes from each partition.
    """

    steps: tuple[Step, ...]
    inputs: tuple[str, ...]
    patient_tables: dict[str, tuple[str, ...]]


def _refuse(step: Step) -> ConfigError:
    return ConfigError(
        f"execution.engine: the spark engine cannot run step '{step.name}': it is neither "
        "declared partition-safe (a per-patient part that gives the same rows on any "
        "partition of patients) nor cohort-level, and run on partitions it could give "
        "different results; register it with register_patient_wise(...) or "
        "cohort_level=True, or set execution.engine: polars"
    )


def partition_plan(steps: Sequence[Step], sources: Iterable[str]) -> PartitionPlan:
    """Split ``steps`` into partition work and driver work; refuse what cannot be split.

    Parameters
    ----------
    steps : sequence of Step
        The recipe's steps, in order.
    sources : iterable of str
        The tables the sources provide (``raw_labs``, ``patients``, ``events``).

    Raises
    ------
    ConfigError
        A step neither partition-safe nor cohort-level, or a partition-safe step that
        needs a table only the driver has (made by a cohort-level step or the cohort
        part of another step).
    """
    source_tables = tuple(sources)
    on_partitions: set[str] = set(source_tables)
    driver_only: dict[str, str] = {}
    chosen: list[Step] = []
    patient_tables: dict[str, tuple[str, ...]] = {}
    for step in steps:
        if step.patient_wise is None:
            if not step.cohort_level:
                raise _refuse(step)
            driver_only.update({name: step.name for name in step.makes})
            continue
        for name in (*step.needs, *step.optional_needs):
            if name in driver_only and name not in on_partitions:
                raise ConfigError(
                    f"execution.engine: the spark engine cannot run step '{step.name}' on "
                    f"partitions of patients: it needs '{name}', which step "
                    f"'{driver_only[name]}' makes over the whole cohort; move "
                    f"'{step.name}' before it in the recipe or set execution.engine: polars"
                )
        tables = step.patient_wise.tables(step.makes, step.cohort_makes)
        patient_tables[step.name] = tables
        on_partitions.update(tables)
        driver_only.update({name: step.name for name in step.cohort_makes})
        chosen.append(step)
    return PartitionPlan(tuple(chosen), source_tables, patient_tables)
