"""kidneycohort: kidney-function cohort analysis.

The public API is re-exported here; nothing is defined in this module. Tables go in as
polars or pandas DataFrames and come back as polars DataFrames.
"""

from kidneycohort import equations, units
from kidneycohort.cautions import CAUTIONS
from kidneycohort.errors import (
    ConfigError,
    ConvergenceError,
    InputDataError,
    KidneyCohortError,
    KidneyCohortWarning,
    StatisticalWarning,
    UnknownEquationError,
    UnknownUnitError,
)

__version__ = "0.1.0"

__all__ = [
    "CAUTIONS",
    "ConfigError",
    "ConvergenceError",
    "InputDataError",
    "KidneyCohortError",
    "KidneyCohortWarning",
    "StatisticalWarning",
    "UnknownEquationError",
    "UnknownUnitError",
    "__version__",
    "equations",
    "units",
]
