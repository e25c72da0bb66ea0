"""GFR-estimating equations: the registry, :func:`evaluate` and the inverse solvers.

One function per equation lives in a family module (``ckd_epi``, ``mdrd``, ``ekfc``,
``full_age``, ``elderly``, ``pediatric``, ``clearance``); each has an
:class:`EquationSpec` entry in :data:`REGISTRY`. The registry does the shared work:
dispatch by id, input coercion (scalars, lists, numpy arrays, pandas or polars Series),
validated age ranges, NaN handling and per-element reasons. Each family module keeps its
published numbers as named constants at its top; where each one comes from, and whether it
was re-read or recalled, is in :mod:`kidneycohort.provenance`.

>>> from kidneycohort.equations import evaluate
>>> round(evaluate("ckd_epi_2021_cr", creatinine_mg_dl=0.9, age=40, sex="male"), 2)
110.73
>>> evaluate("ckd_epi_2021_cr", creatinine_mg_dl=0.9, age=12, sex="male")
nan
"""

from __future__ import annotations

import logging
from collections.abc import Mapping
from typing import Any, NamedTuple

import numpy as np
import numpy.typing as npt
import polars as pl

from kidneycohort.equations import (
    ckd_epi,
    clearance,
    ekfc,
    elderly,
    full_age,
    mdrd,
    pediatric,
)
from kidneycohort.equations._core import (
    AGE_ABOVE,
    AGE_BELOW,
    INVALID_VALUE,
    MISSING_INPUT,
    NONPOSITIVE_VALUE,
    OK,
    OUTSIDE_DOMAIN,
    REASON_CODES,
    ArrayLike,
    EquationSpec,
    FloatArray,
    Prepared,
    as_float_array,
    bisect_log,
    finish,
    invert_power_shape,
    prepare,
    reason_indices,
    reasons_for,
    run_kernel,
)
from kidneycohort.equations.body_size import bsa_dubois, bsa_mosteller, deindex_egfr, index_gfr
from kidneycohort.errors import InputDataError, UnknownEquationError, did_you_mean

logger = logging.getLogger("kidneycohort.equations")

REGISTRY: dict[str, EquationSpec] = {
    spec.id: spec
    for module in (ckd_epi, mdrd, ekfc, full_age, elderly, clearance, pediatric)
    for spec in module.SPECS
}
"""Every registered equation by id, in listing order."""

__all__ = [
    "AGE_ABOVE",
    "AGE_BELOW",
    "INVALID_VALUE",
    "MISSING_INPUT",
    "NONPOSITIVE_VALUE",
    "OK",
    "OUTSIDE_DOMAIN",
    "REASON_CODES",
    "REGISTRY",
    "EquationReasonIndex",
    "EquationResult",
    "EquationSpec",
    "bsa_dubois",
    "bsa_mosteller",
    "deindex_egfr",
    "equation_ids",
    "evaluate",
    "evaluate_with_reason",
    "evaluate_with_reason_index",
    "get_equation",
    "index_gfr",
    "registry_table",
    "solve_creatinine",
    "solve_cystatin_c",
]


class EquationResult(NamedTuple):
    """Values and per-element reason codes (``""`` where the value was computed)."""

    values: FloatArray | float
    reasons: npt.NDArray[np.str_] | str


def equation_ids() -> tuple[str, ...]:
    """All registered equation ids, in listing order."""
    return tuple(REGISTRY)


def get_equation(equation_id: str) -> EquationSpec:
    """Return the registry entry for ``equation_id``.

    Raises
    ------
    UnknownEquationError
        When the id is not registered (with a suggestion for near misses).
    """
    try:
        return REGISTRY[equation_id]
    except (KeyError, TypeError):
        raise UnknownEquationError(
            f"unknown equation id {equation_id!r}{did_you_mean(str(equation_id), REGISTRY)}; "
            "run `kidneycohort equations` to list them"
        ) from None


def _collect(spec: EquationSpec, given: Mapping[str, Any], what: str) -> None:
    for name in spec.inputs:
        if given.get(name) is None:
            raise InputDataError(
                f"{spec.id}: {what} needs {name!r} (inputs: {', '.join(spec.inputs)}); "
                f"pass {name}=... (NaN or None inside an array marks a missing value)"
            )


def _prepare(
    equation_id: str,
    given: dict[str, Any],
    allow_outside_age: bool,
    apply_race_coefficient: bool,
    what: str,
) -> tuple[EquationSpec, Prepared]:
    spec = get_equation(equation_id)
    _collect(spec, given, what)
    if apply_race_coefficient and not spec.race_coefficient:
        logger.debug("%s has no race coefficient; apply_race_coefficient ignored", spec.id)
    prepared = prepare(
        spec,
        given,
        apply_age_range=not allow_outside_age,
        apply_race_coefficient=apply_race_coefficient,
    )
    return spec, prepared


def evaluate(
    equation_id: str,
    *,
    creatinine_mg_dl: ArrayLike = None,
    cystatin_c_mg_l: ArrayLike = None,
    age: ArrayLike = None,
    sex: ArrayLike = None,
    height_cm: ArrayLike = None,
    weight_kg: ArrayLike = None,
    black_race: ArrayLike = None,
    allow_outside_age: bool = False,
    apply_race_coefficient: bool = False,
) -> FloatArray | float:
    """Evaluate one registered equation on scalars or arrays.

    Parameters
    ----------
    equation_id : str
        A registry id, e.g. ``"ckd_epi_2021_cr"`` (see :func:`registry_table`).
    creatinine_mg_dl, cystatin_c_mg_l : array-like, optional
        Serum creatinine in mg/dL and cystatin C in mg/L (convert with
        :mod:`kidneycohort.units`).
    age : array-like
        Age in years (every equation checks its validated range).
    sex : array-like of str, optional
        the sex vocabulary of :mod:`kidneycohort.vocabulary` (``female``/``male``, ``f``/``m``, ...); another code is an error naming it.
    height_cm, weight_kg : array-like, optional
        For the height-based children's equations and Cockcroft–Gault.
    black_race : array-like of bool, optional
        Read only by legacy equations with a race coefficient, and only when
        ``apply_race_coefficient`` is True.
    allow_outside_age : bool
        Compute outside the validated age range instead of returning NaN.
    apply_race_coefficient : bool
        Apply a legacy race coefficient (issues an
        :class:`~kidneycohort.errors.EquationWarning`).

    Returns
    -------
    numpy.ndarray or float
        eGFR in the equation's unit (a float when every input is a scalar), NaN where
        not computable; :func:`evaluate_with_reason` says why.

    Raises
    ------
    UnknownEquationError
        Unknown id.
    InputDataError
        A required input not passed at all, non-numeric values, or arrays of
        different lengths.
    """
    given = {
        "creatinine_mg_dl": creatinine_mg_dl,
        "cystatin_c_mg_l": cystatin_c_mg_l,
        "age": age,
        "sex": sex,
        "height_cm": height_cm,
        "weight_kg": weight_kg,
        "black_race": black_race,
    }
    spec, prepared = _prepare(
        equation_id, given, allow_outside_age, apply_race_coefficient, "evaluate"
    )
    values, _ = run_kernel(spec, prepared)
    return finish(values, prepared.scalar)


_INPUT_NAMES = (
    "creatinine_mg_dl",
    "cystatin_c_mg_l",
    "age",
    "sex",
    "height_cm",
    "weight_kg",
    "black_race",
)


class EquationReasonIndex(NamedTuple):
    """Values, and per element the index of its reason in ``codes`` (``len(codes)``
    where the value was computed): the compact form of :class:`EquationResult`."""

    values: FloatArray
    reason_index: npt.NDArray[np.uint8]
    codes: list[str]


def evaluate_with_reason_index(
    equation_id: str,
    *,
    allow_outside_age: bool = False,
    apply_race_coefficient: bool = False,
    **inputs: ArrayLike,
) -> EquationReasonIndex:
    """Like :func:`evaluate_with_reason` for arrays, the reasons as one byte per element
    (an index into the codes) instead of text: for millions of samples.

    ``inputs`` are the keyword inputs of :func:`evaluate` (``creatinine_mg_dl``,
    ``age``, ``sex``, ...).
    """
    unknown = sorted(set(inputs) - set(_INPUT_NAMES))
    if unknown:
        raise TypeError(f"evaluate_with_reason_index: unknown inputs {unknown}")
    given = {name: inputs.get(name) for name in _INPUT_NAMES}
    spec, prepared = _prepare(
        equation_id, given, allow_outside_age, apply_race_coefficient, "evaluate"
    )
    values, ok = run_kernel(spec, prepared)
    index, codes = reason_indices(prepared, ok)
    return EquationReasonIndex(np.atleast_1d(values), np.atleast_1d(index), codes)


def evaluate_with_reason(
    equation_id: str,
    *,
    creatinine_mg_dl: ArrayLike = None,
    cystatin_c_mg_l: ArrayLike = None,
    age: ArrayLike = None,
    sex: ArrayLike = None,
    height_cm: ArrayLike = None,
    weight_kg: ArrayLike = None,
    black_race: ArrayLike = None,
    allow_outside_age: bool = False,
    apply_race_coefficient: bool = False,
) -> EquationResult:
    """Like :func:`evaluate`, plus a reason code per element.

    Reason codes (first that applies): ``missing_input``, ``nonpositive_value``,
    ``invalid_value`` (infinite value or negative age),
    ``age_below_validated_range``, ``age_above_validated_range``,
    ``outside_equation_domain`` (e.g. Cockcroft–Gault at age 140+); ``""`` where the
    value was computed.

    Returns
    -------
    EquationResult
        ``(values, reasons)``; a float and a str for all-scalar input.
    """
    given = {
        "creatinine_mg_dl": creatinine_mg_dl,
        "cystatin_c_mg_l": cystatin_c_mg_l,
        "age": age,
        "sex": sex,
        "height_cm": height_cm,
        "weight_kg": weight_kg,
        "black_race": black_race,
    }
    spec, prepared = _prepare(
        equation_id, given, allow_outside_age, apply_race_coefficient, "evaluate"
    )
    values, ok = run_kernel(spec, prepared)
    reasons = reasons_for(prepared, ok)
    if prepared.scalar:
        return EquationResult(float(values), str(reasons))
    return EquationResult(values, reasons)


# ----------------------------------------------------------------------------- solvers


def _solve(
    marker: str,
    equation_id: str,
    egfr: ArrayLike,
    given: dict[str, Any],
    allow_outside_age: bool,
    apply_race_coefficient: bool,
) -> FloatArray | float:
    spec = get_equation(equation_id)
    if marker not in spec.inputs:
        raise InputDataError(
            f"{spec.id} does not use {marker}; pick an equation whose inputs include it "
            f"(its inputs: {', '.join(spec.inputs)})"
        )
    target = as_float_array(egfr, "egfr")
    given = {**given, marker: np.ones(target.shape)}
    spec, prepared = _prepare(
        equation_id, given, allow_outside_age, apply_race_coefficient, f"solving for {marker}"
    )
    shape = np.broadcast_shapes(prepared.shape, target.shape)
    target = np.broadcast_to(target, shape)
    arrays = {
        k: (np.broadcast_to(v, shape) if v is not None else None)
        for k, v in prepared.arrays.items()
        if k != "black" or spec.race_coefficient
    }
    bad = np.zeros(shape, dtype=bool)
    for mask in prepared.masks.values():
        bad |= mask
    power_shape = spec.creatinine_shape if marker == "creatinine_mg_dl" else spec.cystatin_shape
    with np.errstate(all="ignore"):
        if power_shape is not None:
            knot, below, above = power_shape(**arrays)
            knot = np.broadcast_to(np.asarray(knot, dtype=np.float64), shape)
            at_knot = spec.kernel(**{**arrays, marker: knot})
            solved = invert_power_shape(target, at_knot, knot, below, above)
        else:
            solved = bisect_log(lambda s: spec.kernel(**{**arrays, marker: s}), target)
    ok = ~bad & np.isfinite(target) & (target > 0) & np.isfinite(solved) & (solved > 0)
    return finish(np.where(ok, solved, np.nan), prepared.scalar and target.ndim == 0)


def solve_creatinine(
    equation_id: str,
    egfr: ArrayLike,
    *,
    age: ArrayLike,
    sex: ArrayLike = None,
    allow_outside_age: bool = False,
    apply_race_coefficient: bool = False,
    **other: ArrayLike,
) -> FloatArray | float:
    r"""Serum creatinine (mg/dL) at which ``equation_id`` gives ``egfr``.

    Closed form where ln(eGFR) is piecewise linear in ln(creatinine) (all CKD-EPI,
    MDRD, EKFC, FAS, BIS1, Cockcroft–Gault and the children's equations): with knot
    :math:`k`, exponents :math:`\beta` below / above the knot and :math:`e(k)` the
    eGFR at the knot,

    .. math:: S_{cr} = k \exp\!\left(\frac{\ln(eGFR / e(k))}{\beta}\right)

    Otherwise (revised Lund–Malmö) vectorised bisection in log space to 1e-13
    relative. Other inputs the equation needs (``cystatin_c_mg_l``, ``height_cm``,
    ``weight_kg``, ``black_race``) go in ``other``.

    Returns
    -------
    numpy.ndarray or float
        Creatinine in mg/dL; NaN where the target or an input is missing or invalid,
        or the age is outside the validated range (unless ``allow_outside_age``).
    """
    given = {**other, "age": age, "sex": sex}
    return _solve(
        "creatinine_mg_dl", equation_id, egfr, given, allow_outside_age, apply_race_coefficient
    )


def solve_cystatin_c(
    equation_id: str,
    egfr: ArrayLike,
    *,
    age: ArrayLike,
    sex: ArrayLike = None,
    allow_outside_age: bool = False,
    apply_race_coefficient: bool = False,
    **other: ArrayLike,
) -> FloatArray | float:
    """Serum cystatin C (mg/L) at which ``equation_id`` gives ``egfr``.

    Same method as :func:`solve_creatinine` (closed form for the piecewise power-law
    cystatin C terms); ``creatinine_mg_dl`` goes in ``other`` for combined equations.
    """
    given = {**other, "age": age, "sex": sex}
    return _solve(
        "cystatin_c_mg_l", equation_id, egfr, given, allow_outside_age, apply_race_coefficient
    )


# ----------------------------------------------------------------------------- listing


def registry_table() -> pl.DataFrame:
    """The registry as a table: one row per equation, all columns strings.

    Columns: ``id``, ``label``, ``inputs``, ``ages``, ``unit``, ``population``,
    ``reference`` (with DOI).
    """
    rows = [
        {
            "id": spec.id,
            "label": spec.label,
            "inputs": ", ".join(spec.inputs),
            "ages": spec.ages,
            "unit": spec.output_unit,
            "population": spec.population,
            "reference": f"{spec.reference}. doi:{spec.doi}" if spec.doi else spec.reference,
        }
        for spec in REGISTRY.values()
    ]
    return pl.DataFrame(
        rows,
        schema={
            c: pl.String
            for c in ("id", "label", "inputs", "ages", "unit", "population", "reference")
        },
    )
