"""kidneycohort: kidney-function cohort analysis.

The public API is listed here and nothing is defined in this module. Tables go in as
polars or pandas DataFrames and come back as polars DataFrames.

Names load on first use (PEP 562), so ``import kidneycohort`` and the command line stay
fast while statsmodels, lifelines and plotnine are imported only by the stages that
need them. Every public name is spelled out in ``_PUBLIC`` below, and ``dir()`` and
``__all__`` list them all.

>>> import kidneycohort as kc
>>> round(float(kc.evaluate("ckd_epi_2021_cr", creatinine_mg_dl=1.0, age=60, sex="female")), 1)
64.5
"""

from __future__ import annotations

import importlib
from typing import Any

from kidneycohort.cautions import CAUTIONS
from kidneycohort.errors import (
    AccountingError,
    ConfigError,
    ConvergenceError,
    DataQualityWarning,
    EquationWarning,
    InputDataError,
    KidneyCohortError,
    KidneyCohortWarning,
    StatisticalWarning,
    UnknownEquationError,
    UnknownUnitError,
)

__version__ = "0.1.0"

# public name -> module that defines it
_PUBLIC: dict[str, str] = {
    # equations
    **{
        name: "kidneycohort.equations"
        for name in (
            "REGISTRY",
            "EquationSpec",
            "evaluate",
            "evaluate_with_reason",
            "equation_ids",
            "get_equation",
            "registry_table",
            "solve_creatinine",
            "solve_cystatin_c",
            "bsa_dubois",
            "bsa_mosteller",
            "deindex_egfr",
            "index_gfr",
        )
    },
    # reading and harmonising
    **{
        name: "kidneycohort.io"
        for name in (
            "FileSource",
            "read_source",
            "read_labs",
            "read_patients",
            "read_events",
            "loinc_table",
        )
    },
    **{
        name: "kidneycohort.harmonize"
        for name in ("HarmonizeRule", "HarmonizeResult", "PlausibleRange", "harmonize_tables")
    },
    **{name: "kidneycohort.egfr" for name in ("compute_egfr", "egfr_wide", "EgfrRule", "AgeBand")},
    # per-patient derivations
    **{
        name: "kidneycohort.value_filter"
        for name in ("ValueFilterRule", "flag_aki", "apply_value_filter")
    },
    **{
        name: "kidneycohort.baseline" for name in ("uacr_baseline", "egfr_baseline", "BaselineRule")
    },
    **{name: "kidneycohort.uacr" for name in ("uacr_timeline",)},
    **{name: "kidneycohort.slopes" for name in ("egfr_slopes", "SlopeRule")},
    **{
        name: "kidneycohort.kdigo"
        for name in (
            "SustainRule",
            "gfr_category",
            "albuminuria_category",
            "risk_grid",
            "category_results",
            "sustained_stages",
            "transitions",
            "transition_matrix",
            "time_to_first_worsening",
            "ckd_status",
            "kdigo_progression",
            "baseline_categories",
            "kdigo_grid_counts",
        )
    },
    **{name: "kidneycohort.kfre" for name in ("kfre_risk", "kfre_inputs", "add_kfre_risk")},
    # endpoints
    **{
        name: "kidneycohort.endpoints"
        for name in (
            "derive_endpoints",
            "EndpointRule",
            "EgfrDecline",
            "EgfrBelow",
            "KidneyFailure",
            "Death",
            "KidneyDeath",
            "Composite",
            "parse_endpoint_definitions",
            "usual_kidney_composite",
        )
    },
    "to_adam_tte": "kidneycohort.adam",
    **{name: "kidneycohort.kfre" for name in ("kfre_at_baseline", "kfre_summary_table")},
    # models and tables
    **{
        name: "kidneycohort.models"
        for name in (
            "SlopeModel",
            "SlopeModelRule",
            "KaplanMeier",
            "CumulativeIncidence",
            "CoxModel",
            "SurvivalRule",
            "incidence_rates",
            "exact_poisson_interval",
            "rate_difference",
            "rate_ratio",
            "numbers_at_risk",
        )
    },
    **{
        name: "kidneycohort.tables"
        for name in (
            "TableRule",
            "endpoint_table",
            "slope_table",
            "baseline_characteristics_table",
            "kdigo_grid_table",
            "write_tables",
        )
    },
    # figures, report, synthetic cohorts, pipeline
    **{name: "kidneycohort.plots" for name in ("write_figures",)},
    **{name: "kidneycohort.report" for name in ("write_report",)},
    **{
        name: "kidneycohort.synthetic"
        for name in (
            "generate_cohort",
            "write_cohort",
            "load_scenario",
            "Scenario",
            "SyntheticCohort",
        )
    },
    **{
        name: "kidneycohort.pipeline"
        for name in (
            "load_config",
            "run_pipeline",
            "check_inputs",
            "StudyConfig",
            "RunResult",
            "StepRegistry",
        )
    },
}

_SUBMODULES = (
    "adam",
    "value_filter",
    "egfr",
    "endpoints",
    "equations",
    "io",
    "kdigo",
    "models",
    "pipeline",
    "plots",
    "report",
    "schemas",
    "slopes",
    "synthetic",
    "tables",
    "units",
)

__all__ = [
    "CAUTIONS",
    "AccountingError",
    "ConfigError",
    "ConvergenceError",
    "DataQualityWarning",
    "EquationWarning",
    "InputDataError",
    "KidneyCohortError",
    "KidneyCohortWarning",
    "StatisticalWarning",
    "UnknownEquationError",
    "UnknownUnitError",
    "__version__",
    *_PUBLIC,
    *_SUBMODULES,
]


def __getattr__(name: str) -> Any:
    if name in _PUBLIC:
        value = getattr(importlib.import_module(_PUBLIC[name]), name)
    elif name in _SUBMODULES:
        value = importlib.import_module(f"kidneycohort.{name}")
    else:
        raise AttributeError(f"module 'kidneycohort' has no attribute {name!r}")
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(__all__)
