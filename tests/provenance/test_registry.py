"""The provenance registry: complete, consistent with the code, and honest about status.

These tests check bookkeeping, not the published values themselves: a registered value is
read from the code, so they catch an unregistered constant, a stale code location, a
missing publication or a malformed DOI -- never a wrongly recalled number.
"""

from __future__ import annotations

import ast
import dataclasses
import importlib
import inspect
import re
from collections.abc import Iterator, Mapping
from typing import Any

import polars as pl
import pytest

from kidneycohort import provenance
from kidneycohort.equations import EquationSpec
from kidneycohort.errors import InputDataError
from kidneycohort.provenance import (
    CONSTANTS,
    PUBLICATIONS,
    STATUSES,
    get_constant,
    get_publication,
    read_code_location,
    status_counts,
)

# Modules whose public top-level UPPER_CASE numeric constants are formula constants: each
# one must be registered.
FORMULA_MODULES = (
    "kidneycohort.equations.ckd_epi",
    "kidneycohort.equations.mdrd",
    "kidneycohort.equations.ekfc",
    "kidneycohort.equations.full_age",
    "kidneycohort.equations.elderly",
    "kidneycohort.equations.pediatric",
    "kidneycohort.equations.clearance",
    "kidneycohort.equations.body_size",
    "kidneycohort.units",
    "kidneycohort.kfre",
    "kidneycohort.kdigo",
)
# Equation family modules: their functions may hold no numeric literal but these.
EQUATION_FAMILIES = FORMULA_MODULES[:8]
STRUCTURAL_LITERALS = {0, 1}
ALLOWED_LITERALS = {
    # powers of the EKFC ln Q polynomial in age
    ("kidneycohort.equations.ekfc", 2),
    ("kidneycohort.equations.ekfc", 3),
    # centimetres to metres in the CKiD U25 creatinine equation (SI, not a published value)
    ("kidneycohort.equations.pediatric", 100.0),
}
DOI = re.compile(r"^10\.\d{4,9}/[-._;()/:A-Za-z0-9]+$")


def _top_level_constant_names(module_name: str) -> list[str]:
    module = importlib.import_module(module_name)
    tree = ast.parse(inspect.getsource(module))
    names = []
    for node in tree.body:
        targets = node.targets if isinstance(node, ast.Assign) else []
        if isinstance(node, ast.AnnAssign):
            targets = [node.target]
        # private names (codes, SI prefixes, bit widths) are implementation, not published
        names += [
            t.id
            for t in targets
            if isinstance(t, ast.Name) and t.id.isupper() and not t.id.startswith("_")
        ]
    return names


def _numeric_leaves(value: Any, path: str) -> Iterator[tuple[str, float]]:
    if isinstance(value, bool) or isinstance(value, EquationSpec):
        return
    if isinstance(value, int | float):
        yield path, value
    elif dataclasses.is_dataclass(value) and not isinstance(value, type):
        for field in dataclasses.fields(value):
            yield from _numeric_leaves(getattr(value, field.name), f"{path}.{field.name}")
    elif isinstance(value, tuple) and hasattr(value, "_fields"):
        for name in value._fields:
            yield from _numeric_leaves(getattr(value, name), f"{path}.{name}")
    elif isinstance(value, Mapping):
        for key, item in value.items():
            text = ",".join(key) if isinstance(key, tuple) else str(key)
            yield from _numeric_leaves(item, f"{path}[{text}]")


def _module_constant_locations() -> dict[str, float]:
    found: dict[str, float] = {}
    for module_name in FORMULA_MODULES:
        module = importlib.import_module(module_name)
        for name in _top_level_constant_names(module_name):
            for path, value in _numeric_leaves(getattr(module, name), name):
                found[f"{module_name}:{path}"] = value
    return found


def test_every_formula_module_constant_is_registered() -> None:
    registered = {c.code for c in CONSTANTS}
    missing = sorted(set(_module_constant_locations()) - registered)
    assert not missing, f"numeric module constants without a registry entry: {missing}"


def test_every_registered_code_location_holds_the_value_the_code_uses() -> None:
    module_values = _module_constant_locations()
    for c in CONSTANTS:
        value = c.value  # raises when the location is stale
        if c.code in module_values:
            assert value == module_values[c.code], c.id
    # the registry reads rule defaults where the rule objects keep them
    from kidneycohort.kdigo import RISK_GRID, SustainRule
    from kidneycohort.slopes import SlopeRule
    from kidneycohort.value_filter import ValueFilterRule as ValueFilter

    assert get_constant("aki.ratio").value == ValueFilter().aki_ratio
    assert get_constant("kdigo.persistence_days").value == SustainRule().confirm_after_days
    assert get_constant("kdigo.rapid_decline_per_year").value == (
        SlopeRule().rapid_decline_per_year
    )
    registered_cells = {c.code for c in CONSTANTS if c.id.startswith("kdigo.prognosis.")}
    assert registered_cells == {f"kidneycohort.kdigo:RISK_GRID[{g},{a}]" for g, a in RISK_GRID}


@pytest.mark.parametrize("module_name", EQUATION_FAMILIES)
def test_equation_code_holds_no_unnamed_numbers(module_name: str) -> None:
    """A published number inside a formula must be a named, registered module constant."""
    tree = ast.parse(inspect.getsource(importlib.import_module(module_name)))
    stray = []
    for function in (n for n in ast.walk(tree) if isinstance(n, ast.FunctionDef)):
        for node in ast.walk(function):
            if (
                isinstance(node, ast.Constant)
                and isinstance(node.value, int | float)
                and not isinstance(node.value, bool)
                and node.value not in STRUCTURAL_LITERALS
                and (module_name, node.value) not in ALLOWED_LITERALS
            ):
                stray.append(f"{function.name}:{node.lineno}: {node.value}")
    assert not stray, f"unnamed numbers in {module_name}: {stray}"


def test_ids_are_unique_and_statuses_allowed() -> None:
    ids = [c.id for c in CONSTANTS]
    assert len(ids) == len(set(ids))
    codes = [c.code for c in CONSTANTS]
    assert len(codes) == len(set(codes))
    assert {c.status for c in CONSTANTS} <= set(STATUSES)
    assert set(STATUSES) == {"re-read", "recalled", "derived"}
    counts = status_counts()
    assert sum(counts.values()) == len(CONSTANTS)
    assert counts["recalled"] > 0  # an honest registry of this library has some


def test_every_constant_cites_a_listed_publication_and_says_where() -> None:
    keys = [p.key for p in PUBLICATIONS]
    assert len(keys) == len(set(keys))
    for c in CONSTANTS:
        assert get_publication(c.source).key == c.source
        assert c.where and c.unit, c.id
        if c.status == "re-read":
            # a re-read value names the copy of the text that was read
            assert "read" in c.where, c.id
    cited = {c.source for c in CONSTANTS}
    assert cited == set(keys), f"publications nobody cites: {set(keys) - cited}"


def test_publications_are_well_formed() -> None:
    for p in PUBLICATIONS:
        assert p.authors and p.title and p.journal
        assert 1900 <= p.year <= 2030
        if p.doi is not None:
            assert DOI.match(p.doi), p.doi
            assert not p.doi.startswith("http")
        assert p.key in p.citation() or p.title in p.citation()
    # only the 2000 MDRD abstract has no DOI
    assert [p.key for p in PUBLICATIONS if p.doi is None] == ["levey_2000"]


def test_derived_constant_follows_from_its_inputs() -> None:
    # units.uacr_mg_g_per_mg_mmol is registered as derived: creatinine factor / 10
    derived = get_constant("units.uacr_mg_g_per_mg_mmol")
    assert derived.status == "derived"
    assert "units.creatinine_umol_per_mg_dl" in derived.where
    base = get_constant("units.creatinine_umol_per_mg_dl").value
    assert isinstance(base, float)
    assert derived.value == pytest.approx(base / 10, rel=1e-12)


def test_lookups_name_what_was_asked_and_suggest() -> None:
    with pytest.raises(
        InputDataError, match=r"unknown constant id 'ckd_epi\.kapa_male'.*did you mean"
    ):
        get_constant("ckd_epi.kapa_male")
    with pytest.raises(InputDataError, match=r"unknown publication 'levey_2090'.*did you mean"):
        get_publication("levey_2090")


def test_code_locations_read_attributes_items_fields_and_parameters() -> None:
    assert (
        read_code_location("kidneycohort.kfre:CENTRES[male]")
        == get_constant("kfre.centre.male").value
    )
    assert read_code_location("kidneycohort.kdigo:A_UPPER_BOUNDS[mg/mmol][A2]") == 30.0
    assert read_code_location("kidneycohort.kdigo:RISK_GRID[G3a,A2]") == "high"
    assert read_code_location("kidneycohort.value_filter:ValueFilterRule.aki_rise_hours") == 48.0
    assert read_code_location("kidneycohort.kdigo:kdigo_progression(decline_fraction)") == 0.25
    for bad, message in (
        ("kidneycohort.kfre", "no ':path'"),
        ("kidneycohort.nowhere:X", "module 'kidneycohort.nowhere' not found"),
        ("kidneycohort.kfre:NOT_THERE", "no attribute 'NOT_THERE'"),
        ("kidneycohort.kfre:CENTRES[female]", r"no item \[female\]"),
        ("kidneycohort.kfre:add_kfre_risk(nothing)", "no parameter 'nothing'"),
        ("kidneycohort.kfre:add_kfre_risk(inputs)", "has no default"),
        ("kidneycohort.kfre:CENTRES{male}", "cannot read"),
    ):
        with pytest.raises(LookupError, match=message):
            read_code_location(bad)


def test_table_lists_every_constant_with_its_publication() -> None:
    table = provenance.constants_table()
    assert table.height == len(CONSTANTS)
    assert table.columns == [
        "id",
        "value",
        "unit",
        "publication",
        "where",
        "status",
        "note",
        "code",
    ]
    row = table.row(by_predicate=pl.col("id") == "schwartz_bedside.k", named=True)
    assert row["value"] == "0.413"
    assert row["publication"] == "Schwartz 2009, doi:10.1681/ASN.2008030287"
    assert row["status"] == "re-read"
    kdigo = table.row(by_predicate=pl.col("id") == "kdigo.g_lower_bound.G3a", named=True)
    assert kdigo["publication"].startswith("KDIGO 2013")
