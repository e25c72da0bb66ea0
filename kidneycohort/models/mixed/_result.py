r"""The fitted mixed model: estimates, variance components, BLUPs, contrasts and tests.

Inference on fixed effects is Wald inference with the model-based covariance
:math:`\widehat{\operatorname{Var}}(\hat\beta) = \hat\sigma^2 M^{-1}` (lme4's
``vcov``), normal quantiles for confidence limits and two-sided normal p values (as
the slope model reports; lme4 itself prints t values without p values). Information
criteria follow lme4 [1]_: :math:`\mathrm{AIC} = -2\ell + 2k`,
:math:`\mathrm{BIC} = -2\ell + k \log n` with :math:`n` the number of values and
:math:`k` the fixed effects, covariance parameters and residual variance(s), where
:math:`\ell` is the REML log-likelihood for REML fits (so REML criteria only compare
fits with the same fixed effects).

References
----------
.. [1] Bates D, Maechler M, Bolker B, Walker S. Fitting linear mixed-effects models
   using lme4. J Stat Softw 2015;67(1):1-48. doi:10.18637/jss.v067.i01
.. [2] Henderson CR. Best linear unbiased estimation and prediction under a selection
   model. Biometrics 1975;31:423-447. doi:10.2307/2529430
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Literal

import numpy as np
import polars as pl
from scipy import stats

from kidneycohort.errors import InputDataError
from kidneycohort.models.mixed._objective import PatientPredictions
from kidneycohort.models.mixed._optimise import FitConvergence

__all__ = ["LikelihoodRatioTest", "MixedModelFit", "likelihood_ratio_test"]

ESTIMATE_COLUMNS = ("estimate", "se", "lower", "upper", "p")


def _wald_frame(
    labels: dict[str, Sequence[object] | pl.Series],
    estimate: np.ndarray,
    se: np.ndarray,
    confidence: float,
) -> pl.DataFrame:
    z = stats.norm.ppf(0.5 + confidence / 2.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        p = 2.0 * stats.norm.sf(np.abs(estimate / se))
    return pl.DataFrame(
        {
            **labels,
            "estimate": estimate,
            "se": se,
            "lower": estimate - z * se,
            "upper": estimate + z * se,
            "p": p,
        }
    )


@dataclass(frozen=True, eq=False)
class MixedModelFit:
    """A fitted one-level linear mixed model (see :func:`fit_mixed_model`).

    Attributes
    ----------
    method : {"reml", "ml"}
    covariance : {"unstructured", "diagonal"}
        Structure of the random-effects covariance that was accepted.
    structure : str
        Label of the accepted step of the fallback sequence.
    fixed_names, random_names : tuple of str
    fixed_effects : numpy.ndarray
        :math:`\\hat\\beta` ``(p,)``.
    fixed_covariance : numpy.ndarray
        :math:`\\hat\\sigma^2 M^{-1}` ``(p, p)``.
    random_covariance : numpy.ndarray
        :math:`\\hat G` ``(q, q)``.
    residual_variances : dict of str to float
        :math:`\\hat\\sigma^2_g` per residual group (one entry ``"all"`` by default).
    log_likelihood : float
        ML log-likelihood, or REML log-likelihood (minus half the REML criterion).
    n_parameters : int
        Fixed effects + covariance parameters + residual variances.
    n_observations, n_patients : int
    confidence : float
        Level of the confidence limits in the tables.
    convergence : FitConvergence
    attempts : tuple of str
        Every structure tried, in order, with how it ended.
    random_effects : polars.DataFrame
        BLUPs: ``patient_id``, one column per random effect and ``<effect>_se``, the
        conditional SD given the data at the estimated parameters (lme4's
        ``ranef(condVar = TRUE)``).
    """

    method: Literal["reml", "ml"]
    covariance: str
    structure: str
    fixed_names: tuple[str, ...]
    random_names: tuple[str, ...]
    fixed_effects: np.ndarray
    fixed_covariance: np.ndarray
    random_covariance: np.ndarray
    residual_variances: dict[str, float]
    log_likelihood: float
    n_parameters: int
    n_observations: int
    n_patients: int
    confidence: float
    convergence: FitConvergence
    attempts: tuple[str, ...]
    random_effects: pl.DataFrame
    data_summary: tuple[float, ...] = field(repr=False)
    _predictions: PatientPredictions = field(repr=False)
    _fixed_precision_inverse: np.ndarray = field(repr=False)

    # ---- summaries ------------------------------------------------------------------

    @property
    def residual_variance(self) -> float:
        """Residual variance of the first (reference) residual group."""
        return next(iter(self.residual_variances.values()))

    @property
    def deviance(self) -> float:
        """Minus twice the log-likelihood (the REML criterion for REML fits)."""
        return -2.0 * self.log_likelihood

    @property
    def aic(self) -> float:
        """Akaike's information criterion, lme4's convention."""
        return self.deviance + 2.0 * self.n_parameters

    @property
    def bic(self) -> float:
        """Bayesian information criterion with n = number of values (lme4)."""
        return self.deviance + self.n_parameters * float(np.log(self.n_observations))

    def fixed_effects_table(self, confidence: float | None = None) -> pl.DataFrame:
        """``term, estimate, se, lower, upper, p`` (Wald, normal quantiles)."""
        se = np.sqrt(np.diag(self.fixed_covariance))
        return _wald_frame(
            {"term": list(self.fixed_names)},
            self.fixed_effects,
            se,
            self.confidence if confidence is None else confidence,
        )

    def variance_components_table(self) -> pl.DataFrame:
        """One row per variance or covariance: ``level`` (``patient`` / ``residual``),
        ``term``, ``other_term`` (set for a covariance), ``variance`` (variance or
        covariance) and ``sd_or_correlation`` (lme4's ``as.data.frame(VarCorr(.))``)."""
        sd = np.sqrt(np.diag(self.random_covariance))
        rows: list[tuple[str, str, str | None, float, float]] = [
            ("patient", name, None, float(self.random_covariance[k, k]), float(sd[k]))
            for k, name in enumerate(self.random_names)
        ]
        for a in range(len(self.random_names)):
            for b in range(a + 1, len(self.random_names)):
                covariance = float(self.random_covariance[a, b])
                with np.errstate(divide="ignore", invalid="ignore"):
                    correlation = covariance / float(sd[a] * sd[b])
                rows.append(
                    ("patient", self.random_names[a], self.random_names[b], covariance, correlation)
                )
        for group, variance in self.residual_variances.items():
            rows.append(("residual", group, None, variance, float(np.sqrt(variance))))
        return pl.DataFrame(
            rows,
            schema={
                "level": pl.String,
                "term": pl.String,
                "other_term": pl.String,
                "variance": pl.Float64,
                "sd_or_correlation": pl.Float64,
            },
            orient="row",
        )

    def describe(self) -> str:
        """One sentence for a methods section and a report."""
        fit = "REML" if self.method == "reml" else "maximum likelihood"
        effects = ", ".join(self.random_names)
        residual = (
            "one residual variance"
            if len(self.residual_variances) == 1
            else f"a residual variance per group ({', '.join(self.residual_variances)})"
        )
        state = self.convergence
        ending = (
            f"converged in {state.iterations} iterations (gradient norm "
            f"{state.gradient_norm:.2g}, Newton decrement {state.newton_decrement:.2g})"
            if state.converged
            else "did NOT converge"
        )
        boundary = f"; at the boundary: {'; '.join(state.boundary)}" if state.boundary else ""
        return (
            f"Linear mixed model fitted by {fit} with {len(self.fixed_names)} fixed effects, "
            f"{self.covariance} random effects ({effects}) per patient and {residual}; "
            f"{self.n_patients} patients, {self.n_observations} values; {ending}{boundary}."
        )

    # ---- linear functions of beta ---------------------------------------------------

    def _weights(self, weights: np.ndarray | Mapping[str, float]) -> np.ndarray:
        if isinstance(weights, Mapping):
            vector = np.zeros(len(self.fixed_names))
            for name, value in weights.items():
                if name not in self.fixed_names:
                    raise InputDataError(
                        f"contrast: '{name}' is not a fixed effect {list(self.fixed_names)}"
                    )
                vector[self.fixed_names.index(name)] = value
            return vector[None, :]
        matrix = np.atleast_2d(np.asarray(weights, dtype=float))
        if matrix.shape[1] != len(self.fixed_names):
            raise InputDataError(
                f"contrast: {matrix.shape[1]} weights for {len(self.fixed_names)} fixed effects"
            )
        return matrix

    def contrast(
        self,
        weights: np.ndarray | Mapping[str, float],
        names: Sequence[str] | None = None,
        confidence: float | None = None,
    ) -> pl.DataFrame:
        r"""Linear contrasts :math:`c^\top\hat\beta` with SE :math:`\sqrt{c^\top
        \widehat{\operatorname{Var}}(\hat\beta) c}`, Wald limits and p.

        ``weights`` is a ``(k, p)`` matrix (one contrast per row) or ``{term: weight}``.
        Returns ``contrast, estimate, se, lower, upper, p``.
        """
        matrix = self._weights(weights)
        labels = list(names) if names is not None else [f"c{k}" for k in range(len(matrix))]
        estimate = matrix @ self.fixed_effects
        se = np.sqrt(np.einsum("ij,jk,ik->i", matrix, self.fixed_covariance, matrix))
        return _wald_frame(
            {"contrast": labels},
            estimate,
            se,
            self.confidence if confidence is None else confidence,
        )

    def mean_trajectory(
        self,
        times: Sequence[float] | np.ndarray,
        design: Callable[[np.ndarray], np.ndarray]
        | Mapping[str, Callable[[np.ndarray], np.ndarray]],
        confidence: float | None = None,
    ) -> pl.DataFrame:
        """Model-based mean response at ``times``: ``design(times)`` returns the fixed-effect
        design rows ``(len(times), p)``; a mapping gives one trajectory per label.
        Returns ``label, time, estimate, se, lower, upper, p``."""
        grid = np.asarray(times, dtype=float)
        designs = design if isinstance(design, Mapping) else {"mean": design}
        frames = []
        for label, make in designs.items():
            rows = np.asarray(make(grid), dtype=float)
            if rows.shape != (grid.size, len(self.fixed_names)):
                raise InputDataError(
                    f"mean_trajectory: design for '{label}' gave shape {rows.shape}, expected "
                    f"({grid.size}, {len(self.fixed_names)})"
                )
            contrast = self.contrast(rows, confidence=confidence).drop("contrast")
            frames.append(
                contrast.with_columns(pl.lit(label).alias("label"), pl.Series("time", grid)).select(
                    "label", "time", *ESTIMATE_COLUMNS
                )
            )
        return pl.concat(frames)

    def patient_contrast(
        self,
        fixed_weights: np.ndarray,
        random_weights: np.ndarray | Mapping[str, float],
        confidence: float | None = None,
    ) -> pl.DataFrame:
        r"""Per-patient model-based estimate :math:`c_i^\top\hat\beta + r^\top\hat b_i`
        (e.g. a patient's shrunken slope) with its prediction-error SE from Henderson's
        mixed-model equations [2]_, which counts the uncertainty of :math:`\hat\beta`:

        .. math::

            \operatorname{Var} = \hat\sigma^2 \bigl[ r^\top Q_i r
                + (c_i - J_i^\top r)^\top M^{-1} (c_i - J_i^\top r) \bigr]

        ``fixed_weights`` is ``(p,)`` or one row per patient ``(n_patients, p)`` in the
        order of :attr:`random_effects`. Returns ``patient_id, estimate, se, lower, upper, p``.
        """
        if isinstance(random_weights, Mapping):
            vector = np.array([float(random_weights.get(n, 0.0)) for n in self.random_names])
        else:
            vector = np.asarray(random_weights, dtype=float)
        fixed = np.broadcast_to(
            np.asarray(fixed_weights, dtype=float), (self.n_patients, len(self.fixed_names))
        )
        parts = self._predictions
        estimate = fixed @ self.fixed_effects + vector @ parts.random_effects
        sigma2 = self.residual_variance
        own = np.einsum("a,abn,b->n", vector, parts.conditional, vector)
        shifted = fixed - np.einsum("a,ajn->nj", vector, parts.fixed_link)
        spread = np.einsum("nj,jk,nk->n", shifted, self._fixed_precision_inverse, shifted)
        se = np.sqrt(sigma2 * (own + spread))
        ids = self.random_effects["patient_id"]
        return _wald_frame(
            {"patient_id": ids}, estimate, se, self.confidence if confidence is None else confidence
        )


@dataclass(frozen=True)
class LikelihoodRatioTest:
    """``statistic`` :math:`= 2(\\ell_1 - \\ell_0)`, ``df`` and the chi-squared ``p_value``."""

    statistic: float
    df: int
    p_value: float


def likelihood_ratio_test(smaller: MixedModelFit, larger: MixedModelFit) -> LikelihoodRatioTest:
    r"""Likelihood-ratio test of nested fits to the same data.

    :math:`2(\ell_\text{larger} - \ell_\text{smaller}) \sim \chi^2_{k_1 - k_0}` under the
    smaller model. REML likelihoods are comparable only with identical fixed effects;
    a test of a variance at zero is conservative (the chi-squared p value is about twice
    the boundary-corrected one; Self & Liang 1987, doi:10.1080/01621459.1987.10478472).

    Raises
    ------
    InputDataError
        Different methods or data, REML fits with different fixed effects, or a "larger"
        model without more parameters.
    """
    if smaller.method != larger.method:
        raise InputDataError(
            f"likelihood_ratio_test: one fit is {smaller.method}, the other {larger.method}; "
            "refit both with method='ml'"
        )
    if smaller.data_summary != larger.data_summary:
        raise InputDataError(
            "likelihood_ratio_test: the fits are to different data (values or patients differ)"
        )
    if smaller.method == "reml" and smaller.fixed_names != larger.fixed_names:
        raise InputDataError(
            "likelihood_ratio_test: REML fits with different fixed effects are not comparable; "
            "refit both with method='ml'"
        )
    df = larger.n_parameters - smaller.n_parameters
    if df <= 0:
        raise InputDataError(
            f"likelihood_ratio_test: the larger model has {larger.n_parameters} parameters, "
            f"not more than the smaller's {smaller.n_parameters}; pass (smaller, larger)"
        )
    statistic = max(0.0, 2.0 * (larger.log_likelihood - smaller.log_likelihood))
    return LikelihoodRatioTest(statistic, df, float(stats.chi2.sf(statistic, df)))
