"""Memory the data engine frees goes back to the system at once (command-line runs).

polars allocates through its own jemalloc. By default that allocator gives freed pages
back lazily: after half a second they are marked *lazily freeable* (``MADV_FREE``), and
such pages stay in the process's resident size until the system runs short of memory.
A run of a million patients frees gigabytes between steps (the raw labs after
harmonising, each step's intermediates), so its resident size kept the high-water mark
of the first steps to the end, and every later step's peak stood on top of it.

``muzzy_decay_ms:0`` makes jemalloc return decayed pages with ``MADV_DONTNEED``, which
takes them out of the resident size when they are returned; freed memory is still kept
for reuse for ``dirty_decay_ms`` first, so steady allocation costs no more page faults.
jemalloc reads its options from the environment once, when polars' library is loaded,
so :func:`configure_allocator` must run before ``import polars``: the command line
(``kidneycohort ...`` and ``python -m kidneycohort ...``) calls it first thing. A
program that imports kidneycohort as a library can call it before importing polars,
or set the variable itself.

This module imports nothing heavy (no polars, numpy): it is safe to import first.
"""

from __future__ import annotations

import os
import sys
from typing import Final

__all__ = ["ALLOCATOR_ENV", "ALLOCATOR_OPTIONS", "configure_allocator"]

ALLOCATOR_ENV: Final = "_RJEM_MALLOC_CONF"
"""The environment variable polars' (prefixed) jemalloc reads its options from."""

ALLOCATOR_OPTIONS: Final = "background_thread:true,dirty_decay_ms:500,muzzy_decay_ms:0"
"""polars' own defaults (background purging, 500 ms before freed pages are returned),
except that returned pages leave the resident size at once (no lazy ``MADV_FREE``)."""


def configure_allocator() -> bool:
    """Set :data:`ALLOCATOR_OPTIONS` for polars' allocator; True when it was set.

    Nothing is changed when polars is already loaded (too late: the allocator has read
    its options) or when the variable is set already (the user's choice wins).
    """
    if "polars" in sys.modules or ALLOCATOR_ENV in os.environ:
        return False
    os.environ[ALLOCATOR_ENV] = ALLOCATOR_OPTIONS
    return True
