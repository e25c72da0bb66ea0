"""The eGFR equations section: each equation the run computed, with its reference,
validated ages and population, and what the run observed (values, computed, ages).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import polars as pl

from kidneycohort.disclosure import small_count_text
from kidneycohort.run_folder import RunFolder

__all__ = ["equation_rows"]


def _spec_value(spec: Any, name: str) -> Any:
    if isinstance(spec, Mapping):
        return spec.get(name)
    return getattr(spec, name, None)


def _registry() -> Mapping[str, Any]:
    try:
        from kidneycohort.equations import REGISTRY
    except ImportError:  # the registry is optional for a report
        return {}
    if isinstance(REGISTRY, Mapping):
        return REGISTRY
    return {str(_spec_value(s, "id")): s for s in REGISTRY}


def _age_range(spec: Any) -> str:
    low, high = _spec_value(spec, "min_age"), _spec_value(spec, "max_age")
    if low is None and high is None:
        return "not stated"
    if high is None:
        return f"{low:g} years and over"
    return f"{(low or 0):g} to under {high:g} years"


def _observed(run: RunFolder) -> dict[str, dict[str, Any]]:
    """Per equation: rows, computed values and the age range seen in ``egfr``."""
    if not run.has("egfr"):
        return {}
    aggs = [
        pl.len().alias("values"),
        (pl.col("egfr").is_not_null() & pl.col("egfr").is_not_nan()).sum().alias("computed"),
        pl.col("age_years").min().alias("age_min"),
        pl.col("age_years").max().alias("age_max"),
    ]
    stats = run.scan("egfr").group_by("equation").agg(aggs).collect()
    return {r["equation"]: r for r in stats.to_dicts()}


def equation_rows(run: RunFolder, ids: list[str], threshold: int) -> list[dict[str, Any]]:
    """One row per equation of ``ids`` (default: every equation in ``egfr``)."""
    registry = _registry()
    observed = _observed(run)
    ids = ids or sorted(observed)
    rows = []
    for eq in ids:
        spec = registry.get(eq)
        seen = observed.get(eq, {})
        age = ""
        if seen.get("age_min") is not None:
            age = f"{seen['age_min']:.0f} to {seen['age_max']:.0f} years"
        rows.append(
            {
                "id": eq,
                "label": _spec_value(spec, "label") or eq,
                "in_registry": spec is not None,
                "reference": _spec_value(spec, "reference") or "",
                "doi": _spec_value(spec, "doi") or "",
                "population": _spec_value(spec, "population") or "",
                "ages": _age_range(spec) if spec is not None else "not in the registry",
                "unit": (_spec_value(spec, "output_unit") or "").replace("1.73 m2", "1.73 m²"),
                "observed_ages": age,
                "n_values": small_count_text(int(seen["values"]), threshold) if seen else "",
                "n_computed": small_count_text(int(seen["computed"]), threshold) if seen else "",
            }
        )
    return rows
