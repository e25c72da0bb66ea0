"""kidneycohort: kidney-function cohort analysis.

The public API is listed here and nothing is defined in this module. Tables go in as
polars or pandas DataFrames and come back as polars DataFrames.

Names load on first use (PEP 562), so ``import kidneycohort`` and the command line stay
fast while statsmodels, lifelines and plotnine are imported only by the stages that
need them. Every public name is spelled out in ``_PUBLIC`` below, and ``dir()`` and
``__all__`` list them all; the ``TYPE_CHECKING`` block imports each of them for type
checkers (``tests/test_exports.py`` keeps the two in step).

>>> import kidneycohort as kc
>>> round(float(kc.evaluate("ckd_epi_2021_cr", creatinine_mg_dl=1.0, age=60, sex="female")), 1)
64.5
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

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

if TYPE_CHECKING:  # the lazily loaded names, spelled out for type checkers
    from kidneycohort import adam as adam
    from kidneycohort import ages as ages
    from kidneycohort import baseline as baseline
    from kidneycohort import cautions as cautions
    from kidneycohort import cli as cli
    from kidneycohort import data_contract as data_contract
    from kidneycohort import design as design
    from kidneycohort import disclosure as disclosure
    from kidneycohort import egfr as egfr
    from kidneycohort import endpoints as endpoints
    from kidneycohort import equations as equations
    from kidneycohort import errors as errors
    from kidneycohort import harmonize as harmonize
    from kidneycohort import io as io
    from kidneycohort import kdigo as kdigo
    from kidneycohort import kfre as kfre
    from kidneycohort import labels as labels
    from kidneycohort import models as models
    from kidneycohort import pipeline as pipeline
    from kidneycohort import plots as plots
    from kidneycohort import provenance as provenance
    from kidneycohort import report as report
    from kidneycohort import run_folder as run_folder
    from kidneycohort import schemas as schemas
    from kidneycohort import slopes as slopes
    from kidneycohort import synthetic as synthetic
    from kidneycohort import tables as tables
    from kidneycohort import uacr as uacr
    from kidneycohort import units as units
    from kidneycohort import value_filter as value_filter
    from kidneycohort import vocabulary as vocabulary
    from kidneycohort.adam import AdamDataset as AdamDataset
    from kidneycohort.adam import AdamRule as AdamRule
    from kidneycohort.adam import Variable as Variable
    from kidneycohort.adam import VisitWindow as VisitWindow
    from kidneycohort.adam import adegfr_dataset as adegfr_dataset
    from kidneycohort.adam import adsl_dataset as adsl_dataset
    from kidneycohort.adam import adtte_dataset as adtte_dataset
    from kidneycohort.adam import check_dataset as check_dataset
    from kidneycohort.adam import check_xpt_round_trip as check_xpt_round_trip
    from kidneycohort.adam import default_visit_windows as default_visit_windows
    from kidneycohort.adam import read_back_xpt as read_back_xpt
    from kidneycohort.adam import spec_sheet as spec_sheet
    from kidneycohort.adam import subject_facts as subject_facts
    from kidneycohort.adam import to_adam_tte as to_adam_tte
    from kidneycohort.adam import write_adam as write_adam
    from kidneycohort.baseline import BaselineRule as BaselineRule
    from kidneycohort.baseline import egfr_baseline as egfr_baseline
    from kidneycohort.baseline import uacr_baseline as uacr_baseline
    from kidneycohort.design import DesignConfig as DesignConfig
    from kidneycohort.design import DesignResult as DesignResult
    from kidneycohort.design import load_design as load_design
    from kidneycohort.design import simulate_power as simulate_power
    from kidneycohort.egfr import AgeBand as AgeBand
    from kidneycohort.egfr import EgfrRule as EgfrRule
    from kidneycohort.egfr import compute_egfr as compute_egfr
    from kidneycohort.egfr import egfr_wide as egfr_wide
    from kidneycohort.endpoints import Composite as Composite
    from kidneycohort.endpoints import Death as Death
    from kidneycohort.endpoints import EgfrBelow as EgfrBelow
    from kidneycohort.endpoints import EgfrDecline as EgfrDecline
    from kidneycohort.endpoints import EndpointRule as EndpointRule
    from kidneycohort.endpoints import KidneyDeath as KidneyDeath
    from kidneycohort.endpoints import KidneyFailure as KidneyFailure
    from kidneycohort.endpoints import derive_endpoints as derive_endpoints
    from kidneycohort.endpoints import parse_endpoint_definitions as parse_endpoint_definitions
    from kidneycohort.endpoints import usual_kidney_composite as usual_kidney_composite
    from kidneycohort.equations import REGISTRY as REGISTRY
    from kidneycohort.equations import EquationReasonIndex as EquationReasonIndex
    from kidneycohort.equations import EquationResult as EquationResult
    from kidneycohort.equations import EquationSpec as EquationSpec
    from kidneycohort.equations import bsa_dubois as bsa_dubois
    from kidneycohort.equations import bsa_mosteller as bsa_mosteller
    from kidneycohort.equations import deindex_egfr as deindex_egfr
    from kidneycohort.equations import equation_ids as equation_ids
    from kidneycohort.equations import evaluate as evaluate
    from kidneycohort.equations import evaluate_with_reason as evaluate_with_reason
    from kidneycohort.equations import (
        evaluate_with_reason_index as evaluate_with_reason_index,
    )
    from kidneycohort.equations import get_equation as get_equation
    from kidneycohort.equations import index_gfr as index_gfr
    from kidneycohort.equations import registry_table as registry_table
    from kidneycohort.equations import solve_creatinine as solve_creatinine
    from kidneycohort.equations import solve_cystatin_c as solve_cystatin_c
    from kidneycohort.harmonize import HarmonizeResult as HarmonizeResult
    from kidneycohort.harmonize import HarmonizeRule as HarmonizeRule
    from kidneycohort.harmonize import PlausibleRange as PlausibleRange
    from kidneycohort.harmonize import harmonize_tables as harmonize_tables
    from kidneycohort.harmonize import unusable_tables as unusable_tables
    from kidneycohort.io import FileSource as FileSource
    from kidneycohort.io import infer_date_format as infer_date_format
    from kidneycohort.io import loinc_table as loinc_table
    from kidneycohort.io import parse_date_columns as parse_date_columns
    from kidneycohort.io import read_events as read_events
    from kidneycohort.io import read_labs as read_labs
    from kidneycohort.io import read_many as read_many
    from kidneycohort.io import read_patients as read_patients
    from kidneycohort.io import read_source as read_source
    from kidneycohort.io.omop import OmopSource as OmopSource
    from kidneycohort.io.sdtm import SdtmSource as SdtmSource
    from kidneycohort.kdigo import KdigoGridRule as KdigoGridRule
    from kidneycohort.kdigo import SustainRule as SustainRule
    from kidneycohort.kdigo import albuminuria_category as albuminuria_category
    from kidneycohort.kdigo import albuminuria_category_expr as albuminuria_category_expr
    from kidneycohort.kdigo import baseline_categories as baseline_categories
    from kidneycohort.kdigo import category_results as category_results
    from kidneycohort.kdigo import ckd_status as ckd_status
    from kidneycohort.kdigo import gfr_category as gfr_category
    from kidneycohort.kdigo import gfr_category_expr as gfr_category_expr
    from kidneycohort.kdigo import kdigo_grid_counts as kdigo_grid_counts
    from kidneycohort.kdigo import kdigo_progression as kdigo_progression
    from kidneycohort.kdigo import kdigo_risk_expr as kdigo_risk_expr
    from kidneycohort.kdigo import risk_grid as risk_grid
    from kidneycohort.kdigo import sustained_stages as sustained_stages
    from kidneycohort.kdigo import time_to_first_worsening as time_to_first_worsening
    from kidneycohort.kdigo import transition_matrix as transition_matrix
    from kidneycohort.kdigo import transitions as transitions
    from kidneycohort.kfre import KfreRule as KfreRule
    from kidneycohort.kfre import add_kfre_risk as add_kfre_risk
    from kidneycohort.kfre import kfre_at_baseline as kfre_at_baseline
    from kidneycohort.kfre import kfre_inputs as kfre_inputs
    from kidneycohort.kfre import kfre_risk as kfre_risk
    from kidneycohort.kfre import kfre_summary_table as kfre_summary_table
    from kidneycohort.models import CauseSpecificCox as CauseSpecificCox
    from kidneycohort.models import CompetingRisks as CompetingRisks
    from kidneycohort.models import CompetingRisksRule as CompetingRisksRule
    from kidneycohort.models import CoxModel as CoxModel
    from kidneycohort.models import CumulativeIncidence as CumulativeIncidence
    from kidneycohort.models import DropoutAnalysisRule as DropoutAnalysisRule
    from kidneycohort.models import FineGray as FineGray
    from kidneycohort.models import JointSlopeModel as JointSlopeModel
    from kidneycohort.models import JointSlopeRule as JointSlopeRule
    from kidneycohort.models import KaplanMeier as KaplanMeier
    from kidneycohort.models import MixedModelFit as MixedModelFit
    from kidneycohort.models import SlopeModel as SlopeModel
    from kidneycohort.models import SlopeModelRule as SlopeModelRule
    from kidneycohort.models import SurvivalRule as SurvivalRule
    from kidneycohort.models import delta_adjusted_slopes as delta_adjusted_slopes
    from kidneycohort.models import dropout_analysis as dropout_analysis
    from kidneycohort.models import exact_poisson_interval as exact_poisson_interval
    from kidneycohort.models import fit_mixed_model as fit_mixed_model
    from kidneycohort.models import gray_test as gray_test
    from kidneycohort.models import incidence_rates as incidence_rates
    from kidneycohort.models import numbers_at_risk as numbers_at_risk
    from kidneycohort.models import patient_blocks as patient_blocks
    from kidneycohort.models import rate_difference as rate_difference
    from kidneycohort.models import rate_ratio as rate_ratio
    from kidneycohort.models import simulate_joint_cohort as simulate_joint_cohort
    from kidneycohort.models import stated_value_at_kidney_failure as stated_value_at_kidney_failure
    from kidneycohort.pipeline import DataSection as DataSection
    from kidneycohort.pipeline import ExecutionSection as ExecutionSection
    from kidneycohort.pipeline import OutputSection as OutputSection
    from kidneycohort.pipeline import ProgressObserver as ProgressObserver
    from kidneycohort.pipeline import Recipe as Recipe
    from kidneycohort.pipeline import RunResult as RunResult
    from kidneycohort.pipeline import Step as Step
    from kidneycohort.pipeline import StepContext as StepContext
    from kidneycohort.pipeline import StepRegistry as StepRegistry
    from kidneycohort.pipeline import StudyConfig as StudyConfig
    from kidneycohort.pipeline import StudySection as StudySection
    from kidneycohort.pipeline import apply_overrides as apply_overrides
    from kidneycohort.pipeline import check_chain as check_chain
    from kidneycohort.pipeline import check_inputs as check_inputs
    from kidneycohort.pipeline import default_registry as default_registry
    from kidneycohort.pipeline import load_config as load_config
    from kidneycohort.pipeline import read_sources as read_sources
    from kidneycohort.pipeline import run_pipeline as run_pipeline
    from kidneycohort.plots import FigureRule as FigureRule
    from kidneycohort.plots import attrition_boxes as attrition_boxes
    from kidneycohort.plots import attrition_figure as attrition_figure
    from kidneycohort.plots import draw_figures as draw_figures
    from kidneycohort.plots import egfr_time_bins as egfr_time_bins
    from kidneycohort.plots import egfr_trajectory_figure as egfr_trajectory_figure
    from kidneycohort.plots import forest_figure as forest_figure
    from kidneycohort.plots import forest_rows as forest_rows
    from kidneycohort.plots import group_palette as group_palette
    from kidneycohort.plots import kdigo_grid_cells as kdigo_grid_cells
    from kidneycohort.plots import kdigo_grid_figure as kdigo_grid_figure
    from kidneycohort.plots import model_trajectory_figure as model_trajectory_figure
    from kidneycohort.plots import patient_flow_boxes as patient_flow_boxes
    from kidneycohort.plots import patient_flow_figure as patient_flow_figure
    from kidneycohort.plots import slope_density as slope_density
    from kidneycohort.plots import slope_distribution as slope_distribution
    from kidneycohort.plots import slope_distribution_figure as slope_distribution_figure
    from kidneycohort.plots import survival_figure as survival_figure
    from kidneycohort.plots import survival_steps as survival_steps
    from kidneycohort.plots import transition_cells as transition_cells
    from kidneycohort.plots import transition_heatmap_figure as transition_heatmap_figure
    from kidneycohort.plots import write_figures as write_figures
    from kidneycohort.provenance import Constant as Constant
    from kidneycohort.provenance import Publication as Publication
    from kidneycohort.provenance import constants_table as constants_table
    from kidneycohort.provenance import get_constant as get_constant
    from kidneycohort.provenance import get_publication as get_publication
    from kidneycohort.provenance import read_code_location as read_code_location
    from kidneycohort.provenance import status_counts as status_counts
    from kidneycohort.report import ReportRule as ReportRule
    from kidneycohort.report import build_report_context as build_report_context
    from kidneycohort.report import find_browser as find_browser
    from kidneycohort.report import methods_from_config as methods_from_config
    from kidneycohort.report import print_pdf as print_pdf
    from kidneycohort.report import render_report as render_report
    from kidneycohort.report import require_browser as require_browser
    from kidneycohort.report import write_report as write_report
    from kidneycohort.run_folder import AccountingRecord as AccountingRecord
    from kidneycohort.run_folder import ExecutionRecord as ExecutionRecord
    from kidneycohort.run_folder import InputRecord as InputRecord
    from kidneycohort.run_folder import Manifest as Manifest
    from kidneycohort.run_folder import OutputRecord as OutputRecord
    from kidneycohort.run_folder import ReasonCount as ReasonCount
    from kidneycohort.run_folder import RunFile as RunFile
    from kidneycohort.run_folder import RunFolder as RunFolder
    from kidneycohort.run_folder import StepRecord as StepRecord
    from kidneycohort.run_folder import StudyFacts as StudyFacts
    from kidneycohort.run_folder import canonical_order as canonical_order
    from kidneycohort.run_folder import check_layout as check_layout
    from kidneycohort.run_folder import csv_safe as csv_safe
    from kidneycohort.run_folder import declared as declared
    from kidneycohort.run_folder import file_for as file_for
    from kidneycohort.run_folder import is_written as is_written
    from kidneycohort.run_folder import markdown_table as markdown_table
    from kidneycohort.run_folder import output_records as output_records
    from kidneycohort.run_folder import package_versions as package_versions
    from kidneycohort.run_folder import read_manifest as read_manifest
    from kidneycohort.run_folder import sha256_of as sha256_of
    from kidneycohort.run_folder import table_footnotes as table_footnotes
    from kidneycohort.run_folder import write_csv as write_csv
    from kidneycohort.run_folder import write_manifest as write_manifest
    from kidneycohort.run_folder import write_sheets as write_sheets
    from kidneycohort.run_folder import write_table as write_table
    from kidneycohort.run_folder import write_workbook as write_workbook
    from kidneycohort.slopes import SlopeRule as SlopeRule
    from kidneycohort.slopes import egfr_slopes as egfr_slopes
    from kidneycohort.synthetic import Scenario as Scenario
    from kidneycohort.synthetic import SyntheticCohort as SyntheticCohort
    from kidneycohort.synthetic import generate_cohort as generate_cohort
    from kidneycohort.synthetic import load_scenario as load_scenario
    from kidneycohort.synthetic import write_cohort as write_cohort
    from kidneycohort.tables import TableRule as TableRule
    from kidneycohort.tables import baseline_characteristics_table as baseline_characteristics_table
    from kidneycohort.tables import competing_risks_table as competing_risks_table
    from kidneycohort.tables import dropout_table as dropout_table
    from kidneycohort.tables import endpoint_table as endpoint_table
    from kidneycohort.tables import kdigo_grid_table as kdigo_grid_table
    from kidneycohort.tables import rate_comparison_table as rate_comparison_table
    from kidneycohort.tables import slope_table as slope_table
    from kidneycohort.tables import suppress_small_counts as suppress_small_counts
    from kidneycohort.tables import suppression_footnote as suppression_footnote
    from kidneycohort.tables import suppression_label as suppression_label
    from kidneycohort.tables import to_markdown as to_markdown
    from kidneycohort.tables import transition_table as transition_table
    from kidneycohort.tables import write_tables as write_tables
    from kidneycohort.uacr import uacr_timeline as uacr_timeline
    from kidneycohort.value_filter import ValueFilterRule as ValueFilterRule
    from kidneycohort.value_filter import apply_value_filter as apply_value_filter
    from kidneycohort.value_filter import flag_aki as flag_aki

__version__ = "0.1.0"


def _by_module(groups: dict[str, str]) -> dict[str, str]:
    """``{module: "Name other_name ..."}`` -> ``{name: module}``."""
    return {name: module for module, names in groups.items() for name in names.split()}


# every public name -> the module it is loaded from on first use
_PUBLIC: dict[str, str] = _by_module(
    {
        "kidneycohort.equations": (
            "REGISTRY EquationSpec evaluate evaluate_with_reason evaluate_with_reason_index "
            "EquationReasonIndex equation_ids get_equation "
            "registry_table solve_creatinine solve_cystatin_c bsa_dubois bsa_mosteller "
            "deindex_egfr index_gfr EquationResult"
        ),
        "kidneycohort.io": (
            "FileSource read_source read_labs read_patients read_events loinc_table read_many "
            "infer_date_format parse_date_columns"
        ),
        "kidneycohort.io.omop": "OmopSource",
        "kidneycohort.io.sdtm": "SdtmSource",
        "kidneycohort.harmonize": (
            "HarmonizeRule HarmonizeResult PlausibleRange harmonize_tables unusable_tables"
        ),
        "kidneycohort.egfr": "compute_egfr egfr_wide EgfrRule AgeBand",
        "kidneycohort.value_filter": "ValueFilterRule flag_aki apply_value_filter",
        "kidneycohort.baseline": "uacr_baseline egfr_baseline BaselineRule",
        "kidneycohort.uacr": "uacr_timeline",
        "kidneycohort.slopes": "egfr_slopes SlopeRule",
        "kidneycohort.kdigo": (
            "SustainRule gfr_category albuminuria_category risk_grid category_results "
            "sustained_stages transitions transition_matrix time_to_first_worsening "
            "ckd_status kdigo_progression baseline_categories kdigo_grid_counts KdigoGridRule "
            "gfr_category_expr albuminuria_category_expr kdigo_risk_expr"
        ),
        "kidneycohort.kfre": (
            "kfre_risk kfre_inputs add_kfre_risk KfreRule kfre_at_baseline kfre_summary_table"
        ),
        "kidneycohort.endpoints": (
            "derive_endpoints EndpointRule EgfrDecline EgfrBelow KidneyFailure Death "
            "KidneyDeath Composite parse_endpoint_definitions usual_kidney_composite"
        ),
        "kidneycohort.adam": (
            "to_adam_tte AdamRule AdamDataset Variable VisitWindow default_visit_windows "
            "adsl_dataset adegfr_dataset adtte_dataset subject_facts write_adam spec_sheet "
            "check_dataset check_xpt_round_trip read_back_xpt"
        ),
        "kidneycohort.models": (
            "SlopeModel SlopeModelRule CauseSpecificCox CompetingRisks CompetingRisksRule "
            "FineGray gray_test JointSlopeModel DropoutAnalysisRule dropout_analysis "
            "JointSlopeRule delta_adjusted_slopes simulate_joint_cohort "
            "stated_value_at_kidney_failure MixedModelFit fit_mixed_model patient_blocks "
            "KaplanMeier CumulativeIncidence CoxModel SurvivalRule incidence_rates "
            "exact_poisson_interval rate_difference rate_ratio numbers_at_risk"
        ),
        "kidneycohort.tables": (
            "TableRule endpoint_table competing_risks_table dropout_table slope_table "
            "baseline_characteristics_table kdigo_grid_table write_tables "
            "rate_comparison_table transition_table to_markdown suppress_small_counts "
            "suppression_footnote suppression_label"
        ),
        "kidneycohort.plots": (
            "write_figures FigureRule attrition_boxes attrition_figure egfr_time_bins "
            "egfr_trajectory_figure model_trajectory_figure forest_rows forest_figure "
            "group_palette kdigo_grid_cells kdigo_grid_figure transition_cells "
            "transition_heatmap_figure slope_density slope_distribution "
            "slope_distribution_figure survival_steps survival_figure draw_figures "
            "patient_flow_boxes patient_flow_figure"
        ),
        "kidneycohort.report": (
            "write_report render_report build_report_context methods_from_config ReportRule "
            "print_pdf find_browser require_browser"
        ),
        "kidneycohort.synthetic": (
            "generate_cohort write_cohort load_scenario Scenario SyntheticCohort"
        ),
        "kidneycohort.pipeline": (
            "load_config run_pipeline check_inputs StudyConfig RunResult StepRegistry "
            "StudySection DataSection OutputSection Recipe Step StepContext ProgressObserver "
            "apply_overrides check_chain default_registry read_sources ExecutionSection"
        ),
        "kidneycohort.run_folder": (
            "RunFolder RunFile Manifest AccountingRecord InputRecord OutputRecord ReasonCount "
            "StepRecord StudyFacts canonical_order check_layout csv_safe write_csv declared "
            "file_for is_written markdown_table output_records package_versions read_manifest "
            "sha256_of write_manifest write_table write_workbook table_footnotes write_sheets "
            "ExecutionRecord"
        ),
        "kidneycohort.design": "DesignConfig DesignResult load_design simulate_power",
        "kidneycohort.provenance": (
            "Constant Publication constants_table get_constant get_publication "
            "read_code_location status_counts"
        ),
    }
)

_SUBMODULES = (
    "adam",
    "ages",
    "baseline",
    "cautions",
    "cli",
    "data_contract",
    "design",
    "disclosure",
    "value_filter",
    "egfr",
    "endpoints",
    "equations",
    "errors",
    "harmonize",
    "io",
    "kdigo",
    "kfre",
    "labels",
    "models",
    "pipeline",
    "plots",
    "provenance",
    "report",
    "run_folder",
    "schemas",
    "slopes",
    "synthetic",
    "tables",
    "uacr",
    "units",
    "vocabulary",
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


if not TYPE_CHECKING:  # hidden from type checkers, so that a misspelt name is reported

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
