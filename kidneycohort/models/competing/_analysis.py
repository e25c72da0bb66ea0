"""One competing-risks analysis of an endpoint: Fine–Gray and cause-specific hazard ratios
side by side, Gray's test, cumulative incidence curves and the methods text.

``CompetingRisks(spec).fit(endpoints, patients)`` prepares the rows once and runs

- :class:`~kidneycohort.models.competing._fine_gray.FineGray` (subdistribution hazard ratios),
- :class:`~kidneycohort.models.competing._cause_specific.CauseSpecificCox` (both causes),
- :func:`~kidneycohort.models.competing._gray_test.gray_test` across groups,
- :func:`~kidneycohort.models.competing._gray_test.aalen_johansen_by_group` and the Fine–Gray
  predicted incidence per group.

Whatever cannot be estimated is a row with ``estimable = False`` and a one-line reason
(``statements_`` collects them), never a number.
"""

from __future__ import annotations

from typing import Any

import polars as pl

from kidneycohort._frames import FrameLike
from kidneycohort.errors import InputDataError
from kidneycohort.models.competing._cause_specific import CauseSpecificCox
from kidneycohort.models.competing._data import (
    CompetingRisksRule,
    CompetingRows,
    prepare_competing_rows,
    resolve_rule,
)
from kidneycohort.models.competing._fine_gray import FineGray
from kidneycohort.models.competing._gray_test import aalen_johansen_by_group, gray_test
from kidneycohort.models.competing._results import HAZARD_COLUMNS

__all__ = ["CURVE_COLUMNS", "CompetingRisks"]

CURVE_COLUMNS: dict[str, pl.DataType] = {
    "group": pl.String(),
    "cause": pl.String(),
    "years": pl.Float64(),
    "estimate": pl.Float64(),
    "lower": pl.Float64(),
    "upper": pl.Float64(),
    "measure": pl.String(),  # "cumulative_incidence" (Aalen–Johansen) or "..._fine_gray"
}


class CompetingRisks:
    """Fine–Gray and cause-specific Cox models, Gray's test and cumulative incidence.

    Configure with a :class:`CompetingRisksRule` and/or its fields as keywords.

    Attributes
    ----------
    fine_gray_ : FineGray or None
    cause_specific_ : CauseSpecificCox or None
        None when there is nothing to model (one group and no covariates).
    gray_test_ : polars.DataFrame
        ``cause, groups, test_statistic, df, p, estimable, reason`` (one row).
    cumulative_incidence_ : polars.DataFrame
        ``group, cause, years, estimate, lower, upper, measure``: Aalen–Johansen
        incidence of both causes (``measure = "cumulative_incidence"``) and the
        Fine–Gray predicted incidence of the event (``"cumulative_incidence_fine_gray"``).
        Limits are null here (the Aalen–Johansen limits come from
        ``CumulativeIncidence``).
    statements_ : list of str
        Every one-line statement of the analysis, in order, without repeats.
    excluded_ : polars.DataFrame
        ``patient_id, reason`` of rows not used.

    Examples
    --------
    >>> import polars as pl
    >>> rows = pl.DataFrame({
    ...     "patient_id": ["a", "b", "c", "d", "e", "f", "g", "h"],
    ...     "endpoint": "kidney_failure",
    ...     "years": [1.0, 2.0, 4.0, 7.0, 3.0, 5.0, 6.0, 8.0],
    ...     "event": [1, 0, 1, 0, 1, 0, 1, 0],
    ...     "competing": [0, 1, 0, 0, 0, 1, 0, 1],
    ...     "group": ["x", "x", "x", "x", "y", "y", "y", "y"],
    ... })
    >>> fitted = CompetingRisks().fit(rows)
    >>> fitted.summary().select("model", "cause", "term", "estimable").rows()
    [('subdistribution', 'kidney_failure', 'group=y', True), ('cause_specific', 'kidney_failure', 'group=y', True), ('cause_specific', 'death', 'group=y', True)]
    """

    def __init__(self, rule: CompetingRisksRule | None = None, /, **options: Any) -> None:
        self.rule = resolve_rule(rule, options, type(self).__name__)

    def fit(self, endpoints: FrameLike, patients: FrameLike | None = None) -> CompetingRisks:
        """Run every part of the analysis; returns ``self``."""
        rows = prepare_competing_rows(endpoints, patients, self.rule)
        self.rows_, self.endpoint_, self.excluded_ = rows, rows.event_label, rows.excluded
        statements: list[str] = []
        self.fine_gray_: FineGray | None = None
        self.cause_specific_: CauseSpecificCox | None = None
        if rows.terms:
            self.fine_gray_ = FineGray(self.rule).fit_rows(rows)
            self.cause_specific_ = CauseSpecificCox(self.rule).fit_rows(rows)
            statements += self.fine_gray_.statements_ + self.cause_specific_.statements_
        else:
            statements.append(
                "one group and no covariates: no hazard ratio to estimate; cumulative "
                "incidence only"
            )
        test = gray_test(
            rows.time,
            rows.cause,
            rows.group,
            strata=rows.strata,
            rho=self.rule.gray_test_rho,
        )
        self.gray_test_ = test.as_frame(rows.event_label)
        if test.reason is not None:
            statements.append(f"Gray's test not computed: {test.reason}")
        self.cumulative_incidence_ = self._curves(rows)
        self.statements_ = list(dict.fromkeys(statements))
        return self

    def _curves(self, rows: CompetingRows) -> pl.DataFrame:
        found = aalen_johansen_by_group(rows.time, rows.cause, rows.group)
        null = pl.lit(None, dtype=pl.Float64)
        parts = [
            found.select(
                "group",
                pl.lit(cause).alias("cause"),
                "years",
                pl.col(column).alias("estimate"),
                null.alias("lower"),
                null.alias("upper"),
                pl.lit("cumulative_incidence").alias("measure"),
            )
            for cause, column in (
                (rows.event_label, "event_incidence"),
                (rows.competing_label, "competing_incidence"),
            )
        ]
        if self.fine_gray_ is not None and hasattr(self.fine_gray_, "cumulative_incidence_"):
            predicted = self.fine_gray_.cumulative_incidence_
            parts.append(predicted.with_columns(pl.lit(rows.event_label).alias("cause")))
        return pl.concat(p.select(list(CURVE_COLUMNS)) for p in parts).cast(
            pl.Schema(CURVE_COLUMNS)
        )

    def _check_fitted(self) -> None:
        if not hasattr(self, "rows_"):
            raise InputDataError("CompetingRisks: call .fit(endpoints, patients) first")

    def summary(self) -> pl.DataFrame:
        """Hazard ratios (``HAZARD_COLUMNS``): the subdistribution rows of the event of
        interest, then the cause-specific rows of the event and of the competing event."""
        self._check_fitted()
        if self.fine_gray_ is None or self.cause_specific_ is None:
            return pl.DataFrame(schema=HAZARD_COLUMNS)
        return pl.concat([self.fine_gray_.summary(), self.cause_specific_.summary()])

    def side_by_side(self) -> pl.DataFrame:
        """One row per term for the event of interest: ``term`` then ``hr, hr_lower,
        hr_upper, p, reason`` prefixed ``subdistribution_`` and ``cause_specific_``."""
        table = self.summary().filter(pl.col("cause") == self.rows_.event_label)
        values = ["hr", "hr_lower", "hr_upper", "p", "reason"]
        parts = [
            table.filter(pl.col("model") == model).select(
                "term", *(pl.col(v).alias(f"{model}_{v}") for v in values)
            )
            for model in ("subdistribution", "cause_specific")
        ]
        return parts[0].join(parts[1], on="term", how="full", coalesce=True, maintain_order="left")

    def methods_text(self) -> str:
        """A methods paragraph that says which hazard ratio is which."""
        self._check_fitted()
        rows, spec = self.rows_, self.rule
        rho = f"rho = {spec.gray_test_rho:g}"
        strata = (
            f", stratified by {', '.join(spec.gray_test_strata)}" if spec.gray_test_strata else ""
        )
        return (
            f"Competing risks: {rows.event_label} was analysed with {rows.competing_label} as "
            "competing event. Cumulative incidence per group was estimated by the "
            f"Aalen–Johansen method and compared between groups by Gray's test ({rho}{strata}). "
            "Subdistribution hazard ratios come from the Fine–Gray model: patients stay in "
            "the risk set after a competing event, weighted by the inverse probability of "
            "censoring (Kaplan–Meier estimate of the censoring distribution), with Breslow "
            "ties and the robust sandwich standard errors of Fine and Gray; they describe "
            f"the effect on the cumulative incidence of {rows.event_label}. Cause-specific "
            "hazard ratios come from Cox models in which the other event censors "
            f"follow-up ({spec.cause_specific_ties.capitalize()} ties, model-based standard "
            "errors); they describe the effect on the rate of each event among patients "
            "still free of both. The two are shown side by side and answer different "
            "questions (Austin, Lee & Fine, Circulation 2016)."
        )
