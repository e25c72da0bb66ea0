"""Publications and guidelines that registered constants are taken from."""

from __future__ import annotations

from typing import Final

from kidneycohort.provenance._model import Publication

__all__ = ["PUBLICATIONS"]

PUBLICATIONS: Final[tuple[Publication, ...]] = (
    Publication(
        "levey_2009",
        "Levey AS, Stevens LA, Schmid CH, et al.",
        "A new equation to estimate glomerular filtration rate",
        "Ann Intern Med 150(9):604-612",
        2009,
        "10.7326/0003-4819-150-9-200905050-00006",
    ),
    Publication(
        "inker_2012",
        "Inker LA, Schmid CH, Tighiouart H, et al.",
        "Estimating glomerular filtration rate from serum creatinine and cystatin C",
        "N Engl J Med 367(1):20-29",
        2012,
        "10.1056/NEJMoa1114248",
    ),
    Publication(
        "inker_2021",
        "Inker LA, Eneanya ND, Coresh J, et al.",
        "New creatinine- and cystatin C-based equations to estimate GFR without race",
        "N Engl J Med 385(19):1737-1749",
        2021,
        "10.1056/NEJMoa2102953",
    ),
    Publication(
        "levey_2006",
        "Levey AS, Coresh J, Greene T, et al.",
        "Using standardized serum creatinine values in the Modification of Diet in Renal "
        "Disease study equation for estimating glomerular filtration rate",
        "Ann Intern Med 145(4):247-254",
        2006,
        "10.7326/0003-4819-145-4-200608150-00004",
    ),
    Publication(
        "levey_2000",
        "Levey AS, Greene T, Kusek JW, Beck GJ.",
        "A simplified equation to predict glomerular filtration rate from serum creatinine "
        "(abstract)",
        "J Am Soc Nephrol 11:155A",
        2000,
        None,
    ),
    Publication(
        "pottel_2016",
        "Pottel H, Hoste L, Dubourg L, et al.",
        "An estimated glomerular filtration rate equation for the full age spectrum",
        "Nephrol Dial Transplant 31(5):798-806",
        2016,
        "10.1093/ndt/gfv454",
    ),
    Publication(
        "pottel_2021",
        "Pottel H, Björk J, Courbebaisse M, et al.",
        "Development and validation of a modified full age spectrum creatinine-based "
        "equation to estimate glomerular filtration rate: a cross-sectional analysis of "
        "pooled data",
        "Ann Intern Med 174(2):183-191",
        2021,
        "10.7326/M20-4366",
    ),
    Publication(
        "pottel_2023",
        "Pottel H, Björk J, Rule AD, et al.",
        "Cystatin C-based equation to estimate GFR without the inclusion of race and sex",
        "N Engl J Med 388(4):333-343",
        2023,
        "10.1056/NEJMoa2203769",
    ),
    Publication(
        "schaeffner_2012",
        "Schaeffner ES, Ebert N, Delanaye P, et al.",
        "Two novel equations to estimate kidney function in persons aged 70 years or older",
        "Ann Intern Med 157(7):471-481",
        2012,
        "10.7326/0003-4819-157-7-201210020-00003",
    ),
    Publication(
        "bjork_2011",
        "Björk J, Grubb A, Sterner G, Nyman U.",
        "Revised equations for estimating glomerular filtration rate based on the "
        "Lund-Malmö Study cohort",
        "Scand J Clin Lab Invest 71(3):232-239",
        2011,
        "10.3109/00365513.2011.557086",
    ),
    Publication(
        "cockcroft_1976",
        "Cockcroft DW, Gault MH.",
        "Prediction of creatinine clearance from serum creatinine",
        "Nephron 16(1):31-41",
        1976,
        "10.1159/000180580",
    ),
    Publication(
        "schwartz_2009",
        "Schwartz GJ, Muñoz A, Schneider MF, et al.",
        "New equations to estimate GFR in children with CKD",
        "J Am Soc Nephrol 20(3):629-637",
        2009,
        "10.1681/ASN.2008030287",
    ),
    Publication(
        "pierce_2021",
        "Pierce CB, Muñoz A, Ng DK, Warady BA, Furth SL, Schwartz GJ.",
        "Age- and sex-dependent clinical equations to estimate glomerular filtration rates "
        "in children and young adults with chronic kidney disease",
        "Kidney Int 99(4):948-956",
        2021,
        "10.1016/j.kint.2020.10.047",
    ),
    Publication(
        "dubois_1916",
        "Du Bois D, Du Bois EF.",
        "A formula to estimate the approximate surface area if height and weight be known",
        "Arch Intern Med 17(6):863-871",
        1916,
        "10.1001/archinte.1916.00080130010002",
    ),
    Publication(
        "mosteller_1987",
        "Mosteller RD.",
        "Simplified calculation of body-surface area",
        "N Engl J Med 317(17):1098",
        1987,
        "10.1056/NEJM198710223171717",
    ),
    Publication(
        "tangri_2011",
        "Tangri N, Stevens LA, Griffith J, et al.",
        "A predictive model for progression of chronic kidney disease to kidney failure",
        "JAMA 305(15):1553-1559",
        2011,
        "10.1001/jama.2011.451",
    ),
    Publication(
        "tangri_2016",
        "Tangri N, Grams ME, Levey AS, et al.",
        "Multinational assessment of accuracy of equations for predicting risk of kidney "
        "failure: a meta-analysis",
        "JAMA 315(2):164-174",
        2016,
        "10.1001/jama.2015.18202",
    ),
    Publication(
        "kdigo_2012_ckd",
        "Kidney Disease: Improving Global Outcomes (KDIGO) CKD Work Group.",
        "KDIGO 2012 clinical practice guideline for the evaluation and management of "
        "chronic kidney disease",
        "Kidney Int Suppl 3(1):1-150",
        2013,
        "10.1038/kisup.2012.73",
    ),
    Publication(
        "kdigo_2012_aki",
        "Kidney Disease: Improving Global Outcomes (KDIGO) Acute Kidney Injury Work Group.",
        "KDIGO clinical practice guideline for acute kidney injury. Section 2: AKI definition",
        "Kidney Int Suppl 2(1):19-36",
        2012,
        "10.1038/kisup.2011.32",
    ),
    Publication(
        "kdigo_2024_ckd",
        "Kidney Disease: Improving Global Outcomes (KDIGO) CKD Work Group.",
        "KDIGO 2024 clinical practice guideline for the evaluation and management of "
        "chronic kidney disease",
        "Kidney Int 105(4S):S117-S314",
        2024,
        "10.1016/j.kint.2023.10.018",
    ),
    Publication(
        "levey_2014",
        "Levey AS, Inker LA, Matsushita K, et al.",
        "GFR decline as an end point for clinical trials in CKD: a scientific workshop "
        "sponsored by the National Kidney Foundation and the US Food and Drug Administration",
        "Am J Kidney Dis 64(6):821-835",
        2014,
        "10.1053/j.ajkd.2014.07.030",
    ),
)
"""Every publication a registered constant cites, by key."""
