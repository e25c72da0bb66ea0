"""The heat-map cells read the prognosis grid of kidneycohort.kdigo, in either spelling."""

from __future__ import annotations

import polars as pl

from kidneycohort.kdigo import RISK_GRID, risk_grid
from kidneycohort.plots import KDIGO_RISK, kdigo_grid_cells


def test_plot_grid_is_the_kdigo_grid():
    # KDIGO 2012 Figure 2: 18 cells, e.g. G3a/A1 moderately increased, G3b/A1 high
    assert {cell: level.replace("_", " ") for cell, level in KDIGO_RISK.items()} == RISK_GRID
    assert KDIGO_RISK[("G3a", "A1")] == "moderately_increased"
    assert KDIGO_RISK[("G3b", "A1")] == "high"


def test_grid_cells_accept_the_risk_column_written_by_kdigo():
    grid = risk_grid().with_columns(n=pl.lit(20))
    cells = kdigo_grid_cells(grid)
    assert cells.height == 18
    row = cells.filter((pl.col("g_category") == "G2") & (pl.col("a_category") == "A2"))
    assert row["risk"].to_list() == ["moderately_increased"]
