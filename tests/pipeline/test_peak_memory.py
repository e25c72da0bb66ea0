"""Per-step peak resident memory (kidneycohort.pipeline._peak_memory)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from kidneycohort.pipeline import _peak_memory
from kidneycohort.pipeline._peak_memory import StepPeakMemory

linux = pytest.mark.skipif(
    not Path("/proc/self/status").exists(), reason="peak memory is read from /proc (Linux)"
)


@linux
@pytest.mark.parametrize("exact", [True, False])
def test_peak_sees_a_freed_allocation(monkeypatch, exact) -> None:
    """A 400 MB array allocated and freed inside the block is in the peak; a block
    after it, without the allocation, reports far less (the mark was reset). The
    sampling fallback (no clear_refs) is checked too, with a block long enough for it."""
    if not exact:
        monkeypatch.setattr(_peak_memory, "_reset_high_water_mark", lambda: False)
    with StepPeakMemory() as big:
        block = np.ones(50_000_000)
        block[::4096] = 2.0
        if not exact:
            import time

            time.sleep(0.1)
        del block
    with StepPeakMemory() as small:
        np.ones(10).sum()
    assert big.peak_mib is not None and small.peak_mib is not None
    assert big.peak_mib - small.peak_mib > 300


def test_no_proc_gives_none(monkeypatch) -> None:
    monkeypatch.setattr(_peak_memory, "_STATUS", Path("/nonexistent/status"))
    with StepPeakMemory() as memory:
        pass
    assert memory.peak_mib is None


def test_per_row_tables_are_released_after_their_last_reader(monkeypatch) -> None:
    """The runner drops a per-row table once no later step reads it (it is in the run
    folder already); the cohort, shared tables and models stay for RunResult.tables."""
    from types import SimpleNamespace

    import polars as pl

    from kidneycohort.pipeline import runner
    from kidneycohort.pipeline.registry import Step

    def step(name: str, needs: tuple[str, ...], makes: tuple[str, ...]) -> Step:
        return Step(name=name, run=lambda ctx: {}, needs=needs, makes=makes)

    steps = [
        step("harmonize", ("raw_labs",), ("labs", "cohort")),
        step("egfr", ("labs", "cohort"), ("egfr",)),
        step("tables", ("egfr", "cohort"), ("tables/endpoint_table",)),
    ]
    config = SimpleNamespace(steps=steps)
    frame = pl.DataFrame({"patient_id": ["a"]})
    tables = {n: frame for n in ("raw_labs", "labs", "cohort", "egfr", "tables/endpoint_table")}
    last = runner._last_use(steps)
    assert last == {
        "raw_labs": 0,
        "labs": 1,
        "cohort": 2,
        "egfr": 2,
        "tables/endpoint_table": 2,
    }
    monkeypatch.setattr(runner, "run_files", lambda config: {})
    runner._release(tables, last, 0, config)  # type: ignore[arg-type]
    assert "raw_labs" not in tables and "labs" in tables
    runner._release(tables, last, 1, config)  # type: ignore[arg-type]
    assert "labs" not in tables
    runner._release(tables, last, 2, config)  # type: ignore[arg-type]
    assert sorted(tables) == ["cohort", "tables/endpoint_table"]
