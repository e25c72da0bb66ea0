"""The two fitters of the slope model: the exact engine (default) and statsmodels.

Both take the same design (response, fixed-effect matrix, patient codes, the time pieces
of the random slopes) and a starting random-effects structure, walk the same stated
fallback chain (unstructured -> diagonal -> one random slope -> random intercept), and
return the same :class:`SlopeFit`, so the contrasts, trajectories and tables of
:class:`~kidneycohort.models.mixed.SlopeModel` do not depend on the fitter.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import polars as pl

from kidneycohort.errors import ConvergenceError, StatisticalWarning
from kidneycohort.models._design import capture_warnings
from kidneycohort.models.mixed._blocks import patient_blocks
from kidneycohort.models.mixed._engine import RandomEffectsStep, fit_mixed_model
from kidneycohort.models.mixed._result import MixedModelFit

__all__ = ["FALLBACK", "SlopeFit", "fit_exact", "fit_statsmodels", "random_effect_names"]

# What each structure falls back to when its fit fails (stated, in order).
FALLBACK: dict[str, tuple[str, ...]] = {
    "unstructured": ("unstructured", "diagonal", "intercept_and_slope", "intercept"),
    "diagonal": ("diagonal", "intercept_and_slope", "intercept"),
    "intercept_and_slope": ("intercept_and_slope", "intercept"),
    "intercept": ("intercept",),
}
# statsmodels messages that make a fit unusable; its "Retrying ... with <optimizer>"
# notes are not failures by themselves (the next optimizer may converge).
_FAILURE_WORDS = ("not positive definite", "gradient optimization failed", "fit error")
_OPTIMIZERS = ["lbfgs", "bfgs", "cg"]


@dataclass
class SlopeFit:
    """What a fitter hands back: estimates and how the fit went."""

    beta: np.ndarray
    fixed_covariance: np.ndarray
    random_covariance: np.ndarray
    random_names: list[str]
    residual_variance: float
    structure: str
    messages: list[str]
    engine: str
    log_likelihood: float
    exact: MixedModelFit | None = None
    statsmodels_result: Any = field(default=None, repr=False)


def random_effect_names(structure: str, slope_terms: list[str]) -> list[str]:
    """The random effects of a structure of the fallback chain."""
    if structure in ("unstructured", "diagonal"):
        return ["intercept", *slope_terms]
    if structure == "intercept_and_slope":
        return ["intercept", "slope"]
    return ["intercept"]


def fit_exact(
    endog: np.ndarray,
    exog: np.ndarray,
    patient_codes: np.ndarray | pl.Series,
    pieces: list[np.ndarray],
    names: list[str],
    slope_terms: list[str],
    start: str,
    confidence: float,
) -> SlopeFit:
    """REML fit by the exact engine (:func:`~kidneycohort.models.mixed.fit_mixed_model`)."""
    random = np.column_stack([np.ones_like(endog), *pieces])
    blocks = patient_blocks(
        patient_codes,
        endog,
        exog,
        random,
        fixed_names=names,
        random_names=["intercept", *slope_terms],
    )
    steps = {
        "unstructured": RandomEffectsStep("unstructured", "unstructured"),
        "diagonal": RandomEffectsStep("diagonal", "diagonal"),
        # one random slope on time since index when the spline slopes cannot be separated
        "intercept_and_slope": RandomEffectsStep(
            "intercept_and_slope",
            "unstructured",
            {"intercept": {"intercept": 1.0}, "slope": dict.fromkeys(slope_terms, 1.0)},
        ),
        "intercept": RandomEffectsStep("intercept", "unstructured", ["intercept"]),
    }
    fit = fit_mixed_model(blocks, steps=[steps[s] for s in FALLBACK[start]], confidence=confidence)
    return SlopeFit(
        beta=fit.fixed_effects,
        fixed_covariance=fit.fixed_covariance,
        random_covariance=fit.random_covariance,
        random_names=list(fit.random_names),
        residual_variance=fit.residual_variance,
        structure=fit.structure,
        messages=list(fit.attempts),
        engine="exact",
        log_likelihood=fit.log_likelihood,
        exact=fit,
    )


def _statsmodels_structure(
    endog: np.ndarray,
    exog: np.ndarray,
    patient_codes: np.ndarray,
    pieces: list[np.ndarray],
    structure: str,
) -> tuple[Any, list[str]]:
    from statsmodels.regression.mixed_linear_model import MixedLM, MixedLMParams

    ones = np.ones_like(endog)
    if structure in ("unstructured", "diagonal"):
        exog_re = np.column_stack([ones, *pieces])
    elif structure == "intercept_and_slope":
        exog_re = np.column_stack([ones, np.sum(pieces, axis=0)])
    else:
        exog_re = ones[:, None]
    model = MixedLM(endog, exog, groups=patient_codes, exog_re=exog_re)
    free = None
    if structure == "diagonal":
        free = MixedLMParams.from_components(np.ones(exog.shape[1]), np.eye(exog_re.shape[1]))
    result, failure = None, None
    with capture_warnings() as captured:
        try:
            with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
                result = model.fit(reml=True, free=free, method=_OPTIMIZERS)
        except (np.linalg.LinAlgError, ValueError) as error:
            failure = f"fit error: {error}"
    messages = list(dict.fromkeys(captured.convergence))
    if failure:
        messages.append(failure)
    return result, messages


def fit_statsmodels(
    endog: np.ndarray,
    exog: np.ndarray,
    patient_codes: np.ndarray,
    pieces: list[np.ndarray],
    slope_terms: list[str],
    start: str,
) -> SlopeFit:
    """REML fit by statsmodels ``MixedLM`` (kept for cross-checks)."""
    every: list[str] = []
    attempts = FALLBACK[start]
    for position, structure in enumerate(attempts):
        result, messages = _statsmodels_structure(endog, exog, patient_codes, pieces, structure)
        every.extend(f"{structure}: {m}" for m in messages)
        failed = (
            result is None
            or not result.converged
            or any(word in m.lower() for m in messages for word in _FAILURE_WORDS)
        )
        if not failed:
            break
        if position + 1 < len(attempts):
            warnings.warn(
                f"SlopeModel: the '{structure}' random-effects fit did not converge "
                f"({'; '.join(messages) or 'optimizer did not converge'}); refitting with "
                f"'{attempts[position + 1]}' random effects. To keep '{structure}', try more "
                "values per patient, max_years to trim sparse late follow-up, or fewer covariates",
                StatisticalWarning,
                stacklevel=3,
            )
    else:
        raise ConvergenceError(
            "SlopeModel: no random-effects structure converged "
            f"({'; '.join(every[-3:])}); check the eGFR values for outliers and "
            "units, trim follow-up with max_years, or reduce covariates"
        )
    if any("boundary" in m.lower() or "singular" in m.lower() for m in messages):
        warnings.warn(
            f"SlopeModel: the '{structure}' fit has a random-effects variance at or near zero "
            "(boundary of the parameter space); fixed effects are reported, but a simpler "
            "random-effects structure may fit as well",
            StatisticalWarning,
            stacklevel=3,
        )
    k_fe = exog.shape[1]
    return SlopeFit(
        beta=np.asarray(result.fe_params, dtype=float),
        fixed_covariance=np.asarray(result.cov_params(), dtype=float)[:k_fe, :k_fe],
        random_covariance=np.asarray(result.cov_re, dtype=float),
        random_names=random_effect_names(structure, slope_terms),
        residual_variance=float(result.scale),
        structure=structure,
        messages=every,
        engine="statsmodels",
        log_likelihood=float(result.llf),
        statsmodels_result=result,
    )
