"""Disclosure control: counts of people shown so that no small count can be read or derived.

Data-use agreements commonly forbid showing a count of people between 1 and a threshold
(often 10: "cells below 11") in any shared output. This module is the one place that
decides which counts are hidden, for the tables, the figures and the report alike.

**What is protected.** Counts of *people* (patients, patients with an event, patients in
a category or at risk). Counts of rows (row accounting), person-time, rates and ratios
are not counts of people and are not suppressed for their own sake; a rate is hidden only
where it would reveal a hidden count (its events given the printed person-years).

**How.** The counts an output prints are entered in a :class:`CountLedger` together with
the additive relations a reader knows (a row of a table adds up to its printed total, a
group column adds up to the overall column, the same count printed in two places is one
count). Primary suppression hides every count from 1 to the threshold (zero stays: an
empty cell discloses nobody). Complementary suppression then hides further counts until
no hidden count can be computed from the visible ones by any combination of the known
relations (a linear-algebra differencing attack, :meth:`CountLedger.recoverable`), the
smallest visible count of a relation first. The result is a fixed point over every margin
of the ledger; when only a printed total can break a disclosure, the total is hidden too
and a :class:`~kidneycohort.errors.DisclosureWarning` says so.

References
----------
.. [1] Hundepool A, Domingo-Ferrer J, Franconi L, et al. Statistical Disclosure
   Control. Wiley, 2012, chapter 4 (tabular data: primary and secondary suppression,
   linear-programming attacks). doi:10.1002/9781118348239
"""

from __future__ import annotations

import warnings
from collections.abc import Hashable, Iterable, Mapping
from dataclasses import dataclass, field
from typing import Final

import numpy as np
import polars as pl

from kidneycohort.errors import DisclosureWarning

__all__ = [
    "DEFAULT_SMALL_CELL_THRESHOLD",
    "HIDDEN",
    "CountLedger",
    "protected_texts",
    "small_cell_text",
    "small_count_text",
    "suppression_label",
]

DEFAULT_SMALL_CELL_THRESHOLD: Final = 10
"""Counts from 1 to this are not shown (common practice under data-use agreements)."""

HIDDEN: Final = "*"
"""Text of a count hidden to protect another (complementary suppression)."""

_TOLERANCE: Final = 1e-9


def suppression_label(threshold: int = DEFAULT_SMALL_CELL_THRESHOLD) -> str:
    """The text of a count from 1 to ``threshold``: ``"<threshold+1>"``."""
    return f"<{threshold + 1}"


def small_cell_text(counts: pl.Expr, threshold: int = DEFAULT_SMALL_CELL_THRESHOLD) -> pl.Expr:
    """Expression printing counts, with 1..``threshold`` shown as ``"<threshold+1>"``.

    Primary suppression only: for counts that appear in no relation with other printed
    counts. Zero stays ``"0"`` (an empty cell discloses nobody); nulls stay null.
    """
    # the count comes first so that the result keeps the count's column name
    return (
        pl.when(counts.is_null() | ~counts.is_between(1, threshold))
        .then(counts.cast(pl.Int64).cast(pl.String))
        .otherwise(pl.lit(suppression_label(threshold)))
    )


def small_count_text(n: int, threshold: int = DEFAULT_SMALL_CELL_THRESHOLD) -> str:
    """One count as text: ``"<threshold+1>"`` for 1..``threshold``, else with separators.

    >>> small_count_text(7), small_count_text(0), small_count_text(1234)
    ('<11', '0', '1,234')
    """
    return suppression_label(threshold) if 1 <= n <= threshold else f"{n:,}"


@dataclass
class CountLedger:
    """The counts of people one output (or several shown together) prints, and what a
    reader knows about how they add up.

    Examples
    --------
    A 2 x 2 table with its margins: the small cell (3) is hidden, and so is enough of the
    rest that neither margin gives it away.

    >>> ledger = CountLedger(threshold=10)
    >>> cells = {("a", "x"): 3, ("a", "y"): 40, ("b", "x"): 25, ("b", "y"): 30}
    >>> for key, n in cells.items():
    ...     ledger.add(key, n)
    >>> for row in ("a", "b"):
    ...     ledger.add((row, "all"), cells[(row, "x")] + cells[(row, "y")])
    ...     ledger.relate([(row, "x"), (row, "y")], (row, "all"))
    >>> for col in ("x", "y"):
    ...     ledger.add(("all", col), cells[("a", col)] + cells[("b", col)])
    ...     ledger.relate([("a", col), ("b", col)], ("all", col))
    >>> hidden = ledger.protect()
    >>> sorted(hidden)
    [('a', 'x'), ('a', 'y'), ('b', 'x'), ('b', 'y')]
    >>> ledger.recoverable(hidden)
    []
    """

    threshold: int = DEFAULT_SMALL_CELL_THRESHOLD
    counts: dict[Hashable, int] = field(default_factory=dict)
    relations: list[tuple[tuple[Hashable, ...], Hashable]] = field(default_factory=list)

    def add(self, key: Hashable, count: int) -> None:
        """Enter a printed count; the same key entered twice must carry the same count."""
        count = int(count)
        if key in self.counts and self.counts[key] != count:
            raise ValueError(f"ledger: {key!r} entered as {self.counts[key]} and as {count}")
        self.counts[key] = count

    def relate(self, members: Iterable[Hashable], total: Hashable) -> None:
        """A reader knows that the ``members`` add up to ``total`` (all entered counts)."""
        members = tuple(members)
        for key in (*members, total):
            if key not in self.counts:
                raise KeyError(f"ledger: {key!r} is related but was never entered")
        self.relations.append((members, total))

    def same(self, first: Hashable, second: Hashable) -> None:
        """The same count printed in two places (two tables, a table and a sentence)."""
        self.relate([first], second)

    # ---- the attack ------------------------------------------------------------------
    def _system(self, hidden: set[Hashable]) -> tuple[list[Hashable], np.ndarray, np.ndarray]:
        """Relations restricted to the hidden counts: ``A x = b`` with ``b`` from the
        visible counts (the reader's knowledge)."""
        unknown = sorted(hidden, key=repr)
        column = {key: j for j, key in enumerate(unknown)}
        rows, rhs = [], []
        for members, total in self.relations:
            coefficients = np.zeros(len(unknown))
            known = 0.0
            for key, sign in [*((m, 1.0) for m in members), (total, -1.0)]:
                if key in column:
                    coefficients[column[key]] += sign
                else:
                    known -= sign * self.counts[key]
            if np.any(coefficients):
                rows.append(coefficients)
                rhs.append(known)
        matrix = np.array(rows) if rows else np.zeros((0, len(unknown)))
        return unknown, matrix, np.array(rhs)

    def recoverable(self, hidden: Iterable[Hashable]) -> list[Hashable]:
        """Hidden counts a reader can compute exactly from the visible ones.

        A hidden count :math:`x_k` is determined by the relations :math:`A x = b` when the
        unit vector :math:`e_k` lies in the row space of :math:`A`, i.e. when
        :math:`\\operatorname{rank}[A; e_k] = \\operatorname{rank} A`.
        """
        unknown, matrix, _ = self._system(set(hidden))
        if matrix.shape[0] == 0:
            return []
        rank = np.linalg.matrix_rank(matrix)
        found = []
        for j, key in enumerate(unknown):
            unit = np.zeros((1, len(unknown)))
            unit[0, j] = 1.0
            if np.linalg.matrix_rank(np.vstack([matrix, unit])) == rank:
                found.append(key)
        return found

    # ---- protection ------------------------------------------------------------------
    def primary(self) -> set[Hashable]:
        """Counts from 1 to the threshold."""
        if self.threshold <= 0:
            return set()
        return {k for k, n in self.counts.items() if 1 <= n <= self.threshold}

    def _complement(self, exposed: list[Hashable], hidden: set[Hashable]) -> Hashable | None:
        """The count to hide next: among the visible counts related to an exposed one, the
        one that leaves the fewest counts exposed; then members before totals, non-zero
        before zero, the smallest first (the least information lost)."""
        members_anywhere = {m for ms, _ in self.relations for m in ms}
        touched = set(exposed)
        candidates = {
            other
            for members, total in self.relations
            if touched & {*members, total}
            for other in (*members, total)
            if other not in hidden
        }
        if not candidates:
            return None

        def cost(key: Hashable) -> tuple[int, bool, bool, int, str]:
            n = self.counts[key]
            left = len(self.recoverable(hidden | {key}))
            return (left, key not in members_anywhere, n == 0, n, repr(key))

        return min(candidates, key=cost)

    def protect(self) -> set[Hashable]:
        """The counts to hide: primary suppression, then complementary suppression until
        no hidden count is recoverable (a fixed point)."""
        hidden = self.primary()
        while True:
            exposed = self.recoverable(hidden)
            if not exposed:
                return hidden
            extra = self._complement(exposed, hidden)
            if extra is None:  # pragma: no cover - an exposed count always has a relation
                warnings.warn(
                    f"disclosure: counts {exposed!r} cannot be protected", DisclosureWarning, 2
                )
                return hidden
            if extra not in {m for ms, _ in self.relations for m in ms}:
                warnings.warn(
                    f"disclosure: a printed total ({extra!r}) is hidden to protect a small count",
                    DisclosureWarning,
                    stacklevel=2,
                )
            hidden.add(extra)

    def display(self, hidden: set[Hashable], key: Hashable) -> str:
        """The text of ``key``: its count, ``"<11"`` when small, ``"*"`` when hidden to
        protect another count."""
        n = self.counts[key]
        if key not in hidden:
            return f"{n}"
        return suppression_label(self.threshold) if 1 <= n <= self.threshold else HIDDEN


def protected_texts(ledger: CountLedger) -> Mapping[Hashable, str]:
    """Every entered count as printed after protection."""
    hidden = ledger.protect()
    return {key: ledger.display(hidden, key) for key in ledger.counts}
