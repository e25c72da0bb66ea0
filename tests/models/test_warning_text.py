"""Library warnings re-worded as ours keep their statement, not an offer of code."""

from __future__ import annotations

from kidneycohort.models._design import _first_statement


def test_a_trailing_offer_of_code_is_dropped() -> None:
    # lifelines' separation warning ends its first line with "try the following code:"
    # and prints code after it (lifelines CoxPHFitter, low-variance check)
    message = (
        "Column group=B have very low variance when conditioned on death event present or "
        "not. This may harm convergence. For example, try the following code:\n\n"
        ">>> events = df['event'].astype(bool)"
    )
    assert _first_statement(message) == (
        "Column group=B have very low variance when conditioned on death event present or "
        "not. This may harm convergence."
    )


def test_a_plain_first_line_is_kept() -> None:
    assert _first_statement("norm(delta) is still high, 0.499.\nmore") == (
        "norm(delta) is still high, 0.499."
    )
