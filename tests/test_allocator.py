"""Allocator options set before polars is loaded (kidneycohort._allocator)."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

from kidneycohort import _allocator, cli
from kidneycohort._allocator import ALLOCATOR_ENV, ALLOCATOR_OPTIONS, configure_allocator


def _child(code: str, env: dict[str, str]) -> str:
    done = subprocess.run(
        [sys.executable, "-c", code], env=env, capture_output=True, text=True, check=True
    )
    return done.stdout.strip()


def _env_without_options() -> dict[str, str]:
    env = dict(os.environ)
    env.pop(ALLOCATOR_ENV, None)
    return env


def test_set_in_a_fresh_process_before_polars() -> None:
    code = (
        "import os\n"
        "from kidneycohort._allocator import configure_allocator, ALLOCATOR_ENV\n"
        "print(configure_allocator(), os.environ[ALLOCATOR_ENV])"
    )
    assert _child(code, _env_without_options()) == f"True {ALLOCATOR_OPTIONS}"


def test_the_users_setting_wins() -> None:
    env = {**_env_without_options(), ALLOCATOR_ENV: "dirty_decay_ms:0"}
    code = (
        "import os\n"
        "from kidneycohort._allocator import configure_allocator, ALLOCATOR_ENV\n"
        "print(configure_allocator(), os.environ[ALLOCATOR_ENV])"
    )
    assert _child(code, env) == "False dirty_decay_ms:0"


def test_too_late_once_polars_is_loaded(monkeypatch) -> None:
    import polars  # noqa: F401  (loaded: the allocator has read its options)

    monkeypatch.delenv(ALLOCATOR_ENV, raising=False)
    assert configure_allocator() is False
    assert ALLOCATOR_ENV not in os.environ


def test_importing_the_command_line_does_not_load_polars() -> None:
    """The entry point can set the options only while polars is not loaded yet."""
    code = "import sys, kidneycohort.cli, kidneycohort.__main__\nprint('polars' in sys.modules)"
    assert _child(code, _env_without_options()) == "False"


def test_the_entry_point_configures_first(monkeypatch) -> None:
    calls: list[str] = []
    monkeypatch.setattr(cli, "configure_allocator", lambda: calls.append("allocator"))
    monkeypatch.setattr(cli, "cli", lambda: calls.append("cli"))
    cli.main()
    assert calls == ["allocator", "cli"]


@pytest.mark.skipif(
    not Path("/proc/self/status").exists(), reason="resident size is read from /proc (Linux)"
)
def test_freed_polars_memory_leaves_the_resident_size() -> None:
    """With the options, 800 MB that polars allocated and freed no longer count in the
    resident size two seconds later (the options are read and take effect)."""
    code = (
        "import time\n"
        "from kidneycohort._allocator import configure_allocator\n"
        "configure_allocator()\n"
        "import polars as pl\n"
        "def rss():\n"
        "    for line in open('/proc/self/status'):\n"
        "        if line.startswith('VmRSS'):\n"
        "            return int(line.split()[1]) / 1024\n"
        "before = rss()\n"
        "frame = pl.select(pl.int_range(100_000_000, dtype=pl.Int64).alias('x'))\n"
        "held = rss()\n"
        "del frame\n"
        "time.sleep(2.0)\n"
        "print(round(held - before), round(rss() - before))"
    )
    held, left = map(int, _child(code, _env_without_options()).split())
    assert held > 600  # the frame was resident
    assert left < 200, f"{left} MiB of the freed 800 MB still resident"


def test_module_is_light() -> None:
    """Nothing heavy is imported by the module itself (it runs before polars)."""
    import ast

    tree = ast.parse(Path(_allocator.__file__).read_text())
    imported = {
        alias.name.split(".")[0]
        for node in ast.walk(tree)
        if isinstance(node, ast.Import | ast.ImportFrom)
        for alias in (
            node.names if isinstance(node, ast.Import) else [ast.alias(node.module or "")]
        )
    }
    assert imported <= {"__future__", "os", "sys", "typing"}
