"""Lab rows checked a slice at a time give the same harmonised tables as all at once."""

from __future__ import annotations

import polars as pl
import pytest
from polars.testing import assert_frame_equal

from kidneycohort.harmonize import _accounting, harmonize_tables
from tests._fixtures import harmonize as fx


def _two_sources_shuffled() -> pl.DataFrame:
    # two sources, rows out of source order: the sliced path must sort like the whole
    labs = fx.dirty_labs()
    both = pl.concat(
        [
            labs.with_columns(source=pl.lit("site_b")),
            labs.with_columns(source=pl.lit("site_a")),
        ],
        how="diagonal_relaxed",
    )
    return both.sample(fraction=1.0, shuffle=True, seed=7)


def _outputs(labs: pl.DataFrame) -> list[pl.DataFrame]:
    out = harmonize_tables(labs, fx.patients_with_bad_rows(), data_cut_date=fx.DATA_CUT)
    return [
        out.labs,
        out.rejected,
        out.merged,
        out.accounting,
        out.accounting_by_reason,
        out.assumptions,
    ]


@pytest.mark.parametrize("labs", [fx.dirty_labs, _two_sources_shuffled])
@pytest.mark.parametrize("slice_rows", [1, 3, 10])
def test_slices_give_the_whole_result(monkeypatch, labs, slice_rows) -> None:
    frame = labs()
    whole = _outputs(frame)
    monkeypatch.setattr(_accounting, "_SLICE_ROWS", slice_rows)
    assert frame.height > slice_rows  # more than one slice
    for sliced, expected in zip(_outputs(frame), whole, strict=True):
        assert_frame_equal(sliced, expected)
    assert whole[0].height > 0 and whole[1].height > 5
