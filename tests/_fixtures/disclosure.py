"""A differencing attack on printed tables, written independently of the library's ledger.

The attacker sees the printed texts of a table, knows how its counts add up (rows to their
totals, groups to the overall column) and knows that a hidden count is a non-negative
whole number, between 1 and the threshold when printed as ``"<11"``. For every hidden
count it solves two linear programmes (scipy.optimize.linprog): the smallest and the
largest value consistent with everything printed. A count whose smallest and largest
values coincide is disclosed. (The linear-programming attack of statistical disclosure
control: Hundepool et al., Statistical Disclosure Control, Wiley 2012, section 4.3.)
"""

from __future__ import annotations

from collections.abc import Hashable, Mapping, Sequence

import numpy as np
from scipy.optimize import linprog

__all__ = ["disclosed_counts", "printed_count"]


def printed_count(text: str | None) -> int | None:
    """The number a printed cell shows (``"25 (83.3%)"`` -> 25), None when hidden."""
    if text is None:
        return None
    head = str(text).strip().split(" ")[0].replace(",", "")
    return int(head) if head.isdigit() else None


def disclosed_counts(
    printed: Mapping[Hashable, str],
    relations: Sequence[tuple[Sequence[Hashable], Hashable]],
    threshold: int = 10,
    *,
    upper: int = 10**7,
) -> dict[Hashable, float]:
    """Hidden counts whose value the attacker pins down, with that value."""
    hidden = [key for key, text in printed.items() if printed_count(text) is None]
    if not hidden:
        return {}
    column = {key: j for j, key in enumerate(hidden)}
    rows, rhs = [], []
    for members, total in relations:
        coefficients = np.zeros(len(hidden))
        known = 0.0
        for key, sign in [*((m, 1.0) for m in members), (total, -1.0)]:
            if key in column:
                coefficients[column[key]] += sign
            else:
                known -= sign * printed_count(printed[key])  # type: ignore[operator]
        if np.any(coefficients):
            rows.append(coefficients)
            rhs.append(known)
    if not rows:
        return {}
    small = f"<{threshold + 1}"
    bounds = [
        (1, threshold) if str(printed[key]).startswith(small) else (0, upper) for key in hidden
    ]
    found: dict[Hashable, float] = {}
    for key, j in column.items():
        objective = np.zeros(len(hidden))
        objective[j] = 1.0
        low = linprog(objective, A_eq=np.array(rows), b_eq=np.array(rhs), bounds=bounds)
        high = linprog(-objective, A_eq=np.array(rows), b_eq=np.array(rhs), bounds=bounds)
        # the printed truth satisfies every relation: an infeasible system means the
        # attacker's relations are wrong, and the test would pass for nothing
        assert low.status != 2 and high.status != 2, f"relations contradict the table at {key!r}"
        if low.status == 0 and high.status == 0 and abs(low.fun + high.fun) < 1e-6:
            found[key] = low.fun
    return found
