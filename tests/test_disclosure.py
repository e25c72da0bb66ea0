"""Disclosure control: primary and complementary suppression that no differencing of the
printed margins can undo (Hundepool et al. 2012, Statistical Disclosure Control, ch. 4)."""

from __future__ import annotations

import warnings

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from kidneycohort.disclosure import HIDDEN, CountLedger, protected_texts, small_count_text
from kidneycohort.errors import DisclosureWarning


def _table(cells: np.ndarray, threshold: int = 10) -> CountLedger:
    """A rows x columns table printed with its row totals, column totals and grand total."""
    ledger = CountLedger(threshold=threshold)
    rows, cols = cells.shape
    for i in range(rows):
        for j in range(cols):
            ledger.add((i, j), int(cells[i, j]))
    for i in range(rows):
        ledger.add((i, "all"), int(cells[i].sum()))
        ledger.relate([(i, j) for j in range(cols)], (i, "all"))
    for j in range(cols):
        ledger.add(("all", j), int(cells[:, j].sum()))
        ledger.relate([(i, j) for i in range(rows)], ("all", j))
    ledger.add(("all", "all"), int(cells.sum()))
    ledger.relate([(i, "all") for i in range(rows)], ("all", "all"))
    ledger.relate([("all", j) for j in range(cols)], ("all", "all"))
    return ledger


def test_primary_only_without_relations() -> None:
    ledger = CountLedger(threshold=10)
    for key, n in {"a": 0, "b": 1, "c": 10, "d": 11}.items():
        ledger.add(key, n)
    assert ledger.protect() == {"b", "c"}  # zero discloses nobody; 11 is allowed
    assert protected_texts(ledger) == {"a": "0", "b": "<11", "c": "<11", "d": "11"}


def test_a_small_cell_is_not_recoverable_from_any_margin() -> None:
    cells = np.array([[3, 40, 12], [25, 30, 18], [14, 22, 41]])
    ledger = _table(cells)
    hidden = ledger.protect()
    assert (0, 0) in hidden and ledger.recoverable(hidden) == []
    # by hand: with only the small cell hidden, its row total gives it away
    assert ledger.recoverable({(0, 0)}) == [(0, 0)]


def test_a_bridge_between_two_hidden_cycles_is_found_by_the_rank_attack() -> None:
    # two hidden 2x2 rectangles joined by one hidden cell: every row and column holds two
    # or more hidden cells, yet the joining cell is the difference of two block totals
    ledger = CountLedger(threshold=0)
    cells = np.array([[20, 20, 0, 0], [20, 25, 20, 0], [0, 0, 20, 20], [0, 0, 20, 20]], dtype=int)
    table = _table(cells, threshold=0)
    hidden = {(0, 0), (0, 1), (1, 0), (1, 1), (1, 2), (2, 2), (2, 3), (3, 2), (3, 3)}
    assert table.recoverable(hidden) != []
    assert ledger.protect() == set()


def test_threshold_zero_turns_suppression_off() -> None:
    ledger = _table(np.array([[1, 2], [3, 4]]), threshold=0)
    assert ledger.protect() == set()


def test_members_are_hidden_before_totals() -> None:
    # complementary suppression prefers a member of the relation to its printed total
    ledger = CountLedger(threshold=4)
    for key, n in {"a": 3, "b": 5, "total": 8}.items():
        ledger.add(key, n)
    ledger.relate(["a", "b"], "total")
    assert ledger.protect() == {"a", "b"}


def test_display_marks_small_and_complementary_counts() -> None:
    ledger = _table(np.array([[3, 40], [25, 30]]))
    texts = protected_texts(ledger)
    assert texts[(0, 0)] == "<11" and texts[(1, 1)] == HIDDEN
    assert small_count_text(3) == "<11" and small_count_text(12000) == "12,000"


@settings(max_examples=30, deadline=None)
@given(
    st.integers(2, 4).flatmap(
        lambda r: st.integers(2, 4).flatmap(
            lambda c: st.lists(
                st.lists(st.integers(0, 60), min_size=c, max_size=c), min_size=r, max_size=r
            )
        )
    )
)
def test_no_hidden_count_is_ever_recoverable(rows: list[list[int]]) -> None:
    # the property the module promises: after protection, a differencing attack over
    # every printed margin recovers nothing, and every small count is hidden
    ledger = _table(np.array(rows))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DisclosureWarning)
        hidden = ledger.protect()
    assert ledger.primary() <= hidden
    assert ledger.recoverable(hidden) == []


def test_the_independent_attack_finds_a_margin_leak() -> None:
    # primary suppression alone: the hidden cell is the printed total minus the other
    # (the leak reported for attrition boxes); the test-side attack must find it
    from tests._fixtures.disclosure import disclosed_counts

    printed = {"a": "<11", "b": "25", "total": "30"}
    assert disclosed_counts(printed, [(["a", "b"], "total")]) == {"a": 5.0}
    protected = {"a": "<11", "b": "*", "total": "30"}
    assert disclosed_counts(protected, [(["a", "b"], "total")]) == {}


def _interval_reference(ledger, hidden):
    """Hidden counts whose least and largest value coincide, by two linear programmes
    each (scipy's linprog, the interval attack written out in full)."""
    from scipy.optimize import linprog

    unknown = sorted(hidden, key=repr)
    matrix, rhs = ledger._system(unknown, ledger.relations)
    upper = float(max(ledger.counts.values()))
    bounds = [
        (1.0, float(ledger.threshold))
        if 1 <= ledger.counts[k] <= ledger.threshold
        else (0.0, upper)
        for k in unknown
    ]
    found = []
    for j, key in enumerate(unknown):
        if matrix.shape[0] == 0 or not matrix[:, j].any():
            continue
        c = np.zeros(len(unknown))
        c[j] = 1.0
        low = linprog(c, A_eq=matrix, b_eq=rhs, bounds=bounds, method="highs")
        high = linprog(-c, A_eq=matrix, b_eq=rhs, bounds=bounds, method="highs")
        if -high.fun - low.fun < 1.0 - 1e-9:
            found.append(key)
    return sorted(found, key=repr)


@given(
    cells=st.lists(st.integers(0, 40), min_size=6, max_size=6),
    hide=st.lists(st.booleans(), min_size=12, max_size=12),
)
@settings(max_examples=60, deadline=None)
def test_recoverable_equals_the_full_interval_attack(cells, hide) -> None:
    """Skipping the least value when the largest is a whole count above the truth finds
    the same recoverable counts as computing both ends every time."""
    ledger = CountLedger(threshold=10)
    rows, cols = ("a", "b"), ("x", "y", "z")
    grid = dict(zip([(r, c) for r in rows for c in cols], cells, strict=True))
    for key, n in grid.items():
        ledger.add(key, n)
    for r in rows:
        ledger.add((r, "all"), sum(grid[(r, c)] for c in cols))
        ledger.relate([(r, c) for c in cols], (r, "all"))
    for c in cols:
        ledger.add(("all", c), sum(grid[(r, c)] for r in rows))
        ledger.relate([(r, c) for r in rows], ("all", c))
    ledger.add(("all", "all"), sum(cells))
    ledger.relate([(r, "all") for r in rows], ("all", "all"))
    hidden = {k for k, h in zip(sorted(ledger.counts, key=repr), hide, strict=True) if h}
    assert ledger.recoverable(hidden) == _interval_reference(ledger, hidden)
