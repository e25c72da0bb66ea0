"""Registered constants of the GFR-estimating equations and body-surface area."""

from __future__ import annotations

from typing import Final

from kidneycohort.provenance._model import Constant

__all__ = ["EQUATION_CONSTANTS"]

_PER_YEAR = "factor per year"
_NUMBER = "1"
_MG_DL = "mg/dL"
_MG_L = "mg/L"
_UMOL = "umol/L"
_INDEXED = "mL/min/1.73 m2"
_YEARS = "years"


def _recalled(id: str, code: str, unit: str, source: str, where: str, note: str = "") -> Constant:
    return Constant(id, code, unit, source, where, "recalled", note)


# ---- CKD-EPI ----------------------------------------------------------------------------
_C = "kidneycohort.equations.ckd_epi:"
_W2009 = "the single-equation form given with Table 2 (location not re-read)"
_W2012 = "the eGFRcys and eGFRcr-cys equations as printed in the article (location not re-read)"
_W2021 = "the race-free eGFRcr and eGFRcr-cys equations as printed (location not re-read)"


_CR_TERMS = ("constant", "age_factor", "female_factor", "alpha_female", "alpha_male")
_CYS_TERMS = ("cystatin_below", "cystatin_above")
_TERMS = {
    "constant": (_INDEXED, "leading constant"),
    "age_factor": (_PER_YEAR, "age term"),
    "female_factor": (_NUMBER, "female factor"),
    "alpha_female": (_NUMBER, "creatinine exponent below kappa, female"),
    "alpha_male": (_NUMBER, "creatinine exponent below kappa, male"),
    "creatinine_above": (_NUMBER, "creatinine exponent at or above kappa"),
    "cystatin_below": (_NUMBER, "cystatin C exponent below 0.8 mg/L"),
    "cystatin_above": (_NUMBER, "cystatin C exponent at or above 0.8 mg/L"),
    "black_factor": (_NUMBER, "legacy race factor, applied only on request"),
}


def _ckd_epi(
    key: str, attribute: str, terms: tuple[str, ...], source: str, where: str
) -> list[Constant]:
    return [
        _recalled(
            f"ckd_epi.{key}.{term}",
            f"{_C}{attribute}.{term}",
            _TERMS[term][0],
            source,
            where,
            _TERMS[term][1],
        )
        for term in terms
    ]


CKD_EPI: Final[tuple[Constant, ...]] = (
    _recalled(
        "ckd_epi.kappa_female",
        f"{_C}KAPPA_FEMALE",
        _MG_DL,
        "levey_2009",
        _W2009,
        "creatinine knot; the same in the 2012 and 2021 equations",
    ),
    _recalled(
        "ckd_epi.kappa_male",
        f"{_C}KAPPA_MALE",
        _MG_DL,
        "levey_2009",
        _W2009,
        "creatinine knot; the same in the 2012 and 2021 equations",
    ),
    _recalled(
        "ckd_epi.cystatin_knot",
        f"{_C}CYSTATIN_KNOT",
        _MG_L,
        "inker_2012",
        _W2012,
        "the same in the 2021 eGFRcr-cys equation",
    ),
    *_ckd_epi("2021_cr", "CR_2021", (*_CR_TERMS, "creatinine_above"), "inker_2021", _W2021),
    *_ckd_epi(
        "2021_crcys",
        "CRCYS_2021",
        (*_CR_TERMS, "creatinine_above", *_CYS_TERMS),
        "inker_2021",
        _W2021,
    ),
    *_ckd_epi(
        "2012_cys",
        "CYS_2012",
        ("constant", "age_factor", "female_factor", *_CYS_TERMS),
        "inker_2012",
        _W2012,
    ),
    *_ckd_epi(
        "2012_crcys",
        "CRCYS_2012",
        (*_CR_TERMS, "creatinine_above", *_CYS_TERMS, "black_factor"),
        "inker_2012",
        _W2012,
    ),
    *_ckd_epi(
        "2009_cr",
        "CR_2009",
        (*_CR_TERMS, "creatinine_above", "black_factor"),
        "levey_2009",
        _W2009,
    ),
)

# ---- MDRD -------------------------------------------------------------------------------
_M = "kidneycohort.equations.mdrd:"
_W2006 = "the re-expressed 4-variable equation (Methods; not re-read; the abstract omits it)"
_W2000 = "the 4-variable equation of the abstract (not re-read)"

MDRD: Final[tuple[Constant, ...]] = (
    _recalled(
        "mdrd.creatinine_exponent",
        f"{_M}CREATININE_EXPONENT",
        _NUMBER,
        "levey_2006",
        _W2006,
        "the same in the 186 form",
    ),
    _recalled(
        "mdrd.age_exponent",
        f"{_M}AGE_EXPONENT",
        _NUMBER,
        "levey_2006",
        _W2006,
        "the same in the 186 form",
    ),
    _recalled(
        "mdrd.female_factor",
        f"{_M}FEMALE_FACTOR",
        _NUMBER,
        "levey_2006",
        _W2006,
        "the same in the 186 form",
    ),
    _recalled(
        "mdrd.175.constant",
        f"{_M}IDMS.constant",
        _INDEXED,
        "levey_2006",
        _W2006,
        "for IDMS-traceable creatinine",
    ),
    _recalled(
        "mdrd.175.black_factor",
        f"{_M}IDMS.black_factor",
        _NUMBER,
        "levey_2006",
        _W2006,
        "legacy race factor, applied only on request",
    ),
    _recalled(
        "mdrd.186.constant",
        f"{_M}NON_IDMS.constant",
        _INDEXED,
        "levey_2000",
        _W2000,
        "for creatinine not traceable to IDMS",
    ),
    _recalled(
        "mdrd.186.black_factor",
        f"{_M}NON_IDMS.black_factor",
        _NUMBER,
        "levey_2000",
        _W2000,
        "legacy race factor, applied only on request",
    ),
)

# ---- EKFC and FAS -----------------------------------------------------------------------
_E = "kidneycohort.equations.ekfc:"
_WEKFC = "the EKFC equation and its Q values as printed in the article (location not re-read)"
_WEKFCQ = "the ln Q polynomials for ages 2-25 (appendix; location not re-read)"
_WCYS = (
    "Abstract (Results): 'the rescaling factor for cystatin C was estimated at 0.83 for men "
    "and women younger than 50 years of age and 0.83+0.005x(age-50) for those 50 years of "
    "age or older'; read in the Lund University research-portal record of the article"
)


def _polynomial(sex: str, attribute: str) -> list[Constant]:
    terms = ("intercept", "age", "log_age", "age_squared", "age_cubed")
    return [
        _recalled(
            f"ekfc.child_log_q_{sex}.{term}",
            f"{_E}{attribute}.{term}",
            "ln(umol/L)",
            "pottel_2021",
            _WEKFCQ,
            "meets the adult Q at 25 to within 1.5 % (a consistency check, not a re-read)",
        )
        for term in terms
    ]


EKFC: Final[tuple[Constant, ...]] = (
    _recalled(
        "ekfc.constant",
        f"{_E}CONSTANT",
        _INDEXED,
        "pottel_2021",
        _WEKFC,
        "also used by the cystatin C equation (Pottel 2023)",
    ),
    _recalled(
        "ekfc.exponent_below", f"{_E}EXPONENT_BELOW", _NUMBER, "pottel_2021", _WEKFC, "S/Q < 1"
    ),
    _recalled(
        "ekfc.exponent_above", f"{_E}EXPONENT_ABOVE", _NUMBER, "pottel_2021", _WEKFC, "S/Q >= 1"
    ),
    _recalled(
        "ekfc.age_factor", f"{_E}AGE_FACTOR", _PER_YEAR, "pottel_2021", _WEKFC, "per year above 40"
    ),
    _recalled("ekfc.age_term_from", f"{_E}AGE_TERM_FROM", _YEARS, "pottel_2021", _WEKFC),
    _recalled("ekfc.adult_q_from_age", f"{_E}ADULT_Q_FROM_AGE", _YEARS, "pottel_2021", _WEKFC),
    _recalled("ekfc.adult_q_female", f"{_E}ADULT_Q_UMOL_FEMALE", _UMOL, "pottel_2021", _WEKFC),
    _recalled("ekfc.adult_q_male", f"{_E}ADULT_Q_UMOL_MALE", _UMOL, "pottel_2021", _WEKFC),
    *_polynomial("male", "CHILD_LOG_Q_MALE"),
    *_polynomial("female", "CHILD_LOG_Q_FEMALE"),
    Constant("ekfc.cys.q", f"{_E}CYSTATIN_Q", _MG_L, "pottel_2023", _WCYS, "re-read"),
    Constant(
        "ekfc.cys.q_flat_until",
        f"{_E}CYSTATIN_Q_FLAT_UNTIL",
        _YEARS,
        "pottel_2023",
        _WCYS,
        "re-read",
    ),
    Constant(
        "ekfc.cys.q_slope",
        f"{_E}CYSTATIN_Q_SLOPE",
        "mg/L per year",
        "pottel_2023",
        _WCYS,
        "re-read",
    ),
)

_F = "kidneycohort.equations.full_age:"
_WFAS = "the FAS equation and the adult Q values (location not re-read)"

FAS: Final[tuple[Constant, ...]] = (
    _recalled("fas.constant", f"{_F}CONSTANT", _INDEXED, "pottel_2016", _WFAS),
    _recalled(
        "fas.age_factor", f"{_F}AGE_FACTOR", _PER_YEAR, "pottel_2016", _WFAS, "per year above 40"
    ),
    _recalled("fas.age_term_from", f"{_F}AGE_TERM_FROM", _YEARS, "pottel_2016", _WFAS),
    _recalled("fas.adult_q_female", f"{_F}ADULT_Q_FEMALE", _MG_DL, "pottel_2016", _WFAS),
    _recalled("fas.adult_q_male", f"{_F}ADULT_Q_MALE", _MG_DL, "pottel_2016", _WFAS),
)

# ---- BIS1 and revised Lund-Malmö --------------------------------------------------------
_L = "kidneycohort.equations.elderly:"
_WBIS = "the BIS1 equation (Results; not re-read; the abstract omits it)"
_WLMR = "the revised LM equation by sex and creatinine range (location not re-read)"

ELDERLY: Final[tuple[Constant, ...]] = (
    _recalled("bis1.constant", f"{_L}BIS1_CONSTANT", _INDEXED, "schaeffner_2012", _WBIS),
    _recalled(
        "bis1.creatinine_exponent",
        f"{_L}BIS1_CREATININE_EXPONENT",
        _NUMBER,
        "schaeffner_2012",
        _WBIS,
    ),
    _recalled("bis1.age_exponent", f"{_L}BIS1_AGE_EXPONENT", _NUMBER, "schaeffner_2012", _WBIS),
    _recalled("bis1.female_factor", f"{_L}BIS1_FEMALE_FACTOR", _NUMBER, "schaeffner_2012", _WBIS),
    *(
        _recalled(f"lmr.{sex}.{name}", f"{_L}LMR_{sex.upper()}.{name}", unit, "bjork_2011", _WLMR)
        for sex in ("female", "male")
        for name, unit in (("knot_umol", _UMOL), ("base", _NUMBER), ("linear_slope", "per umol/L"))
    ),
    _recalled(
        "lmr.log_slope",
        f"{_L}LMR_LOG_SLOPE",
        _NUMBER,
        "bjork_2011",
        _WLMR,
        "coefficient of ln(p / knot) at or above the knot, both sexes",
    ),
    _recalled("lmr.age_coefficient", f"{_L}LMR_AGE_COEFFICIENT", "per year", "bjork_2011", _WLMR),
    _recalled(
        "lmr.log_age_coefficient", f"{_L}LMR_LOG_AGE_COEFFICIENT", _NUMBER, "bjork_2011", _WLMR
    ),
)

# ---- Cockcroft-Gault --------------------------------------------------------------------
_G = "kidneycohort.equations.clearance:"
_WCG = (
    "Abstract: '(140 - age) (wt kg) / 72 Scr(mg/100 ml) (15% less in females)'; read in a "
    "copy of the article"
)

COCKCROFT_GAULT: Final[tuple[Constant, ...]] = (
    Constant(
        "cockcroft_gault.age_offset", f"{_G}AGE_OFFSET", _YEARS, "cockcroft_1976", _WCG, "re-read"
    ),
    Constant("cockcroft_gault.divisor", f"{_G}DIVISOR", _NUMBER, "cockcroft_1976", _WCG, "re-read"),
    Constant(
        "cockcroft_gault.female_factor",
        f"{_G}FEMALE_FACTOR",
        _NUMBER,
        "cockcroft_1976",
        _WCG,
        "re-read",
        "'15% less in females', i.e. x 0.85",
    ),
)

# ---- children and young adults ----------------------------------------------------------
_P = "kidneycohort.equations.pediatric:"
_WU25 = "the K coefficients by age and sex as printed in the article (location not re-read)"


_WU25_ABSTRACT = (
    "Abstract: 'K increased monotonically for children 1-18 years old and was constant for "
    "young adults 18-25 years. For males, K ranged from 35.7 for one-year-olds to 50.8 for "
    "those 18 and older. For females, the values of K ranged from 33.1 to 41.4'; read in "
    "the PubMed record (PMID 33301749)"
)


def _u25(marker: str, sex: str, attribute: str) -> list[Constant]:
    fields = (
        ("base", "K at the pivot age"),
        ("pivot_age", ""),
        ("rate_below", "factor per year below the pivot age"),
        ("rate_above", "factor per year from the pivot age to 18"),
        ("adult", "K from age 18"),
    )
    constants = []
    for name, note in fields:
        unit = _YEARS if name == "pivot_age" else _NUMBER
        id_, code = f"ckid_u25.{marker}.{sex}.{name}", f"{_P}{attribute}.{name}"
        if marker == "creatinine" and name == "adult":
            # the abstract prints the adult creatinine K of both sexes
            constants.append(
                Constant(id_, code, unit, "pierce_2021", _WU25_ABSTRACT, "re-read", note)
            )
        else:
            constants.append(_recalled(id_, code, unit, "pierce_2021", _WU25, note))
    return constants


PEDIATRIC: Final[tuple[Constant, ...]] = (
    Constant(
        "schwartz_bedside.k",
        f"{_P}BEDSIDE_K",
        "mL/min/1.73 m2 per (cm / (mg/dL))",
        "schwartz_2009",
        "Abstract: 'a bedside calculation of 0.413*(height/serum creatinine)', height in "
        "cm; read in the full text on PubMed Central (PMC2653687)",
        "re-read",
    ),
    Constant(
        "ckid_u25.adult_from_age",
        f"{_P}U25_ADULT_FROM_AGE",
        _YEARS,
        "pierce_2021",
        _WU25_ABSTRACT,
        "re-read",
    ),
    *_u25("creatinine", "male", "U25_CREATININE_MALE"),
    *_u25("creatinine", "female", "U25_CREATININE_FEMALE"),
    *_u25("cystatin_c", "male", "U25_CYSTATIN_MALE"),
    *_u25("cystatin_c", "female", "U25_CYSTATIN_FEMALE"),
)

# ---- body-surface area ------------------------------------------------------------------
_B = "kidneycohort.equations.body_size:"

BODY_SIZE: Final[tuple[Constant, ...]] = (
    _recalled(
        "bsa.dubois.constant",
        f"{_B}DUBOIS.constant",
        "m2",
        "dubois_1916",
        "the height-weight formula (not re-read)",
        "0.007184 m2 is 71.84 cm2 with weight in kg and height in cm",
    ),
    _recalled(
        "bsa.dubois.weight_exponent",
        f"{_B}DUBOIS.weight_exponent",
        _NUMBER,
        "dubois_1916",
        "the height-weight formula (not re-read)",
    ),
    _recalled(
        "bsa.dubois.height_exponent",
        f"{_B}DUBOIS.height_exponent",
        _NUMBER,
        "dubois_1916",
        "the height-weight formula (not re-read)",
    ),
    _recalled(
        "bsa.mosteller_divisor",
        f"{_B}MOSTELLER_DIVISOR",
        "cm kg / m4",
        "mosteller_1987",
        "the formula of the letter (not re-read)",
    ),
    Constant(
        "bsa.standard",
        f"{_B}STANDARD_BSA_M2",
        "m2",
        "kdigo_2012_ckd",
        "the unit of every GFR category, ml/min/1.73 m2 (Table 5, p. 27); read in a "
        "reprint by permission credited to Kidney Int Suppl 3:27, Table 5",
        "re-read",
        "the conventional standard body-surface area that GFR is indexed to",
    ),
)

EQUATION_CONSTANTS: Final[tuple[Constant, ...]] = (
    *CKD_EPI,
    *MDRD,
    *EKFC,
    *FAS,
    *ELDERLY,
    *COCKCROFT_GAULT,
    *PEDIATRIC,
    *BODY_SIZE,
)
"""Every registered constant of :mod:`kidneycohort.equations`."""
