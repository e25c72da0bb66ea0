r"""Estimated GFR over a whole cohort: harmonised labs x patients -> the long ``egfr`` table.

``compute_egfr(labs, patients, equations=[...])`` evaluates registered equations
(:mod:`kidneycohort.equations`) once per equation over every eligible sample, vectorised:

* **age** at each sample in exact years, from the birth date, or from ``age_at_index``
  plus the time since ``index_date``:

  .. math::

      \text{age} = \frac{d_\text{sample} - d_\text{birth}}{365.25}, \qquad
      \text{years\_from\_index} = \frac{d_\text{sample} - d_\text{index}}{365.25}

* **combined** creatinine-cystatin C equations pair a creatinine result with the
  nearest cystatin C result of the same patient within ``pairing_window_days``
  (0 = same calendar day). Nothing is imputed: an unpaired creatinine gets a row with
  no eGFR and reason ``no_cystatin_c_in_window``, an unpaired cystatin C one with
  ``no_creatinine_in_window``;
* **height and weight** (children's equations, Cockcroft-Gault) come from a
  time-varying ``measurements`` table (nearest within ``body_size_window_days``) or
  else from ``patients``;
* **equation choice** is one list for every sample, or by age bands the user states
  (e.g. children's equations below 18, adult ones from 18). Outside an equation's
  validated age range the eGFR is null with the equation library's reason.

Every derivation is per patient (joins and as-of joins by ``patient_id``), so any
partition of patients gives the same rows.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from typing import Any, Final

import numpy as np
import polars as pl
from pydantic import Field, field_validator

from kidneycohort import equations as eq
from kidneycohort import schemas, units
from kidneycohort._frames import FrameLike, conform, follows_input, require_columns, to_polars
from kidneycohort._rules import RuleModel, resolve_rules
from kidneycohort.ages import age_on_expr
from kidneycohort.errors import InputDataError, did_you_mean
from kidneycohort.vocabulary import sex_expr, unknown_sex_error

__all__ = [
    "EGFR_REASON_CODES",
    "AgeBand",
    "EgfrRule",
    "compute_egfr",
    "egfr_wide",
    "resolve_egfr_rule",
]

logger = logging.getLogger(__name__)

EGFR_REASON_CODES: Final[dict[str, str]] = {
    "missing_age": "no birth date and no age at index (with index date) for the patient",
    "missing_sex": "the patient's sex is missing and the equation is sex-specific",
    "missing_height": "no height within the body-size window and none in patients",
    "missing_weight": "no weight within the body-size window and none in patients",
    "missing_input": "another input of the equation is missing",
    "no_cystatin_c_in_window": "combined equation: no cystatin C result within the "
    "pairing window of this creatinine result",
    "no_creatinine_in_window": "combined equation: no creatinine result within the "
    "pairing window of this cystatin C result",
    "outside_measurement_window": "the sample lies outside the measurement window "
    "relative to the index date",
    **{
        code: f"from the equation library: {code.replace('_', ' ')}"
        for code in eq.REASON_CODES
        if code != eq.MISSING_INPUT
    },
}
"""Reason codes of the ``egfr_reason`` column (null where the eGFR was computed)."""

_MISSING_NAMES: Final = {
    "age": "missing_age",
    "sex": "missing_sex",
    "height_cm": "missing_height",
    "weight_kg": "missing_weight",
}


def _check_ids(value: list[str]) -> list[str]:
    for equation_id in value:
        if equation_id not in eq.REGISTRY:
            raise ValueError(
                f"unknown equation id {equation_id!r}{did_you_mean(equation_id, eq.REGISTRY)}"
            )
    return value


class AgeBand(RuleModel):
    """Equations used for samples taken at ages in ``[min_age, max_age)``."""

    min_age: float = Field(default=0.0, description="Lowest age of the band (inclusive).")
    max_age: float | None = Field(
        default=None, description="Age where the band ends (exclusive); none = no limit."
    )
    equations: list[str] = Field(description="Equation ids used in this band.")

    @field_validator("equations")
    @classmethod
    def _known(cls, value: list[str]) -> list[str]:
        return _check_ids(value)


class EgfrRule(RuleModel):
    """Rules of the eGFR stage; field names are the config keys under ``egfr``.

    Examples
    --------
    >>> rule = EgfrRule(by_age=[
    ...     AgeBand(max_age=18, equations=["ckid_u25_cr"]),
    ...     AgeBand(min_age=18, equations=["ckd_epi_2021_cr"])])
    >>> rule.all_equations()
    ['ckid_u25_cr', 'ckd_epi_2021_cr']
    """

    equations: list[str] = Field(
        default_factory=lambda: ["ckd_epi_2021_cr"],
        description="Equation ids evaluated for every sample (ignored when by_age is "
        "given). Default: the race-free CKD-EPI 2021 creatinine equation, adults only "
        "(null with a reason below its validated age).",
    )
    by_age: list[AgeBand] | None = Field(
        default=None,
        description="Age bands, each with its equations (e.g. children's equations below "
        "18, adult equations from 18); a sample gets the equations of its band.",
    )
    pairing_window_days: int = Field(
        default=0,
        ge=0,
        description="Combined equations: largest gap in days between the creatinine and "
        "the cystatin C result paired with it (0 = same calendar day).",
    )
    body_size_window_days: int = Field(
        default=30,
        ge=0,
        description="Largest gap in days to the nearest height or weight measurement.",
    )
    window_start_years: float | None = Field(
        default=None,
        description="Measurement window start, in years from the index date (inclusive).",
    )
    window_end_years: float | None = Field(
        default=None,
        description="Measurement window end, in years from the index date (inclusive).",
    )
    allow_outside_age: bool = Field(
        default=False,
        description="Compute equations outside their validated age range.",
    )
    apply_race_coefficient: bool = Field(
        default=False,
        description="Apply legacy race coefficients (MDRD, CKD-EPI 2009); not advised.",
    )

    @field_validator("equations")
    @classmethod
    def _known(cls, value: list[str]) -> list[str]:
        return _check_ids(value)

    def all_equations(self) -> list[str]:
        """Every equation id the rules can use, in first-mention order."""
        if self.by_age is None:
            return list(dict.fromkeys(self.equations))
        return list(dict.fromkeys(e for band in self.by_age for e in band.equations))


def resolve_egfr_rule(rule: EgfrRule | None, overrides: dict[str, Any]) -> EgfrRule:
    """Return ``rules`` (or the defaults) updated by keyword ``overrides``, validated."""
    return resolve_rules(EgfrRule, rule, overrides, "egfr")


# --------------------------------------------------------------------------------------


def _day_number(column: str) -> pl.Expr:
    return pl.col(column).cast(pl.Date).cast(pl.Int32)


def _samples(labs: pl.DataFrame, analyte: str, value_name: str) -> pl.DataFrame:
    rows = labs.filter(pl.col("analyte") == analyte)
    wrong = rows.filter(pl.col("unit") != units.STANDARD_UNIT[analyte])
    if wrong.height:
        raise InputDataError(
            f"labs: {analyte} unit {wrong['unit'][0]!r} is not the standard "
            f"{units.STANDARD_UNIT[analyte]!r}; pass harmonised labs (kc.harmonize)"
        )
    return rows.select(
        "patient_id",
        pl.col("sample_date").cast(pl.Date),
        pl.coalesce(pl.col("sample_datetime"), pl.col("sample_date").cast(pl.Datetime("us")))
        .cast(pl.Datetime("us"))
        .alias("sample_datetime"),
        "setting",
        pl.col("value").cast(pl.Float64).alias(value_name),
        # reported with "<" or ">": a limit, not an exact value (value_filter decides)
        pl.col("qualifier").is_not_null().alias("qualified"),
    ).with_columns(_day_number("sample_date").alias("_day"))


def _pair(cr: pl.DataFrame, cys: pl.DataFrame, window: int) -> pl.DataFrame:
    """Creatinine rows with the nearest cystatin C within ``window`` days, plus
    cystatin C rows no creatinine was paired with."""
    right = cys.select(
        "patient_id",
        "_day",
        pl.col("_day").alias("_cys_day"),
        pl.col("sample_datetime").alias("_cys_datetime"),
        "cystatin_c_mg_l",
        pl.col("qualified").alias("_cys_qualified"),
    ).sort("_day", maintain_order=True)
    paired = (
        cr.with_row_index("_order")
        .sort("_day", maintain_order=True)
        .join_asof(
            right,
            on="_day",
            by="patient_id",
            strategy="nearest",
            tolerance=window,
            check_sortedness=False,
        )
        .with_columns(
            pl.when(pl.col("cystatin_c_mg_l").is_null())
            .then(pl.lit("no_cystatin_c_in_window"))
            .alias("_pair_reason"),
            (pl.col("qualified") | pl.col("_cys_qualified").fill_null(False)).alias("qualified"),
        )
        .sort("_order")
        .drop("_order", "_cys_qualified")
    )
    used = paired.filter(pl.col("_cys_day").is_not_null()).select(
        "patient_id",
        pl.col("_cys_day").alias("_day"),
        pl.col("_cys_datetime").alias("sample_datetime"),
        "cystatin_c_mg_l",
    )
    alone = cys.join(
        used.drop("qualified", strict=False),
        on=["patient_id", "_day", "sample_datetime", "cystatin_c_mg_l"],
        how="anti",
    ).with_columns(
        pl.lit(None, pl.Float64).alias("creatinine_mg_dl"),
        pl.lit("no_creatinine_in_window").alias("_pair_reason"),
    )
    return pl.concat([paired.drop("_cys_day", "_cys_datetime"), alone], how="diagonal_relaxed")


def _attach_measurements(
    samples: pl.DataFrame, measurements: pl.DataFrame | None, window: int
) -> pl.DataFrame:
    if measurements is None:
        return samples
    samples = samples.with_row_index("_order")
    for column in ("height_cm", "weight_kg"):
        if column not in measurements.columns:
            continue
        right = (
            measurements.filter(pl.col(column).is_not_null())
            .select(
                pl.col("patient_id").cast(pl.String),
                _day_number("measurement_date").alias("_day"),
                pl.col(column).cast(pl.Float64).alias(f"_measured_{column}"),
            )
            .sort("_day", maintain_order=True)
        )
        samples = samples.sort("_day", maintain_order=True).join_asof(
            right,
            on="_day",
            by="patient_id",
            strategy="nearest",
            tolerance=window,
            check_sortedness=False,
        )
    return samples.sort("_order").drop("_order")


def _in_band(age: pl.Expr, band: AgeBand) -> pl.Expr:
    condition = age >= band.min_age
    if band.max_age is not None:
        condition = condition & (age < band.max_age)
    return condition


def _evaluate(frame: pl.DataFrame, equation_id: str, rule: EgfrRule) -> pl.DataFrame:
    spec = eq.get_equation(equation_id)
    # rows already without a pair or outside the window are not evaluated at all
    eligible = (frame["_pair_reason"].is_null() & frame["_window_reason"].is_null()).to_numpy()
    where = np.flatnonzero(eligible)
    subset = frame[where]
    inputs: dict[str, Any] = {}
    for name in spec.inputs:
        column = {"age": "age_years"}.get(name, name)
        if name == "sex":
            inputs[name] = subset["sex"]
        else:
            inputs[name] = subset[column].cast(pl.Float64).to_numpy()
    if spec.race_coefficient and rule.apply_race_coefficient:
        inputs["black_race"] = subset["black_race"].cast(pl.Float64).to_numpy()
    result = eq.evaluate_with_reason(
        equation_id,
        **inputs,
        allow_outside_age=rule.allow_outside_age,
        apply_race_coefficient=rule.apply_race_coefficient,
    )
    values = np.full(frame.height, np.nan)
    values[where] = np.asarray(result.values, dtype=np.float64).reshape(subset.height)
    reasons = np.asarray(result.reasons).reshape(subset.height)
    # numpy string arrays convert slowly: name the few distinct codes of the rows that
    # failed, and gather (code index len(codes) = no library reason)
    failed = reasons != eq.OK
    codes, inverse = np.unique(reasons[failed], return_inverse=True)
    index = np.full(frame.height, len(codes), dtype=np.uint32)
    index[where[failed]] = inverse.ravel()
    library_reason = pl.Series("_lib", [*codes.tolist(), None], dtype=pl.String).gather(
        pl.Series(index, dtype=pl.UInt32)
    )
    # name the missing input instead of the library's generic missing_input
    specific: Any = pl
    for name in spec.inputs:
        if name in _MISSING_NAMES:
            column = {"age": "age_years"}.get(name, name)
            specific = specific.when(pl.col(column).is_null()).then(pl.lit(_MISSING_NAMES[name]))
    specific_expr = (
        specific.otherwise(pl.lit("missing_input"))
        if specific is not pl
        else pl.lit("missing_input")
    )
    return (
        frame.with_columns(
            pl.lit(equation_id).alias("equation"),
            pl.Series("egfr", values).fill_nan(None),
            pl.lit(spec.output_unit.replace(" ", "")).alias("egfr_unit"),
            library_reason,
        )
        .with_columns(
            pl.coalesce(
                pl.col("_pair_reason"),
                pl.col("_window_reason"),
                pl.when(pl.col("_lib") == eq.MISSING_INPUT)
                .then(specific_expr)
                .otherwise(pl.col("_lib")),
            ).alias("egfr_reason")
        )
        .with_columns(pl.when(pl.col("egfr_reason").is_null()).then(pl.col("egfr")).alias("egfr"))
    )


@follows_input
def compute_egfr(
    labs: FrameLike,
    patients: FrameLike,
    equations: str | Sequence[str] | None = None,
    *,
    rule: EgfrRule | None = None,
    measurements: FrameLike | None = None,
    wide: bool = False,
    **rule_fields: Any,
) -> pl.DataFrame:
    r"""Evaluate eGFR equations for every creatinine / cystatin C sample of a cohort.

    Parameters
    ----------
    labs
        Harmonised labs (``schemas.LABS``: standard units; see
        :func:`kidneycohort.harmonize.harmonize_tables`), polars or pandas.
    patients
        Patients (``schemas.PATIENTS``): ``sex``, ``birth_date`` or ``age_at_index``
        with ``index_date``, optional ``height_cm``, ``weight_kg``, ``black_race``.
    equations
        An equation id, or several (shortcut for ``rule.equations``).
    rule
        :class:`EgfrRule`; keyword ``rule_fields`` override its fields.
    measurements
        Optional time-varying body size: ``patient_id``, ``measurement_date``,
        ``height_cm`` and/or ``weight_kg``.
    wide
        Return :func:`egfr_wide` of the result instead of the long table.

    Returns
    -------
    polars.DataFrame
        The long ``egfr`` table (``schemas.EGFR``), one row per sample x equation,
        in blocks per equation (in the order of the rule), each in the order of
        ``labs`` (combined equations: creatinine rows, then unpaired cystatin C rows); ``egfr`` null where not
        computable, with ``egfr_reason`` from :data:`EGFR_REASON_CODES`.

    Raises
    ------
    ConfigError
        Unknown equation id or rule.
    InputDataError
        Missing columns, or labs not in standard units.

    Notes
    -----
    Ages use 365.25 days per year (``schemas.DAYS_PER_YEAR``), the common
    convention for exact age in years.

    Examples
    --------
    >>> import datetime as dt, polars as pl
    >>> labs = pl.DataFrame({"patient_id": ["a"], "sample_date": [dt.date(2020, 1, 1)],
    ...                      "analyte": ["creatinine"], "value": [0.9], "unit": ["mg/dL"]})
    >>> patients = pl.DataFrame({"patient_id": ["a"], "sex": ["male"],
    ...                          "birth_date": [dt.date(1980, 1, 1)]})
    >>> round(compute_egfr(labs, patients)["egfr"].item(), 1)  # age exactly 40.0 years
    110.7
    """
    overrides = dict(rule_fields)
    if equations is not None:
        # one id given as text is one equation, not a list of its characters
        overrides["equations"] = [equations] if isinstance(equations, str) else list(equations)
    resolved = resolve_egfr_rule(rule, overrides)
    table, people, body = _inputs(labs, patients, measurements)
    specs = {e: eq.get_equation(e) for e in resolved.all_equations()}
    frames = _sample_frames(table, {s.kind for s in specs.values()}, resolved)
    needs_body = any({"height_cm", "weight_kg"} & set(s.inputs) for s in specs.values())
    out: list[pl.DataFrame] = []
    for kind, samples in frames.items():
        ids = [e for e, s in specs.items() if s.kind == kind]
        if not ids:
            continue
        enriched = _enrich(samples, people, body if needs_body else None, resolved)
        for equation_id in ids:
            rows = _rows_in_age_bands(enriched, equation_id, resolved)
            if rows.height:
                out.append(conform(_evaluate(rows, equation_id, resolved), schemas.EGFR))
    # blocks per equation (rule order), each in labs order: no sort of millions of rows
    result = pl.concat(out) if out else pl.DataFrame(schema=schemas.EGFR)
    logger.info(
        "egfr: %d rows, %d computed, equations %s",
        result.height,
        result["egfr"].is_not_null().sum(),
        list(specs),
    )
    return egfr_wide(result) if wide else result


def _inputs(
    labs: FrameLike, patients: FrameLike, measurements: FrameLike | None
) -> tuple[pl.DataFrame, pl.DataFrame, pl.DataFrame | None]:
    """Labs, patients (one row each, sex in the vocabulary) and body-size measurements."""
    table = to_polars(labs, "labs")
    require_columns(table, ("patient_id", "sample_date", "analyte", "value"), "labs")
    table = conform(table, schemas.LABS)
    people = to_polars(patients, "patients")
    require_columns(people, schemas.PATIENTS_REQUIRED, "patients")
    people = conform(people, schemas.PATIENTS).unique("patient_id", keep="first")
    coded = people.select(sex_expr(pl.col("sex")).alias("_sex"), "sex")
    unknown = coded.filter(pl.col("_sex").is_null() & pl.col("sex").is_not_null())["sex"]
    unknown = unknown.filter(unknown.str.strip_chars() != "")
    if unknown.len():
        raise unknown_sex_error("patients.sex", unknown.unique().to_list())
    people = people.with_columns(coded["_sex"].alias("sex"))
    body = None
    if measurements is not None:
        body = to_polars(measurements, "measurements")
        require_columns(body, ("patient_id", "measurement_date"), "measurements")
    return table, people, body


def _sample_frames(table: pl.DataFrame, kinds: set[str], rule: EgfrRule) -> dict[str, pl.DataFrame]:
    """The samples each kind of equation reads (combined: paired creatinine and cystatin C)."""
    cr = _samples(table, "creatinine", "creatinine_mg_dl")
    cys = _samples(table, "cystatin_c", "cystatin_c_mg_l")
    frames: dict[str, pl.DataFrame] = {}
    if kinds & {"creatinine", "clearance"}:
        frames["creatinine"] = cr.with_columns(pl.lit(None, pl.Float64).alias("cystatin_c_mg_l"))
        frames["clearance"] = frames["creatinine"]
    if "cystatin_c" in kinds:
        frames["cystatin_c"] = cys.with_columns(pl.lit(None, pl.Float64).alias("creatinine_mg_dl"))
    if "combined" in kinds:
        frames["combined"] = _pair(cr, cys, rule.pairing_window_days)
    return frames


def _enrich(
    samples: pl.DataFrame, people: pl.DataFrame, body: pl.DataFrame | None, rule: EgfrRule
) -> pl.DataFrame:
    """Samples with the patient's facts, exact age, time from index, window and body size."""
    if "_pair_reason" not in samples.columns:
        samples = samples.with_columns(pl.lit(None, pl.String).alias("_pair_reason"))
    enriched = samples.join(people, on="patient_id", how="left", maintain_order="left")
    enriched = enriched.with_columns(
        age_on_expr(people.columns, pl.col("sample_date")).alias("age_years"),
        (
            (pl.col("sample_date") - pl.col("index_date")).dt.total_days() / schemas.DAYS_PER_YEAR
        ).alias("years_from_index"),
    )
    outside = pl.lit(False)
    if rule.window_start_years is not None:
        outside = outside | (pl.col("years_from_index") < rule.window_start_years).fill_null(True)
    if rule.window_end_years is not None:
        outside = outside | (pl.col("years_from_index") > rule.window_end_years).fill_null(True)
    enriched = enriched.with_columns(
        pl.when(outside).then(pl.lit("outside_measurement_window")).alias("_window_reason")
    )
    if body is None:
        return enriched
    enriched = _attach_measurements(enriched, body, rule.body_size_window_days)
    # a measurement near the sample wins over the patients table's value
    return enriched.with_columns(
        pl.coalesce(f"_measured_{c}", c).alias(c)
        for c in ("height_cm", "weight_kg")
        if f"_measured_{c}" in enriched.columns
    )


def _rows_in_age_bands(enriched: pl.DataFrame, equation_id: str, rule: EgfrRule) -> pl.DataFrame:
    """With age bands, the samples whose age falls in a band that uses ``equation_id``."""
    if rule.by_age is None:
        return enriched
    keep = pl.col("age_years").is_null()
    for band in (b for b in rule.by_age if equation_id in b.equations):
        keep = keep | _in_band(pl.col("age_years"), band)
    return enriched.filter(keep)


@follows_input
def egfr_wide(egfr: pl.DataFrame) -> pl.DataFrame:
    """Wide view of the long table: one row per patient and sample time, one column per
    equation (its eGFR), plus the creatinine and cystatin C of the sample.

    >>> import datetime as dt
    >>> long = pl.DataFrame({"patient_id": ["a", "a"], "sample_date": [dt.date(2020, 1, 1)] * 2,
    ...     "sample_datetime": [dt.datetime(2020, 1, 1)] * 2, "equation": ["x", "y"],
    ...     "egfr": [90.0, 80.0], "creatinine_mg_dl": [1.0, 1.0], "cystatin_c_mg_l": [None, 1.1]})
    >>> egfr_wide(long).columns
    ['patient_id', 'sample_date', 'sample_datetime', 'creatinine_mg_dl', 'cystatin_c_mg_l', 'x', 'y']
    """
    index = ["patient_id", "sample_date", "sample_datetime"]
    values = egfr.pivot(
        on="equation",
        index=index,
        values="egfr",
        aggregate_function="first",
        sort_columns=False,
    )
    inputs = egfr.group_by(index, maintain_order=True).agg(
        pl.col("creatinine_mg_dl").drop_nulls().first(),
        pl.col("cystatin_c_mg_l").drop_nulls().first(),
    )
    return inputs.join(values, on=index, how="left", maintain_order="left").sort(index)
