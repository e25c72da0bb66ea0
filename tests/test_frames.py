"""Tables in, the same kind of tables out, across the public API."""

from __future__ import annotations

import inspect

import polars as pl

import kidneycohort as kc
from kidneycohort._frames import follows_input

# functions that take no table (registries, reference tables) return polars
NO_TABLE_INPUT = {
    "registry_table",
    "loinc_table",
    "risk_grid",
    "constants_table",
    "read_back_xpt",
    "read_sources",
    "spec_sheet",
    "canonical_order",
    "simulate_joint_cohort",  # a simulator: generates its tables
}
# building blocks the figures, the report and the ADaM datasets call with the tables they
# were given; they return polars to those callers (exported with the typed API, see
# tests/test_exports.py; making them follow their input needs those callers changed first)
POLARS_BUILDING_BLOCKS = {
    "csv_safe",  # a writer's helper over polars frames
    "subject_facts",
    "suppress_small_counts",
    "attrition_boxes",
    "egfr_time_bins",
    "forest_rows",
    "kdigo_grid_cells",
    "transition_cells",
    "slope_distribution",
    "survival_steps",
}


def test_every_public_table_function_follows_its_input() -> None:
    missing = []
    for name in kc._PUBLIC:
        obj = getattr(kc, name)
        if not inspect.isfunction(obj) or name in NO_TABLE_INPUT | POLARS_BUILDING_BLOCKS:
            continue
        returns = str(inspect.signature(obj).return_annotation)
        if "DataFrame" in returns and not hasattr(obj, "__wrapped__"):
            missing.append(name)
    assert missing == [], f"decorate with kidneycohort._frames.follows_input: {missing}"


def test_pandas_in_pandas_out_polars_in_polars_out() -> None:
    import pandas as pd

    @follows_input
    def double(table: pl.DataFrame | pd.DataFrame) -> pl.DataFrame:
        frame = table if isinstance(table, pl.DataFrame) else pl.from_pandas(table)
        return frame.with_columns(pl.col("x") * 2)

    assert isinstance(double(pl.DataFrame({"x": [1]})), pl.DataFrame)
    out = double(pd.DataFrame({"x": [1]}))
    assert isinstance(out, pd.DataFrame) and out["x"].tolist() == [2]
