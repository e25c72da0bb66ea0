"""``kidneycohort demo``: a synthetic two-arm trial, generated and run in one go.

The demo config and recipes are found in the repository (``configs/``, ``pipelines/``,
``synthetic/`` beside the package) when running from a source checkout, and otherwise
among the copies shipped inside the package (``kidneycohort/pipeline/configs``,
``.../recipes``, ``.../scenarios``), which a test keeps identical to the originals.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from pathlib import Path

from kidneycohort.errors import ConfigError
from kidneycohort.pipeline.config import builtin_config_dir, load_config
from kidneycohort.pipeline.runner import ProgressObserver, RunResult, run_pipeline

logger = logging.getLogger(__name__)

DEMO_CONFIG = "demo_trial.yaml"
DEMO_SCENARIO = "trial_two_arm_dirty.yaml"
DEMO_PATIENTS = 500
_REPO = Path(__file__).resolve().parents[2]


def _first_existing(candidates: list[Path], what: str) -> Path:
    for path in candidates:
        if path.is_file():
            return path
    raise ConfigError(
        f"demo: {what} not found (looked in {', '.join(str(p.parent) for p in candidates)}); "
        "reinstall kidneycohort"
    )


def demo_config_path() -> Path:
    """The demo trial config: the repository's ``configs/`` first, then the package copy."""
    return _first_existing(
        [_REPO / "configs" / DEMO_CONFIG, builtin_config_dir() / DEMO_CONFIG], "demo config"
    )


def demo_scenario_path() -> Path:
    """The synthetic trial scenario the demo generates data from."""
    return _first_existing(
        [
            _REPO / "synthetic" / DEMO_SCENARIO,
            builtin_config_dir().parent / "scenarios" / DEMO_SCENARIO,
        ],
        "synthetic trial scenario",
    )


def run_demo(
    out_dir: str | Path = "demo_run",
    *,
    patients: int | None = None,
    force: bool = False,
    progress: ProgressObserver | None = None,
    overrides: Sequence[str] = (),
) -> tuple[RunResult, Path]:
    """Generate the synthetic trial and run the demo trial config on it.

    Parameters
    ----------
    out_dir : str or Path
        The run folder. The synthetic input tables go to ``<out_dir>_inputs`` beside it
        (the manifest records their paths and hashes).
    patients : int, optional
        Trial size; default 500 (about a minute end to end).
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
    size = patients if patients is not None else DEMO_PATIENTS
    if size < 20:
        raise ConfigError(f"--patients: got {size}; the demo needs at least 20 patients")
    summary = write_cohort(demo_scenario_path(), inputs, patients=size, fmt="parquet")
    logger.info(
        "demo: %s patients, %s lab rows written to %s", summary["patients"], summary["labs"], inputs
    )
    overrides = [
        f"data.patients.path={(inputs / 'patients.parquet').as_posix()}",
        f"data.labs.path={(inputs / 'labs.parquet').as_posix()}",
        f"data.events.path={(inputs / 'events.parquet').as_posix()}",
        *overrides,
    ]
    config = load_config(demo_config_path(), overrides=overrides)
    result = run_pipeline(config, out_dir=out, force=force, progress=progress)
    return result, inputs
