"""CDISC ADaM analysis datasets: ADSL, the eGFR BDS dataset ADEGFR, and ADTTE.

Each dataset comes with variable metadata (label, type, length, origin) checked against
the ADaM Implementation Guide and the SAS transport v5 limits, and can be written as SAS
transport (XPT v5) and CDISC Dataset-JSON v1.1 with a spec sheet.
"""

from kidneycohort.adam._adsl import adsl_dataset
from kidneycohort.adam._bds import (
    PARAMCD_BY_EQUATION,
    VisitWindow,
    adegfr_dataset,
    default_visit_windows,
)
from kidneycohort.adam._export import check_xpt_round_trip, read_back_xpt, write_adam
from kidneycohort.adam._metadata import (
    ADAM_IG_LABELS,
    AdamDataset,
    Variable,
    check_dataset,
    spec_sheet,
)
from kidneycohort.adam._rule import AdamRule
from kidneycohort.adam._subjects import subject_facts
from kidneycohort.adam._tte import ADAM_TTE_COLUMNS, adtte_dataset, to_adam_tte

__all__ = [
    "ADAM_IG_LABELS",
    "ADAM_TTE_COLUMNS",
    "PARAMCD_BY_EQUATION",
    "AdamDataset",
    "AdamRule",
    "Variable",
    "VisitWindow",
    "adegfr_dataset",
    "adsl_dataset",
    "adtte_dataset",
    "check_dataset",
    "check_xpt_round_trip",
    "default_visit_windows",
    "read_back_xpt",
    "spec_sheet",
    "subject_facts",
    "to_adam_tte",
    "write_adam",
]
