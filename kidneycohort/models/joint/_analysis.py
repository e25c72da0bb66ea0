r"""The slope analysis under informative dropout as one configured analysis
(:class:`DropoutAnalysisRule`, config section ``dropout_analysis``): the joint model
beside the ordinary mixed model, the delta-adjusted tipping point and eGFR set to a
stated value at kidney failure, as three tidy tables and their methods paragraphs.

Every part that cannot be estimated (one group only, no dropout events, a fit that did
not converge) is a row with ``estimable = false``, a reason code and a one-line note,
never a number that looks real.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import polars as pl
from pydantic import Field

from kidneycohort._frames import FrameLike
from kidneycohort._rules import RuleModel
from kidneycohort.errors import ConvergenceError, InputDataError
from kidneycohort.models.joint._dropout_sensitivity import (
    delta_adjusted_slopes,
    stated_value_at_kidney_failure,
)
from kidneycohort.models.joint._model import JointSlopeModel
from kidneycohort.models.joint._rule import JointSlopeRule
from kidneycohort.schemas import DROPOUT_SENSITIVITY, DROPOUT_SLOPES

__all__ = [
    "DropoutAnalysis",
    "DropoutAnalysisRule",
    "StatedValuePart",
    "TippingPointPart",
    "dropout_analysis",
]


class TippingPointPart(RuleModel):
    """Delta-adjusted multiple imputation with a tipping-point search
    (config key ``dropout_analysis.tipping_point``)."""

    deltas: tuple[float, ...] = Field(
        (0.0, -1.0, -2.0, -3.0, -5.0),
        min_length=1,
        description="Shifts (mL/min/1.73 m² per year since dropout) of the imputed values "
        "of the non-reference arm; negative = faster decline after dropout than modelled.",
    )
    imputations: int = Field(20, ge=2, le=500, description="Imputations per delta.")
    seed: int = Field(0, ge=0, description="Seed of the imputations.")
    alpha: float = Field(0.05, gt=0, lt=1, description="Two-sided level of the conclusion.")
    planned_years: tuple[float, ...] | None = Field(
        None,
        description="Planned visit times (years) imputed after dropout; default: the visit "
        "times held by at least 5 % of patients.",
    )


class StatedValuePart(RuleModel):
    """eGFR set to a stated value at kidney failure
    (config key ``dropout_analysis.stated_value``)."""

    value: float = Field(
        10.0, gt=0, le=60, description="eGFR (mL/min/1.73 m²) added at kidney failure."
    )
    failure_endpoint: str = Field(
        "kidney_failure", description="Endpoint whose event time gets the stated value."
    )


class DropoutAnalysisRule(JointSlopeRule):
    """The slope analysis under informative dropout (config section ``dropout_analysis``):
    the joint model's options, and which analyses run."""

    knot_years: float | None = Field(
        None,
        gt=0,
        description="Knot of the acute/chronic slopes in years; null for one slope. In a "
        "run, the slope model's knot (slope_model.knot_years) unless set here.",
    )
    joint_model: bool = Field(True, description="Fit the joint model of eGFR and dropout.")
    tipping_point: TippingPointPart | None = Field(
        default_factory=TippingPointPart,
        description="Delta-adjusted tipping-point analysis; null to leave it out.",
    )
    stated_value: StatedValuePart | None = Field(
        default_factory=StatedValuePart,
        description="eGFR set to a stated value at kidney failure; null to leave it out.",
    )


@dataclass(frozen=True)
class DropoutAnalysis:
    """Result of :func:`dropout_analysis`: ``slopes`` (:data:`DROPOUT_SLOPES`, empty
    without the joint model), ``sensitivity`` (:data:`DROPOUT_SENSITIVITY`) and the
    methods paragraphs, one per analysis that ran."""

    slopes: pl.DataFrame
    sensitivity: pl.DataFrame
    methods: tuple[str, ...]


def _not_estimable(analysis: str, reason: str, note: str) -> pl.DataFrame:
    return pl.DataFrame(
        {"analysis": [analysis], "estimable": [False], "reason": [reason], "note": [note]},
        schema={k: DROPOUT_SENSITIVITY[k] for k in ("analysis", "estimable", "reason", "note")},
    ).select(
        [
            pl.col(name)
            if name in ("analysis", "estimable", "reason", "note")
            else pl.lit(None, dtype=dtype).alias(name)
            for name, dtype in DROPOUT_SENSITIVITY.items()
        ]
    )


def _reason(error: Exception) -> str:
    if isinstance(error, ConvergenceError):
        return "did_not_converge"
    return "one_group" if "two groups" in str(error) else "not_estimable"


def _tipping_rows(
    egfr: FrameLike,
    patients: FrameLike | None,
    endpoints: FrameLike,
    part: TippingPointPart,
    options: dict[str, object],
) -> tuple[pl.DataFrame, str | None]:
    try:
        result = delta_adjusted_slopes(
            egfr,
            patients,
            endpoints,
            deltas=part.deltas,
            imputations=part.imputations,
            seed=part.seed,
            alpha=part.alpha,
            planned_years=part.planned_years,
            **options,
        )
    except (ConvergenceError, InputDataError) as error:
        return _not_estimable("delta_adjusted", _reason(error), str(error)), None
    table = result.table.select(
        pl.lit("delta_adjusted").alias("analysis"),
        "delta",
        "step",
        pl.lit(result.contrast).alias("contrast"),
        pl.lit(result.quantity).alias("quantity"),
        "estimate",
        "se",
        "lower",
        "upper",
        "p",
        pl.lit(result.tipping_point, dtype=pl.Float64).alias("tipping_point"),
        pl.lit(True).alias("estimable"),
        pl.lit(None, dtype=pl.String).alias("reason"),
        pl.lit(result.note or None, dtype=pl.String).alias("note"),
    )
    return table.cast(pl.Schema(DROPOUT_SENSITIVITY)), result.methods_text()


def _stated_rows(
    egfr: FrameLike,
    patients: FrameLike | None,
    endpoints: FrameLike,
    part: StatedValuePart,
    options: dict[str, object],
    count_text: Callable[[int], str],
) -> tuple[pl.DataFrame, str | None]:
    options = {k: v for k, v in options.items() if k != "dropout_endpoints"}
    try:
        result = stated_value_at_kidney_failure(
            egfr,
            patients,
            endpoints,
            value=part.value,
            failure_endpoint=part.failure_endpoint,
            **options,  # type: ignore[arg-type]
        )
    except (ConvergenceError, InputDataError) as error:
        return _not_estimable("stated_value_at_kidney_failure", _reason(error), str(error)), None
    note = result.note or None
    if result.added_values == 0:
        note = f"no patient reached {part.failure_endpoint}: nothing was added"
    table = result.table.select(
        pl.lit("stated_value_at_kidney_failure").alias("analysis"),
        pl.lit(None, dtype=pl.Float64).alias("delta"),
        pl.col("analysis").alias("step"),
        "contrast",
        "quantity",
        "estimate",
        "se",
        "lower",
        "upper",
        "p",
        pl.lit(None, dtype=pl.Float64).alias("tipping_point"),
        pl.lit(True).alias("estimable"),
        pl.lit(None, dtype=pl.String).alias("reason"),
        pl.lit(note, dtype=pl.String).alias("note"),
    )
    return table.cast(pl.Schema(DROPOUT_SENSITIVITY)), result.methods_text(count_text)


def dropout_analysis(
    egfr: FrameLike,
    patients: FrameLike | None,
    endpoints: FrameLike,
    *,
    rule: DropoutAnalysisRule | None = None,
    count_text: Callable[[int], str] = str,
) -> DropoutAnalysis:
    """The joint model and the two sensitivity analyses a rule asks for, as tables.

    ``egfr``, ``patients`` and ``endpoints`` as for
    :class:`~kidneycohort.models.joint.JointSlopeModel`; ``count_text`` prints counts of
    patients in the methods text (small-cell protection). See the module docstring.
    """
    rule = rule or DropoutAnalysisRule()
    joint_options = rule.model_dump(include=set(JointSlopeRule.model_fields))
    methods: list[str] = []
    slopes = pl.DataFrame(schema=DROPOUT_SLOPES)
    if rule.joint_model:
        model = JointSlopeModel(rule=JointSlopeRule(**joint_options)).fit(egfr, patients, endpoints)
        slopes = model.summary().select(list(DROPOUT_SLOPES)).cast(pl.Schema(DROPOUT_SLOPES))
        methods.append(model.methods_text())
    parts = [pl.DataFrame(schema=DROPOUT_SENSITIVITY)]
    if rule.tipping_point is not None:
        rows, text = _tipping_rows(egfr, patients, endpoints, rule.tipping_point, joint_options)
        parts.append(rows)
        methods += [text] if text else []
    if rule.stated_value is not None:
        rows, text = _stated_rows(
            egfr, patients, endpoints, rule.stated_value, joint_options, count_text
        )
        parts.append(rows)
        methods += [text] if text else []
    return DropoutAnalysis(slopes, pl.concat(parts), tuple(methods))
