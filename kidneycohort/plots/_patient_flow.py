"""The CONSORT-style flow of patients by group, from those enrolled to those analysed."""

from __future__ import annotations

import itertools
from collections.abc import Iterable, Mapping, Sequence
from typing import Final

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

from kidneycohort._frames import FrameLike, as_float, follows_input, require_columns, to_polars
from kidneycohort.disclosure import DEFAULT_SMALL_CELL_THRESHOLD, protected_group_flow
from kidneycohort.errors import InputDataError
from kidneycohort.labels import display_label
from kidneycohort.plots._flow_layers import box_limits, flow_layers
from kidneycohort.plots._style import BASE_SIZE, check_threshold, wrap

__all__ = ["flow_note", "patient_flow_boxes", "patient_flow_figure"]

# what a reader calls each step's box, and the exclusion before it
_STEP_TEXT: Final = {
    "enrolled": ("Enrolled", ""),
    "with lab results": ("With lab results", "No lab result"),
    "with eGFR": ("With eGFR", "No computable eGFR"),
    "with a baseline (analysed)": ("Analysed (baseline eGFR)", "No baseline eGFR"),
}
_COLUMN: Final = 3.6  # inches between the flows of two groups
_SIDE: Final = 1.75  # inches from a flow to its exclusion boxes
_ROW: Final = 0.95  # inches between two steps
_CHAR: Final = 0.068  # inches per character of 8-pt text


@follows_input
def patient_flow_boxes(
    flow: FrameLike,
    *,
    labels: Mapping[str, str] | None = None,
    small_cell_threshold: int = DEFAULT_SMALL_CELL_THRESHOLD,
    shown_elsewhere: Iterable[tuple[str, str]] = (),
) -> pl.DataFrame:
    """Boxes of the patient flow by group, counts protected as one table.

    Parameters
    ----------
    flow : DataFrame
        ``group``, ``step``, ``n`` (:meth:`kidneycohort.run_folder.RunFolder.
        patient_flow_by_group`): every group has every step, steps in flow order, each
        a subset of the one before.
    labels : mapping, optional
        Display labels of the groups.
    small_cell_threshold : int
        Counts of people from 1 to this are hidden, and so is what would give them away
        (:func:`kidneycohort.disclosure.protected_group_flow`).
    shown_elsewhere : iterable of (group, step)
        Counts another output prints (e.g. the baseline table's N).

    Returns
    -------
    polars.DataFrame
        ``group``, ``step``, ``kind`` (total / step / excluded), ``x``, ``y`` (inches),
        ``n`` (null when hidden), ``text``.

    Raises
    ------
    InputDataError
        A group without every step, or a step with more patients than the one before.
    """
    threshold = check_threshold(small_cell_threshold)
    df = to_polars(flow, "patient_flow")
    require_columns(df, ("group", "step", "n"), "patient_flow")
    df = df.with_columns(pl.col("group").cast(pl.String), pl.col("n").cast(pl.Int64))
    steps = df["step"].unique(maintain_order=True).to_list()
    groups = sorted(df["group"].unique().to_list())
    counts = {(g, s): n for g, s, n in df.select("group", "step", "n").rows()}
    _check(counts, steps, groups)
    texts = protected_group_flow(counts, steps, groups, threshold, shown_elsewhere=shown_elsewhere)
    rows: list[dict[str, object]] = []
    depth = len(steps)
    for i, group in enumerate(groups):
        x = i * _COLUMN
        name = display_label(group, labels) if group != "no group" else "No group"
        for j, step in enumerate(steps):
            title, dropped = _STEP_TEXT.get(step, (step[:1].upper() + step[1:], f"Not {step}"))
            shown = texts[("flow", group, step)]
            head = f"{name}\n{title.lower()}" if j == 0 and len(groups) > 1 else title
            rows.append(_box(group, step, "step", x, (depth - j) * _ROW, shown, head))
            if j:
                left = texts[("left out", group, step)]
                rows.append(
                    _box(
                        group, step, "excluded", x + _SIDE, (depth - j + 0.5) * _ROW, left, dropped
                    )
                )
    if len(groups) > 1:
        first = steps[0]
        total = texts[("flow", "all", first)]
        title = _STEP_TEXT.get(first, (first, ""))[0]
        rows.append(
            _box("all", first, "total", (len(groups) - 1) * _COLUMN / 2, (depth + 1.1) * _ROW,
                 total, f"{title}, all groups")
        )  # fmt: skip
    return pl.DataFrame(rows, schema=_SCHEMA)


_SCHEMA: Final = {
    "group": pl.String,
    "step": pl.String,
    "kind": pl.String,
    "x": pl.Float64,
    "y": pl.Float64,
    "n": pl.Int64,
    "text": pl.String,
}


def _box(group: str, step: str, kind: str, x: float, y: float, shown: str, title: str) -> dict:
    digits = shown.replace(",", "")
    return {
        "group": group,
        "step": step,
        "kind": kind,
        "x": x,
        "y": y,
        "n": int(digits) if digits.isdigit() else None,
        "text": f"{title}\nn = {shown}",
    }


def _check(counts: Mapping[tuple[str, str], int], steps: Sequence[str], groups: list[str]) -> None:
    for group in groups:
        missing = [s for s in steps if (group, s) not in counts]
        if missing:
            raise InputDataError(f"patient_flow: group '{group}' has no step '{missing[0]}'")
        for before, after in itertools.pairwise(steps):
            if counts[(group, after)] > counts[(group, before)]:
                raise InputDataError(
                    f"patient_flow: group '{group}' has more patients '{after}' "
                    f"({counts[(group, after)]}) than '{before}' ({counts[(group, before)]}); "
                    "each step is a subset of the one before"
                )


def patient_flow_figure(
    flow: FrameLike,
    *,
    labels: Mapping[str, str] | None = None,
    small_cell_threshold: int = DEFAULT_SMALL_CELL_THRESHOLD,
    shown_elsewhere: Iterable[tuple[str, str]] = (),
    note: str = "",
) -> ggplot:
    """CONSORT-style flow diagram [3]_ of patients by group: enrolled, then each step
    down to those analysed, with the patients left out beside each arrow.

    Sized in inches from its text (about 3.6 in per group), so two groups read at the
    width of a report page.

    Parameters
    ----------
    flow, labels, small_cell_threshold, shown_elsewhere
        As :func:`patient_flow_boxes`.
    note : str
        A caption (e.g. lab rows of patient ids not in the patients table).

    Returns
    -------
    plotnine.ggplot
    """
    boxes = patient_flow_boxes(
        to_polars(flow, "patient_flow"), labels=labels, small_cell_threshold=small_cell_threshold,
        shown_elsewhere=shown_elsewhere,
    )  # fmt: skip
    lines = pl.col("text").str.split("\n")
    boxes = boxes.with_columns(
        w=pl.max_horizontal(pl.lit(1.3), _CHAR * lines.list.eval(pl.element().str.len_chars())
                            .list.max() + 0.25),
        h=0.17 * lines.list.len() + 0.14,
    )  # fmt: skip
    steps = boxes.filter(pl.col("kind") == "step").sort("group", "y", descending=[False, True])
    down = (
        steps.with_columns(
            y1=(pl.col("y") + pl.col("h") / 2).shift(-1).over("group"),
            y0=pl.col("y") - pl.col("h") / 2,
        )
        .drop_nulls("y1")
        .select("x", "y0", "y1")
    )
    side = boxes.filter(pl.col("kind") == "excluded").select(
        x0=pl.col("x") - _SIDE, x1=pl.col("x") - pl.col("w") / 2, y="y"
    )
    plot = ggplot() + theme_void(base_size=BASE_SIZE)
    total = boxes.filter(pl.col("kind") == "total")
    if total.height:
        tops = steps.group_by("group").agg(
            pl.col("x").first(), top=(pl.col("y") + pl.col("h") / 2).max()
        )
        bottom = total["y"][0] - total["h"][0] / 2
        bar = (bottom + as_float(tops["top"].max(), "patient flow: group tops")) / 2
        plot += geom_segment(
            data=tops.with_columns(y0=pl.lit(bar)).to_pandas(),
            mapping=aes(x="x", xend="x", y="y0", yend="top"),
            arrow=arrow(length=0.08, type="closed"),
        )
        plot += geom_segment(
            data=pl.DataFrame(
                {"x0": [tops["x"].min(), total["x"][0]], "x1": [tops["x"].max(), total["x"][0]],
                 "y0": [bar, bar], "y1": [bar, bottom]}
            ).to_pandas(),
            mapping=aes(x="x0", xend="x1", y="y0", yend="y1"),
        )  # fmt: skip
    plot += flow_layers(down, side, boxes)
    plot += geom_text(data=boxes.to_pandas(), mapping=aes("x", "y", label="text"), size=8)
    plot += scale_fill_manual(
        values={"total": "#FFFFFF", "step": "#E8F1F8", "excluded": "#FFF6E0"}, guide=None
    )
    x_lo, x_hi, y_lo, y_hi = box_limits(boxes, 0.1, "patient flow")
    plot += scale_x_continuous(limits=(x_lo, x_hi), expand=(0, 0))
    plot += scale_y_continuous(limits=(y_lo, y_hi), expand=(0, 0))
    plot += theme(
        figure_size=(x_hi - x_lo + 0.3, y_hi - y_lo + (1.1 if note else 0.8)),
        plot_title=element_text(size=BASE_SIZE + 2, weight="bold", margin={"b": 6}),
        plot_caption=element_text(size=BASE_SIZE - 2, ha="left"),
        plot_margin=0.02,
    )
    width = max(60, int((x_hi - x_lo) / _CHAR * 0.8))
    plot += labs(title="Patient flow by group", caption=wrap(note, width) if note else None)
    return plot


def flow_note(rows_of_unknown_patients: int) -> str:
    """The caption about lab rows whose patient id is not in the patients table."""
    if rows_of_unknown_patients <= 0:
        return ""
    return (
        f"Not patients: {rows_of_unknown_patients:,} lab rows with a patient id that is not "
        "in the patients table were rejected as data defects (row accounting, reason "
        "'unknown patient')."
    )
