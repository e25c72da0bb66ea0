"""Write a synthetic cohort as CDISC SDTM datasets (``kidneycohort synth --format sdtm``).

Domains DM, LB, DS, EX and PR, each as SAS transport (``sdtm/xpt/<domain>.xpt``) and
Dataset-JSON v1.1 (``sdtm/json/<domain>.json``), holding the same subjects, lab rows
(export defects included) and kidney-failure events as the canonical files:

* DM: one row per subject; ``RFSTDTC``/``RFXSTDTC`` the index (first dose) date, ``ARM``
  the arm, ``BRTHDTC``, ``AGE`` at the index date, ``DTHDTC``; sex "U" where unknown;
* LB: one row per lab row, ``LBORRES``/``LBORRESU`` as reported and the standard result
  ``LBSTRESN`` (full precision) in the analyte's standard unit when the unit converts;
  ``VISIT``/``VISITNUM`` of the scheduled visit;
* DS: randomisation (protocol milestone) and the end-of-study disposition event;
* EX: one record per subject, start at the index date;
* PR: dialysis and kidney transplant.

Labels are the SDTM IG v3.4 variable labels (from memory; those of the pilot example
datasets shipped with Dataset-JSON v1.1 were re-read there).
"""

from __future__ import annotations

import datetime as dt
import logging
from pathlib import Path
from typing import Final

import polars as pl

from kidneycohort import units
from kidneycohort.adam._metadata import Kind, Variable
from kidneycohort.errors import UnknownUnitError
from kidneycohort.io.cdisc_files import write_dataset_json, write_xpt
from kidneycohort.synthetic.cohort import SyntheticCohort

__all__ = ["write_sdtm"]

logger = logging.getLogger(__name__)

TEST_CODES: Final = {"creatinine": "CREAT", "cystatin_c": "CYSTC", "uacr": "ALBCREAT"}
TEST_NAMES: Final = {
    "creatinine": "Creatinine",
    "cystatin_c": "Cystatin C",
    "uacr": "Albumin/Creatinine",
}
_END_REASON: Final = {
    "death": "DEATH",
    "loss_to_followup": "LOST TO FOLLOW-UP",
    "end_of_study": "COMPLETED",
}
_EVENT_TERMS: Final = {"dialysis": "HEMODIALYSIS", "transplant": "KIDNEY TRANSPLANT"}


def _v(name: str, label: str, kind: Kind = "text") -> Variable:
    return Variable(name, label, kind, "Assigned")


_COMMON: Final = (_v("STUDYID", "Study Identifier"), _v("DOMAIN", "Domain Abbreviation"))
_USUBJID: Final = _v("USUBJID", "Unique Subject Identifier")
DM_VARIABLES: Final = (
    *_COMMON,
    _USUBJID,
    _v("SUBJID", "Subject Identifier for the Study"),
    _v("RFSTDTC", "Subject Reference Start Date/Time"),
    _v("RFXSTDTC", "Date/Time of First Study Treatment"),
    _v("RFPENDTC", "Date/Time of End of Participation"),
    _v("DTHDTC", "Date/Time of Death"),
    _v("DTHFL", "Subject Death Flag"),
    _v("SITEID", "Study Site Identifier"),
    _v("BRTHDTC", "Date/Time of Birth"),
    _v("AGE", "Age", "integer"),
    _v("AGEU", "Age Units"),
    _v("SEX", "Sex"),
    _v("ARMCD", "Planned Arm Code"),
    _v("ARM", "Description of Planned Arm"),
    _v("ACTARMCD", "Actual Arm Code"),
    _v("ACTARM", "Description of Actual Arm"),
)
LB_VARIABLES: Final = (
    *_COMMON,
    _USUBJID,
    _v("LBSEQ", "Sequence Number", "integer"),
    _v("LBTESTCD", "Lab Test or Examination Short Name"),
    _v("LBTEST", "Lab Test or Examination Name"),
    _v("LBCAT", "Category for Lab Test"),
    _v("LBSPEC", "Specimen Type"),
    _v("LBORRES", "Result or Finding in Original Units"),
    _v("LBORRESU", "Original Units"),
    _v("LBSTRESC", "Character Result/Finding in Std Format"),
    _v("LBSTRESN", "Numeric Result/Finding in Standard Units", "float"),
    _v("LBSTRESU", "Standard Units"),
    _v("LBSTAT", "Completion Status"),
    _v("LBREASND", "Reason Test Not Done"),
    _v("VISITNUM", "Visit Number", "float"),
    _v("VISIT", "Visit Name"),
    _v("LBDTC", "Date/Time of Specimen Collection"),
    _v("LBDY", "Study Day of Specimen Collection", "integer"),
)
DS_VARIABLES: Final = (
    *_COMMON,
    _USUBJID,
    _v("DSSEQ", "Sequence Number", "integer"),
    _v("DSTERM", "Reported Term for the Disposition Event"),
    _v("DSDECOD", "Standardized Disposition Term"),
    _v("DSCAT", "Category for Disposition Event"),
    _v("DSSTDTC", "Start Date/Time of Disposition Event"),
)
EX_VARIABLES: Final = (
    *_COMMON,
    _USUBJID,
    _v("EXSEQ", "Sequence Number", "integer"),
    _v("EXTRT", "Name of Treatment"),
    _v("EXSTDTC", "Start Date/Time of Treatment"),
    _v("EXENDTC", "End Date/Time of Treatment"),
)
PR_VARIABLES: Final = (
    *_COMMON,
    _USUBJID,
    _v("PRSEQ", "Sequence Number", "integer"),
    _v("PRTRT", "Reported Name of Procedure"),
    _v("PRDECOD", "Standardized Procedure Name"),
    _v("PRSTDTC", "Start Date/Time of Procedure"),
    _v("PRENDTC", "End Date/Time of Procedure"),
)
LABELS: Final = {
    "DM": "Demographics",
    "LB": "Laboratory Test Results",
    "DS": "Disposition",
    "EX": "Exposure",
    "PR": "Procedures",
}


def _iso(column: str) -> pl.Expr:
    return pl.col(column).dt.strftime("%Y-%m-%d")


def _factor_table(labs: pl.DataFrame) -> pl.DataFrame:
    rows = []
    for analyte, unit in labs.select("analyte", "unit").unique().iter_rows():
        try:
            factor = units.conversion_factor(analyte, unit) if unit else None
        except (UnknownUnitError, KeyError, ValueError):
            factor = None
        rows.append({"analyte": analyte, "unit": unit, "_factor": factor})
    return pl.DataFrame(
        rows, schema={"analyte": pl.String, "unit": pl.String, "_factor": pl.Float64}
    )


def _dm(cohort: SyntheticCohort, study: str) -> pl.DataFrame:
    p = cohort.patients
    codes = {a.label: f"ARM{i}" for i, a in enumerate(cohort.scenario.groups.arms, start=1)}
    age = (
        ((pl.col("index_date") - pl.col("birth_date")).dt.total_days() / 365.25)
        .floor()
        .cast(pl.Int64)
    )
    return p.select(
        pl.lit(study).alias("STUDYID"),
        pl.lit("DM").alias("DOMAIN"),
        pl.col("patient_id").alias("USUBJID"),
        pl.col("patient_id").str.extract(r"(\d+)$").alias("SUBJID"),
        _iso("index_date").alias("RFSTDTC"),
        _iso("index_date").alias("RFXSTDTC"),
        _iso("end_of_followup").alias("RFPENDTC"),
        _iso("death_date").alias("DTHDTC"),
        pl.when(pl.col("death_date").is_not_null()).then(pl.lit("Y")).alias("DTHFL"),
        pl.col("site").alias("SITEID")
        if "site" in p.columns
        else pl.lit(None, pl.String).alias("SITEID"),
        _iso("birth_date").alias("BRTHDTC"),
        age.alias("AGE"),
        pl.lit("YEARS").alias("AGEU"),
        pl.col("sex").replace_strict({"female": "F", "male": "M"}, default="U").alias("SEX"),
        pl.col("group").replace_strict(codes, default=None).alias("ARMCD"),
        pl.col("group").alias("ARM"),
        pl.col("group").replace_strict(codes, default=None).alias("ACTARMCD"),
        pl.col("group").alias("ACTARM"),
    )


def _lb(cohort: SyntheticCohort, study: str) -> pl.DataFrame:
    visits = cohort.truth["samples"].select("sample_id", "visit")
    names = list(dict.fromkeys(cohort.truth["samples"]["visit"].drop_nulls().to_list()))
    numbers = {name: float(i) for i, name in enumerate(names, start=1)}
    index = cohort.patients.select("patient_id", "index_date")
    labs = (
        cohort.labs.join(visits, on="sample_id", how="left", maintain_order="left")
        .join(index, on="patient_id", how="left", maintain_order="left")
        .join(_factor_table(cohort.labs), on=["analyte", "unit"], how="left", maintain_order="left")
    )
    number = pl.col("value").cast(pl.Float64, strict=False)
    standard = number * pl.col("_factor")
    day = (pl.col("sample_date").dt.date() - pl.col("index_date")).dt.total_days()
    return labs.with_row_index("_row", offset=1).select(
        pl.lit(study).alias("STUDYID"),
        pl.lit("LB").alias("DOMAIN"),
        pl.col("patient_id").alias("USUBJID"),
        pl.col("_row").cast(pl.Int64).alias("LBSEQ"),
        pl.col("analyte").replace_strict(TEST_CODES).alias("LBTESTCD"),
        pl.col("analyte").replace_strict(TEST_NAMES).alias("LBTEST"),
        pl.when(pl.col("analyte") == "uacr")
        .then(pl.lit("URINALYSIS"))
        .otherwise(pl.lit("CHEMISTRY"))
        .alias("LBCAT"),
        pl.when(pl.col("analyte") == "uacr")
        .then(pl.lit("URINE"))
        .otherwise(pl.lit("SERUM"))
        .alias("LBSPEC"),
        pl.col("value").alias("LBORRES"),
        pl.col("unit").alias("LBORRESU"),
        pl.coalesce(standard.cast(pl.String), pl.col("value")).alias("LBSTRESC"),
        standard.alias("LBSTRESN"),
        pl.when(standard.is_not_null())
        .then(pl.col("analyte").replace_strict(units.STANDARD_UNIT))
        .otherwise(pl.col("unit"))
        .alias("LBSTRESU"),
        pl.lit(None, pl.String).alias("LBSTAT"),
        pl.lit(None, pl.String).alias("LBREASND"),
        pl.col("visit")
        .replace_strict(numbers, default=None, return_dtype=pl.Float64)
        .alias("VISITNUM"),
        pl.col("visit").str.to_uppercase().alias("VISIT"),
        pl.col("sample_date").dt.strftime("%Y-%m-%dT%H:%M").alias("LBDTC"),
        pl.when(day >= 0).then(day + 1).otherwise(day).alias("LBDY"),
    )


def _ds(cohort: SyntheticCohort, study: str) -> pl.DataFrame:
    ends = cohort.truth["events"].select("patient_id", "end_reason")
    p = cohort.patients.join(ends, on="patient_id", how="left")
    randomised = p.select(
        "patient_id",
        pl.lit("RANDOMIZED").alias("DSTERM"),
        pl.lit("RANDOMIZED").alias("DSDECOD"),
        pl.lit("PROTOCOL MILESTONE").alias("DSCAT"),
        _iso("index_date").alias("DSSTDTC"),
    )
    finished = p.select(
        "patient_id",
        pl.col("end_reason").replace_strict(_END_REASON, default="COMPLETED").alias("DSTERM"),
        pl.col("end_reason").replace_strict(_END_REASON, default="COMPLETED").alias("DSDECOD"),
        pl.lit("DISPOSITION EVENT").alias("DSCAT"),
        _iso("end_of_followup").alias("DSSTDTC"),
    )
    rows = pl.concat([randomised, finished]).sort("patient_id", "DSCAT", descending=[False, True])
    return rows.select(
        pl.lit(study).alias("STUDYID"),
        pl.lit("DS").alias("DOMAIN"),
        pl.col("patient_id").alias("USUBJID"),
        pl.int_range(1, pl.len() + 1).over("patient_id").cast(pl.Int64).alias("DSSEQ"),
        "DSTERM",
        "DSDECOD",
        "DSCAT",
        "DSSTDTC",
    )


def _ex(cohort: SyntheticCohort, study: str) -> pl.DataFrame:
    return cohort.patients.filter(pl.col("index_date").is_not_null()).select(
        pl.lit(study).alias("STUDYID"),
        pl.lit("EX").alias("DOMAIN"),
        pl.col("patient_id").alias("USUBJID"),
        pl.lit(1, pl.Int64).alias("EXSEQ"),
        pl.col("group").str.to_uppercase().alias("EXTRT"),
        _iso("index_date").alias("EXSTDTC"),
        _iso("end_of_followup").alias("EXENDTC"),
    )


def _pr(cohort: SyntheticCohort, study: str) -> pl.DataFrame:
    rows = cohort.events.filter(pl.col("event").is_in(list(_EVENT_TERMS)))
    return rows.select(
        pl.lit(study).alias("STUDYID"),
        pl.lit("PR").alias("DOMAIN"),
        pl.col("patient_id").alias("USUBJID"),
        pl.int_range(1, pl.len() + 1).over("patient_id").cast(pl.Int64).alias("PRSEQ"),
        pl.col("event").replace_strict(_EVENT_TERMS).alias("PRTRT"),
        pl.col("event").replace_strict(_EVENT_TERMS).alias("PRDECOD"),
        _iso("event_date").alias("PRSTDTC"),
        _iso("end_date").alias("PRENDTC"),
    )


def sdtm_domains(cohort: SyntheticCohort) -> dict[str, tuple[pl.DataFrame, tuple[Variable, ...]]]:
    """The cohort's SDTM domains: name -> (rows, variables)."""
    study = cohort.scenario.id_prefix.rstrip("-") or "KC"
    return {
        "DM": (_dm(cohort, study), DM_VARIABLES),
        "LB": (_lb(cohort, study), LB_VARIABLES),
        "DS": (_ds(cohort, study), DS_VARIABLES),
        "EX": (_ex(cohort, study), EX_VARIABLES),
        "PR": (_pr(cohort, study), PR_VARIABLES),
    }


def write_sdtm(
    cohort: SyntheticCohort, out: Path, created: dt.datetime | None = None
) -> tuple[list[Path], dict[str, int]]:
    """Write ``out/sdtm/xpt/*.xpt`` and ``out/sdtm/json/*.json``; returns files and rows."""
    files: list[Path] = []
    rows: dict[str, int] = {}
    for fmt in ("xpt", "json"):
        (out / "sdtm" / fmt).mkdir(parents=True, exist_ok=True)
    for name, (frame, variables) in sdtm_domains(cohort).items():
        frame = frame.select([v.name for v in variables])
        rows[name] = frame.height
        xpt = out / "sdtm" / "xpt" / f"{name.lower()}.xpt"
        files.append(write_xpt(frame, xpt, name=name, label=LABELS[name], variables=variables))
        files.append(
            write_dataset_json(
                frame,
                out / "sdtm" / "json" / f"{name.lower()}.json",
                name=name,
                label=LABELS[name],
                variables=variables,
                keys=("STUDYID", "USUBJID"),
                study_oid=str(frame["STUDYID"][0]) if frame.height else "",
                created=created or dt.datetime(2000, 1, 1, tzinfo=dt.UTC),
            )
        )
    logger.info("SDTM datasets written: %s", rows)
    return files, rows
