"""The Cox proportional-hazards model of one endpoint with its proportional-hazards test."""

from __future__ import annotations

import logging
from typing import Any

import numpy as np
import polars as pl
from lifelines import CoxPHFitter
from lifelines.exceptions import ConvergenceError as LifelinesConvergenceError

from kidneycohort._frames import FrameLike
from kidneycohort._rules import resolve_rules
from kidneycohort.errors import ConvergenceError, InputDataError, did_you_mean
from kidneycohort.models._design import capture_warnings, encode_covariates
from kidneycohort.models.survival._data import _prepare, _warn_all
from kidneycohort.models.survival._efron import VectorisedCoxPHFitter
from kidneycohort.models.survival._estimability import with_estimability
from kidneycohort.models.survival._ph_test import proportional_hazards_test
from kidneycohort.models.survival._rule import SurvivalRule

__all__ = ["CoxModel"]

logger = logging.getLogger(__name__)


class CoxModel:
    r"""Cox proportional-hazards model of one endpoint: group, covariates and strata.

    .. math::

        h_i(t) = h_{0,s(i)}(t) \exp(\beta^\top x_i)

    with a baseline hazard per stratum :math:`s(i)`, Efron's handling of ties (lifelines
    ``CoxPHFitter``, its Newton derivatives vectorised: :class:`VectorisedCoxPHFitter`).
    The group enters as indicators of each group against
    ``reference_group`` (terms ``<group_column>=<level>``); text covariates likewise.
    Beside the fit, the proportional-hazards assumption is checked per term by the
    scaled-Schoenfeld-residual test of Grambsch and Therneau with Kaplan–Meier time
    transform (:func:`~kidneycohort.models.survival.proportional_hazards_test`, vectorised;
    the statistics of lifelines' ``proportional_hazard_test(time_transform="km")``).

    Parameters
    ----------
    endpoint : str, optional
        Endpoint to model; needed when the table holds several.
    group_column : str, default "group"
        Arm / exposure column; ``None`` fits covariates only.
    reference_group : str, optional
        Reference level of the group (default: first, sorted).
    covariates, strata : sequence of str
        Patients columns adjusted for / stratified on.
    confidence : float, default 0.95
        Confidence level of the hazard-ratio limits.

    Attributes
    ----------
    fitter_ : lifelines.CoxPHFitter
        A :class:`VectorisedCoxPHFitter` (a ``CoxPHFitter`` subclass).
    ph_test_ : polars.DataFrame
        ``term, test_statistic, p``.
    ph_global_ : polars.DataFrame
        The global test: ``term`` ("GLOBAL"), ``test_statistic, df, p``.
    n_patients_, n_events_ : int
    excluded_ : polars.DataFrame
        ``patient_id, reason`` of rows left out (missing covariate or stratum).

    Raises
    ------
    ConvergenceError
        When the partial likelihood cannot be maximised (e.g. a group without events);
        the message says what to try.

    References
    ----------
    .. [1] Cox DR. Regression models and life-tables. J R Stat Soc B 1972;34:187-220.
    .. [2] Grambsch PM, Therneau TM. Proportional hazards tests and diagnostics based on
       weighted residuals. Biometrika 1994;81:515-526. doi:10.1093/biomet/81.3.515
    """

    def __init__(
        self, rule: SurvivalRule | None = None, /, *, endpoint: str | None = None, **options: Any
    ) -> None:
        self.rule = resolve_rules(SurvivalRule, rule, options, type(self).__name__)
        self.endpoint = endpoint

    def fit(self, endpoints: FrameLike, patients: FrameLike | None = None) -> CoxModel:
        """Fit the model; returns ``self``."""
        group_column = self.rule.group_column or "group"
        rows, excluded, self.endpoint_ = _prepare(
            endpoints,
            patients,
            endpoint=self.endpoint,
            group_column=group_column,
            extra_columns=[*self.rule.covariates, *self.rule.strata],
        )
        self.excluded_ = excluded
        terms_frame = []
        names: list[str] = []
        if self.rule.group_column is not None:
            groups = sorted(rows["group"].unique().to_list())
            reference = (
                self.rule.reference_group if self.rule.reference_group is not None else groups[0]
            )
            if reference not in groups:
                raise InputDataError(
                    f"reference_group: '{reference}' is not a value of '{group_column}' "
                    f"(values: {groups}){did_you_mean(reference, groups)}"
                )
            self.reference_group_ = reference
            for level in groups:
                if level != reference:
                    name = f"{group_column}={level}"
                    terms_frame.append((rows["group"] == level).cast(pl.Float64).alias(name))
                    names.append(name)
        encoded, covariate_names = encode_covariates(rows, self.rule.covariates, "patients")
        if encoded.width:
            terms_frame.extend(encoded.get_columns())
            names.extend(covariate_names)
        if not names:
            raise InputDataError(
                "CoxModel: nothing to model; give a group_column with two or more groups or covariates"
            )
        data = pl.DataFrame(terms_frame).with_columns(
            rows["years"].alias("_years"), rows["event"].cast(pl.Int64).alias("_event")
        )
        strata_names = [f"_stratum_{i}" for i in range(len(self.rule.strata))]
        if self.rule.strata:
            data = data.with_columns(
                rows[s].cast(pl.String).alias(n)
                for s, n in zip(self.rule.strata, strata_names, strict=True)
            )
        frame = data.to_pandas()
        self.n_patients_ = rows.height
        self.n_events_ = int(rows["event"].cast(pl.Int64).sum())
        if self.n_events_ == 0:
            raise ConvergenceError(
                f"CoxModel ({self.endpoint_}): no events among {rows.height} patients; a hazard "
                "ratio cannot be estimated - report the event counts instead"
            )
        fitter = VectorisedCoxPHFitter(alpha=1.0 - self.rule.confidence)
        try:
            with capture_warnings() as captured:
                fitter.fit(
                    frame,
                    duration_col="_years",
                    event_col="_event",
                    strata=strata_names or None,
                )
        except LifelinesConvergenceError as error:
            raise ConvergenceError(
                f"CoxModel ({self.endpoint_}): the fit did not converge "
                f"({str(error).splitlines()[0]}); check for a group or covariate level without "
                "events, collinear covariates, or fewer covariates"
            ) from error
        _warn_all(
            captured.convergence,
            f"CoxModel ({self.endpoint_})",
            "check groups or covariate levels with few events and collinear covariates",
        )
        self.converged_ = not captured.convergence
        self.fitter_ = fitter
        self.terms_ = names
        self._summary = self._tidy_summary(fitter, names, rows, group_column)
        ph = proportional_hazards_test(
            data["_years"].to_numpy(),
            data["_event"].to_numpy(),
            data.select(names).to_numpy(),
            fitter.params_.loc[names].to_numpy(dtype=float),
            fitter.variance_matrix_.loc[names, names].to_numpy(dtype=float),
            strata=[data[n].to_numpy() for n in strata_names] or None,
            time_transform="km",
            names=names,
        )
        self.ph_test_ = ph.filter(pl.col("term") != "GLOBAL").select("term", "test_statistic", "p")
        self.ph_global_ = ph.filter(pl.col("term") == "GLOBAL")
        flagged = self.ph_test_.filter(pl.col("p") < 0.05)
        if flagged.height:
            logger.info(
                "%s: proportional-hazards test p < 0.05 for %s (see .ph_test_)",
                self.endpoint_,
                ", ".join(flagged["term"].to_list()),
            )
        return self

    def _tidy_summary(
        self, fitter: CoxPHFitter, names: list[str], rows: pl.DataFrame, group_column: str
    ) -> pl.DataFrame:
        """lifelines' summary as one row per term, with the estimability rule applied."""
        summary = fitter.summary
        # an unbounded fit (separation) overflows to inf; the estimability rule rejects it
        with np.errstate(over="ignore"):
            tidy = self._tidy_numbers(summary, names)
        return with_estimability(
            tidy.join(self._term_events(rows, group_column), on="term", how="left"),
            converged=self.converged_,
            min_events_per_group=self.rule.min_events_per_group,
        )

    @staticmethod
    def _tidy_numbers(summary: Any, names: list[str]) -> pl.DataFrame:
        return pl.DataFrame(
            {
                "term": names,
                "hr": summary.loc[names, "exp(coef)"].to_numpy(dtype=float),
                "hr_lower": np.exp(
                    summary.loc[names].filter(like="coef lower").iloc[:, 0].to_numpy(dtype=float)
                ),
                "hr_upper": np.exp(
                    summary.loc[names].filter(like="coef upper").iloc[:, 0].to_numpy(dtype=float)
                ),
                "p": summary.loc[names, "p"].to_numpy(dtype=float),
                "log_hr": summary.loc[names, "coef"].to_numpy(dtype=float),
                "se": summary.loc[names, "se(coef)"].to_numpy(dtype=float),
            }
        )

    def _term_events(self, rows: pl.DataFrame, group_column: str) -> pl.DataFrame:
        """Events in each group term's group and in the reference group."""
        if self.rule.group_column is None:
            return pl.DataFrame(
                schema={"term": pl.String, "events": pl.Int64, "reference_events": pl.Int64}
            )
        events = dict(rows.group_by("group").agg(pl.col("event").cast(pl.Int64).sum()).iter_rows())
        return pl.DataFrame(
            {
                "term": [f"{group_column}={g}" for g in events if g != self.reference_group_],
                "events": [n for g, n in events.items() if g != self.reference_group_],
            },
            schema={"term": pl.String, "events": pl.Int64},
        ).with_columns(
            pl.lit(events[self.reference_group_], dtype=pl.Int64).alias("reference_events")
        )

    def summary(self) -> pl.DataFrame:
        """``term, hr, hr_lower, hr_upper, p, log_hr, se`` per term, with ``events`` and
        ``reference_events`` of group terms and the estimability rule's ``estimable`` and
        ``reason`` (:mod:`kidneycohort.models.survival._estimability`; numbers null where
        not estimable)."""
        if not hasattr(self, "_summary"):
            raise InputDataError("CoxModel: call .fit(endpoints, patients) first")
        return self._summary
