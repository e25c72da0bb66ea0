"""ADEGFR: eGFR in the ADaM Basic Data Structure, one parameter per equation.

One record per eGFR value (``AVAL``) and equation (``PARAMCD``), dated ``ADT`` with
``ADY`` relative to the index date (day 1 is the index date, no day 0), placed in an
analysis visit (``AVISIT``/``AVISITN``) by configured visit windows of study days. The
baseline is the study's analysis baseline (the baseline rule of the ``baseline`` stage):
when it is one value, that record carries ``ABLFL = "Y"``; when it is a mean of several,
a derived record (``DTYPE = "AVERAGE"``) carries it. ``BASE`` is that baseline, ``CHG``
and ``PCHG`` the change and percent change of post-baseline records. ``ANL01FL`` marks
the baseline record and, in each post-baseline window, the record nearest the window's
target day (the earlier on a tie) — the record an analysis by visit uses.

References
----------
.. [1] CDISC. ADaM Implementation Guide v1.3 (2021), section 3.3 (BDS: PARAMCD, AVAL,
   ADT, ADY, AVISIT, AVISITN, ABLFL, BASE, CHG, PCHG, ANL01FL, DTYPE).
"""

from __future__ import annotations

import itertools
from collections.abc import Mapping, Sequence
from typing import Final

import polars as pl
from pydantic import Field, model_validator

from kidneycohort._frames import FrameLike, require_columns, to_polars
from kidneycohort._rules import RuleModel
from kidneycohort.adam._metadata import AdamDataset, Variable, make_dataset, standard
from kidneycohort.adam._subjects import subject_facts
from kidneycohort.equations import REGISTRY
from kidneycohort.errors import ConfigError

__all__ = [
    "PARAMCD_BY_EQUATION",
    "VisitWindow",
    "adegfr_dataset",
    "default_visit_windows",
    "paramcd",
]

# PARAMCD of each equation (8 characters at most, ADaM IG); our own codes.
PARAMCD_BY_EQUATION: Final[dict[str, str]] = {
    "ckd_epi_2021_cr": "EGFRC21",
    "ckd_epi_2021_crcys": "EGFRCC21",
    "ckd_epi_2012_cys": "EGFRCY12",
    "ckd_epi_2012_crcys": "EGFRCC12",
    "ckd_epi_2009_cr": "EGFRC09",
    "mdrd_175": "EGFRMD75",
    "mdrd_186": "EGFRMD86",
    "ekfc_cr": "EGFREKC",
    "ekfc_cys": "EGFREKCY",
    "fas_cr": "EGFRFAS",
    "bis1_cr": "EGFRBIS1",
    "lmr_cr": "EGFRLMR",
    "cockcroft_gault": "CRCLCG",
    "schwartz_bedside": "EGFRSWB",
    "ckid_u25_cr": "EGFRU25C",
    "ckid_u25_cys": "EGFRU25Y",
}


class VisitWindow(RuleModel):
    """An analysis visit: records dated from ``first_day`` to ``last_day`` (study days,
    day 1 = index date) belong to it; ``target_day`` picks the record analysed."""

    name: str = Field(description="AVISIT text, e.g. 'Month 6'.")
    target_day: int = Field(description="Study day the visit aims at.")
    first_day: int = Field(description="First study day of the window (inclusive).")
    last_day: int = Field(description="Last study day of the window (inclusive).")

    @model_validator(mode="after")
    def _ordered(self) -> VisitWindow:
        if not self.first_day <= self.target_day <= self.last_day:
            raise ValueError(
                f"window '{self.name}': need first_day <= target_day <= last_day, got "
                f"{self.first_day}, {self.target_day}, {self.last_day}"
            )
        return self


def default_visit_windows() -> list[VisitWindow]:
    """Every 3 months to month 36, +/- 45 days around day 91 x k (common practice)."""
    return [
        VisitWindow(
            name=f"Month {3 * k}",
            target_day=91 * k + 1,
            first_day=91 * k - 44,
            last_day=91 * k + 46,
        )
        for k in range(1, 13)
    ]


def _check_windows(windows: Sequence[VisitWindow]) -> None:
    spans = sorted((w.first_day, w.last_day, w.name) for w in windows)
    for (_, end, name), (start, _, other) in itertools.pairwise(spans):
        if start <= end:
            raise ConfigError(
                f"adam.visit_windows: '{name}' and '{other}' overlap; make them disjoint"
            )
    if any(w.first_day <= 1 for w in windows):
        raise ConfigError("adam.visit_windows: post-baseline windows must start after day 1")


def paramcd(equation: str, codes: Mapping[str, str] | None = None) -> str:
    """The PARAMCD of an equation (``codes`` first, then :data:`PARAMCD_BY_EQUATION`)."""
    table = {**PARAMCD_BY_EQUATION, **(codes or {})}
    if equation not in table:
        raise ConfigError(f"adam.paramcd: no PARAMCD for equation '{equation}'; add one")
    return table[equation]


def _variables(saffl_rule: str) -> list[Variable]:
    return [
        standard("STUDYID", "text", "Assigned", "study name or adam.study_id"),
        standard("USUBJID", "text", "Predecessor", "egfr.patient_id"),
        standard("TRTP", "text", "Derived", "ADSL.TRT01P"),
        standard("TRTPN", "integer", "Derived", "ADSL.TRT01PN"),
        standard("TRTA", "text", "Derived", "ADSL.TRT01A"),
        standard("TRTAN", "integer", "Derived", "ADSL.TRT01AN"),
        standard("ITTFL", "text", "Derived", "ADSL.ITTFL"),
        standard("SAFFL", "text", "Derived", saffl_rule),
        standard("ASEQ", "integer", "Derived", "1, 2, ... per subject in PARAMN, ADT order"),
        standard("PARAMCD", "text", "Assigned", "one code per eGFR equation"),
        standard("PARAM", "text", "Assigned", "equation label and unit"),
        standard("PARAMN", "integer", "Assigned", "order of the equations, from 1"),
        standard("DTYPE", "text", "Derived", "AVERAGE on a baseline averaged from several values"),
        standard("AVAL", "float", "Derived", "egfr.egfr (mean of the baseline values on AVERAGE)"),
        standard("ADT", "date", "Derived", "egfr.sample_date"),
        standard(
            "ADY",
            "integer",
            "Derived",
            "ADT - index date + 1 when on or after it, else ADT - index date",
        ),
        standard(
            "AVISIT",
            "text",
            "Derived",
            "visit window holding ADY; Baseline for the baseline record",
        ),
        standard("AVISITN", "integer", "Derived", "window number; 0 for Baseline"),
        standard("ABLFL", "text", "Derived", "Y on the analysis baseline record"),
        standard("BASE", "float", "Derived", "baseline.baseline_egfr of the equation"),
        standard("CHG", "float", "Derived", "AVAL - BASE after the baseline date"),
        standard("PCHG", "float", "Derived", "100 x CHG / BASE"),
        standard(
            "ANL01FL",
            "text",
            "Derived",
            "Y on the baseline and the record nearest each window's target day",
        ),
    ]


def _records(
    egfr: pl.DataFrame, base: pl.DataFrame, index: pl.DataFrame, codes: dict[str, str]
) -> pl.DataFrame:
    equations = [e for e in codes if e in set(egfr["equation"].unique().to_list())]
    order = {e: i for i, e in enumerate(equations, start=1)}
    collected = egfr.filter(
        pl.col("equation").is_in(equations) & pl.col("egfr").is_not_null()
    ).select(
        pl.col("patient_id").cast(pl.String),
        "equation",
        pl.col("egfr").alias("AVAL"),
        pl.col("sample_date").cast(pl.Date).alias("ADT"),
        pl.lit(None, pl.String).alias("DTYPE"),
    )
    averaged = base.filter(
        pl.col("equation").is_in(equations)
        & pl.col("baseline_egfr").is_not_null()
        & (pl.col("baseline_n_values") > 1)
    ).select(
        pl.col("patient_id").cast(pl.String),
        "equation",
        pl.col("baseline_egfr").alias("AVAL"),
        pl.col("baseline_date").cast(pl.Date).alias("ADT"),
        pl.lit("AVERAGE").alias("DTYPE"),
    )
    rows = pl.concat([collected, averaged]).join(index, on="patient_id", how="left")
    return rows.with_columns(
        pl.col("equation").replace_strict(codes).alias("PARAMCD"),
        pl.col("equation").replace_strict(order, return_dtype=pl.Int64).alias("PARAMN"),
        pl.col("equation")
        .replace_strict({e: f"{REGISTRY[e].label} ({REGISTRY[e].output_unit})" for e in equations})
        .alias("PARAM"),
    )


def _baseline_flags(rows: pl.DataFrame, base: pl.DataFrame) -> pl.DataFrame:
    b = base.select(
        pl.col("patient_id").cast(pl.String),
        "equation",
        pl.col("baseline_egfr").alias("BASE"),
        pl.col("baseline_date").cast(pl.Date).alias("_bdate"),
        pl.col("baseline_n_values").alias("_bn"),
    )
    rows = rows.join(b, on=["patient_id", "equation"], how="left")
    single = (pl.col("_bn") == 1) & pl.col("DTYPE").is_null() & (pl.col("ADT") == pl.col("_bdate"))
    # one record of a single-value baseline: the first of that day (a same-day value equal
    # to the baseline)
    single = single & (pl.col("AVAL") == pl.col("BASE"))
    first_single = single & (pl.int_range(pl.len()).over(["patient_id", "equation", single]) == 0)
    is_base = (pl.col("DTYPE") == "AVERAGE") | first_single
    post = (pl.col("ADT") > pl.col("_bdate")) & pl.col("DTYPE").is_null()
    change = pl.when(post).then(pl.col("AVAL") - pl.col("BASE"))
    return rows.sort("patient_id", "PARAMN", "ADT", "DTYPE", nulls_last=False).with_columns(
        pl.when(is_base).then(pl.lit("Y")).alias("ABLFL"),
        change.alias("CHG"),
        (100.0 * change / pl.col("BASE")).alias("PCHG"),
    )


def _windows(rows: pl.DataFrame, windows: Sequence[VisitWindow]) -> pl.DataFrame:
    days = pl.col("ADT") - pl.col("index_date")
    ady = (
        pl.when(days.dt.total_days() >= 0)
        .then(days.dt.total_days() + 1)
        .otherwise(days.dt.total_days())
    )
    rows = rows.with_columns(ady.cast(pl.Int64).alias("ADY"))
    name: pl.Expr = pl.lit(None, pl.String)
    number: pl.Expr = pl.lit(None, pl.Int64)
    target: pl.Expr = pl.lit(None, pl.Int64)
    for i, w in enumerate(windows, start=1):
        inside = pl.col("ADY").is_between(w.first_day, w.last_day) & (pl.col("ABLFL").is_null())
        name = pl.when(inside).then(pl.lit(w.name)).otherwise(name)
        number = pl.when(inside).then(pl.lit(i, pl.Int64)).otherwise(number)
        target = pl.when(inside).then(pl.lit(w.target_day, pl.Int64)).otherwise(target)
    rows = rows.with_columns(
        pl.when(pl.col("ABLFL") == "Y").then(pl.lit("Baseline")).otherwise(name).alias("AVISIT"),
        pl.when(pl.col("ABLFL") == "Y")
        .then(pl.lit(0, pl.Int64))
        .otherwise(number)
        .alias("AVISITN"),
        (pl.col("ADY") - target).abs().alias("_distance"),
    )
    ranked = pl.col("_distance").rank("ordinal").over(["patient_id", "PARAMN", "AVISITN"])
    chosen = (pl.col("ABLFL") == "Y") | (
        pl.col("AVISITN").is_not_null() & (ranked == 1) & (pl.col("AVISITN") > 0)
    )
    return rows.with_columns(pl.when(chosen).then(pl.lit("Y")).alias("ANL01FL"))


def adegfr_dataset(
    egfr: FrameLike,
    baseline: FrameLike,
    patients: FrameLike,
    *,
    equations: Sequence[str] | None = None,
    visit_windows: Sequence[VisitWindow] | None = None,
    paramcds: Mapping[str, str] | None = None,
    arm_order: Sequence[str] | None = None,
    study_id: str = "",
) -> AdamDataset:
    """ADEGFR: the eGFR values as a BDS dataset, one parameter per equation.

    Parameters
    ----------
    egfr
        The ``egfr`` table (``patient_id``, ``sample_date``, ``equation``, ``egfr``).
    baseline
        The ``baseline`` table (``baseline_egfr``, ``baseline_date``, ``baseline_n_values``).
    patients
        Harmonised patients (treatment and index date; see :func:`adsl_dataset`).
    equations
        Equations to include, in ``PARAMN`` order; default every one in ``egfr``.
    visit_windows
        Post-baseline analysis visits; default :func:`default_visit_windows`.
    paramcds
        Extra or overriding equation -> PARAMCD codes.
    arm_order, study_id
        Arms in numbering order; the ``STUDYID`` value.

    Returns
    -------
    AdamDataset
        Rows ordered by ``USUBJID``, ``PARAMN``, ``ADT`` (a derived baseline record after
        the collected records of its day); ``ASEQ`` numbers them per subject.
    """
    e = to_polars(egfr, "egfr")
    b = to_polars(baseline, "baseline")
    require_columns(e, ("patient_id", "sample_date", "equation", "egfr"), "egfr")
    require_columns(
        b,
        ("patient_id", "equation", "baseline_egfr", "baseline_date", "baseline_n_values"),
        "baseline",
    )
    windows = list(visit_windows) if visit_windows is not None else default_visit_windows()
    _check_windows(windows)
    chosen = (
        list(equations)
        if equations is not None
        else sorted(e["equation"].drop_nulls().unique().to_list())
    )
    codes = {eq: paramcd(eq, paramcds) for eq in chosen}
    facts, saffl_rule = subject_facts(patients, arm_order)
    index = to_polars(patients, "patients").select(
        pl.col("patient_id").cast(pl.String), pl.col("index_date").cast(pl.Date)
    )
    rows = _records(e, b, index, codes)
    rows = _windows(_baseline_flags(rows, b), windows)
    rows = rows.rename({"patient_id": "USUBJID"}).join(
        facts.select("USUBJID", "TRTP", "TRTPN", "TRTA", "TRTAN", "ITTFL", "SAFFL"),
        on="USUBJID",
        how="left",
    )
    rows = rows.sort("USUBJID", "PARAMN", "ADT", "DTYPE", nulls_last=False).with_columns(
        pl.int_range(1, pl.len() + 1).over("USUBJID").cast(pl.Int64).alias("ASEQ"),
        pl.lit(study_id, pl.String).alias("STUDYID"),
    )
    return make_dataset(
        "ADEGFR", "eGFR Analysis Dataset", rows, _variables(saffl_rule), keys=("USUBJID", "ASEQ")
    )
