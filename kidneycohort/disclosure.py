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
smallest visible count of a relation first (a total is hidden like any other count when
that protects best). The result is a fixed point over every margin of the ledger; where no
fixed point is reached a :class:`~kidneycohort.errors.DisclosureWarning` says so.

References
----------
.. [1] Hundepool A, Domingo-Ferrer J, Franconi L, et al. Statistical Disclosure
   Control. Wiley, 2012, chapter 4 (tabular data: primary and secondary suppression,
   linear-programming attacks). doi:10.1002/9781118348239
"""

from __future__ import annotations

import itertools
import warnings
from collections.abc import Callable, Hashable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Final

import numpy as np
import polars as pl
from scipy.optimize import linprog

from kidneycohort.errors import DisclosureWarning

__all__ = [
    "DEFAULT_SMALL_CELL_THRESHOLD",
    "HIDDEN",
    "CountLedger",
    "SharedDisclosure",
    "disclosure_footnote",
    "protect_part",
    "protected_flow",
    "protected_group_flow",
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
_SHORTLIST: Final = 4  # candidates tried per step of complementary suppression


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
    unprinted: set[Hashable] = field(default_factory=set)
    fixed: set[Hashable] = field(default_factory=set)
    _cache: dict[object, list[Hashable]] = field(
        default_factory=dict, init=False, repr=False, compare=False
    )

    def add(self, key: Hashable, count: int, *, printed: bool = True, fixed: bool = False) -> None:
        """Enter a count; the same key entered twice must carry the same count.

        ``printed=False`` enters a count the output does not print but a reader can
        derive (the patients left out between two steps of a flow): it needs protection
        only when it is small. ``fixed=True`` enters a count printed by another output
        that this one cannot hide (it is never chosen for complementary suppression).
        """
        count = int(count)
        if key in self.counts and self.counts[key] != count:
            raise ValueError(f"ledger: {key!r} entered as {self.counts[key]} and as {count}")
        self.counts[key] = count
        if not printed:
            self.unprinted.add(key)
        if fixed:
            self.fixed.add(key)

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
    def _system(
        self, unknown: list[Hashable], relations: Iterable[tuple[tuple[Hashable, ...], Hashable]]
    ) -> tuple[np.ndarray, np.ndarray]:
        """Relations restricted to the ``unknown`` counts: ``A x = b`` with ``b`` from the
        visible counts (the reader's knowledge)."""
        column = {key: j for j, key in enumerate(unknown)}
        rows, rhs = [], []
        for members, total in relations:
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
        return matrix, np.array(rhs)

    def _components(self, hidden: set[Hashable]) -> list[frozenset[Hashable]]:
        """Hidden counts linked by relations (each is attacked on its own)."""
        parent = {key: key for key in hidden}

        def root(key: Hashable) -> Hashable:
            while parent[key] != key:
                parent[key] = parent[parent[key]]
                key = parent[key]
            return key

        for members, total in self.relations:
            linked = [key for key in (*members, total) if key in hidden]
            for other in linked[1:]:
                parent[root(other)] = root(linked[0])
        groups: dict[Hashable, set[Hashable]] = {}
        for key in hidden:
            groups.setdefault(root(key), set()).add(key)
        return [frozenset(group) for group in groups.values()]

    def recoverable(self, hidden: Iterable[Hashable]) -> list[Hashable]:
        """Hidden counts a reader can compute exactly from the visible ones.

        The reader knows the relations :math:`A x = b` among the hidden counts
        :math:`x`, that a count printed as ``"<11"`` lies in :math:`[1, \text{threshold}]`
        and that every other hidden count lies in :math:`[0, N]` (:math:`N` the largest
        count). A hidden count is recovered when the smallest and the largest value it
        can take under these constraints coincide (two linear programmes, the interval
        attack of [1]_, section 4.3).
        """
        found: list[Hashable] = []
        for component in self._components(set(hidden)):
            found += self._recoverable_in(component)
        return sorted(found, key=repr)

    def _recoverable_in(self, component: frozenset[Hashable]) -> list[Hashable]:
        cache_key = (component, len(self.relations), len(self.counts))
        if cache_key in self._cache:
            return self._cache[cache_key]
        unknown = sorted(component, key=repr)
        relations = [r for r in self.relations if component & {*r[0], r[1]}]
        matrix, rhs = self._system(unknown, relations)
        found: list[Hashable] = []
        upper = float(max(self.counts.values(), default=0))
        bounds = [
            (1.0, float(self.threshold))
            if 1 <= self.counts[key] <= self.threshold
            else (0.0, upper)
            for key in unknown
        ]
        for j, key in enumerate(unknown):
            if matrix.shape[0] == 0 or not matrix[:, j].any():
                continue
            objective = np.zeros(len(unknown))
            objective[j] = 1.0
            high = linprog(-objective, A_eq=matrix, b_eq=rhs, bounds=bounds, method="highs")
            if high.status != 0:  # pragma: no cover - the truth is feasible
                continue
            # the true count is feasible, so the least value is at most the count: when
            # the largest is a whole count above it, the interval is wide whatever the least
            if -high.fun - self.counts[key] >= 1.0 - _TOLERANCE:
                continue
            low = linprog(objective, A_eq=matrix, b_eq=rhs, bounds=bounds, method="highs")
            if low.status != 0:  # pragma: no cover - the truth is feasible
                continue
            if -high.fun - low.fun < 1.0 - _TOLERANCE:
                found.append(key)
        self._cache[cache_key] = found
        return found

    # ---- protection ------------------------------------------------------------------
    def primary(self) -> set[Hashable]:
        """Counts from 1 to the threshold."""
        if self.threshold <= 0:
            return set()
        return {k for k, n in self.counts.items() if 1 <= n <= self.threshold}

    def _complement(self, exposed: list[Hashable], hidden: set[Hashable]) -> Hashable | None:
        """The count to hide next: among the visible counts related to an exposed one
        (members before totals - a total only when no member is left -, non-zero before
        zero, the smallest first: the least information lost), of the first few the one
        that leaves the fewest exposed."""
        members_anywhere = {m for ms, _ in self.relations for m in ms}
        touched = set(exposed)
        candidates = {
            other
            for members, total in self.relations
            if touched & {*members, total}
            for other in (*members, total)
            if other not in hidden and other not in self.fixed
        }
        if not candidates:
            return None

        def order(key: Hashable) -> tuple[bool, bool, int, str]:
            n = self.counts[key]
            return (key not in members_anywhere, n == 0, n, repr(key))

        # a total (a group's N, a margin) is hidden only when no member can protect:
        # readers need the margins of a table more than its inner cells
        def best(pool: list[Hashable]) -> tuple[int, Hashable]:
            shortlist = sorted(pool, key=order)[:_SHORTLIST]
            scored = [(len(self.recoverable(hidden | {key})), key) for key in shortlist]
            return min(scored, key=lambda item: (item[0], order(item[1])))

        totals = {total for _, total in self.relations}
        inner = [k for k in candidates if k not in totals and self.counts[k] > 0]
        if inner:
            left, key = best(inner)
            if left <= len(exposed):  # an inner cell that does not make things worse
                return key
        return best(list(candidates))[1]

    def protect(self) -> set[Hashable]:
        """The counts to hide: primary suppression, then complementary suppression until
        no hidden count is recoverable (a fixed point)."""
        hidden = self.primary() | self.unprinted
        # an unprinted count that is not small may be derived: nothing to protect there
        free = self.unprinted - self.primary()
        while True:
            exposed = [key for key in self.recoverable(hidden) if key not in free]
            if not exposed:
                return hidden
            extra = self._complement(exposed, hidden)
            if extra is None:  # pragma: no cover - an exposed count always has a relation
                warnings.warn(
                    f"disclosure: counts {exposed!r} cannot be protected", DisclosureWarning, 2
                )
                return hidden
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


class SharedDisclosure:
    """One protection over several outputs shown together (the tables, figures and report
    of one run), so that a count hidden in one is not given away by another.

    Each output enters its counts with keys that name what is counted (the same key in two
    outputs is the same count, e.g. ``("N", "", "Overall")``) and the relations a reader
    knows. The builders run twice: once to enter everything (:meth:`merge`), then, after
    :meth:`finalize`, to print with the one hidden set (:meth:`hidden`).
    """

    def __init__(self, threshold: int = DEFAULT_SMALL_CELL_THRESHOLD) -> None:
        self.ledger = CountLedger(threshold=threshold)
        self._hidden: set[Hashable] | None = None
        self._relations: set[tuple[tuple[Hashable, ...], Hashable]] = set()

    @property
    def threshold(self) -> int:
        return self.ledger.threshold

    def merge(self, part: CountLedger, name: str) -> dict[Hashable, Hashable]:
        """Enter the counts and relations of one output; returns the keys it renamed.

        A key entered by two outputs with different counts names two different things
        (e.g. a different set of patients); the second is kept under its output's own key (``name``).
        """
        rename: dict[Hashable, Hashable] = {}
        for key, n in part.counts.items():
            if key in self.ledger.counts and self.ledger.counts[key] != n:
                rename[key] = (name, key)
            target = rename.get(key, key)
            if self._hidden is not None and target not in self.ledger.counts:
                raise RuntimeError(f"disclosure: {target!r} entered after the protection")
            self.ledger.add(target, n)
        for members, total in part.relations:
            relation = (tuple(rename.get(m, m) for m in members), rename.get(total, total))
            if relation not in self._relations:
                self._relations.add(relation)
                self.ledger.relations.append(relation)
        return rename

    def finalize(self) -> None:
        """Protect every count entered so far, once."""
        self._hidden = self.ledger.protect()

    def hidden(self) -> set[Hashable] | None:
        """The hidden keys after :meth:`finalize`, None before."""
        return self._hidden


def protect_part(
    part: CountLedger, shared: SharedDisclosure | None, name: str
) -> Callable[[Hashable], str]:
    """How to print the counts of one output (``key -> text``): its own protection when
    shown alone; the shared protection (or, before it is final, its own) when shown with
    others."""
    if shared is not None:
        rename = shared.merge(part, name)
        hidden = shared.hidden()
        if hidden is not None:
            ledger = shared.ledger
            return lambda key: ledger.display(hidden, rename.get(key, key))
    own = part.protect()
    return lambda key: part.display(own, key)


def protected_flow(
    flow: Mapping[str, int],
    threshold: int = DEFAULT_SMALL_CELL_THRESHOLD,
    *,
    shown_elsewhere: Iterable[str] = (),
    disclosure: SharedDisclosure | None = None,
) -> dict[str, str]:
    """A patient flow (each step a subset of the one before) as printed.

    The patients left out between two steps are not printed but are the difference of
    two printed counts; a small difference is protected like a small count (the flow
    step after it, or before it, is hidden), so no attrition box gives away a handful of
    patients by subtraction. Steps in ``shown_elsewhere`` are printed by another output
    (a table's N) and stay shown; the others are hidden around them.

    >>> protected_flow({"with labs": 250, "with eGFR": 245, "analysed": 200})
    {'with labs': '250', 'with eGFR': '*', 'analysed': '200'}
    """
    ledger = CountLedger(threshold=threshold)
    names = list(flow)
    elsewhere = set(shown_elsewhere)
    for name in names:
        ledger.add(("flow", name), int(flow[name]), fixed=name in elsewhere)
    for before, after in itertools.pairwise(names):
        left_out = ("flow left out", after)
        ledger.add(left_out, int(flow[before]) - int(flow[after]), printed=False)
        ledger.relate([("flow", after), left_out], ("flow", before))
    display = protect_part(ledger, disclosure, "patient_flow")
    return {name: display(("flow", name)) for name in names}


def protected_group_flow(
    counts: Mapping[tuple[str, str], int],
    steps: Sequence[str],
    groups: Sequence[str],
    threshold: int = DEFAULT_SMALL_CELL_THRESHOLD,
    *,
    shown_elsewhere: Iterable[tuple[str, str]] = (),
    disclosure: SharedDisclosure | None = None,
) -> dict[tuple[str, str, str], str]:
    """A patient flow by group (CONSORT style) as printed: each group's steps, the
    patients left out between two steps (printed as exclusion boxes), and the total of
    the first step over the groups.

    The known relations are entered (a step = the next step + those left out before
    it; the first step's total = the sum over groups), so a small count is hidden
    together with enough of its neighbours that no subtraction gives it back.

    Parameters
    ----------
    counts : mapping
        ``{(group, step): patients}`` for every group and step (each step a subset of
        the one before).
    steps, groups
        Their order.
    threshold : int
        Counts from 1 to this are hidden.
    shown_elsewhere : iterable of (group, step)
        Counts another output prints (a table's N): they stay shown.
    disclosure : SharedDisclosure, optional
        One protection shared with the run's other outputs.

    Returns
    -------
    dict
        ``("flow", group, step)``, ``("left out", group, step)`` (before ``step``) and
        ``("flow", "all", steps[0])`` -> printed text.

    >>> flow = {("a", "in"): 40, ("a", "out"): 36, ("b", "in"): 50, ("b", "out"): 50}
    >>> texts = protected_group_flow(flow, ["in", "out"], ["a", "b"])
    >>> texts[("left out", "a", "out")], texts[("flow", "b", "out")]
    ('<11', '50')
    """
    ledger = CountLedger(threshold=threshold)
    elsewhere = set(shown_elsewhere)
    keys: list[tuple[str, str, str]] = []
    for group in groups:
        for step in steps:
            keys.append(("flow", group, step))
            ledger.add(keys[-1], int(counts[(group, step)]), fixed=(group, step) in elsewhere)
        for before, after in itertools.pairwise(steps):
            keys.append(("left out", group, after))
            ledger.add(keys[-1], int(counts[(group, before)]) - int(counts[(group, after)]))
            ledger.relate([("flow", group, after), keys[-1]], ("flow", group, before))
    if len(groups) > 1:
        keys.append(("flow", "all", steps[0]))
        ledger.add(keys[-1], sum(int(counts[(g, steps[0])]) for g in groups))
        ledger.relate([("flow", g, steps[0]) for g in groups], keys[-1])
    display = protect_part(ledger, disclosure, "patient_flow_by_group")
    return {key: display(key) for key in keys}


def disclosure_footnote(threshold: int = DEFAULT_SMALL_CELL_THRESHOLD) -> str:
    """The footnote of an output that hides counts, in the words every output uses."""
    if threshold <= 0:
        return "No small-cell suppression applied."
    return (
        f"Counts of people from 1 to {threshold} are shown as '{suppression_label(threshold)}'; "
        f"'{HIDDEN}' marks a count hidden so that a small one cannot be worked out from the "
        "totals and the other counts (complementary suppression); a percentage or rate of a "
        "hidden count is hidden with it. Counts of rows and person-years are shown in full."
    )
