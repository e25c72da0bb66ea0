"""Transitions between sustained stages, the count matrix with rates per 100 person-years,
and the time to first worsening.
"""

from __future__ import annotations

import polars as pl

from kidneycohort import schemas
from kidneycohort._frames import FrameLike, conform, follows_input, require_columns, to_polars
from kidneycohort.kdigo._categories import _RANK, A_CATEGORIES, G_CATEGORIES
from kidneycohort.kdigo._sustained import _KEYS

__all__ = ["time_to_first_worsening", "transition_matrix", "transitions"]


def _in_sequence_order(df: pl.DataFrame, columns: list[str]) -> bool:
    """True when ``df`` is already sorted by ``columns`` (no missing keys)."""
    if any(df[c].null_count() for c in columns):
        return False
    ok = pl.lit(True)
    for column in reversed(columns):
        current, previous = pl.col(column), pl.col(column).shift(1)
        ok = (current > previous) | ((current == previous) & ok)
    return bool(df.select(ok.fill_null(True).all()).item())


def _with_keys(stages: FrameLike) -> pl.DataFrame:
    """Stages in patient, equation, axis and stage order, with an integer sequence ``_gid``.

    :func:`sustained_stages` already returns that order, so the sort runs only for
    tables that arrive in another order.
    """
    df = to_polars(stages, "stages")
    require_columns(df, ("patient_id", "axis", "stage_number", "category", "start_years"), "stages")
    if "equation" not in df.columns:
        df = df.with_columns(equation=pl.lit(None, dtype=pl.String))
    df = df.with_columns(_eq=pl.col("equation").fill_null(""))
    order = [*_KEYS, "stage_number"]
    if not _in_sequence_order(df, order):
        df = df.sort(order)
    same = pl.all_horizontal([pl.col(k).eq_missing(pl.col(k).shift(1)) for k in _KEYS])
    return df.with_columns(_gid=(~same).cast(pl.Int64).cum_sum())


def _ranked_transitions(stages: pl.DataFrame) -> pl.DataFrame:
    df = stages.filter(pl.col("category").is_not_null()).with_columns(
        _rank=pl.col("category").replace_strict(_RANK, return_dtype=pl.Int8)
    )
    same = pl.col("_gid") == pl.col("_gid").shift(1)
    df = df.with_columns(
        from_category=pl.when(same).then(pl.col("category").shift(1)),
        _from_rank=pl.when(same).then(pl.col("_rank").shift(1)),
    )
    return df.filter(pl.col("from_category").is_not_null()).with_columns(
        to_category=pl.col("category"),
        transition_date=pl.col("start_date"),
        direction=pl.when(pl.col("_rank") > pl.col("_from_rank"))
        .then(pl.lit("worsening"))
        .otherwise(pl.lit("improvement")),
    )


@follows_input
def transitions(stages: FrameLike) -> pl.DataFrame:
    """Category transitions from a :func:`sustained_stages` table.

    A transition happens at the onset of each sustained stage after the first; its
    direction is ``"worsening"`` towards G5 / A3 and ``"improvement"`` otherwise.

    Returns
    -------
    polars.DataFrame
        ``schemas.TRANSITIONS`` layout, in patient, equation, axis and time order.
    """
    return conform(_ranked_transitions(_with_keys(stages)), schemas.TRANSITIONS)


@follows_input
def transition_matrix(stages: FrameLike) -> pl.DataFrame:
    """Transition counts and rates per 100 person-years, per equation and axis.

    .. math::

        \\text{rate}_{c \\to d} = 100 \\times \\frac{n_{c \\to d}}{\\sum_{\\text{stages in } c}
        (\\text{end\\_years} - \\text{start\\_years})}

    Person-time in a category runs from each stage's onset to the next stage's onset,
    or to the patient's last usable result.

    Returns
    -------
    polars.DataFrame
        ``equation``, ``axis``, ``from_category``, ``to_category``, ``n_transitions``,
        ``person_years_in_from``, ``rate_per_100_person_years``: every ordered pair of
        distinct categories of the axis, zeros included (rates null without person-time).
    """
    df = _with_keys(stages)
    person_time = (
        df.filter(pl.col("category").is_not_null())
        .group_by("_eq", "axis", pl.col("category").alias("from_category"))
        .agg(person_years_in_from=(pl.col("end_years") - pl.col("start_years")).sum())
    )
    counts = (
        _ranked_transitions(df)
        .group_by("_eq", "axis", "from_category", "to_category")
        .agg(n_transitions=pl.len().cast(pl.Int64))
    )
    cells = []
    for axis, cats in (("G", G_CATEGORIES), ("A", A_CATEGORIES)):
        pairs = [(a, b) for a in cats for b in cats if a != b]
        cells.append(
            pl.DataFrame(
                {
                    "axis": [axis] * len(pairs),
                    "from_category": [a for a, _ in pairs],
                    "to_category": [b for _, b in pairs],
                }
            )
        )
    grid = df.select("_eq", "axis").unique().join(pl.concat(cells), on="axis")
    out = (
        grid.join(counts, on=["_eq", "axis", "from_category", "to_category"], how="left")
        .join(person_time, on=["_eq", "axis", "from_category"], how="left")
        .with_columns(
            n_transitions=pl.col("n_transitions").fill_null(0),
            person_years_in_from=pl.col("person_years_in_from").fill_null(0.0),
        )
        .with_columns(
            rate_per_100_person_years=pl.when(pl.col("person_years_in_from") > 0).then(
                100.0 * pl.col("n_transitions") / pl.col("person_years_in_from")
            ),
            equation=pl.when(pl.col("_eq") == "").then(None).otherwise(pl.col("_eq")),
            _fr=pl.col("from_category").replace_strict(_RANK, return_dtype=pl.Int8),
            _tr=pl.col("to_category").replace_strict(_RANK, return_dtype=pl.Int8),
        )
        .sort("_eq", "axis", "_fr", "_tr", descending=[False, True, False, False])
    )
    return out.select(
        "equation",
        "axis",
        "from_category",
        "to_category",
        "n_transitions",
        "person_years_in_from",
        "rate_per_100_person_years",
    )


@follows_input
def time_to_first_worsening(stages: FrameLike) -> pl.DataFrame:
    """Time from index to the first sustained worsening of category, per patient.

    The origin is the index date; the event is the first worsening transition with onset
    after index; follow-up is censored at the last usable result. A patient whose last
    usable result is at or before index has ``years`` 0, ``event`` 0.

    Returns
    -------
    polars.DataFrame
        ``patient_id``, ``equation``, ``axis``, ``category_at_index`` (the sustained
        category in force at index, null if none yet), ``years``, ``event`` (Int8),
        ``event_date``, ``to_category``, ``reason`` (``"worsening"``,
        ``"censored_at_last_value"`` or ``"no_values_after_index"``).
    """
    df = _with_keys(stages)
    keys = df.group_by("_gid", maintain_order=True).agg(
        pl.col("patient_id", "equation", "axis").first(), _last_years=pl.col("end_years").max()
    )
    at_index = (
        df.filter(pl.col("start_years") <= 0)
        .group_by("_gid")
        .agg(category_at_index=pl.col("category").last())
    )
    worse = (
        _ranked_transitions(df)
        .filter((pl.col("direction") == "worsening") & (pl.col("start_years") > 0))
        .group_by("_gid")
        .agg(
            _event_years=pl.col("start_years").first(),
            event_date=pl.col("transition_date").first(),
            to_category=pl.col("to_category").first(),
        )
    )
    out = keys.join(at_index, on="_gid", how="left", maintain_order="left").join(
        worse, on="_gid", how="left", maintain_order="left"
    )
    has_event = pl.col("_event_years").is_not_null()
    out = out.with_columns(
        years=pl.when(has_event)
        .then(pl.col("_event_years"))
        .otherwise(pl.max_horizontal(pl.col("_last_years"), pl.lit(0.0))),
        event=has_event.cast(pl.Int8),
        reason=pl.when(has_event)
        .then(pl.lit("worsening"))
        .when(pl.col("_last_years") > 0)
        .then(pl.lit("censored_at_last_value"))
        .otherwise(pl.lit("no_values_after_index")),
    )
    return out.select(
        "patient_id",
        "equation",
        "axis",
        "category_at_index",
        "years",
        "event",
        pl.col("event_date").cast(pl.Date),
        "to_category",
        "reason",
    )
