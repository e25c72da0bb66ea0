"""How a run fails: a full or unwritable disk as one line, SIGTERM as an interrupt."""

from __future__ import annotations

import errno
import os
import re
import signal
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import polars as pl

from kidneycohort.errors import ConfigError, KidneyCohortError

__all__ = ["disk_error", "is_disk_error", "sigterm_as_interrupt"]


def is_disk_error(exc: BaseException, target: Path) -> bool:
    """A full or read-only disk, or a folder we may not write to, under the target's
    parent (an unreadable input is not one)."""
    if not isinstance(exc, OSError | pl.exceptions.PolarsError):
        return False
    code = getattr(exc, "errno", None)
    found = _OS_ERROR.search(str(exc))  # polars and pyarrow say "(os error 28)"
    if found and code is None:
        code = int(found.group(1))
    if code in (errno.ENOSPC, errno.EDQUOT, errno.EROFS):
        return True
    if not isinstance(exc, OSError):
        return False
    name = str(exc.filename or "")
    return exc.errno in (errno.EACCES, errno.EPERM) and name.startswith(str(target.parent))


_OS_ERROR = re.compile(r"\(os error (\d+)\)")


def disk_error(target: Path, exc: BaseException) -> KidneyCohortError:
    code = getattr(exc, "errno", None)
    found = _OS_ERROR.search(str(exc))
    if found and code is None:
        code = int(found.group(1))
    reason = "no space left on the device" if code == errno.ENOSPC else os.strerror(code or 0)
    filename = getattr(exc, "filename", None)
    where = f" ({filename})" if filename else ""
    return ConfigError(
        f"output.dir: cannot write the run folder '{target}': {reason}{where}; "
        "nothing was written; free space or choose another --out"
    )


@contextmanager
def sigterm_as_interrupt() -> Iterator[None]:
    """While the run lasts, SIGTERM is handled like SIGINT (the run fails cleanly)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def interrupt(signum: int, frame: Any) -> None:
        raise KeyboardInterrupt(f"signal {signum}")

    previous = signal.signal(signal.SIGTERM, interrupt)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)
