"""The library's stages as pipeline steps.

Each step is a small adapter: it takes its tables and typed options from the
:class:`~kidneycohort.pipeline.registry.StepContext`, calls the stage function with
them, and returns the tables it declared. No derivation happens here, so a table in a
run folder equals the stage function's result on the same inputs.

Table names: ``patients``, ``raw_labs``, ``events`` (read from the sources);
``cohort`` and ``cohort_events`` (harmonised patients and events); run-folder tables
as declared in :mod:`kidneycohort.run_folder`.
"""

from __future__ import annotations

from kidneycohort.pipeline.registry import StepRegistry
from kidneycohort.pipeline.steps._adam import add_adam
from kidneycohort.pipeline.steps._derive import (
    EndpointsSection,
    add_baseline_and_slopes,
    add_endpoints,
    add_kdigo,
    add_kdigo_grid,
    add_kfre,
)
from kidneycohort.pipeline.steps._facts import primary_equation, study_equations
from kidneycohort.pipeline.steps._models import (
    add_dropout_analysis,
    add_slope_model,
    add_survival,
)
from kidneycohort.pipeline.steps._outputs import add_figures, add_report, add_tables
from kidneycohort.pipeline.steps._prepare import add_egfr, add_harmonize

__all__ = ["EndpointsSection", "build_registry", "primary_equation", "study_equations"]

_STAGES = (
    add_harmonize,
    add_egfr,
    add_baseline_and_slopes,
    add_endpoints,
    add_kdigo,
    add_kdigo_grid,
    add_kfre,
    add_adam,
    add_survival,
    add_slope_model,
    add_dropout_analysis,
    add_tables,
    add_figures,
    add_report,
)


def build_registry() -> StepRegistry:
    """A registry holding every library stage as a step."""
    registry = StepRegistry()
    for add in _STAGES:
        add(registry)
    return registry
