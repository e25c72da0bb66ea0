"""Drawing pieces shared by the flow diagrams (rows by input table; patients by group):
the arrows down and to the side, the boxes, and the plot limits around the boxes."""

from __future__ import annotations

from typing import Any

import polars as pl
from plotnine import aes, arrow, geom_segment, geom_tile

from kidneycohort._frames import as_float

__all__ = ["box_limits", "flow_layers"]


def flow_layers(down: pl.DataFrame, side: pl.DataFrame, boxes: pl.DataFrame) -> list[Any]:
    """Arrows down the main column (``x, y0, y1``), arrows to the exclusion boxes
    (``x0, x1, y``) and the boxes (``x, y, w, h, kind``) as plotnine layers."""
    return [
        geom_segment(
            data=down.to_pandas(),
            mapping=aes(x="x", xend="x", y="y0", yend="y1"),
            arrow=arrow(length=0.08, type="closed"),
        ),
        geom_segment(
            data=side.to_pandas(),
            mapping=aes(x="x0", xend="x1", y="y", yend="y"),
            arrow=arrow(length=0.08, type="closed"),
        ),
        geom_tile(
            data=boxes.to_pandas(),
            mapping=aes("x", "y", width="w", height="h", fill="kind"),
            colour="#333333",
            size=0.5,
        ),
    ]


def box_limits(boxes: pl.DataFrame, pad: float, what: str) -> tuple[float, float, float, float]:
    """``(x_lo, x_hi, y_lo, y_hi)``: the boxes' extent with ``pad`` around it."""
    return (
        as_float((boxes["x"] - boxes["w"] / 2).min(), f"{what}: left edge") - pad,
        as_float((boxes["x"] + boxes["w"] / 2).max(), f"{what}: right edge") + pad,
        as_float((boxes["y"] - boxes["h"] / 2).min(), f"{what}: bottom edge") - pad,
        as_float((boxes["y"] + boxes["h"] / 2).max(), f"{what}: top edge") + pad,
    )
