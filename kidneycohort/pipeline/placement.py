"""Placing a run folder atomically: a hidden temporary folder, renamed into place on success.

A failure renames the temporary folder to ``<name>.failed``: it keeps ``run.log`` and
``error.txt`` and has no ``manifest.json``, so it can never be mistaken for a finished run.
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path

from kidneycohort.errors import ConfigError

__all__ = ["abandon", "commit", "failed_dir", "prepare"]


def failed_dir(out_dir: Path) -> Path:
    """Where a failed run's folder goes: ``<name>.failed`` beside the intended folder."""
    return out_dir.with_name(out_dir.name + ".failed")


def prepare(out_dir: Path, force: bool) -> Path:
    """Create and return the temporary folder a run writes into.

    The temporary folder is a hidden sibling of ``out_dir`` (same file system, so the
    final move is a rename). An existing ``out_dir`` is an error unless ``force``.
    """
    out_dir = Path(out_dir)
    if out_dir.exists() and not force:
        raise ConfigError(
            f"output.dir: run folder '{out_dir}' already exists; choose another --out "
            "or pass --force to replace it"
        )
    out_dir.parent.mkdir(parents=True, exist_ok=True)
    tmp = out_dir.with_name(f".{out_dir.name}.partial-{os.getpid()}")
    if tmp.exists():
        shutil.rmtree(tmp)
    tmp.mkdir()
    return tmp


def commit(tmp: Path, out_dir: Path) -> Path:
    """Move a finished run into place, replacing an old one (``--force``) only now."""
    if out_dir.exists():
        old = out_dir.with_name(f".{out_dir.name}.replaced-{os.getpid()}")
        out_dir.rename(old)
        tmp.rename(out_dir)
        shutil.rmtree(old)
    else:
        tmp.rename(out_dir)
    stale = failed_dir(out_dir)
    if stale.exists():
        shutil.rmtree(stale)
    return out_dir


def abandon(tmp: Path, out_dir: Path) -> Path:
    """Rename a failed run's temporary folder to ``<name>.failed`` (log kept inside)."""
    target = failed_dir(out_dir)
    if target.exists():
        shutil.rmtree(target)
    tmp.rename(target)
    return target
