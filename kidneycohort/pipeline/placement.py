"""Placing a run folder atomically: a hidden temporary folder, renamed into place on success.

A failure renames the temporary folder to ``<name>.failed``: it keeps ``run.log`` and
``error.txt`` and has no ``manifest.json``, so it can never be mistaken for a finished run.

Input is never destroyed: ``--force`` replaces only a folder that is recognisably a
previous run folder (it has ``manifest.json``) and holds neither the config nor an
input; a file is never replaced. Exactly one run owns a target at a time: a lock file
``.<name>.lock`` beside it holds the owner's pid (a lock of a dead pid is taken over),
and the hidden ``.partial-<pid>`` folders of runs that died (SIGKILL) are removed by the
next run into the same target.
"""

from __future__ import annotations

import errno
import os
import shutil
from collections.abc import Iterable
from pathlib import Path

from kidneycohort.errors import ConfigError

__all__ = [
    "abandon",
    "check_target",
    "commit",
    "failed_dir",
    "lock_path",
    "prepare",
    "release",
    "remove_stale",
]

_MANIFEST = "manifest.json"


def failed_dir(out_dir: Path) -> Path:
    """Where a failed run's folder goes: ``<name>.failed`` beside the intended folder."""
    return out_dir.with_name(out_dir.name + ".failed")


def lock_path(out_dir: Path) -> Path:
    """The lock file of a target: ``.<name>.lock`` beside it."""
    return out_dir.with_name(f".{out_dir.name}.lock")


def _pid_alive(pid: int) -> bool:
    if pid <= 0:
        return False
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # alive, owned by someone else
        return True
    return True


def _inside(path: Path, folder: Path) -> bool:
    return path == folder or folder in path.parents


def check_target(out_dir: Path, force: bool, protected: Iterable[Path] = ()) -> None:
    """Refuse a target that is a file, exists without ``force``, holds an input, or is
    not a previous run folder; see the module docstring."""
    if not out_dir.exists() and not out_dir.is_symlink():
        return
    if not out_dir.is_dir():
        raise ConfigError(
            f"output.dir: '{out_dir}' is a file, not a run folder; a file is never "
            "replaced (not even with --force); choose another --out"
        )
    if not force:
        raise ConfigError(
            f"output.dir: run folder '{out_dir}' already exists; choose another --out "
            "or pass --force to replace it"
        )
    for path in protected:
        if _inside(path.resolve(), out_dir.resolve()):
            raise ConfigError(
                f"output.dir: '{out_dir}' holds an input of this run ('{path}'); --force "
                "replaces only a previous run folder; choose another --out"
            )
    if not (out_dir / _MANIFEST).is_file():
        raise ConfigError(
            f"output.dir: '{out_dir}' is not a previous run folder (no {_MANIFEST}); "
            "--force replaces only a finished run folder; choose another --out"
        )


def _acquire(out_dir: Path) -> Path:
    """Create the lock file with our pid; take over the lock of a dead pid."""
    lock = lock_path(out_dir)
    for _ in range(3):
        try:
            fd = os.open(lock, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
        except FileExistsError:
            try:
                owner = int(lock.read_text(encoding="utf-8").strip() or "0")
            except (OSError, ValueError):
                owner = 0
            if owner and _pid_alive(owner):
                raise ConfigError(
                    f"output.dir: run folder '{out_dir}' is being written by another run "
                    f"(pid {owner}, lock file {lock}); wait for it or choose another --out"
                ) from None
            lock.unlink(missing_ok=True)  # a dead run's lock: take it over
            continue
        with os.fdopen(fd, "w", encoding="utf-8") as handle:
            handle.write(f"{os.getpid()}\n")
        return lock
    raise ConfigError(f"output.dir: could not take the lock {lock}; try again")


def release(out_dir: Path) -> None:
    """Remove the lock file if it is ours."""
    lock = lock_path(out_dir)
    try:
        if int(lock.read_text(encoding="utf-8").strip() or "0") == os.getpid():
            lock.unlink()
    except (OSError, ValueError):
        pass


def remove_stale(out_dir: Path) -> list[Path]:
    """Remove hidden ``.partial-<pid>`` / ``.replaced-<pid>`` folders of dead runs into
    ``out_dir``; returns what was removed (the caller logs it)."""
    removed = []
    for kind in ("partial", "replaced"):
        for path in out_dir.parent.glob(f".{out_dir.name}.{kind}-*"):
            pid_text = path.name.rsplit("-", 1)[-1]
            if not pid_text.isdigit() or _pid_alive(int(pid_text)):
                continue
            shutil.rmtree(path, ignore_errors=True)
            removed.append(path)
    return removed


def _os_error(out_dir: Path, exc: OSError) -> ConfigError:
    reason = exc.strerror or type(exc).__name__
    if exc.errno == errno.ENOSPC:
        reason = "no space left on the device"
    return ConfigError(f"output.dir: cannot write the run folder '{out_dir}' ({reason})")


def prepare(out_dir: Path, force: bool, protected: Iterable[Path] = ()) -> Path:
    """Check the target, take its lock and create the temporary folder a run writes into.

    The temporary folder is a hidden sibling of ``out_dir`` (same file system, so the
    final move is a rename). An existing ``out_dir`` is an error unless ``force`` and it
    is a previous run folder holding none of ``protected`` (config, recipe, inputs).
    """
    out_dir = Path(out_dir)
    check_target(out_dir, force, list(protected))
    try:
        out_dir.parent.mkdir(parents=True, exist_ok=True)
        _acquire(out_dir)
    except OSError as exc:
        raise _os_error(out_dir, exc) from None
    try:
        tmp = out_dir.with_name(f".{out_dir.name}.partial-{os.getpid()}")
        if tmp.exists():
            shutil.rmtree(tmp)
        tmp.mkdir()
    except OSError as exc:
        release(out_dir)
        raise _os_error(out_dir, exc) from None
    return tmp


def commit(tmp: Path, out_dir: Path) -> Path:
    """Move a finished run into place, replacing an old one (``--force``) only now."""
    try:
        if out_dir.exists():
            old = out_dir.with_name(f".{out_dir.name}.replaced-{os.getpid()}")
            out_dir.rename(old)
            tmp.rename(out_dir)
            shutil.rmtree(old)
        else:
            tmp.rename(out_dir)
        stale = failed_dir(out_dir)
        if stale.is_dir() and not (stale / _MANIFEST).exists():
            shutil.rmtree(stale)
    finally:
        release(out_dir)
    return out_dir


def abandon(tmp: Path, out_dir: Path) -> Path:
    """Rename a failed run's temporary folder to ``<name>.failed`` (log kept inside)."""
    target = failed_dir(out_dir)
    try:
        if target.is_dir():
            shutil.rmtree(target)
        elif target.exists():  # a user's file of that name: keep it
            target = out_dir.with_name(f"{out_dir.name}.failed-{os.getpid()}")
        tmp.rename(target)
    finally:
        release(out_dir)
    return target
