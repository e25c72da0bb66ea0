"""Configured pipelines: study configs, recipes, the step registry, the runner, manifests.

Typical use::

    from kidneycohort.pipeline import load_config, run_pipeline
    config = load_config("configs/demo_trial.yaml", overrides=["study.seed=7"])
    result = run_pipeline(config, out_dir="runs/demo")
"""

from kidneycohort.pipeline.config import (
    DataSection,
    ExecutionSection,
    OutputSection,
    Recipe,
    StudyConfig,
    StudySection,
    apply_overrides,
    check_chain,
    load_config,
)
from kidneycohort.pipeline.registry import Step, StepContext, StepRegistry, default_registry
from kidneycohort.pipeline.runner import ProgressObserver, RunResult, run_pipeline
from kidneycohort.pipeline.sources import check_inputs, read_sources

__all__ = [
    "DataSection",
    "ExecutionSection",
    "OutputSection",
    "ProgressObserver",
    "Recipe",
    "RunResult",
    "Step",
    "StepContext",
    "StepRegistry",
    "StudyConfig",
    "StudySection",
    "apply_overrides",
    "check_chain",
    "check_inputs",
    "default_registry",
    "load_config",
    "read_sources",
    "run_pipeline",
]
