r"""An exact mixed-model engine for one grouping level (the patient), fitted from blocks.

:func:`fit_mixed_model` fits

.. math::

    y_i = X_i\beta + Z_i b_i + \varepsilon_i, \qquad b_i \sim N(0, G), \qquad
    \varepsilon_i \sim N(0, \sigma^2_{g(i)} I)

by REML or ML with any fixed-effect design (groups x time, spline pieces, covariates,
site), random effects on any of the per-patient columns, an unstructured or diagonal
:math:`G` and optionally a residual variance per group of patients. The likelihood,
its analytic gradient and :math:`\operatorname{Var}(\hat\beta)` are computed exactly
from per-patient blocks (:mod:`~kidneycohort.models.mixed._blocks`) with
:math:`\beta` and :math:`\sigma^2` profiled out (:mod:`~kidneycohort.models.mixed._objective`,
Bates et al. [1]_, section 3; Henderson [2]_; Laird & Ware [3]_), so the cost is linear
in patients and no n x n matrix is ever formed.

When a fit fails (the deviance cannot be evaluated or the optimum is not reached), a
stated sequence of simpler structures is tried: unstructured, then diagonal, then
fewer random effects (dropping the last), each step announced by a
:class:`~kidneycohort.errors.StatisticalWarning`. A fit with a variance at zero is not
a failure: it is reported (``convergence.boundary``) with a warning.

References
----------
.. [1] Bates D, Maechler M, Bolker B, Walker S. Fitting linear mixed-effects models
   using lme4. J Stat Softw 2015;67(1):1-48. doi:10.18637/jss.v067.i01
.. [2] Henderson CR. Best linear unbiased estimation and prediction under a selection
   model. Biometrics 1975;31:423-447. doi:10.2307/2529430
.. [3] Laird NM, Ware JH. Random-effects models for longitudinal data. Biometrics
   1982;38:963-974. doi:10.2307/2529876
"""

from __future__ import annotations

import logging
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import polars as pl
from pydantic import Field

from kidneycohort._frames import FrameLike
from kidneycohort._rules import RuleModel, resolve_rules
from kidneycohort.errors import ConvergenceError, StatisticalWarning
from kidneycohort.models.mixed._blocks import (
    PatientBlocks,
    combine_blocks,
    patient_blocks,
    patient_blocks_from_frame,
)
from kidneycohort.models.mixed._checks import check_estimable
from kidneycohort.models.mixed._linalg import one_blas_thread
from kidneycohort.models.mixed._objective import Covariance, ProfiledDeviance
from kidneycohort.models.mixed._optimise import (
    FitConvergence,
    OptimisationFailed,
    minimise_deviance,
)
from kidneycohort.models.mixed._result import (
    LikelihoodRatioTest,
    MixedModelFit,
    likelihood_ratio_test,
)

logger = logging.getLogger(__name__)

# the engine's whole public surface, gathered for the package that will export it
__all__ = [
    "LikelihoodRatioTest",
    "MixedModelFit",
    "MixedModelRule",
    "PatientBlocks",
    "RandomEffectsStep",
    "combine_blocks",
    "fallback_steps",
    "fit_mixed_model",
    "fit_patient_mixed_model",
    "likelihood_ratio_test",
    "patient_blocks",
    "patient_blocks_from_frame",
]


class MixedModelRule(RuleModel):
    """Options of the mixed-model engine."""

    method: Literal["reml", "ml"] = Field(
        "reml", description="REML (default) or maximum likelihood (for likelihood-ratio tests)."
    )
    covariance: Literal["unstructured", "diagonal"] = Field(
        "unstructured", description="Structure of the random-effects covariance tried first."
    )
    residual_variance_by_group: bool = Field(
        False, description="One residual variance per residual group of the blocks."
    )
    confidence: float = Field(0.95, gt=0, lt=1, description="Level of the confidence limits.")
    fallback: bool = Field(
        True, description="On a failed fit, try diagonal, then fewer random effects."
    )
    tolerance: float = Field(
        1e-10,
        gt=0,
        description="Largest Newton decrement per value (deviance units) counted as converged.",
    )
    max_iterations: int = Field(1000, gt=0, description="L-BFGS-B iteration limit.")


@dataclass(frozen=True)
class RandomEffectsStep:
    """One structure of the fallback sequence.

    ``effects`` is ``None`` (the random effects of the blocks), names to keep, or
    ``{new_name: {old_name: weight}}`` (see :meth:`PatientBlocks.with_random_effects`).
    """

    label: str
    covariance: Covariance
    effects: Sequence[str] | Mapping[str, Mapping[str, float]] | None = None


def fallback_steps(
    random_names: Sequence[str], covariance: Covariance, *, fallback: bool = True
) -> list[RandomEffectsStep]:
    """The default sequence: the requested structure, then diagonal, then the random
    effects without the last one, down to the first alone."""
    steps = [RandomEffectsStep(covariance, covariance)]
    if not fallback:
        return steps
    if covariance == "unstructured" and len(random_names) > 1:
        steps.append(RandomEffectsStep("diagonal", "diagonal"))
    for keep in range(len(random_names) - 1, 0, -1):
        names = tuple(random_names[:keep])
        steps.append(RandomEffectsStep(" + ".join(names), covariance, names))
    return steps


def _result(
    blocks: PatientBlocks,
    deviance: ProfiledDeviance,
    x: np.ndarray,
    convergence: FitConvergence,
    rule: MixedModelRule,
    step: RandomEffectsStep,
    attempts: list[str],
) -> MixedModelFit:
    evaluation = deviance(x, gradient=False)
    sigma2 = evaluation.penalised_rss / deviance.dof
    factor = deviance.factor(x)
    precision_inverse = np.linalg.inv(evaluation.fixed_precision)
    precision_inverse = (precision_inverse + precision_inverse.T) / 2.0
    predictions = deviance.predictions(x, evaluation.beta)
    conditional_sd = np.sqrt(sigma2 * np.einsum("aan->an", predictions.conditional).clip(min=0.0))
    effects = {name: predictions.random_effects[k] for k, name in enumerate(blocks.random_names)}
    spread = {f"{name}_se": conditional_sd[k] for k, name in enumerate(blocks.random_names)}
    ratios = np.exp(2.0 * deviance.log_ratios(x))
    return MixedModelFit(
        method=rule.method,
        covariance=step.covariance,
        structure=step.label,
        fixed_names=blocks.fixed_names,
        random_names=blocks.random_names,
        fixed_effects=evaluation.beta,
        fixed_covariance=sigma2 * precision_inverse,
        random_covariance=sigma2 * factor @ factor.T,
        residual_variances={
            g: float(sigma2 * r) for g, r in zip(deviance.groups, ratios, strict=True)
        },
        log_likelihood=-evaluation.value / 2.0,
        n_parameters=deviance.p + deviance.n_parameters + 1,
        n_observations=blocks.n_observations,
        n_patients=blocks.n_patients,
        confidence=rule.confidence,
        convergence=convergence,
        attempts=tuple(attempts),
        random_effects=pl.DataFrame({"patient_id": blocks.patient_ids, **effects, **spread}),
        data_summary=(
            float(blocks.n_observations),
            float(blocks.n_patients),
            float(blocks.response_square.sum()),
        ),
        _predictions=predictions,
        _fixed_precision_inverse=precision_inverse,
    )


def _attempt(
    blocks: PatientBlocks, step: RandomEffectsStep, rule: MixedModelRule
) -> tuple[ProfiledDeviance, np.ndarray | None, FitConvergence | None, str | None]:
    deviance = ProfiledDeviance(
        blocks,
        covariance=step.covariance,
        reml=rule.method == "reml",
        residual_by_group=rule.residual_variance_by_group,
    )
    try:
        with one_blas_thread():
            x, _, report = minimise_deviance(
                deviance, tolerance=rule.tolerance, max_iterations=rule.max_iterations
            )
    except OptimisationFailed as error:
        return deviance, None, None, str(error)
    if not report.converged:
        return (
            deviance,
            x,
            report,
            f"did not converge (Newton decrement {report.newton_decrement:.3g} after "
            f"{report.iterations} iterations: {report.message})",
        )
    return deviance, x, report, None


def fit_mixed_model(
    blocks: PatientBlocks,
    rule: MixedModelRule | None = None,
    *,
    steps: Sequence[RandomEffectsStep] | None = None,
    **overrides: Any,
) -> MixedModelFit:
    """Fit the mixed model to per-patient blocks.

    Parameters
    ----------
    blocks : PatientBlocks
        From :func:`patient_blocks`, :func:`patient_blocks_from_frame` or
        :func:`combine_blocks`.
    rule : MixedModelRule, optional
        Defaults: REML, unstructured, one residual variance, 95 % limits, fallback on.
    steps : sequence of RandomEffectsStep, optional
        An explicit fallback sequence instead of :func:`fallback_steps`.
    **overrides
        Option fields by keyword (``method="ml"``, ...).

    Returns
    -------
    MixedModelFit

    Raises
    ------
    InputDataError
        A model that cannot be estimated from these data (the cause in one line).
    ConvergenceError
        When no step of the fallback sequence converges.
    """
    settings = resolve_rules(MixedModelRule, rule, overrides, "fit_mixed_model")
    sequence = list(
        steps
        or fallback_steps(blocks.random_names, settings.covariance, fallback=settings.fallback)
    )
    check_estimable(blocks, reml=settings.method == "reml")
    attempts: list[str] = []
    for position, step in enumerate(sequence):
        trial = blocks if step.effects is None else blocks.with_random_effects(step.effects)
        check_estimable(trial, reml=settings.method == "reml")
        deviance, x, report, failure = _attempt(trial, step, settings)
        if failure is None and x is not None and report is not None:
            attempts.append(f"{step.label}: converged")
            break
        attempts.append(f"{step.label}: {failure}")
        logger.info("mixed model: %s fit failed: %s", step.label, failure)
        if position + 1 < len(sequence):
            warnings.warn(
                f"mixed model: the '{step.label}' fit failed ({failure}); refitting with "
                f"'{sequence[position + 1].label}' random effects",
                StatisticalWarning,
                stacklevel=2,
            )
    else:
        raise ConvergenceError(
            f"mixed model: no random-effects structure could be fitted ({'; '.join(attempts)}); "
            "check the response for outliers and units, or simplify the random effects"
        )
    if report.boundary:
        warnings.warn(
            f"mixed model: the '{step.label}' fit is at the boundary of the parameter space "
            f"({'; '.join(report.boundary)}); fixed effects are valid, but a simpler "
            "random-effects structure may fit as well",
            StatisticalWarning,
            stacklevel=2,
        )
    return _result(trial, deviance, x, report, settings, step, attempts)


def fit_patient_mixed_model(
    frame: FrameLike,
    *,
    response: str,
    fixed: Sequence[str],
    random: Sequence[str],
    patient: str = "patient_id",
    residual_variance_by: str | None = None,
    rule: MixedModelRule | None = None,
    steps: Sequence[RandomEffectsStep] | None = None,
    **overrides: Any,
) -> MixedModelFit:
    """Fit the mixed model to a long table (polars or pandas), one row per value.

    Parameters
    ----------
    frame
        Rows with ``patient``, ``response`` and the design columns.
    response
        Column of the response (e.g. ``egfr``).
    fixed, random
        Numeric design columns of the fixed and random effects; ``"intercept"`` is a
        column of ones unless the table has one of that name.
    patient
        Column of the patient id.
    residual_variance_by
        Column of a patient attribute (e.g. the arm) with one residual variance per level.
    rule, steps, **overrides
        As in :func:`fit_mixed_model`.

    Examples
    --------
    >>> import numpy as np, polars as pl
    >>> rng = np.random.default_rng(1)
    >>> years = np.tile(np.arange(6.0), 40)
    >>> patient = np.repeat(np.arange(40), 6)
    >>> egfr = 60 - 2 * years + rng.normal(0, 8, 40)[patient] + rng.normal(0, 2, years.size)
    >>> table = pl.DataFrame({"patient_id": patient, "years": years, "egfr": egfr})
    >>> fit = fit_patient_mixed_model(
    ...     table, response="egfr", fixed=["intercept", "years"], random=["intercept"]
    ... )
    >>> fit.fixed_effects_table()["term"].to_list(), fit.convergence.converged
    (['intercept', 'years'], True)
    """
    if residual_variance_by is not None:
        overrides = {**overrides, "residual_variance_by_group": True}
    blocks = patient_blocks_from_frame(
        frame,
        response=response,
        fixed=fixed,
        random=random,
        patient=patient,
        residual_group=residual_variance_by,
    )
    return fit_mixed_model(blocks, rule, steps=steps, **overrides)
