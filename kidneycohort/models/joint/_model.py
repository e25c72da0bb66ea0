"""The joint model of eGFR slope and informative dropout (:class:`JointSlopeModel`)."""

from __future__ import annotations

import logging
import warnings
from typing import Any, Self

import numpy as np
import polars as pl
from scipy import stats

from kidneycohort._frames import FrameLike
from kidneycohort._rules import resolve_rules
from kidneycohort.errors import ConvergenceError, InputDataError, StatisticalWarning
from kidneycohort.models.joint._data import JointData, joint_data, reorder_groups
from kidneycohort.models.joint._fit import JointOptimum, maximise
from kidneycohort.models.joint._likelihood import JointLikelihood, Layout
from kidneycohort.models.joint._rule import NOT_ESTIMABLE_NOTES, SUMMARY_COLUMNS, JointSlopeRule
from kidneycohort.models.mixed import MixedModelFit, fit_mixed_model, patient_blocks

logger = logging.getLogger(__name__)

__all__ = ["JointSlopeModel", "fit_separate_mixed_model"]


def fit_separate_mixed_model(
    data: JointData, slope_terms: list[str], *, tolerance: float | None = None
) -> MixedModelFit:
    """The same eGFR model alone, by ML (exact engine), on the same patients and values;
    the joint model's starting values. ``tolerance``: the engine's convergence tolerance
    (Newton decrement per value), its default when ``None``."""
    terms = ["intercept", *slope_terms]
    overrides: dict[str, Any] = {} if tolerance is None else {"tolerance": tolerance}
    code = data.group_code[data.row_patient]
    design = data.row_design
    columns = [(code == g)[:, None] * design for g in range(len(data.groups))]
    return fit_mixed_model(
        patient_blocks(
            data.patient_ids[data.row_patient],
            data.row_response,
            np.hstack(columns),
            design,
            fixed_names=[f"{g}: {t}" for g in data.groups for t in terms],
            random_names=terms,
        ),
        method="ml",
        fallback=False,
        **overrides,
    )


def baseline_cuts(data: JointData, pieces: int) -> np.ndarray:
    """Cut points of the piecewise baseline: quantiles of the dropout event times."""
    times = data.time[data.event > 0]
    if pieces <= 1 or times.size == 0:
        return np.empty(0)
    cuts = np.quantile(times, np.arange(1, pieces) / pieces)
    return np.unique(cuts[cuts > 0])


class JointSlopeModel:
    r"""Joint model of the eGFR slope and dropout by kidney failure or death.

    A linear mixed model of eGFR (random intercept and slope, or acute and chronic
    slopes with a knot) and a proportional-hazards model of dropout share the random
    effects (Henderson, Diggle & Dobson 2000; Rizopoulos 2012):

    .. math::

        y_{ij} = z(t_{ij})^\top(\beta_g + b_i) + \varepsilon_{ij}, \qquad
        h_i(t) = h_0(t)\exp\{\gamma_g + \alpha\, m_i(t)\},

    with :math:`m_i(t)` the current true eGFR :math:`z(t)^\top(\beta_g + b_i)`
    (``association="current_value"``) or the patient's random slope
    (``association="slope"``), and :math:`h_0` piecewise constant (pieces at quantiles
    of the dropout times) or Weibull. Parameters are estimated by maximum likelihood,
    integrating over :math:`b_i = L v_i`, :math:`v_i \sim N(0, I)` by adaptive
    Gauss–Hermite quadrature (see :mod:`~kidneycohort.models.joint._likelihood`).
    The treatment effect on slope, :math:`\beta_{g,\text{slope}} -
    \beta_{\text{ref},\text{slope}}`, is reported beside the same eGFR model fitted
    alone by ML on the same patients (``model="mixed"``), which is unbiased only when
    dropout is ignorable given the observed values (missing at random).

    Parameters
    ----------
    knot_years : float, optional
        Knot of the acute/chronic slopes; ``None`` (default) for one slope.
    rule : JointSlopeRule, optional
        Options; keyword ``options`` (any field of :class:`JointSlopeRule`) override it.

    Attributes
    ----------
    parameters_ : polars.DataFrame
        ``parameter, estimate, se`` of the joint model (on the fitting scale).
    diagnostics_ : dict
        ``converged, message, loglik, iterations, seconds`` and counts.
    excluded_ : polars.DataFrame
        ``reason, n_rows, n_patients`` of eGFR rows not used.

    References
    ----------
    .. [1] Henderson R, Diggle P, Dobson A. Joint modelling of longitudinal measurements
       and event time data. Biostatistics 2000;1:465-480. doi:10.1093/biostatistics/1.4.465
    .. [2] Rizopoulos D. Joint Models for Longitudinal and Time-to-Event Data, with
       Applications in R. Chapman & Hall/CRC, 2012.
    """

    def __init__(
        self, knot_years: float | None = None, *, rule: JointSlopeRule | None = None, **options: Any
    ) -> None:
        if knot_years is not None:
            options["knot_years"] = knot_years
        self.rule = resolve_rules(JointSlopeRule, rule, options, "JointSlopeModel")

    # ---- fit --------------------------------------------------------------------------

    def fit(self, egfr: FrameLike, patients: FrameLike | None, endpoints: FrameLike) -> Self:
        """Fit the joint and the separate mixed model; returns ``self``."""
        self.prepare(egfr, patients, endpoints)
        if self.reasons_["mixed"] is None:
            self._fit_mixed(self.data_)
        if self.reasons_["joint"] is None:
            self._fit_joint(self.data_)
        self._summary = self._summarise()
        return self

    def fit_observed(
        self, egfr: FrameLike, patients: FrameLike | None, endpoints: FrameLike
    ) -> Self:
        """Fit only the separate mixed model (the observed-data model of the sensitivity
        analyses); the joint rows of the summary say ``not_fitted``."""
        self.prepare(egfr, patients, endpoints)
        if self.reasons_["mixed"] is None:
            self._fit_mixed(self.data_)
        if self.reasons_["joint"] is None:
            self.reasons_["joint"] = "not_fitted"
        self._summary = self._summarise()
        return self

    def prepare(self, egfr: FrameLike, patients: FrameLike | None, endpoints: FrameLike) -> None:
        """Read and check the tables (``data_``, ``groups_``, ``excluded_``) without fitting."""
        spec = self.rule
        data = joint_data(
            egfr,
            patients,
            endpoints,
            group_column=spec.group_column,
            dropout_endpoints=spec.dropout_endpoints,
            equation=spec.equation,
            knot=spec.knot_years,
        )
        reference = spec.reference_group if spec.reference_group is not None else data.groups[0]
        data = reorder_groups(data, reference)
        self.data_, self.excluded_ = data, data.excluded
        self.groups_, self.reference_group_ = data.groups, reference
        self.slope_terms_ = (
            ["slope"] if spec.knot_years is None else ["acute_slope", "chronic_slope"]
        )
        self.reasons_: dict[str, str | None] = {"mixed": None, "joint": None}
        sizes = np.bincount(data.group_code, minlength=len(data.groups))
        if sizes.min() < spec.min_patients_per_group:
            self.reasons_ = {"mixed": "too_few_patients", "joint": "too_few_patients"}
        elif data.n_events == 0:
            self.reasons_["joint"] = "no_dropout_events"
        elif data.n_events < spec.min_events:
            self.reasons_["joint"] = "too_few_events"
        self.cuts_ = (
            baseline_cuts(data, spec.hazard_pieces)
            if spec.baseline_hazard == "piecewise"
            else np.empty(0)
        )
        self.layout_ = Layout.build(
            data.groups, self.slope_terms_, spec.baseline_hazard, self.cuts_.size + 1
        )
        self.mixed_: JointOptimum | None = None
        self.optimum_: JointOptimum | None = None

    def likelihood(
        self, quadrature_nodes: int | None = None, *, longitudinal_only: bool = False
    ) -> JointLikelihood:
        """The joint log-likelihood of the fitted data (``quadrature_nodes`` per effect);
        ``longitudinal_only`` leaves out the dropout model (the mixed model alone)."""
        spec = self.rule
        return JointLikelihood(
            self.data_,
            self.layout_,
            association=spec.association,
            cuts=self.cuts_,
            quadrature_nodes=quadrature_nodes or spec.quadrature_nodes,
            longitudinal_only=longitudinal_only,
        )

    def _start(self, data: JointData) -> np.ndarray:
        """Mixed-model ML estimates of the exact engine (pooled least squares if it
        fails), random-effect variances floored away from the boundary, crude hazards."""
        lay = self.layout_
        x = np.zeros(lay.size)
        design = data.row_design
        try:
            with warnings.catch_warnings():  # only a start: a boundary fit is floored below
                warnings.simplefilter("ignore", StatisticalWarning)
                mixed = fit_separate_mixed_model(data, self.slope_terms_)
            beta, sigma2 = mixed.fixed_effects, mixed.residual_variance
            covariance = mixed.random_covariance
        except (ConvergenceError, InputDataError) as error:
            logger.info("JointSlopeModel: start by least squares (%s)", error)
            code = data.group_code[data.row_patient]
            wide = np.hstack([(code == g)[:, None] * design for g in range(len(data.groups))])
            beta = np.linalg.lstsq(wide, data.row_response, rcond=None)[0]
            sigma2 = float(np.var(data.row_response - wide @ beta))
            covariance = np.zeros((lay.q, lay.q))
        floor = 0.05 * sigma2 / np.maximum((design**2).mean(axis=0), 1e-8)
        factor = np.linalg.cholesky(covariance + np.diag(floor))
        rows, cols = np.tril_indices(lay.q)
        entries = factor[rows, cols]
        entries[rows == cols] = np.log(entries[rows == cols])
        x[lay.beta] = beta
        x[lay.log_sigma] = 0.5 * np.log(sigma2)
        x[lay.chol] = entries
        exposure = max(float(data.time.sum()), 1e-8)
        rate = np.log(max(data.n_events, 0.5) / exposure)
        x[lay.hazard] = rate if lay.baseline == "piecewise" else [rate, 0.0]
        return x

    def _maximise(
        self, start: np.ndarray, free: np.ndarray, longitudinal_only: bool
    ) -> JointOptimum:
        spec = self.rule
        return maximise(
            self.likelihood(longitudinal_only=longitudinal_only),
            start,
            free,
            tolerance=spec.tolerance,
            max_iterations=spec.max_iterations,
        )

    @staticmethod
    def _failure(optimum: JointOptimum) -> str | None:
        if optimum.covariance is None:
            finite = np.isfinite(optimum.loglik) and np.isfinite(optimum.newton_decrement)
            return "hessian_not_positive_definite" if finite else "not_converged"
        return None if optimum.converged else "not_converged"

    def _fit_mixed(self, data: JointData) -> None:
        lay = self.layout_
        self.start_ = self._start(data)
        free = np.zeros(lay.size, dtype=bool)
        free[lay.beta] = True
        free[lay.log_sigma] = True
        free[lay.chol] = True
        self.mixed_ = self._maximise(self.start_, free, longitudinal_only=True)
        failure = self._failure(self.mixed_)
        if failure is not None:
            self.reasons_["mixed"] = "mixed_not_converged"

    def _fit_joint(self, data: JointData) -> None:
        spec, lay = self.rule, self.layout_
        start = self.start_.copy() if hasattr(self, "start_") else self._start(data)
        if self.mixed_ is not None and self.reasons_["mixed"] is None:
            longitudinal = slice(lay.beta.start, lay.chol.stop)
            start[longitudinal] = self.mixed_.x[longitudinal]
        start[lay.alpha] = spec.fixed_association or 0.0
        free = np.ones(lay.size, dtype=bool)
        if spec.fixed_association is not None:
            free[lay.alpha] = False
        self.optimum_ = self._maximise(start, free, longitudinal_only=False)
        self.reasons_["joint"] = self._failure(self.optimum_)

    # ---- results ----------------------------------------------------------------------

    def _quantities(self) -> list[tuple[str, str, np.ndarray]]:
        """``(contrast, quantity, weights over the fixed effects)`` of every slope row."""
        q = 1 + len(self.slope_terms_)
        size = len(self.groups_) * q
        knot = self.rule.knot_years
        if knot is None:
            parts = {"slope": {1: 1.0}}
        else:
            parts = {"acute_change": {1: knot}, "chronic_slope": {2: 1.0}}
        rows: list[tuple[str, str, np.ndarray]] = []

        def weights(group: int, terms: dict[int, float]) -> np.ndarray:
            out = np.zeros(size)
            for term, weight in terms.items():
                out[group * q + term] = weight
            return out

        for g, name in enumerate(self.groups_):
            rows.extend((name, quantity, weights(g, terms)) for quantity, terms in parts.items())
        for g, name in enumerate(self.groups_[1:], start=1):
            rows.extend(
                (
                    f"{name} - {self.reference_group_}",
                    quantity,
                    weights(g, terms) - weights(0, terms),
                )
                for quantity, terms in parts.items()
            )
        return rows

    def _rows(
        self,
        model: str,
        estimate: np.ndarray,
        covariance: np.ndarray | None,
        labels: list[tuple[str, str]],
    ) -> pl.DataFrame:
        reason = self.reasons_[model]
        n = len(labels)
        if reason is not None or covariance is None:
            reason = reason or "not_converged"
            values: dict[str, list[Any]] = {
                k: [None] * n for k in ("estimate", "se", "lower", "upper", "p")
            }
            flags, notes = [False] * n, [NOT_ESTIMABLE_NOTES[reason]] * n
        else:
            se = np.sqrt(np.clip(covariance, 0.0, None))
            z = float(stats.norm.ppf(0.5 + self.rule.confidence / 2.0))
            p = 2.0 * stats.norm.sf(np.abs(estimate / se))
            values = {
                "estimate": list(estimate),
                "se": list(se),
                "lower": list(estimate - z * se),
                "upper": list(estimate + z * se),
                "p": list(p),
            }
            flags, notes, reason = [True] * n, [""] * n, None
        return pl.DataFrame(
            {
                "model": [model] * n,
                "contrast": [c for c, _ in labels],
                "quantity": [q for _, q in labels],
                **values,
                "estimable": flags,
                "reason": [reason] * n,
                "note": notes,
            },
            schema_overrides={k: pl.Float64 for k in ("estimate", "se", "lower", "upper", "p")}
            | {"reason": pl.String},
        ).select(SUMMARY_COLUMNS)

    def _summarise(self) -> pl.DataFrame:
        quantities = self._quantities()
        labels = [(c, q) for c, q, _ in quantities]
        matrix = np.vstack([w for _, _, w in quantities])
        frames = []
        optimum = self.optimum_
        joint_labels = list(labels)
        if (
            optimum is not None
            and self.reasons_["joint"] is None
            and optimum.covariance is not None
        ):
            lay, cov = self.layout_, optimum.covariance
            full = np.zeros((matrix.shape[0], lay.size))
            full[:, lay.beta] = matrix
            fixed = self.rule.fixed_association is not None
            extra = [("all", "association", lay.alpha)] * (not fixed) + [
                (f"{g} - {self.reference_group_}", "log_hazard_ratio", lay.gamma.start + i)
                for i, g in enumerate(self.groups_[1:])
            ]
            rows = [full]
            for contrast, quantity, index in extra:
                vector = np.zeros(lay.size)
                vector[index] = 1.0
                rows.append(vector[None, :])
                joint_labels.append((contrast, quantity))
            full = np.vstack(rows)
            estimate = full @ optimum.x
            variance = np.einsum("ij,jk,ik->i", full, cov, full)
            frames.append(self._rows("joint", estimate, variance, joint_labels))
        else:
            joint_labels += [("all", "association")]
            frames.append(self._rows("joint", np.zeros(len(joint_labels)), None, joint_labels))
        mixed = self.mixed_
        if mixed is not None and mixed.covariance is not None and self.reasons_["mixed"] is None:
            block = mixed.covariance[self.layout_.beta, self.layout_.beta]
            estimate = matrix @ mixed.x[self.layout_.beta]
            variance = np.einsum("ij,jk,ik->i", matrix, block, matrix)
            frames.append(self._rows("mixed", estimate, variance, labels))
        else:
            frames.append(self._rows("mixed", np.zeros(len(labels)), None, labels))
        return pl.concat(frames)

    def summary(self) -> pl.DataFrame:
        """``model, contrast, quantity, estimate, se, lower, upper, p, estimable, reason,
        note``: per group and difference, from the joint model and the separate mixed
        model; joint-only rows ``association`` and ``log_hazard_ratio``. Rows that cannot
        be estimated carry no number, ``estimable=False``, a reason code and a note."""
        if not hasattr(self, "_summary"):
            raise InputDataError("JointSlopeModel: call .fit(egfr, patients, endpoints) first")
        return self._summary

    @property
    def parameters_(self) -> pl.DataFrame:
        """``parameter, estimate, se`` of the joint model (empty when not fitted)."""
        optimum = self.optimum_
        if optimum is None:
            return pl.DataFrame(
                schema={"parameter": pl.String, "estimate": pl.Float64, "se": pl.Float64}
            )
        se = (
            np.sqrt(np.clip(np.diag(optimum.covariance), 0.0, None))
            if optimum.covariance is not None
            else np.full(optimum.x.size, np.nan)
        )
        return pl.DataFrame(
            {"parameter": list(self.layout_.names), "estimate": optimum.x, "se": se}
        )

    @property
    def diagnostics_(self) -> dict[str, Any]:
        """How the joint fit went: ``converged, message, loglik, iterations, seconds``."""
        optimum, data = self.optimum_, self.data_
        common = {
            "n_patients": data.n_patients,
            "n_values": int(data.n_values.sum()),
            "n_events": data.n_events,
            "mixed_loglik": self.mixed_.loglik if self.mixed_ is not None else None,
            "reason": self.reasons_["joint"],
        }
        if optimum is None:
            return {
                "converged": False,
                "message": self.reasons_["joint"],
                "loglik": None,
                "iterations": 0,
                "seconds": 0.0,
                **common,
            }
        return {
            "converged": optimum.converged,
            "message": optimum.message,
            "loglik": optimum.loglik,
            "iterations": optimum.iterations,
            "seconds": optimum.seconds,
            "newton_decrement": optimum.newton_decrement,
            **common,
        }

    def quadrature_error(
        self, nodes: tuple[int, ...] = (3, 5, 7, 9), reference: int = 21
    ) -> pl.DataFrame:
        """Log-likelihood at the estimates with each number of nodes per random effect
        (grid re-centred), and its absolute difference from a ``reference``-node rule."""
        if self.optimum_ is None:
            raise InputDataError("JointSlopeModel: no joint fit to check")
        x = self.optimum_.x
        values = []
        for count in (*nodes, reference):
            likelihood = self.likelihood(count)
            values.append(likelihood(x, likelihood.grid(x), gradient=False)[0])
        return pl.DataFrame(
            {
                "nodes": list(nodes),
                "loglik": values[:-1],
                "abs_error": [abs(v - values[-1]) for v in values[:-1]],
            }
        )

    def methods_text(self) -> str:
        """A paragraph for the methods section of a report."""
        spec = self.rule
        link = (
            "the current true eGFR value"
            if spec.association == "current_value"
            else "the patient's random eGFR slope"
        )
        base = (
            f"a piecewise-constant baseline hazard ({spec.hazard_pieces} pieces at quantiles "
            "of the dropout times)"
            if spec.baseline_hazard == "piecewise"
            else "a Weibull baseline hazard"
        )
        slopes = (
            "a random intercept and slope"
            if spec.knot_years is None
            else f"a random intercept and acute and chronic slopes (knot at {spec.knot_years:g} years)"
        )
        dropout = " or ".join(e.replace("_", " ") for e in spec.dropout_endpoints)
        return (
            "To account for informative dropout, eGFR and the time to dropout "
            f"({dropout}, whichever came first) were modelled "
            "jointly with a shared-random-effects model (Henderson, Diggle & Dobson 2000; "
            f"Rizopoulos 2012): a linear mixed model of eGFR with {slopes} by group, and a "
            f"proportional-hazards model of dropout with {base}, the group, and {link} as "
            "predictors. Parameters were estimated by maximum likelihood with adaptive "
            f"Gauss-Hermite quadrature ({spec.quadrature_nodes} nodes per random effect) "
            "over each patient's random effects; standard errors come from the observed "
            "information (numerical Hessian). The treatment effect on slope is reported "
            "beside the same mixed model fitted alone by maximum likelihood on the same "
            "patients, which assumes dropout is missing at random."
        )
