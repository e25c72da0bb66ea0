"""The CONSORT-style flow of rows and patients from the input tables to the analysis."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any, Final

import numpy as np
import polars as pl
from plotnine import (
    aes,
    arrow,
    element_text,
    geom_segment,
    geom_text,
    ggplot,
    labs,
    scale_fill_manual,
    scale_x_continuous,
    scale_y_continuous,
    theme,
    theme_void,
)

from kidneycohort._frames import FrameLike, require_columns, to_polars
from kidneycohort.disclosure import DEFAULT_SMALL_CELL_THRESHOLD, small_count_text
from kidneycohort.errors import InputDataError
from kidneycohort.plots._flow_layers import box_limits, flow_layers
from kidneycohort.plots._style import (
    BASE_SIZE,
    check_threshold,
)

__all__ = ["attrition_boxes", "attrition_figure"]


def attrition_boxes(
    accounting: Sequence[Mapping[str, Any]] | FrameLike,
    accounting_by_reason: Sequence[Mapping[str, Any]] | FrameLike | None = None,
    *,
    patients: Mapping[str, int | str] | None = None,
    small_cell_threshold: int = DEFAULT_SMALL_CELL_THRESHOLD,
) -> pl.DataFrame:
    """Boxes of the attrition flow diagram, from the manifest's row accounting.

    For every input table: rows read, then a side box of rows excluded by reason and
    rows merged as duplicates, then rows used, with

    .. math:: \\text{read} = \\text{used} + \\text{rejected} + \\text{merged}

    checked (the run folder's accounting rule). Rows are not people: their counts are
    printed in full. ``patients`` adds a row of patient counts (e.g. ``{"with lab
    results": 200, "with eGFR": 198, "analysed": 190}``), drawn in its given order; give
    them as printed texts (:meth:`kidneycohort.run_folder.RunFolder.printed_patient_flow`,
    protected as a chain) or as numbers (small ones then shown as ``"<11"``).

    Returns
    -------
    polars.DataFrame
        ``table``, ``kind`` (read / excluded / used / patients), ``x``, ``y``, ``n``,
        ``text``.

    Raises
    ------
    InputDataError
        Accounting that does not add up, or reasons that do not sum to the rejected rows.
    """
    threshold = check_threshold(small_cell_threshold)
    acc = _records(accounting, "accounting")
    require_columns(acc, ("table", "rows_read", "rows_used", "rows_rejected"), "accounting")
    if "rows_merged" not in acc.columns:
        acc = acc.with_columns(rows_merged=pl.lit(0))
    acc = acc.with_columns(
        pl.col("rows_read", "rows_used", "rows_rejected", "rows_merged").fill_null(0).cast(pl.Int64)
    )
    broken = acc.filter(
        pl.col("rows_read") != pl.col("rows_used") + pl.col("rows_rejected") + pl.col("rows_merged")
    )
    if broken.height:
        row = broken.row(0, named=True)
        raise InputDataError(
            f"accounting: table '{row['table']}' has rows_read={row['rows_read']} but "
            f"used+rejected+merged={row['rows_used'] + row['rows_rejected'] + row['rows_merged']}; "
            "the run folder's manifest is inconsistent"
        )
    reasons = _records(accounting_by_reason, "accounting_by_reason")
    if accounting_by_reason is not None and reasons.width:
        require_columns(reasons, ("table", "reason", "rows"), "accounting_by_reason")
    else:
        reasons = pl.DataFrame(schema={"table": pl.String, "reason": pl.String, "rows": pl.Int64})
    reasons = reasons.with_columns(pl.col("rows").cast(pl.Int64))
    check = acc.join(
        reasons.group_by("table").agg(listed=pl.col("rows").sum()), on="table", how="left"
    ).filter(pl.col("listed").is_not_null() & (pl.col("listed") != pl.col("rows_rejected")))
    if check.height:
        row = check.row(0, named=True)
        raise InputDataError(
            f"accounting_by_reason: table '{row['table']}' lists {row['listed']} rejected rows "
            f"by reason but accounting says rows_rejected={row['rows_rejected']}"
        )
    reason_lines = (
        reasons.sort("table", "rows", "reason", descending=[False, True, False])
        .with_columns(
            line=pl.concat_str(
                pl.lit("  "),
                pl.col("reason").str.replace_all("_", " "),
                pl.lit(": "),
                _rows_text(pl.col("rows")),
            )
        )
        .group_by("table", maintain_order=True)
        .agg(lines=pl.col("line").str.join("\n"))
    )
    acc = (
        acc.with_row_index("x")
        .with_columns(x=pl.col("x").cast(pl.Float64) * _COLUMN_GAP)
        .join(reason_lines, on="table", how="left")
    )
    boxes: list[pl.DataFrame] = []
    # rows are not people: row accounting is printed in full (disclosure control is for
    # counts of people; the patient boxes below are protected)
    fmt = lambda c: _rows_text(pl.col(c))  # noqa: E731
    boxes.append(
        acc.select(
            "table",
            kind=pl.lit("read"),
            x=pl.col("x").cast(pl.Float64),
            y=pl.lit(3.0),
            n=pl.col("rows_read"),
            text=pl.concat_str(pl.col("table"), pl.lit(": rows read\n"), fmt("rows_read")),
        )
    )
    excluded_text = pl.concat_str(
        pl.lit("Rows excluded: "),
        fmt("rows_rejected"),
        pl.when(pl.col("lines").is_not_null())
        .then(pl.lit("\n") + pl.col("lines"))
        .otherwise(pl.lit("")),
        pl.lit("\nMerged as duplicates: "),
        fmt("rows_merged"),
    )
    boxes.append(
        acc.select(
            "table",
            kind=pl.lit("excluded"),
            x=pl.col("x") + _SIDE_OFFSET,
            y=pl.lit(2.0),
            n=pl.col("rows_rejected") + pl.col("rows_merged"),
            text=excluded_text,
        )
    )
    boxes.append(
        acc.select(
            "table",
            kind=pl.lit("used"),
            x=pl.col("x").cast(pl.Float64),
            y=pl.lit(1.0),
            n=pl.col("rows_used"),
            text=pl.concat_str(pl.col("table"), pl.lit(": rows used\n"), fmt("rows_used")),
        )
    )
    if patients:
        names = list(patients)
        span = max(acc.height - 1, 0) * _COLUMN_GAP + _SIDE_OFFSET
        xs = np.linspace(0.0, span, len(names)) if len(names) > 1 else np.array([span / 2])
        printed = {
            k: v if isinstance(v, str) else small_count_text(int(v), threshold)
            for k, v in patients.items()
        }
        p = pl.DataFrame(
            {
                "step": names,
                "n": [_count_or_none(patients[k]) for k in names],
                "x": xs.tolist(),
                "shown": [printed[k] for k in names],
            },
            schema={"step": pl.String, "n": pl.Int64, "x": pl.Float64, "shown": pl.String},
        )
        boxes.append(
            p.select(
                table=pl.lit("patients"),
                kind=pl.lit("patients"),
                x="x",
                y=pl.lit(0.0),
                n="n",
                text=pl.concat_str(pl.lit("Patients "), pl.col("step"), pl.lit("\n"), "shown"),
            )
        )
    return pl.concat(boxes, how="vertical_relaxed")


def _rows_text(rows: pl.Expr) -> pl.Expr:
    """A row count as printed (in full)."""
    return rows.cast(pl.Int64).cast(pl.String)


def _count_or_none(value: int | str) -> int | None:
    """The number of a patient box (None when it is printed hidden)."""
    if isinstance(value, str):
        digits = value.replace(",", "")
        return int(digits) if digits.isdigit() else None
    return int(value)


_COLUMN_GAP: Final = 1.6  # x distance between the flows of two input tables


_SIDE_OFFSET: Final = 0.65  # x distance from a flow to its exclusion box


_INCH_PER_X: Final = 3.0  # drawing scale of the flow diagram


_INCH_PER_Y: Final = 1.15


def _records(data: Any, name: str) -> pl.DataFrame:
    if data is None:
        return pl.DataFrame()
    if isinstance(data, list | tuple):
        if not data:
            return pl.DataFrame()
        return pl.DataFrame([dict(r) for r in data], infer_schema_length=None)
    return to_polars(data, name)


def attrition_figure(
    accounting: Sequence[Mapping[str, Any]] | FrameLike,
    accounting_by_reason: Sequence[Mapping[str, Any]] | FrameLike | None = None,
    *,
    patients: Mapping[str, int | str] | None = None,
    small_cell_threshold: int = DEFAULT_SMALL_CELL_THRESHOLD,
) -> ggplot:
    """Flow diagram of rows (and patients) in, excluded by reason, and analysed.

    Drawn in the manner of a CONSORT flow diagram [3]_ from the manifest's row
    accounting (see :func:`attrition_boxes`).

    Returns
    -------
    plotnine.ggplot
    """
    boxes = attrition_boxes(
        accounting,
        accounting_by_reason,
        patients=patients,
        small_cell_threshold=small_cell_threshold,
    )
    # Sizes in inches turned into data units at a fixed scale, so text fits its box
    # whatever the number of tables: about 0.068 in per character of 8-pt text.
    lines = pl.col("text").str.split("\n")
    chars = lines.list.eval(pl.element().str.len_chars()).list.max()
    boxes = boxes.with_columns(
        w=pl.max_horizontal(pl.lit(1.3), 0.068 * chars + 0.25) / _INCH_PER_X,
        h=(0.17 * lines.list.len() + 0.16) / _INCH_PER_Y,
    )
    ex = boxes.filter(pl.col("kind") == "excluded")
    main = (
        boxes.filter(pl.col("kind") == "read")
        .select("table", "x", y0=pl.col("y") - pl.col("h") / 2)
        .join(
            boxes.filter(pl.col("kind") == "used").select(
                "table", y1=pl.col("y") + pl.col("h") / 2
            ),
            on="table",
        )
    )
    side = ex.select("x", "y", "w").with_columns(
        x0=pl.col("x") - _SIDE_OFFSET, x1=pl.col("x") - pl.col("w") / 2
    )
    chain = (
        boxes.filter(pl.col("kind") == "patients")
        .sort("x")
        .select(
            x0=pl.col("x") + pl.col("w") / 2, x1=(pl.col("x") - pl.col("w") / 2).shift(-1), y="y"
        )
        .drop_nulls()
    )
    plot = ggplot() + theme_void(base_size=BASE_SIZE)
    if chain.height:
        plot += geom_segment(
            data=chain.to_pandas(),
            mapping=aes(x="x0", xend="x1", y="y", yend="y"),
            arrow=arrow(length=0.08, type="closed"),
        )
    plot += flow_layers(main, side, boxes)
    plot += geom_text(
        data=boxes.filter(pl.col("kind") != "excluded").to_pandas(),
        mapping=aes("x", "y", label="text"),
        size=8,
    )
    plot += geom_text(
        data=ex.with_columns(xl=pl.col("x") - pl.col("w") / 2 + 0.1 / _INCH_PER_X).to_pandas(),
        mapping=aes("xl", "y", label="text"),
        size=8,
        ha="left",
    )
    plot += scale_fill_manual(
        values={"read": "#FFFFFF", "used": "#E8F1F8", "excluded": "#FFF6E0", "patients": "#EAF6F1"},
        guide=None,
    )
    x_lo, x_hi, y_lo, y_hi = box_limits(boxes, 0.05, "attrition")
    plot += scale_x_continuous(limits=(x_lo, x_hi), expand=(0, 0))
    plot += scale_y_continuous(limits=(y_lo, y_hi), expand=(0, 0))
    plot += theme(
        figure_size=((x_hi - x_lo) * _INCH_PER_X + 0.3, (y_hi - y_lo) * _INCH_PER_Y + 0.7),
        plot_title=element_text(size=BASE_SIZE + 2, weight="bold", margin={"b": 6}),
        plot_margin=0.02,
    )
    plot += labs(title="Rows read, excluded and used by input table")
    return plot
