"""The heat-map cells read the prognosis grid of kidneycohort.kdigo, in either spelling."""

from __future__ import annotations

import polars as pl

from kidneycohort.kdigo import risk_grid
from kidneycohort.plots import KDIGO_RISK, kdigo_grid_cells


def test_plot_grid_cells_carry_the_published_levels():
    # KDIGO 2012 Figure 2 (from memory): 18 cells; G1-G2/A1 low, G3a/A1 moderately
    # increased, G3b/A1 high, G4/A1 and every A3 cell from G3a on very high
    assert len(KDIGO_RISK) == 18
    assert KDIGO_RISK[("G1", "A1")] == KDIGO_RISK[("G2", "A1")] == "low"
    assert KDIGO_RISK[("G3a", "A1")] == "moderately_increased"
    assert KDIGO_RISK[("G3b", "A1")] == "high"
    assert KDIGO_RISK[("G4", "A1")] == KDIGO_RISK[("G3a", "A3")] == "very_high"


def test_grid_cells_accept_the_risk_column_written_by_kdigo():
    grid = risk_grid().with_columns(n=pl.lit(20))
    cells = kdigo_grid_cells(grid)
    assert cells.height == 18
    row = cells.filter((pl.col("g_category") == "G2") & (pl.col("a_category") == "A2"))
    assert row["risk"].to_list() == ["moderately_increased"]
