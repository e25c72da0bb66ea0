"""Built-in LOINC codes for the analytes kidneycohort harmonises.

Each entry names the LOINC code, the canonical analyte, the property (mass or molar
concentration, mass ratio), the specimen, the unit a result under that code is usually
reported in, and where the code was checked:

* ``"checked"`` — the code and its long common name were read in a published FHIR value
  set or LOINC code page (HL7 FHIR Clinical Guidelines CKD example value set
  ``ckd-valueset-creatinine`` on hl7.org; a serum creatinine value set of a FHIR
  implementation guide on build.fhir.org; LOINC code pages for the albumin/creatinine
  ratio codes),
* ``"from memory"`` — recalled and not re-read; verify against the LOINC release before
  relying on it for a new site.

Only serum/plasma/blood creatinine, serum/plasma cystatin C and urine albumin/creatinine
ratio are listed; urine creatinine (e.g. 2161-8) is deliberately absent because it is not
an input of any GFR equation.
"""

from __future__ import annotations

from typing import Final, NamedTuple

import polars as pl

__all__ = ["LOINC_CODES", "LOINC_TO_ANALYTE", "LoincEntry", "loinc_table"]


class LoincEntry(NamedTuple):
    """One LOINC code known to kidneycohort."""

    code: str
    analyte: str
    long_name: str
    property: str
    typical_unit: str
    provenance: str


LOINC_CODES: Final[tuple[LoincEntry, ...]] = (
    # ---- serum / plasma / blood creatinine ----------------------------------------
    LoincEntry(
        "2160-0",
        "creatinine",
        "Creatinine [Mass/volume] in Serum or Plasma",
        "mass concentration",
        "mg/dL",
        "checked",
    ),
    LoincEntry(
        "38483-4",
        "creatinine",
        "Creatinine [Mass/volume] in Blood",
        "mass concentration",
        "mg/dL",
        "checked",
    ),
    LoincEntry(
        "14682-9",
        "creatinine",
        "Creatinine [Moles/volume] in Serum or Plasma",
        "molar concentration",
        "umol/L",
        "checked",
    ),
    LoincEntry(
        "77140-2",
        "creatinine",
        "Creatinine [Moles/volume] in Serum, Plasma or Blood",
        "molar concentration",
        "umol/L",
        "checked",
    ),
    LoincEntry(
        "59826-8",
        "creatinine",
        "Creatinine [Moles/volume] in Blood",
        "molar concentration",
        "umol/L",
        "from memory",
    ),
    # ---- cystatin C -----------------------------------------------------------------
    LoincEntry(
        "33863-2",
        "cystatin_c",
        "Cystatin C [Mass/volume] in Serum or Plasma",
        "mass concentration",
        "mg/L",
        "from memory",
    ),
    # ---- urine albumin / creatinine ratio ------------------------------------------
    LoincEntry(
        "9318-7",
        "uacr",
        "Albumin/Creatinine [Mass Ratio] in Urine",
        "mass ratio",
        "mg/g",
        "from memory",
    ),
    LoincEntry(
        "14959-1",
        "uacr",
        "Microalbumin/Creatinine [Mass Ratio] in Urine",
        "mass ratio",
        "mg/g",
        "checked",
    ),
    LoincEntry(
        "14958-3",
        "uacr",
        "Microalbumin/Creatinine [Mass Ratio] in 24 hour Urine",
        "mass ratio",
        "mg/g",
        "checked",
    ),
    LoincEntry(
        "77253-3",
        "uacr",
        "Microalbumin/Creatinine [Ratio] in Urine by Detection limit <= 1.0 mg/L",
        "ratio",
        "mg/g",
        "checked",
    ),
    LoincEntry(
        "77254-1",
        "uacr",
        "Microalbumin/Creatinine [Ratio] in 24 hour Urine by Detection limit <= 1.0 mg/L",
        "ratio",
        "mg/g",
        "checked",
    ),
    LoincEntry(
        "32294-1",
        "uacr",
        "Albumin/Creatinine [Ratio] in Urine",
        "ratio",
        "mg/g",
        "from memory",
    ),
    LoincEntry(
        "13705-9",
        "uacr",
        "Albumin/Creatinine [Mass Ratio] in 24 hour Urine",
        "mass ratio",
        "mg/g",
        "from memory",
    ),
)

LOINC_TO_ANALYTE: Final[dict[str, str]] = {e.code: e.analyte for e in LOINC_CODES}


def loinc_table() -> pl.DataFrame:
    """The built-in LOINC codes as a polars table (one row per code).

    >>> loinc_table().filter(pl.col("code") == "2160-0")["analyte"].item()
    'creatinine'
    """
    return pl.DataFrame(
        [tuple(e) for e in LOINC_CODES],
        schema={
            "code": pl.String,
            "analyte": pl.String,
            "long_name": pl.String,
            "property": pl.String,
            "typical_unit": pl.String,
            "provenance": pl.String,
        },
        orient="row",
    )
