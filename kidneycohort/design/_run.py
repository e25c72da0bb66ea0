"""Running a design: chunks, seed streams, processes, resuming, the output folder.

Every chunk has its own random stream, ``SeedSequence(seed, spawn_key=(scenario,
sample size, chunk))`` (numpy's spawn keys: the streams are independent and depend
on nothing but the root seed and the chunk's place in the design), so a design gives
the same estimates whatever the number of processes and in whatever order the chunks
finish. Each finished chunk is one Parquet file under ``chunks/``; a stopped run
started again with the same config skips the chunks already written.
"""

from __future__ import annotations

import hashlib
import json
import logging
import multiprocessing
import os
import time
from collections.abc import Callable
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl

from kidneycohort.design._config import DesignConfig, load_design
from kidneycohort.design._scenario import data_cut_date, design_scenarios, true_effects
from kidneycohort.design._summary import summarise_estimates
from kidneycohort.design._threads import one_blas_thread, single_threaded_children
from kidneycohort.design._trials import ESTIMATES_SCHEMA, Chunk, simulate_chunk
from kidneycohort.errors import ConfigError
from kidneycohort.synthetic import Scenario

__all__ = ["DesignResult", "Progress", "design_chunks", "simulate_power"]

logger = logging.getLogger(__name__)

Progress = Callable[[int, int], None]
"""Called with (trials done, trials in the design) as chunks finish."""

_SCENARIO_CODES = {"effect": 0, "null": 1}
_REFERENCE_SIZE_KEY = 0  # spawn-key slot of the large reference trial (sizes are >= 4)


@dataclass(frozen=True)
class DesignResult:
    """A finished design: its folder and the tables written there."""

    folder: Path
    estimates: pl.DataFrame
    summary: pl.DataFrame
    chunks: pl.DataFrame
    seconds: float
    chunks_run: int
    chunks_reused: int

    @property
    def power(self) -> pl.DataFrame:
        """The summary under the effect scenario (power, bias, coverage, events)."""
        return self.summary.filter(pl.col("scenario") == "effect")

    @property
    def type_one_error(self) -> pl.DataFrame:
        """The summary under the null scenario (rejection rate = type I error)."""
        return self.summary.filter(pl.col("scenario") == "null")


def chunk_seed(root: int, scenario: str, sample_size: int, index: int) -> int:
    """The generator seed of one chunk: 63 bits of its spawned ``SeedSequence``."""
    sequence = np.random.SeedSequence(
        root, spawn_key=(_SCENARIO_CODES[scenario], sample_size, index)
    )
    high, low = (int(v) for v in sequence.generate_state(2, dtype=np.uint32))
    return ((high << 32) | low) >> 1


def design_chunks(config: DesignConfig) -> list[Chunk]:
    """Every chunk of the design, in a fixed order (scenario, sample size, chunk)."""
    design = config.design
    counts = {"effect": design.trials, "null": design.null_trial_count}
    out = []
    for label, trials in counts.items():
        for size in design.sample_sizes:
            for index, first in enumerate(range(0, trials, design.trials_per_chunk)):
                out.append(
                    Chunk(
                        scenario_label=label,
                        sample_size=size,
                        index=index,
                        first_trial=first,
                        trials=min(design.trials_per_chunk, trials - first),
                        seed=chunk_seed(design.seed, label, size, index),
                    )
                )
    if design.reference_patients:  # under the null the true hazard ratio is 1 anyway
        seed = chunk_seed(design.seed, "effect", _REFERENCE_SIZE_KEY, 0)
        out.append(Chunk("effect_reference", design.reference_patients, 0, 0, 1, seed))
    return out


def _chunk_path(folder: Path, chunk: Chunk) -> Path:
    return (
        folder
        / "chunks"
        / (f"{chunk.scenario_label}_n{chunk.sample_size}_chunk{chunk.index:05d}.parquet")
    )


def _run_one(config: DesignConfig, scenario: Scenario, chunk: Chunk, cut: Any, path: Path) -> Chunk:
    """Simulate one chunk and write it atomically (a partial file is never left)."""
    frame = simulate_chunk(config, scenario, chunk, cut)
    tmp = path.with_suffix(".parquet.partial")
    frame.write_parquet(tmp)
    os.replace(tmp, path)
    return chunk


def _fingerprint(config: DesignConfig, scenarios: dict[str, Scenario]) -> str:
    """What the chunk files depend on; a folder made with another is not resumed."""
    text = json.dumps(
        {
            "design": config.model_dump(
                mode="json", exclude={"design": {"workers"}, "output": True}
            ),
            "scenarios": {k: v.to_plain() for k, v in scenarios.items()},
        },
        sort_keys=True,
    )
    return hashlib.sha256(text.encode()).hexdigest()


def _prepare_folder(folder: Path, fingerprint: str, force: bool) -> None:
    stamp = folder / "design_fingerprint.txt"
    if folder.exists() and any(folder.iterdir()):
        found = stamp.read_text(encoding="utf-8").strip() if stamp.is_file() else None
        if found != fingerprint and not force:
            raise ConfigError(
                f"output folder '{folder}' holds another design's results (or other files); "
                "choose another --out, or pass --force to start it afresh"
            )
        if found != fingerprint:
            for old in (folder / "chunks").glob("*.parquet"):
                old.unlink()
    (folder / "chunks").mkdir(parents=True, exist_ok=True)
    stamp.write_text(fingerprint + "\n", encoding="utf-8")


def _execute(
    pending: list[tuple[Chunk, Path]],
    run: Callable[[Chunk, Path], tuple[Any, ...]],
    workers: int,
    report: Callable[[Chunk], None],
) -> None:
    """Run the pending chunks in this process (1 worker) or in a process pool."""
    if workers <= 1 or len(pending) <= 1:
        with one_blas_thread():
            for chunk, path in pending:
                _run_one(*run(chunk, path))
                report(chunk)
        return
    context = multiprocessing.get_context("spawn")  # polars and forked threads do not mix
    with single_threaded_children(), ProcessPoolExecutor(workers, mp_context=context) as pool:
        futures: set[Future[Chunk]] = {pool.submit(_run_one, *run(c, p)) for c, p in pending}
        try:
            while futures:
                done, futures = wait(futures, return_when=FIRST_COMPLETED)
                for future in done:
                    report(future.result())
        except BaseException:
            for future in futures:
                future.cancel()
            raise


def simulate_power(
    config: str | Path | dict[str, Any] | DesignConfig,
    *,
    out: str | Path | None = None,
    workers: int | None = None,
    overrides: list[str] | None = None,
    progress: Progress | None = None,
    force: bool = False,
) -> DesignResult:
    """Simulate a trial design and write its folder; returns the tables.

    Parameters
    ----------
    config
        A design config: YAML path, mapping or :class:`DesignConfig`.
    out
        Output folder (default: the config's ``output.dir``).
    workers
        Processes (default: ``design.workers``); the results do not depend on it.
    overrides
        ``key.path=value`` changes to the config (as ``--set``).
    progress
        Called with (trials done, trials in the design) after each chunk.
    force
        Start afresh in a folder that holds another design's results.

    Raises
    ------
    ConfigError
        A bad config (one line naming the field), or an output folder holding another
        design's results.
    """
    from kidneycohort.design._report import write_outputs

    started = time.perf_counter()
    cfg, base_folder = load_design(config, overrides)
    target = out if out is not None else cfg.output.dir
    if target is None:
        raise ConfigError("output.dir: no output folder; set output.dir or pass --out")
    folder = (base_folder / target) if out is None else Path(out)
    scenarios = design_scenarios(cfg, base_folder)
    cut = data_cut_date(scenarios["effect"])
    _prepare_folder(folder, _fingerprint(cfg, scenarios), force)
    chunks = design_chunks(cfg)
    pending = [(c, _chunk_path(folder, c)) for c in chunks if not _chunk_path(folder, c).exists()]
    # the large reference trial first, so that it does not finish alone at the end
    pending.sort(key=lambda item: not item[0].scenario_label.endswith("_reference"))
    total = sum(c.trials for c in chunks if not c.scenario_label.endswith("_reference"))
    done = total - sum(c.trials for c, _ in pending if not c.scenario_label.endswith("_reference"))
    if progress is not None:
        progress(done, total)
    counter = {"done": done}

    def report(chunk: Chunk) -> None:
        if not chunk.scenario_label.endswith("_reference"):
            counter["done"] += chunk.trials
        if progress is not None:
            progress(counter["done"], total)

    def arguments(chunk: Chunk, path: Path) -> tuple[Any, ...]:
        label = chunk.scenario_label.removesuffix("_reference")
        return (cfg, scenarios[label], chunk, cut, path)

    logger.info("design: %d chunks, %d to run, in %s", len(chunks), len(pending), folder)
    _execute(pending, arguments, workers or cfg.design.workers, report)
    estimates = (
        pl.concat([pl.read_parquet(_chunk_path(folder, c)) for c in chunks], how="vertical")
        if chunks
        else pl.DataFrame(schema=ESTIMATES_SCHEMA)
    )
    trial_rows, truth = _with_truth(cfg, estimates)
    summary = summarise_estimates(trial_rows)
    chunk_table = pl.DataFrame(
        [
            (c.scenario_label, c.sample_size, c.index, c.first_trial, c.trials, c.seed)
            for c in chunks
        ],
        schema={
            "scenario": pl.String,
            "sample_size": pl.Int64,
            "chunk": pl.Int64,
            "first_trial": pl.Int64,
            "trials": pl.Int64,
            "chunk_seed": pl.UInt64,
        },
        orient="row",
    )
    seconds = time.perf_counter() - started
    result = DesignResult(
        folder=folder,
        estimates=trial_rows,
        summary=summary,
        chunks=chunk_table,
        seconds=seconds,
        chunks_run=len(pending),
        chunks_reused=len(chunks) - len(pending),
    )
    write_outputs(cfg, result, truth, cut)
    return result


def _with_truth(cfg: DesignConfig, estimates: pl.DataFrame) -> tuple[pl.DataFrame, pl.DataFrame]:
    """The trial rows (reference trials set apart) with their ``true_value``, and the
    truth table: slope quantities from the scenario, hazard ratios from the reference
    trial when there is one, zero for everything under the null."""
    reference = estimates.filter(pl.col("scenario").str.ends_with("_reference"))
    trials = estimates.filter(~pl.col("scenario").str.ends_with("_reference"))
    rows: list[tuple[str, str, str, float | None, str | None]] = [
        ("effect", "slope_model", q, v, "scenario") for q, v in true_effects(cfg).items()
    ]
    for name in cfg.time_to_event_names():
        ref = reference.filter(
            (pl.col("scenario") == "effect_reference") & (pl.col("endpoint") == name)
        )
        value = ref["estimate"][0] if ref.height and ref["estimable"][0] else None
        source = (
            f"reference trial of {cfg.design.reference_patients} patients"
            if value is not None
            else None
        )
        rows.append(("effect", "cox", name, value, source))
    for analysis, names in (
        ("slope_model", cfg.slope_quantity_names()),
        ("cox", cfg.time_to_event_names()),
    ):
        rows.extend(("null", analysis, n, 0.0, "no treatment effect") for n in names)
    truth = pl.DataFrame(
        rows,
        schema={
            "scenario": pl.String,
            "analysis": pl.String,
            "endpoint": pl.String,
            "true_value": pl.Float64,
            "source": pl.String,
        },
        orient="row",
    )
    joined = trials.join(
        truth.select("scenario", "analysis", "endpoint", "true_value"),
        on=["scenario", "analysis", "endpoint"],
        how="left",
    )
    return joined, truth
