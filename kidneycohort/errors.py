"""Exception and warning classes of kidneycohort.

Every error a user can cause with bad input or a bad config is one of these, so the
command line can turn it into a one-line message (exit code 2) and a library user can
catch it by class. Internal failures are ordinary Python exceptions (exit code 1).
"""

from __future__ import annotations

import difflib
from collections.abc import Iterable

__all__ = [
    "AccountingError",
    "ConfigError",
    "ConvergenceError",
    "DataQualityWarning",
    "DisclosureWarning",
    "EquationWarning",
    "InputDataError",
    "KidneyCohortError",
    "KidneyCohortWarning",
    "StatisticalWarning",
    "UnknownEquationError",
    "UnknownUnitError",
    "did_you_mean",
]


class KidneyCohortError(Exception):
    """Base class of all errors raised on purpose by kidneycohort."""


class InputDataError(KidneyCohortError, ValueError):
    """A data source or table is unusable: missing file or column, unreadable values."""


class UnknownUnitError(KidneyCohortError, ValueError):
    """A unit spelling that kidneycohort does not recognise for an analyte."""


class UnknownEquationError(KidneyCohortError, KeyError):
    """An equation id that is not in the registry."""

    def __str__(self) -> str:  # KeyError quotes its argument; keep the message readable
        return str(self.args[0]) if self.args else ""


class ConfigError(KidneyCohortError, ValueError):
    """A study config, recipe or scenario file that fails validation."""


class ConvergenceError(KidneyCohortError, RuntimeError):
    """A model fit did not converge and no stated fallback applies."""


class AccountingError(KidneyCohortError, AssertionError):
    """Rows read != rows used + rejected + merged: a bug, never a user error."""


class BrowserNotFoundError(KidneyCohortError, RuntimeError):
    """A PDF of the report was asked for and no headless Chromium / Chrome is installed."""


class KidneyCohortWarning(UserWarning):
    """Base class of all warnings issued by kidneycohort."""


class StatisticalWarning(KidneyCohortWarning):
    """A model result that needs care: fallback structure, boundary fit, few events."""


class EquationWarning(KidneyCohortWarning):
    """An equation used outside its recommended context (e.g. a race coefficient)."""


class DisclosureWarning(KidneyCohortWarning):
    """Small-cell protection had to hide a printed total to keep a small count hidden."""


class DataQualityWarning(KidneyCohortWarning):
    """An assumption was applied to the data (e.g. a default unit) and recorded."""


def did_you_mean(name: str, choices: Iterable[str]) -> str:
    """Return ``" (did you mean 'x'?)"`` for the closest choice, or ``""``.

    Used by every message that names an unknown column, key or id.
    """
    close = difflib.get_close_matches(str(name), [str(c) for c in choices], n=1, cutoff=0.6)
    return f" (did you mean '{close[0]}'?)" if close else ""
