"""The Python example in README.md runs as written (on the synthetic trial scenario)."""

from __future__ import annotations

import re

import pytest

from tests._fixtures import REPO_ROOT

ROOT = REPO_ROOT


def test_readme_python_example_runs(monkeypatch: pytest.MonkeyPatch, capsys) -> None:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    blocks = re.findall(r"```python\n(.*?)\n```", text, flags=re.S)
    assert len(blocks) == 1
    monkeypatch.chdir(ROOT)
    namespace: dict[str, object] = {}
    exec(compile(blocks[0], "README.md", "exec"), namespace)
    out = capsys.readouterr().out
    # the accounting identity printed by the example holds for every table
    clean = namespace["clean"]
    acc = clean.accounting  # type: ignore[attr-defined]
    assert (acc["rows_read"] == acc["rows_used"] + acc["rows_rejected"] + acc["rows_merged"]).all()
    assert "rows_read" in out and "group=active" in out
    cox = namespace["cox"]
    hr = cox.summary()["hr"].item()  # type: ignore[attr-defined]
    assert 0.05 < hr < 20
