"""A per-patient derivation run on consecutive ranges of patients, one range at a time.

Every per-patient derivation gives the same rows on any partition of patients as on the
whole cohort (DEVELOPERS.md, the partition rule). Its working tables, though, are
several times its input (value filters, sorts, joins), so over a million patients the
peak memory of one pass grows with the cohort. :func:`by_patient_ranges` splits the
inputs into consecutive ranges of patient ids holding about ``max_rows`` rows together,
derives each range on its own (only one range's working tables exist at a time) and
puts the rows back in the order the whole-cohort derivation gives: the order of the
first appearance of each output key in a reference input (e.g. the cohort's order of
patients, or the first-seen order of patient and equation in the eGFR table).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Mapping, Sequence
from typing import Final

import numpy as np
import polars as pl

__all__ = ["BATCH_ROWS", "by_patient_ranges", "patient_range_cuts", "patient_range_parts"]

BATCH_ROWS: Final = 2_000_000
"""Input rows derived at once by the pipeline's per-patient steps (all inputs together)."""

_ID: Final = "patient_id"
_POSITION: Final = "_batch_first_position"


def patient_range_cuts(frames: Sequence[pl.DataFrame], max_rows: int) -> pl.Series:
    """Patient ids (as text, ascending) that cut ``frames`` into ranges of about
    ``max_rows`` rows; empty when all of them together hold at most ``max_rows``.

    Range ``i`` holds the ids from cut ``i - 1`` (inclusive) to cut ``i`` (exclusive);
    missing ids go with the first range. A range is never split inside one patient.
    """
    rows = sum(f.height for f in frames)
    if rows <= max_rows:
        return pl.Series(_ID, [], dtype=pl.String)
    # rows per patient of each frame, then summed: no concatenated copy of every id
    counts = (
        pl.concat(
            [
                f.lazy()
                .select(pl.col(_ID).cast(pl.String))
                .drop_nulls()
                .group_by(_ID)
                .agg(pl.len().cast(pl.Int64))
                for f in frames
            ]
        )
        .group_by(_ID)
        .agg(pl.col("len").sum())
        .sort(_ID)
        .collect()
    )
    n_ranges = -(-rows // max_rows)
    # cut where the running row count passes each multiple of rows / n_ranges
    running = counts["len"].cum_sum().to_numpy()
    targets = np.arange(1, n_ranges) * (running[-1] / n_ranges) if len(running) else []
    at = np.unique(np.searchsorted(running, targets, side="right"))
    at = at[(at > 0) & (at < counts.height)]
    return counts[_ID].gather(at)


def _range_numbers(frame: pl.DataFrame, cuts: pl.Series) -> np.ndarray:
    """The range of each row of ``frame``: the number of cuts at or below its id."""
    ids = frame[_ID].cast(pl.String)
    numbers = cuts.search_sorted(ids, side="right").cast(pl.UInt32).to_numpy().copy()
    numbers[ids.is_null().to_numpy()] = 0  # a missing id goes with the first range
    return numbers


def patient_range_parts(frame: pl.DataFrame, max_rows: int) -> Iterator[pl.DataFrame]:
    """The rows of ``frame`` in consecutive ranges of patient ids (of about ``max_rows``
    rows; missing ids in the first), each in the frame's order, one range at a time."""
    cuts = patient_range_cuts([frame], max_rows)
    if cuts.len() == 0:
        yield frame
        return
    numbers = _range_numbers(frame, cuts)
    for number in range(cuts.len() + 1):
        yield frame.filter(pl.Series(numbers == number))


def _parts(
    frames: Mapping[str, pl.DataFrame], cuts: pl.Series, reference: str
) -> Iterator[tuple[dict[str, pl.DataFrame], np.ndarray]]:
    """Each range's rows of every frame, and the positions of its rows in ``reference``."""
    numbers = {name: _range_numbers(frame, cuts) for name, frame in frames.items()}
    for number in range(cuts.len() + 1):
        masks = {name: numbers[name] == number for name in frames}
        part = {name: frame.filter(pl.Series(masks[name])) for name, frame in frames.items()}
        yield part, np.flatnonzero(masks[reference])


def by_patient_ranges(
    derive: Callable[[Mapping[str, pl.DataFrame]], pl.DataFrame],
    frames: Mapping[str, pl.DataFrame],
    *,
    order_of: str,
    keys: Sequence[str],
    max_rows: int = BATCH_ROWS,
    split: Sequence[str] | None = None,
    whole_on: tuple[type[Exception], ...] = (),
) -> pl.DataFrame:
    """``derive(frames)`` computed one range of patients at a time, rows in whole order.

    Parameters
    ----------
    derive
        A per-patient derivation: takes the tables by name, returns one table whose
        rows are keyed by ``keys`` (which include ``patient_id``).
    frames
        The input tables by name; those with a ``patient_id`` column (of ``split``,
        when given) are split, the others given whole to every range.
    order_of, keys
        The whole-cohort derivation returns its rows in the order of the first
        appearance of their ``keys`` in ``frames[order_of]`` (a split table); the
        ranges' rows are put back in that order (rows of one key keep their order).
    max_rows
        Rows of the split tables derived at once; no split when they hold fewer.
    whole_on
        Errors of a check that holds for the cohort but need not hold for every range
        (e.g. "the equation has rows"): when a range raises one, the whole cohort is
        derived at once instead (and raises it, if the cohort fails the check too).

    Returns
    -------
    polars.DataFrame
        The rows of ``derive(frames)``, row for row.
    """
    to_split = {
        name: frame
        for name, frame in frames.items()
        if _ID in frame.columns and (split is None or name in split)
    }
    if order_of not in to_split:
        raise ValueError(f"by_patient_ranges: order_of={order_of!r} is not a split table")
    cuts = patient_range_cuts(list(to_split.values()), max_rows)
    if cuts.len() == 0:
        return derive(frames)
    key_list = list(keys)
    results: list[pl.DataFrame] = []
    firsts: list[pl.DataFrame] = []
    for part, rows in _parts(to_split, cuts, order_of):
        try:
            results.append(derive({**frames, **part}))
        except whole_on:
            del results, firsts, part
            return derive(frames)
        # where each key of this range first appears in the reference table
        firsts.append(
            part[order_of]
            .select(key_list)
            .with_columns(pl.Series(_POSITION, rows, dtype=pl.Int64))
            .unique(key_list, keep="first", maintain_order=True)
        )
        del part
    result = pl.concat(results, how="vertical")
    del results
    ordered = result.join(
        pl.concat(firsts), on=key_list, how="left", nulls_equal=True, maintain_order="left"
    )
    return ordered.sort(_POSITION, nulls_last=True, maintain_order=True).drop(_POSITION)
