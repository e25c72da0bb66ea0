"""Foundation checks: the package installs as documented and says its cautions."""

from __future__ import annotations

import re
from importlib import resources

from click.testing import CliRunner

import kidneycohort as kc
from kidneycohort.cli import cli
from tests._fixtures import REPO_ROOT

ROOT = REPO_ROOT


def test_py_typed_is_shipped() -> None:
    assert resources.files("kidneycohort").joinpath("py.typed").is_file()


def test_readme_opens_with_job_then_two_setup_commands() -> None:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    blocks = re.findall(r"```bash\n(.*?)\n```", text, flags=re.S)
    assert len(blocks) >= 2
    demo, tests = blocks[0], blocks[1]
    assert "pip install -e ." in demo and "kidneycohort demo" in demo
    # the spark extra too: CI runs the spark engine tests (Spark in local mode)
    assert "pip install -e '.[test,spark]'" in tests and "pytest" in tests
    # the CI script runs the line after the marker, i.e. the second block
    assert "<!-- test-command -->\n```bash\n" + tests in text
    first_paragraph = text.split("\n\n")[1]
    assert "creatinine" in first_paragraph and "eGFR" in first_paragraph


def test_cautions_in_readme_and_cli() -> None:
    readme = (ROOT / "README.md").read_text(encoding="utf-8").lower()
    for phrase in ("research estimates", "drug dosing", "clinical judgement", "local guidelines"):
        assert phrase in readme
    result = CliRunner().invoke(cli, ["--help"])
    assert result.exit_code == 0
    assert "not for individual clinical decisions" in result.output
    assert any("drug dosing" in c for c in kc.CAUTIONS)


def test_version_is_exposed() -> None:
    result = CliRunner().invoke(cli, ["--version"])
    assert result.exit_code == 0
    assert kc.__version__ in result.output


def test_no_public_function_shares_a_module_name() -> None:
    # a function never has its module's name, so importing a submodule cannot shadow it
    import importlib
    import pkgutil

    modules = {m.name for m in pkgutil.iter_modules(kc.__path__)}
    clashes = sorted(
        n
        for n in kc.__all__
        if n in modules
        and callable(getattr(kc, n, None))
        and not isinstance(getattr(kc, n), type(importlib))
    )
    assert clashes == []
    for module in sorted(modules):
        importlib.import_module(f"kidneycohort.{module}")
    assert sorted(set(kc.__all__)) == sorted(kc.__all__)
    missing = [name for name in kc.__all__ if not hasattr(kc, name)]
    assert missing == []


def test_no_library_module_is_over_600_lines() -> None:
    # modules of readable size: a concept that grows splits into a package of modules
    sizes = {
        str(p.relative_to(ROOT)): len(p.read_text(encoding="utf-8").splitlines())
        for p in (ROOT / "kidneycohort").rglob("*.py")
    }
    assert {k: v for k, v in sizes.items() if v > 600} == {}
