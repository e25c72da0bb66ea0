"""``kidneycohort demo``: a synthetic study, generated and run in one go.

Two demos: ``trial`` (the default) generates the invented two-arm trial and runs
``configs/demo_trial.yaml``; ``cohort`` generates a small invented health-record cohort
and runs ``configs/demo_cohort.yaml``. The configs, recipes and scenarios are found in
the repository (``configs/``, ``pipelines/``, ``synthetic/`` beside the package) when
running from a source checkout, and otherwise among the copies shipped inside the
package (``kidneycohort/pipeline/configs``, ``.../recipes``, ``.../scenarios``), which a
test keeps identical to the originals.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Final, Literal

from kidneycohort.errors import ConfigError, did_you_mean
from kidneycohort.pipeline.config import builtin_config_dir, load_config
from kidneycohort.pipeline.runner import ProgressObserver, RunResult, run_pipeline

__all__ = [
    "DEMOS",
    "DEMO_CONFIG",
    "DEMO_PATIENTS",
    "DEMO_SCENARIO",
    "DemoSpec",
    "DemoStudy",
    "demo_config_path",
    "demo_scenario_path",
    "run_demo",
]

logger = logging.getLogger(__name__)

DemoStudy = Literal["trial", "cohort"]


@dataclass(frozen=True)
class DemoSpec:
    """One demo: its study config, the scenario its data come from, its default size."""

    config: str
    scenario: str
    patients: int


DEMOS: Final[dict[str, DemoSpec]] = {
    # about half a minute end to end
    "trial": DemoSpec("demo_trial.yaml", "trial_two_arm_dirty.yaml", 500),
    # health-record cohort: small, so the demo stays about half a minute too
    "cohort": DemoSpec("demo_cohort.yaml", "ehr_cohort.yaml", 3000),
}
DEMO_CONFIG = DEMOS["trial"].config
DEMO_SCENARIO = DEMOS["trial"].scenario
DEMO_PATIENTS = DEMOS["trial"].patients
_REPO = Path(__file__).resolve().parents[2]


def _first_existing(candidates: list[Path], what: str) -> Path:
    for path in candidates:
        if path.is_file():
            return path
    raise ConfigError(
        f"demo: {what} not found (looked in {', '.join(str(p.parent) for p in candidates)}); "
        "reinstall kidneycohort"
    )


def _demo(study: str) -> DemoSpec:
    if study not in DEMOS:
        raise ConfigError(
            f"--study: unknown demo {study!r}{did_you_mean(study, DEMOS)}; "
            f"choose one of {', '.join(DEMOS)}"
        )
    return DEMOS[study]


def demo_config_path(study: DemoStudy = "trial") -> Path:
    """The demo's study config: the repository's ``configs/`` first, then the package copy."""
    name = _demo(study).config
    return _first_existing([_REPO / "configs" / name, builtin_config_dir() / name], "demo config")


def demo_scenario_path(study: DemoStudy = "trial") -> Path:
    """The synthetic scenario the demo generates its data from."""
    name = _demo(study).scenario
    return _first_existing(
        [_REPO / "synthetic" / name, builtin_config_dir().parent / "scenarios" / name],
        "synthetic scenario",
    )


def run_demo(
    out_dir: str | Path = "demo_run",
    *,
    study: DemoStudy = "trial",
    patients: int | None = None,
    force: bool = False,
    progress: ProgressObserver | None = None,
    overrides: Sequence[str] = (),
) -> tuple[RunResult, Path]:
    """Generate a synthetic study and run its demo config on it.

    Parameters
    ----------
    out_dir : str or Path
        The run folder. The synthetic input tables go to ``<out_dir>_inputs`` beside it
        (the manifest records their paths and hashes).
    study : {"trial", "cohort"}
        ``trial``: the two-arm trial (``configs/demo_trial.yaml``, recipe
        ``trial_endpoints``); ``cohort``: the health-record cohort
        (``configs/demo_cohort.yaml``, recipe ``cohort_progression``).
    patients : int, optional
        Study size; default 500 for the trial, 3,000 for the cohort.
    force : bool
        Replace an existing run folder and inputs folder.
    progress : ProgressObserver, optional
        Progress display.
    overrides : sequence of str
        Further ``key.path=value`` overrides of the demo config.

    Returns
    -------
    (RunResult, pathlib.Path)
        The run, and the folder holding the synthetic inputs.
    """
    from kidneycohort.synthetic import write_cohort

    spec = _demo(study)
    out = Path(out_dir).resolve()
    inputs = out.with_name(out.name + "_inputs")
    if out.exists() and not force:
        raise ConfigError(
            f"--out: run folder '{out}' already exists; choose another --out or pass --force"
        )
    if inputs.exists() and not force:
        raise ConfigError(
            f"--out: inputs folder '{inputs}' already exists; choose another --out or pass --force"
        )
    size = patients if patients is not None else spec.patients
    if size < 20:
        raise ConfigError(f"--patients: got {size}; the demo needs at least 20 patients")
    summary = write_cohort(demo_scenario_path(study), inputs, patients=size, fmt="parquet")
    logger.info(
        "demo: %s patients, %s lab rows written to %s", summary["patients"], summary["labs"], inputs
    )
    overrides = [
        f"data.patients.path={(inputs / 'patients.parquet').as_posix()}",
        f"data.labs.path={(inputs / 'labs.parquet').as_posix()}",
        f"data.events.path={(inputs / 'events.parquet').as_posix()}",
        *overrides,
    ]
    config = load_config(demo_config_path(study), overrides=overrides)
    result = run_pipeline(config, out_dir=out, force=force, progress=progress)
    return result, inputs
