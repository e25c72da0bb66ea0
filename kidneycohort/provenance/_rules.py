"""Registered constants of unit conversion, KFRE, KDIGO categories and clinical rules."""

from __future__ import annotations

from typing import Final

from kidneycohort.provenance._model import Constant

__all__ = ["RULE_CONSTANTS"]

_NUMBER = "1"
_INDEXED = "mL/min/1.73 m2"

# Copies of guideline text that were read (the statuses below say which values).
_KDIGO_TABLE_5 = (
    "Table 5 (GFR categories in CKD), p. 27; read in a reprint by permission credited to "
    "Kidney Int Suppl 3:27, Table 5, and in the AHRQ guideline-clearinghouse summary"
)
_KDIGO_TABLES_6_7 = (
    "Table 6 (albuminuria categories, p. 28) and Table 7 (albuminuria and proteinuria, "
    "p. 31); read in reprints with permission, e.g. PMC10200071, Table 11"
)
_KDIGO_REC_2_1_3 = (
    "Recommendation 2.1.3 (Chapter 2); read in a verbatim reproduction of the summary of "
    "recommendation statements"
)
_AKI_TEXT = (
    "Recommendation 2.1.1 (Chapter 2.1), restated in Chapter 2.4, p. 30: 'a 50% increase in SCr "
    "within 1 week or a 0.3 mg/dl (26.5 umol/l) increase within 48 hours'; read in a copy "
    "of the guideline text"
)

UNITS: Final[tuple[Constant, ...]] = (
    Constant(
        "units.creatinine_umol_per_mg_dl",
        "kidneycohort.units:CREATININE_UMOL_PER_MG_DL",
        "umol/L per mg/dL",
        "kdigo_2012_aki",
        "Table 2 (staging of AKI), Chapter 2.1: '4.0 mg/dl (353.6 umol/l)', i.e. "
        "353.6 / 4.0; read in a copy of Section 2",
        "re-read",
        "also 10 000 / 113.12, the molar mass of creatinine in g/mol",
    ),
    Constant(
        "units.uacr_mg_g_per_mg_mmol",
        "kidneycohort.units:UACR_MG_G_PER_MG_MMOL",
        "mg/g per mg/mmol",
        "kdigo_2012_aki",
        "units.creatinine_umol_per_mg_dl / 10",
        "derived",
        "1 mmol creatinine = 113.12 mg, so 1 mg/mmol = 1000 / 113.12 mg/g",
    ),
)

_K = "kidneycohort.kfre:"
_W2011 = "4-variable model coefficients and centring values (location not re-read)"
_W2016 = "baseline survivals of the regional recalibration (eTables; location not re-read)"

KFRE: Final[tuple[Constant, ...]] = (
    *(
        Constant(
            f"kfre.coefficient.{name}",
            f"{_K}COEFFICIENTS[{name}]",
            unit,
            "tangri_2011",
            _W2011,
            "recalled",
        )
        for name, unit in (
            ("age_per_10y", "per 10 years"),
            ("male", _NUMBER),
            ("egfr_per_5", "per 5 mL/min/1.73 m2"),
            ("log_uacr", "per ln(mg/g)"),
        )
    ),
    *(
        Constant(
            f"kfre.centre.{name}",
            f"{_K}CENTRES[{name}]",
            unit,
            "tangri_2011",
            _W2011,
            "recalled",
            "mean of the scaled variable in the development cohort",
        )
        for name, unit in (
            ("age_per_10y", "10 years"),
            ("male", "proportion"),
            ("egfr_per_5", "5 mL/min/1.73 m2"),
            ("log_uacr", "ln(mg/g)"),
        )
    ),
    *(
        Constant(
            f"kfre.baseline_survival.{region}.{years}y",
            f"{_K}BASELINE_SURVIVAL[{region}][{years}]",
            "probability",
            "tangri_2016",
            _W2016,
            "recalled",
        )
        for region in ("north_american", "non_north_american")
        for years in (2, 5)
    ),
    Constant(
        "kfre.applicability.egfr_below",
        f"{_K}EGFR_BELOW",
        _INDEXED,
        "tangri_2011",
        "Abstract: 'patients with CKD stages 3 to 5 (estimated GFR, 10-59 mL/min/1.73 m2)'; "
        "read in a copy of the article",
        "re-read",
        "risks are given below 60; the development cohorts had no eGFR under 10",
    ),
    Constant(
        "kfre.applicability.min_age",
        f"{_K}MIN_AGE_YEARS",
        "years",
        "tangri_2011",
        "adult CKD cohorts (location not re-read)",
        "recalled",
        "18 is the library's reading of 'adults'",
    ),
    *(
        Constant(
            f"kfre.decision.{years}y.{index}",
            f"kidneycohort.kfre:KfreRule.thresholds_{years}y[{index}]",
            "probability",
            "kdigo_2024_ckd",
            "KFRE risk thresholds for referral and planning (location not re-read)",
            "recalled",
            note,
        )
        for years, index, note in (
            (2, 0, "2-year risk above 10 %: multidisciplinary care"),
            (2, 1, "2-year risk above 40 %: planning kidney replacement therapy"),
            (5, 0, "5-year risk 3-5 %: referral to nephrology"),
            (5, 1, "5-year risk 3-5 %: referral to nephrology"),
        )
    ),
)

_D = "kidneycohort.kdigo:"
_RISK_GRID_WHERE = (
    "Figure 2 (prognosis of CKD by GFR and albuminuria categories; location not re-read)"
)

KDIGO: Final[tuple[Constant, ...]] = (
    *(
        Constant(
            f"kdigo.g_lower_bound.{category}",
            f"{_D}G_LOWER_BOUNDS[{category}]",
            _INDEXED,
            "kdigo_2012_ckd",
            _KDIGO_TABLE_5,
            "re-read",
            "G5 is '<15'; its lower bound 0 is the floor of a rate" if category == "G5" else "",
        )
        for category in ("G1", "G2", "G3a", "G3b", "G4", "G5")
    ),
    *(
        Constant(
            f"kdigo.a_upper_bound.{unit.replace('/', '_per_')}.{category}",
            f"{_D}A_UPPER_BOUNDS[{unit}][{category}]",
            unit,
            "kdigo_2012_ckd",
            _KDIGO_TABLES_6_7,
            "re-read",
            "the guideline's rounded equivalents, not exact conversions"
            if unit == "mg/mmol"
            else "",
        )
        for unit in ("mg/g", "mg/mmol")
        for category in ("A1", "A2")
    ),
    *(
        Constant(
            f"kdigo.prognosis.{g}_{a}",
            f"{_D}RISK_GRID[{g},{a}]",
            "risk level",
            "kdigo_2012_ckd",
            _RISK_GRID_WHERE,
            "recalled",
            "unchanged in KDIGO 2024 (recalled)",
        )
        for g in ("G1", "G2", "G3a", "G3b", "G4", "G5")
        for a in ("A1", "A2", "A3")
    ),
    Constant(
        "kdigo.persistence_days",
        f"{_D}SustainRule.confirm_after_days",
        "days",
        "kdigo_2012_ckd",
        "Recommendation 1.1.1 and Table 2 (criteria for CKD, p. 20): 'present for >3 "
        "months'; read in the AHRQ guideline-clearinghouse summary, which quotes them",
        "re-read",
        "90 days is the library's count of 3 months; a confirming result must be at least "
        "this much later",
    ),
    Constant(
        "kdigo.certain_drop_fraction",
        f"{_D}kdigo_progression(decline_fraction)",
        "fraction of baseline eGFR",
        "kdigo_2012_ckd",
        _KDIGO_REC_2_1_3,
        "re-read",
        "'a drop in GFR category accompanied by a 25% or greater drop in eGFR from baseline'",
    ),
    Constant(
        "kdigo.rapid_decline_per_year",
        "kidneycohort.slopes:SlopeRule.rapid_decline_per_year",
        "mL/min/1.73 m2 per year",
        "kdigo_2012_ckd",
        _KDIGO_REC_2_1_3,
        "re-read",
        "'a sustained decline in eGFR of more than 5 ml/min/1.73 m2/yr'",
    ),
)

_V = "kidneycohort.value_filter:ValueFilterRule."

AKI: Final[tuple[Constant, ...]] = (
    Constant(
        "aki.rise_mg_dl", f"{_V}aki_rise_mg_dl", "mg/dL", "kdigo_2012_aki", _AKI_TEXT, "re-read"
    ),
    Constant(
        "aki.rise_hours", f"{_V}aki_rise_hours", "hours", "kdigo_2012_aki", _AKI_TEXT, "re-read"
    ),
    Constant(
        "aki.ratio",
        f"{_V}aki_ratio",
        "ratio to the prior value",
        "kdigo_2012_aki",
        _AKI_TEXT + "; Table 2 stage 1 '1.5-1.9 times baseline'",
        "re-read",
        "a 50 % increase is 1.5 times baseline",
    ),
    Constant(
        "aki.ratio_days",
        f"{_V}aki_ratio_days",
        "days",
        "kdigo_2012_aki",
        _AKI_TEXT,
        "re-read",
        "'within 1 week'; the recommendation says 'within the prior 7 days'",
    ),
)

ENDPOINTS: Final[tuple[Constant, ...]] = (
    Constant(
        "endpoints.egfr_below.threshold",
        "kidneycohort.endpoints:EgfrBelow.threshold",
        _INDEXED,
        "kdigo_2012_ckd",
        _KDIGO_TABLE_5,
        "re-read",
        "category G5, '<15'",
    ),
    Constant(
        "endpoints.kidney_composite.below_threshold",
        "kidneycohort.endpoints:usual_kidney_composite(below_threshold)",
        _INDEXED,
        "kdigo_2012_ckd",
        _KDIGO_TABLE_5,
        "re-read",
        "category G5, '<15'",
    ),
    Constant(
        "endpoints.kidney_composite.decline_percent",
        "kidneycohort.endpoints:usual_kidney_composite(decline_percent)",
        "percent",
        "levey_2014",
        "the 40 % eGFR decline end point of the workshop (location not re-read)",
        "recalled",
    ),
)

RULE_CONSTANTS: Final[tuple[Constant, ...]] = (*UNITS, *KFRE, *KDIGO, *AKI, *ENDPOINTS)
"""Every registered constant outside :mod:`kidneycohort.equations`."""
