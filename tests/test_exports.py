"""The public API: what ``kidneycohort`` exports lazily, what type checkers see, and
every module's ``__all__``.

``kidneycohort/__init__.py`` names each public name twice: in ``_PUBLIC`` (loaded on
first use through ``__getattr__``) and in a ``TYPE_CHECKING`` block of
``from x import Y as Y`` imports for mypy and pyright. These tests keep the two in step,
check that every name resolves to the object of the module it is listed under, and that
``import kidneycohort`` stays free of the heavy statistical and plotting libraries.
"""

from __future__ import annotations

import ast
import importlib
import inspect
import pkgutil
import subprocess
import sys
from pathlib import Path

import pytest

import kidneycohort as kc

INIT = Path(kc.__file__)
HEAVY = ("statsmodels", "lifelines", "plotnine", "matplotlib", "scipy", "pandas")


def _type_checking_imports() -> tuple[dict[str, str], set[str]]:
    """Names imported under ``if TYPE_CHECKING:`` -> their module, and the submodules."""
    tree = ast.parse(INIT.read_text(encoding="utf-8"))
    blocks = [
        node
        for node in tree.body
        if isinstance(node, ast.If)
        and isinstance(node.test, ast.Name)
        and node.test.id == "TYPE_CHECKING"
    ]
    assert len(blocks) == 1, "expected one `if TYPE_CHECKING:` block of imports"
    names: dict[str, str] = {}
    submodules: set[str] = set()
    for node in blocks[0].body:
        assert isinstance(node, ast.ImportFrom) and node.module, ast.unparse(node)
        for alias in node.names:
            # `from x import Y as Y` marks Y as re-exported for type checkers
            assert alias.asname == alias.name, f"write `{alias.name} as {alias.name}`"
            if node.module == "kidneycohort":
                submodules.add(alias.name)
            else:
                assert alias.name not in names, f"{alias.name} imported twice"
                names[alias.name] = node.module
    return names, submodules


def _modules() -> list[str]:
    found = ["kidneycohort"]
    for info in pkgutil.walk_packages(kc.__path__, prefix="kidneycohort."):
        found.append(info.name)
    return sorted(found)


def _packages() -> list[str]:
    """The packages directly under kidneycohort."""
    return sorted(
        f"kidneycohort.{info.name}" for info in pkgutil.iter_modules(kc.__path__) if info.ispkg
    )


def test_type_checking_imports_match_public_names() -> None:
    names, submodules = _type_checking_imports()
    assert names == kc._PUBLIC
    assert submodules == set(kc._SUBMODULES)


def test_getattr_is_hidden_from_type_checkers() -> None:
    tree = ast.parse(INIT.read_text(encoding="utf-8"))
    top_level = {node.name for node in tree.body if isinstance(node, ast.FunctionDef)}
    assert "__getattr__" not in top_level, "define __getattr__ under `if not TYPE_CHECKING:`"
    assert callable(getattr(kc, "__getattr__", None))


@pytest.mark.parametrize("name", sorted(kc._PUBLIC))
def test_public_name_resolves_to_its_module_object(name: str) -> None:
    module = importlib.import_module(kc._PUBLIC[name])
    assert name in module.__all__, f"{name} missing from {module.__name__}.__all__"
    assert getattr(kc, name) is getattr(module, name)


@pytest.mark.parametrize("name", sorted(kc._SUBMODULES))
def test_public_submodule_resolves(name: str) -> None:
    assert getattr(kc, name) is importlib.import_module(f"kidneycohort.{name}")


def test_every_public_module_is_a_public_submodule() -> None:
    public = {info.name for info in pkgutil.iter_modules(kc.__path__)}
    missing = sorted(name for name in public - set(kc._SUBMODULES) if not name.startswith("_"))
    assert not missing, f"add to kidneycohort._SUBMODULES and the TYPE_CHECKING imports: {missing}"


def test_top_level_all_and_dir() -> None:
    for name in kc.__all__:
        assert hasattr(kc, name), name
    assert len(set(kc.__all__)) == len(kc.__all__)
    assert dir(kc) == sorted(kc.__all__)


def test_misspelt_name_is_an_attribute_error() -> None:
    with pytest.raises(AttributeError, match="compute_egrf"):
        kc.__getattr__("compute_egrf")


@pytest.mark.parametrize("package", _packages())
def test_every_public_function_and_class_of_a_package_is_exported(package: str) -> None:
    module = importlib.import_module(package)
    missing = [
        name
        for name in module.__all__
        if (inspect.isclass(getattr(module, name)) or inspect.isfunction(getattr(module, name)))
        and kc._PUBLIC.get(name) != package
        and getattr(kc, name, None) is not getattr(module, name)
    ]
    assert not missing, f"add to kidneycohort._PUBLIC (and the TYPE_CHECKING imports): {missing}"


@pytest.mark.parametrize("name", _modules())
def test_module_declares_all_and_every_name_exists(name: str) -> None:
    module = importlib.import_module(name)
    declared = module.__dict__.get("__all__")
    assert declared is not None, f"{name} has no __all__"
    assert len(set(declared)) == len(declared), f"{name}.__all__ repeats a name"
    for entry in declared:
        assert hasattr(module, entry), f"{name}.__all__ lists {entry!r}, which does not exist"


def test_import_loads_no_heavy_library() -> None:
    code = f"import sys, kidneycohort\nprint(','.join(m for m in {HEAVY!r} if m in sys.modules))\n"
    result = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True
    )
    assert result.stdout.strip() == "", f"import kidneycohort loaded {result.stdout.strip()}"


def test_the_polars_engine_never_imports_spark(tmp_path: Path) -> None:
    """Validating a config (either engine) and a whole polars run leave pyspark unloaded."""
    code = f"""
import sys
from pathlib import Path
from kidneycohort.pipeline import load_config, run_pipeline
from kidneycohort.pipeline.demo import demo_scenario_path
from kidneycohort.synthetic import write_cohort

base = Path({str(tmp_path)!r})
write_cohort(demo_scenario_path("trial"), base / "inputs", patients=40, fmt="parquet")
(base / "tiny.yaml").write_text("name: tiny\\nsteps: [harmonize, egfr, baseline, slopes]\\n")
raw = {{
    "study": {{"name": "import check", "recipe": "tiny.yaml"}},
    "data": {{t: {{"path": f"inputs/{{t}}.parquet"}} for t in ("patients", "labs", "events")}},
}}
load_config(raw={{**raw, "execution": {{"engine": "spark"}}}}, base_dir=base)
run_pipeline(load_config(raw=raw, base_dir=base), out_dir=base / "run")
print(",".join(m for m in sys.modules if m.split(".")[0] in ("pyspark", "py4j")))
"""
    result = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True
    )
    assert result.stdout.strip() == "", f"the polars engine loaded {result.stdout.strip()}"
