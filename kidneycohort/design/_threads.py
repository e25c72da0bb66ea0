"""One BLAS thread while trials are analysed: faster for many small fits, and the same
floating-point sums in one process as in several.

The mixed-model engine and the optimiser work on small matrices, where OpenBLAS's
worker threads cost more than they give (on a busy 2-core machine a slope fit took
2.7 times longer with them) and change the order of floating-point sums. Worker
processes get ``OPENBLAS_NUM_THREADS=1`` (and friends) before they import numpy; in the
calling process, where numpy is already loaded, the OpenBLAS libraries numpy and scipy
ship are set to one thread through their own ``*_set_num_threads`` entry points for
the duration, and restored after. Where no such library is found (another BLAS, not
Linux), nothing changes and the results agree to rounding instead of bit for bit.
"""

from __future__ import annotations

import ctypes
import logging
import os
import re
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path

__all__ = ["THREAD_VARIABLES", "one_blas_thread", "single_threaded_children"]

logger = logging.getLogger(__name__)

THREAD_VARIABLES = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")
_ENTRY_POINTS = (  # (set, get) pairs of the OpenBLAS builds numpy and scipy ship
    ("scipy_openblas_set_num_threads64_", "scipy_openblas_get_num_threads64_"),
    ("scipy_openblas_set_num_threads", "scipy_openblas_get_num_threads"),
    ("openblas_set_num_threads64_", "openblas_get_num_threads64_"),
    ("openblas_set_num_threads", "openblas_get_num_threads"),
)


def _loaded_openblas() -> list[tuple[Callable[[int], None], Callable[[], int]]]:
    """(set, get) functions of every OpenBLAS library loaded in this process."""
    maps = Path("/proc/self/maps")
    if not maps.is_file():
        return []
    found: list[tuple[Callable[[int], None], Callable[[], int]]] = []
    for path in sorted(set(re.findall(r"(/\S*openblas\S*\.so\S*)", maps.read_text()))):
        try:
            library = ctypes.CDLL(path)
        except OSError:
            continue
        for set_name, get_name in _ENTRY_POINTS:
            if hasattr(library, set_name) and hasattr(library, get_name):
                found.append((getattr(library, set_name), getattr(library, get_name)))
                break
    return found


@contextmanager
def one_blas_thread() -> Iterator[None]:
    """OpenBLAS in this process uses one thread inside the block."""
    libraries = _loaded_openblas()
    before = [get() for _, get in libraries]
    for set_threads, _ in libraries:
        set_threads(1)
    if not libraries:
        logger.debug("no OpenBLAS library found; BLAS threads left as they are")
    try:
        yield
    finally:
        for (set_threads, _), count in zip(libraries, before, strict=True):
            set_threads(count)


@contextmanager
def single_threaded_children() -> Iterator[None]:
    """Processes started inside the block use one BLAS and one polars thread each
    (processes are the parallelism); variables the user set are left alone."""
    names = (*THREAD_VARIABLES, "POLARS_MAX_THREADS")
    added = [n for n in names if n not in os.environ]
    for name in added:
        os.environ[name] = "1"
    try:
        yield
    finally:
        for name in added:
            os.environ.pop(name, None)
