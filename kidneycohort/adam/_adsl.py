"""ADSL: one row per subject with treatment, key dates, baseline eGFR and KDIGO category.

Derivations (stated in the spec sheet): planned/actual treatment and population flags as
in :mod:`kidneycohort.adam._subjects`; ``AGE`` in whole years at the index date (from
the birth date, else the patients table's ``age_at_index``); ``SEX`` in CDISC
controlled terminology (``F``/``M``); ``DTHDT`` the death date; ``EOSDT`` the end of
follow-up; ``KFRTDT`` the kidney-failure date of the endpoints (first dialysis or
transplant counted by the endpoint rules), else the patients' ``kfrt_date``;
``EGFRBL`` the analysis baseline eGFR of the primary equation and ``GFRCATBL`` its KDIGO
2012 G category; ``ACATBL`` the KDIGO A category at baseline when given.

References
----------
.. [1] CDISC. ADaM Implementation Guide v1.3 (2021), section 3.1 (ADSL variables).
.. [2] KDIGO 2012 Clinical Practice Guideline for the Evaluation and Management of CKD.
   Kidney Int Suppl 2013;3:1-150 (GFR categories G1-G5).
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence

import polars as pl

from kidneycohort import schemas
from kidneycohort._frames import FrameLike, require_columns, to_polars
from kidneycohort.adam._metadata import AdamDataset, Kind, Variable, make_dataset, standard
from kidneycohort.adam._subjects import subject_facts
from kidneycohort.ages import age_at_index_expr
from kidneycohort.kdigo import gfr_category_expr

__all__ = ["adsl_dataset"]


def _sponsor(name: str, label: str, kind: Kind, derivation: str) -> Variable:
    return Variable(name, label, kind, "Derived", derivation)


def _variables(saffl_rule: str, has_site: bool, has_albuminuria: bool) -> list[Variable]:
    out = [
        standard("STUDYID", "text", "Assigned", "study name or adam.study_id"),
        standard("USUBJID", "text", "Predecessor", "patients.patient_id"),
    ]
    if has_site:
        out.append(standard("SITEID", "text", "Predecessor", "patients.site"))
    out += [
        standard("ARM", "text", "Predecessor", "patients.group"),
        standard("ACTARM", "text", "Predecessor", "patients.actual_group, else group"),
        standard("TRT01P", "text", "Derived", "the planned arm"),
        standard("TRT01PN", "integer", "Derived", "arm number in arm order"),
        standard("TRT01A", "text", "Derived", "the actual arm"),
        standard("TRT01AN", "integer", "Derived", "arm number in arm order"),
        standard("RANDDT", "date", "Derived", "patients.index_date"),
        standard("TRTSDT", "date", "Predecessor", "patients.first_dose_date (first EX)"),
        standard("AGE", "integer", "Derived", "whole years from birth to the index date"),
        standard("AGEU", "text", "Assigned", "YEARS"),
        standard("SEX", "text", "Derived", "patients.sex as F / M"),
        standard("ITTFL", "text", "Derived", "Y when the subject has an arm and an index date"),
        standard("SAFFL", "text", "Derived", saffl_rule),
        standard("DTHFL", "text", "Derived", "Y when DTHDT is present"),
        standard("DTHDT", "date", "Predecessor", "patients.death_date"),
        standard("EOSDT", "date", "Predecessor", "patients.end_of_followup"),
        standard("DCUTDT", "date", "Assigned", "endpoints.data_cut"),
        _sponsor(
            "KFRTDT",
            "Date of Kidney Failure (Dialysis/Tx)",
            "date",
            "first kidney-failure date counted by the endpoint rules, else patients.kfrt_date",
        ),
        _sponsor(
            "EGFRBL",
            "Baseline eGFR (mL/min/1.73 m2)",
            "float",
            "baseline.baseline_egfr of the primary equation",
        ),
        _sponsor(
            "GFRCATBL", "Baseline KDIGO GFR Category", "text", "KDIGO 2012 G category of EGFRBL"
        ),
    ]
    if has_albuminuria:
        out.append(
            _sponsor(
                "ACATBL",
                "Baseline KDIGO Albuminuria Category",
                "text",
                "baseline_categories.a_category",
            )
        )
    return out


def adsl_dataset(
    patients: FrameLike,
    baseline: FrameLike,
    *,
    equation: str,
    data_cut: dt.date | None = None,
    kidney_failure_dates: FrameLike | None = None,
    albuminuria_categories: FrameLike | None = None,
    arm_order: Sequence[str] | None = None,
    study_id: str = "",
) -> AdamDataset:
    """ADSL: one row per subject of the harmonised patients table.

    Parameters
    ----------
    patients
        Harmonised patients (``patient_id``, ``group``, ``index_date``; optional
        ``actual_group``, ``first_dose_date``, ``site``, ``sex``, ``birth_date``,
        ``age_at_index``, ``death_date``, ``kfrt_date``, ``end_of_followup``).
    baseline
        The baseline table (``schemas.BASELINE``); the rows of ``equation`` are used.
    equation
        The primary eGFR equation.
    data_cut
        The data-cut date (``DCUTDT``).
    kidney_failure_dates
        ``patient_id, kidney_failure_date`` (e.g. kidney-failure events of the
        endpoints); absent subjects fall back to ``patients.kfrt_date``.
    albuminuria_categories
        ``patient_id, a_category`` at baseline (the baseline KDIGO categories).
    arm_order, study_id
        Arms in numbering order; the ``STUDYID`` value.

    Returns
    -------
    AdamDataset
        ADSL, one row per subject, ordered by ``USUBJID``.
    """
    df = to_polars(patients, "patients")
    base = to_polars(baseline, "baseline")
    require_columns(base, ("patient_id", "equation", "baseline_egfr"), "baseline")
    facts, saffl_rule = subject_facts(df, arm_order)
    for column, dtype in schemas.PATIENTS.items():
        if column not in df.columns:
            df = df.with_columns(pl.lit(None, dtype).alias(column))
    if "actual_group" not in df.columns:
        df = df.with_columns(pl.col("group").alias("actual_group"))
    egfr = base.filter(pl.col("equation") == equation).select(
        pl.col("patient_id").cast(pl.String), pl.col("baseline_egfr").alias("EGFRBL")
    )
    frame = df.with_columns(pl.col("patient_id").cast(pl.String)).join(
        egfr, on="patient_id", how="left"
    )
    kfrt = pl.col("kfrt_date").cast(pl.Date)
    if kidney_failure_dates is not None:
        dates = to_polars(kidney_failure_dates, "kidney_failure_dates").select(
            pl.col("patient_id").cast(pl.String), pl.col("kidney_failure_date").cast(pl.Date)
        )
        frame = frame.join(dates, on="patient_id", how="left")
        kfrt = pl.coalesce("kidney_failure_date", kfrt)
    has_albuminuria = albuminuria_categories is not None
    if albuminuria_categories is not None:
        categories = to_polars(albuminuria_categories, "albuminuria_categories").select(
            pl.col("patient_id").cast(pl.String), pl.col("a_category").alias("ACATBL")
        )
        frame = frame.join(categories, on="patient_id", how="left")
    age = age_at_index_expr(frame.columns).floor().cast(pl.Int64)
    rows = frame.select(
        pl.lit(study_id, pl.String).alias("STUDYID"),
        pl.col("patient_id").alias("USUBJID"),
        *([pl.col("site").cast(pl.String).alias("SITEID")] if "site" in frame.columns else []),
        pl.col("group").cast(pl.String).alias("ARM"),
        pl.col("actual_group").cast(pl.String).alias("ACTARM"),
        age.alias("AGE"),
        pl.when(age.is_not_null()).then(pl.lit("YEARS")).alias("AGEU"),
        pl.col("sex").replace_strict({"female": "F", "male": "M"}, default=None).alias("SEX"),
        pl.when(pl.col("death_date").is_not_null()).then(pl.lit("Y")).alias("DTHFL"),
        pl.col("death_date").cast(pl.Date).alias("DTHDT"),
        pl.col("end_of_followup").cast(pl.Date).alias("EOSDT"),
        pl.lit(data_cut, pl.Date).alias("DCUTDT"),
        kfrt.alias("KFRTDT"),
        "EGFRBL",
        gfr_category_expr(pl.col("EGFRBL")).cast(pl.String).alias("GFRCATBL"),
        *([pl.col("ACATBL").cast(pl.String)] if has_albuminuria else []),
    ).join(
        facts.select(
            "USUBJID",
            pl.col("TRTP").alias("TRT01P"),
            pl.col("TRTPN").alias("TRT01PN"),
            pl.col("TRTA").alias("TRT01A"),
            pl.col("TRTAN").alias("TRT01AN"),
            "RANDDT",
            "TRTSDT",
            "ITTFL",
            "SAFFL",
        ),
        on="USUBJID",
        how="left",
    )
    variables = _variables(saffl_rule, "SITEID" in rows.columns, has_albuminuria)
    return make_dataset(
        "ADSL",
        "Subject-Level Analysis Dataset",
        rows.sort("USUBJID"),
        variables,
        keys=("USUBJID",),
    )
