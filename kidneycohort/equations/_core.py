"""Shared machinery of the equation library: input coercion, domain checks, reasons.

Every equation is a small *kernel* working on clean float64 arrays (creatinine in
mg/dL, cystatin C in mg/L, age in years, ``female`` as a boolean array). This module
turns whatever the caller passes (scalars, lists, numpy arrays, pandas or polars Series)
into those arrays, broadcasts them, works out which elements are computable and why
not, runs the kernel once over the whole array and writes NaN where an element is not
computable. No Python loop over elements happens anywhere.
"""

from __future__ import annotations

import logging
import warnings
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any, Final, Literal

import numpy as np
import numpy.typing as npt
import polars as pl

from kidneycohort.errors import DataQualityWarning, EquationWarning, InputDataError
from kidneycohort.vocabulary import SEX_CODES, fold_code, sex_expr, unknown_sex_error

__all__ = [
    "AGE_ABOVE",
    "AGE_BELOW",
    "INVALID_VALUE",
    "MISSING_INPUT",
    "NONPOSITIVE_VALUE",
    "OK",
    "OUTSIDE_DOMAIN",
    "REASON_CODES",
    "ArrayLike",
    "BoolArray",
    "EquationSpec",
    "FloatArray",
    "Prepared",
    "as_float_array",
    "bisect_log",
    "call_formula",
    "finish",
    "invert_power_shape",
    "prepare",
    "reasons_for",
    "run_kernel",
]

logger = logging.getLogger("kidneycohort.equations")

FloatArray = npt.NDArray[np.float64]
BoolArray = npt.NDArray[np.bool_]
ArrayLike = Any  # scalar, list, numpy array, pandas or polars Series
Kernel = Callable[..., FloatArray]
# (knot, exponent below the knot, exponent above the knot) of ln(eGFR) in ln(serum value)
PowerShape = Callable[..., tuple[Any, Any, Any]]

EquationKind = Literal["creatinine", "cystatin_c", "combined", "clearance"]

# Reason codes, one per element; "" means the value was computed.
OK: Final = ""
MISSING_INPUT: Final = "missing_input"
NONPOSITIVE_VALUE: Final = "nonpositive_value"
INVALID_VALUE: Final = "invalid_value"
AGE_BELOW: Final = "age_below_validated_range"
AGE_ABOVE: Final = "age_above_validated_range"
OUTSIDE_DOMAIN: Final = "outside_equation_domain"

REASON_CODES: Final = (
    MISSING_INPUT,
    NONPOSITIVE_VALUE,
    INVALID_VALUE,
    AGE_BELOW,
    AGE_ABOVE,
    OUTSIDE_DOMAIN,
)

# evaluate() keyword names that carry a positive measured quantity
POSITIVE_INPUTS: Final = ("creatinine_mg_dl", "cystatin_c_mg_l", "height_cm", "weight_kg")
FLOAT_INPUTS: Final = ("creatinine_mg_dl", "cystatin_c_mg_l", "age", "height_cm", "weight_kg")
ALL_INPUTS: Final = (*FLOAT_INPUTS, "sex", "black_race")


@dataclass(frozen=True)
class EquationSpec:
    """Registry entry of one GFR-estimating equation.

    Attributes
    ----------
    id, label
        Registry id (e.g. ``"ckd_epi_2021_cr"``) and a readable name.
    function
        The public per-equation function (formula only; validated ages are applied by
        :func:`kidneycohort.equations.evaluate`).
    kernel
        The formula on clean float64 arrays (keyword arguments named like the
        ``evaluate`` inputs, ``female`` and ``black`` as booleans).
    inputs
        ``evaluate`` keyword names the equation needs.
    output_unit
        ``"mL/min/1.73 m2"`` (indexed) or ``"mL/min"`` (clearance).
    min_age, max_age
        Validated ages in years, ``min_age <= age < max_age``; ``max_age=None`` means
        no upper bound.
    population, reference, doi
        Development population notes and the full reference.
    kind
        ``"creatinine"``, ``"cystatin_c"``, ``"combined"`` or ``"clearance"``.
    race_coefficient
        True for the legacy equations that carry a coefficient for Black race.
    creatinine_shape, cystatin_shape
        For equations where ln(eGFR) is piecewise linear in ln(serum value) with at most
        one knot: a callable returning (knot, exponent below, exponent above); used by
        the closed-form solvers. ``None``: solvers fall back to bisection.
    """

    id: str
    label: str
    function: Callable[..., Any]
    kernel: Kernel
    inputs: tuple[str, ...]
    output_unit: str
    min_age: float
    max_age: float | None
    population: str
    reference: str
    kind: EquationKind
    doi: str = ""
    race_coefficient: bool = False
    creatinine_shape: PowerShape | None = field(default=None, repr=False)
    cystatin_shape: PowerShape | None = field(default=None, repr=False)

    @property
    def uses_sex(self) -> bool:
        """Whether the equation has sex-specific coefficients."""
        return "sex" in self.inputs

    @property
    def ages(self) -> str:
        """Validated ages as text, e.g. ``"18+"`` or ``"1 to <18"``."""
        low = f"{self.min_age:g}"
        return f"{low}+" if self.max_age is None else f"{low} to <{self.max_age:g}"


# ----------------------------------------------------------------------------- coercion


def as_float_array(value: ArrayLike, name: str) -> FloatArray:
    """Return ``value`` as a float64 numpy array (0-d for scalars); missing -> NaN.

    Raises
    ------
    InputDataError
        When the values are not numbers (names the argument and shows an example).
    """
    if value is None:
        return np.array(np.nan)
    if isinstance(value, pl.Series):
        try:
            return value.cast(pl.Float64).to_numpy()
        except Exception:  # polars raises several types for an impossible cast
            raise InputDataError(_not_numeric(name, value.head(3).to_list())) from None
    to_numpy = getattr(value, "to_numpy", None)
    if to_numpy is not None and hasattr(value, "dtype"):  # pandas Series / Index / array
        try:
            return np.asarray(to_numpy(dtype=np.float64, na_value=np.nan))
        except (TypeError, ValueError):
            raise InputDataError(_not_numeric(name, list(value[:3]))) from None
    arr = np.asarray(value)
    if arr.dtype.kind in "fiub":
        return arr.astype(np.float64, copy=False)
    if arr.dtype.kind == "O":
        # None / pandas NA among numbers: let pandas do the element-wise conversion in C
        import pandas as pd

        try:
            return np.asarray(
                pd.array(arr.ravel(), dtype="Float64").to_numpy(dtype=np.float64, na_value=np.nan)
            ).reshape(arr.shape)
        except (TypeError, ValueError):
            pass
    raise InputDataError(_not_numeric(name, arr.ravel()[:3].tolist()))


def _not_numeric(name: str, example: list[Any]) -> str:
    return f"{name}: expected numbers (NaN or None for missing), got values like {example!r}; convert the column to float first"


def sex_codes(sex: ArrayLike) -> tuple[BoolArray, BoolArray, BoolArray]:
    """Vectorised reading of ``sex``: returns (female, known, missing) boolean arrays.

    The project's sex vocabulary is accepted (``female``/``male``, ``f``/``m``,
    ``woman``/``man``, any case); a null, NaN or empty string is *missing*; any other
    code raises :class:`~kidneycohort.errors.InputDataError` naming it. Scalars give 0-d
    arrays. Exact spellings take a fast path; only the other elements are folded.
    """
    if sex is None or isinstance(sex, str):
        text = "" if sex is None else fold_code(sex)
        if text and text not in SEX_CODES:
            raise unknown_sex_error("sex", [sex])
        code = SEX_CODES.get(text, "")
        female = np.array(code == "female")
        return female, female | np.array(code == "male"), np.array(text == "")
    if isinstance(sex, float) and np.isnan(sex):
        return np.array(False), np.array(False), np.array(True)
    values: Any
    if isinstance(sex, pl.Series):
        values = sex if sex.dtype == pl.String else sex.cast(pl.String)
        female = (values == "female").fill_null(False).to_numpy()
        male = (values == "male").fill_null(False).to_numpy()
    else:
        if hasattr(sex, "to_numpy") and not isinstance(sex, np.ndarray):  # pandas
            values = np.asarray(sex.to_numpy(dtype=object))
        else:
            values = np.asarray(sex)
            if values.dtype.kind not in "USO":
                values = values.astype(object)
        female = np.asarray(values == "female", dtype=bool)
        male = np.asarray(values == "male", dtype=bool)
    known = female | male
    missing = np.zeros(known.shape, dtype=bool)
    other = ~known
    if other.any():
        rest = values.filter(pl.Series(other)) if isinstance(values, pl.Series) else values[other]
        rest_female, rest_male, rest_missing = _fold_sex(rest)
        female[other] = rest_female
        known[other] = rest_female | rest_male
        missing[other] = rest_missing
    return female, known, missing


def _fold_sex(values: Any) -> tuple[BoolArray, BoolArray, BoolArray]:
    """Slow path for the elements that are not exactly ``"female"`` / ``"male"``: the
    project's sex vocabulary (:data:`kidneycohort.vocabulary.SEX_CODES`); a code outside
    it is an error naming it."""
    if isinstance(values, pl.Series):
        series = values
    else:
        import pandas as pd

        series = pl.from_pandas(pd.Series(np.ravel(values), dtype=object).astype("string"))
    frame = pl.DataFrame({"raw": series})
    folded = frame.select(
        sex_expr(pl.col("raw")).alias("sex"),
        (pl.col("raw").is_null() | (pl.col("raw").str.strip_chars() == "")).alias("missing"),
    )
    unknown = frame.filter(folded["sex"].is_null() & ~folded["missing"])["raw"]
    if unknown.len():
        raise unknown_sex_error("sex", unknown.unique().to_list())
    female = (folded["sex"] == "female").fill_null(False).to_numpy()
    male = (folded["sex"] == "male").fill_null(False).to_numpy()
    return female, male, folded["missing"].to_numpy()


def black_codes(black_race: ArrayLike) -> tuple[BoolArray, BoolArray]:
    """Vectorised reading of ``black_race`` (booleans or 0/1): returns (black, missing)."""
    values = as_float_array(black_race, "black_race")
    missing = np.isnan(values)
    return np.where(missing, False, values != 0), missing


# ----------------------------------------------------------------------------- evaluation


@dataclass(frozen=True)
class Prepared:
    """Broadcast clean inputs, the computable mask and per-condition masks."""

    arrays: dict[str, Any]
    shape: tuple[int, ...]
    scalar: bool
    masks: dict[str, BoolArray]


# A value far outside the plausible range of the unit the argument names, but inside it
# once read in the other common unit, is most likely a unit slip (common practice; the
# ranges are the harmonise stage's plausibility limits).
_UNIT_SLIPS: Final = {
    # argument: (plausible low, high in its unit, other unit, factor to its unit)
    "creatinine_mg_dl": (0.1, 30.0, "umol/L", 1.0 / 88.4),
    "cystatin_c_mg_l": (0.2, 10.0, "nmol/L", 1.0 / 75.0),  # 1 mg/L ~ 75 nmol/L (from memory)
}


def _warn_unit_slip(name: str, values: FloatArray) -> None:
    """Warn once when values look like they were given in the other common unit."""
    if name not in _UNIT_SLIPS:
        return
    low, high, other, factor = _UNIT_SLIPS[name]
    with np.errstate(invalid="ignore"):
        slipped = (values > high) & (values * factor >= low) & (values * factor <= high)
    if np.any(slipped):
        example = float(np.ravel(values)[np.ravel(slipped)][0])
        unit = name.rsplit("_", 2)[-2] + "/" + name.rsplit("_", 1)[-1]
        warnings.warn(
            DataQualityWarning(
                f"{name}: {int(np.sum(slipped))} value(s) (e.g. {example:g}) are implausible in "
                f"{unit.replace('mg/dl', 'mg/dL')} but plausible in {other} "
                f"({example:g} {other} = {example * factor:.3g} {unit.replace('mg/dl', 'mg/dL')}); "
                f"convert {other} values before passing them"
            ),
            stacklevel=5,
        )


def _coerce(
    spec: EquationSpec, given: Mapping[str, ArrayLike]
) -> tuple[dict[str, Any], dict[str, BoolArray], bool]:
    """The inputs ``spec`` needs as arrays (``sex`` as ``female``) and the missing-sex mask."""
    raw: dict[str, Any] = {}
    masks: dict[str, BoolArray] = {}
    for name in spec.inputs:
        value = given.get(name)
        if name == "sex":
            female, _, missing = sex_codes(value)
            raw["female"] = female
            masks["_missing_sex"] = missing
        else:
            raw[name] = as_float_array(value, name)
            _warn_unit_slip(name, raw[name])
    scalar = all(np.ndim(v) == 0 for v in raw.values())
    return raw, masks, scalar


def _race_inputs(spec: EquationSpec, given: Mapping[str, ArrayLike]) -> tuple[Any, BoolArray]:
    """The legacy race term: only on explicit request, with an EquationWarning."""
    if given.get("black_race") is None:
        raise InputDataError(
            f"{spec.id}: apply_race_coefficient=True needs black_race (booleans per "
            "patient); pass black_race or leave the race coefficient off"
        )
    warnings.warn(
        EquationWarning(
            f"{spec.id}: applying the legacy coefficient for Black race; current "
            "guidance (KDIGO 2024) recommends the race-free CKD-EPI 2021 equations"
        ),
        stacklevel=5,
    )
    return black_codes(given.get("black_race"))


def _value_masks(
    spec: EquationSpec, arrays: Mapping[str, Any], shape: tuple[int, ...]
) -> dict[str, BoolArray]:
    """Missing, non-positive and invalid (infinite, negative age) elements."""
    missing = np.zeros(shape, dtype=bool)
    nonpositive = np.zeros(shape, dtype=bool)
    invalid = np.zeros(shape, dtype=bool)
    for name in spec.inputs:
        if name == "sex":
            continue
        arr = arrays[name]
        missing |= np.isnan(arr)
        invalid |= np.isinf(arr)
        if name in POSITIVE_INPUTS:
            nonpositive |= arr <= 0
        elif name == "age":
            invalid |= arr < 0
    return {MISSING_INPUT: missing, NONPOSITIVE_VALUE: nonpositive, INVALID_VALUE: invalid}


def prepare(
    spec: EquationSpec,
    given: Mapping[str, ArrayLike],
    *,
    apply_age_range: bool,
    apply_race_coefficient: bool,
) -> Prepared:
    """Coerce and broadcast the inputs ``spec`` needs and find the non-computable ones."""
    raw, masks, scalar = _coerce(spec, given)
    use_race = spec.race_coefficient and apply_race_coefficient
    if use_race:
        raw["black"], masks["_missing_race"] = _race_inputs(spec, given)
        scalar = scalar and np.ndim(raw["black"]) == 0
    names = list(raw)
    try:
        broadcast = np.broadcast_arrays(*raw.values(), *masks.values())
    except ValueError:
        shapes = {k: np.shape(v) for k, v in raw.items()}
        raise InputDataError(
            f"{spec.id}: inputs have different lengths {shapes}; pass arrays of one length (or scalars)"
        ) from None
    arrays: dict[str, Any] = dict(zip(names, broadcast[: len(names)], strict=True))
    masks = dict(zip(masks, broadcast[len(names) :], strict=True))
    shape = broadcast[0].shape if broadcast else ()
    out_masks = _value_masks(spec, arrays, shape)
    for name in ("_missing_sex", "_missing_race"):
        if name in masks:
            out_masks[MISSING_INPUT] |= masks[name]
    if apply_age_range:
        age = arrays["age"]
        out_masks[AGE_BELOW] = age < spec.min_age
        if spec.max_age is not None:
            out_masks[AGE_ABOVE] = age >= spec.max_age
    if not use_race:
        arrays["black"] = None
    return Prepared(arrays=arrays, shape=shape, scalar=scalar, masks=out_masks)


def run_kernel(spec: EquationSpec, prepared: Prepared) -> tuple[FloatArray, BoolArray]:
    """Run the kernel over all elements; return (values with NaN, computable mask)."""
    bad = np.zeros(prepared.shape, dtype=bool)
    for mask in prepared.masks.values():
        bad |= mask
    kwargs = {k: v for k, v in prepared.arrays.items() if k != "black" or spec.race_coefficient}
    with np.errstate(all="ignore"):
        values = np.asarray(spec.kernel(**kwargs), dtype=np.float64)
    values = np.broadcast_to(values, prepared.shape)
    domain = ~(np.isfinite(values) & (values > 0))
    ok = ~bad & ~domain
    return np.where(ok, values, np.nan), ok


def reasons_for(prepared: Prepared, ok: BoolArray) -> npt.NDArray[np.str_]:
    """Per-element reason codes, first applicable in :data:`REASON_CODES` order."""
    order = [c for c in REASON_CODES if c in prepared.masks]
    conditions = [prepared.masks[c] for c in order]
    choices = [*order, OUTSIDE_DOMAIN]
    conditions.append(~ok)
    return np.select(conditions, choices, default=OK).astype(f"<U{max(map(len, choices))}")


def finish(values: FloatArray, scalar: bool) -> FloatArray | float:
    """Return a float for all-scalar input, otherwise the array."""
    return float(values) if scalar else values


def call_formula(spec: EquationSpec, **given: ArrayLike) -> FloatArray | float:
    """Evaluate ``spec``'s formula without the validated-age-range rule (domain only).

    A legacy race coefficient is applied when ``black_race`` is passed (not None).
    """
    apply_race = given.get("black_race") is not None
    prepared = prepare(spec, given, apply_age_range=False, apply_race_coefficient=apply_race)
    values, _ = run_kernel(spec, prepared)
    return finish(values, prepared.scalar)


# ----------------------------------------------------------------------------- solving


def invert_power_shape(
    target: FloatArray, at_knot: FloatArray, knot: Any, below: Any, above: Any
) -> FloatArray:
    r"""Serum value giving ``target`` when ln(eGFR) is piecewise linear in ln(value).

    .. math::
        \ln e(s) = \ln e(k) + \beta \ln(s/k), \quad
        \beta = \beta_{below}\ (s < k),\ \beta_{above}\ (s \ge k)

    With both exponents negative, a target above :math:`e(k)` lies below the knot:
    :math:`s = k \exp(\ln(\text{target}/e(k)) / \beta)`.
    """
    with np.errstate(all="ignore"):
        log_ratio = np.log(target) - np.log(at_knot)
        exponent = np.where(log_ratio > 0, below, above)
        return np.asarray(knot * np.exp(log_ratio / exponent), dtype=np.float64)


def bisect_log(
    func: Callable[[FloatArray], FloatArray],
    target: FloatArray,
    low: float = 1e-4,
    high: float = 1e4,
    rel_tol: float = 1e-13,
) -> FloatArray:
    """Vectorised bisection in log space for a function decreasing in its argument.

    Returns NaN where the target is outside ``[func(high), func(low)]``.
    """
    shape = np.shape(target)
    lo = np.full(shape, np.log(low))
    hi = np.full(shape, np.log(high))
    iterations = int(np.ceil(np.log2((hi.flat[0] - lo.flat[0]) / rel_tol))) if lo.size else 0
    with np.errstate(all="ignore"):
        f_lo, f_hi = func(np.exp(lo)), func(np.exp(hi))
        reachable = (target <= f_lo) & (target >= f_hi)
        for _ in range(iterations):  # fixed count over whole arrays, not over elements
            mid = 0.5 * (lo + hi)
            above = func(np.exp(mid)) > target
            lo = np.where(above, mid, lo)
            hi = np.where(above, hi, mid)
    return np.where(reachable, np.exp(0.5 * (lo + hi)), np.nan)
