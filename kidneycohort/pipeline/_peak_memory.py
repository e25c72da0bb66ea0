"""Peak resident memory of the process while one pipeline step runs.

How: on Linux the kernel keeps the process's resident-set high-water mark (``VmHWM`` in
``/proc/self/status``), and writing ``5`` to ``/proc/self/clear_refs`` resets it to the
current resident size (Linux >= 4.0). So a step's peak is exact and free: reset before
the step, read ``VmHWM`` after it. No sampling thread can miss a short spike, and
nothing is added to the step's time (``tracemalloc`` would trace every Python
allocation, slow the step several-fold and still miss the native buffers of polars and
numpy, which are most of the memory).

Where ``clear_refs`` cannot be written (some sandboxes), a daemon thread samples
``VmRSS`` every 10 ms instead and reports the largest value seen (it can miss a spike
shorter than the interval). Without ``/proc`` (macOS, Windows) the peak is ``None``:
``resource.getrusage`` gives only the whole-process peak, which cannot be reset.
"""

from __future__ import annotations

import threading
from pathlib import Path
from types import TracebackType

__all__ = ["StepPeakMemory"]

_STATUS = Path("/proc/self/status")
_CLEAR_REFS = Path("/proc/self/clear_refs")
_SAMPLE_SECONDS = 0.01


def _status_kib(field: str) -> int | None:
    try:
        text = _STATUS.read_text()
    except OSError:
        return None
    for line in text.splitlines():
        if line.startswith(field + ":"):
            return int(line.split()[1])
    return None


def _reset_high_water_mark() -> bool:
    try:
        _CLEAR_REFS.write_text("5")
    except OSError:
        return False
    return True


class StepPeakMemory:
    """Context manager: ``peak_mib`` is the largest resident size while the block ran."""

    def __init__(self) -> None:
        self.peak_mib: float | None = None
        self._exact = False
        self._peak_kib = 0
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    def __enter__(self) -> StepPeakMemory:
        if _status_kib("VmRSS") is None:
            return self
        self._exact = _reset_high_water_mark()
        if not self._exact:
            self._peak_kib = _status_kib("VmRSS") or 0
            self._thread = threading.Thread(target=self._sample, daemon=True)
            self._thread.start()
        return self

    def _sample(self) -> None:
        while not self._stop.wait(_SAMPLE_SECONDS):
            self._peak_kib = max(self._peak_kib, _status_kib("VmRSS") or 0)

    def __exit__(
        self,
        kind: type[BaseException] | None,
        value: BaseException | None,
        traceback: TracebackType | None,
    ) -> None:
        if self._exact:
            hwm = _status_kib("VmHWM")
            self.peak_mib = round(hwm / 1024, 1) if hwm is not None else None
        elif self._thread is not None:
            self._stop.set()
            self._thread.join()
            self._peak_kib = max(self._peak_kib, _status_kib("VmRSS") or 0)
            self.peak_mib = round(self._peak_kib / 1024, 1)
