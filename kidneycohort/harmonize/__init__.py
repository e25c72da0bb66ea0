"""Harmonise raw lab, patient and event tables: every row used, rejected or merged.

``harmonize_tables(labs, patients, events=None, rule=None, **rule)`` turns raw tables (as read
by :mod:`kidneycohort.io`, or any polars/pandas frame with the canonical columns of
``schemas.RAW_LABS`` / ``PATIENTS`` / ``EVENTS``) into

* ``labs`` in standard units (``schemas.LABS``; creatinine mg/dL, cystatin C mg/L,
  UACR mg/g) with the reported value and unit kept beside them,
* ``rejected`` rows (``schemas.REJECTED``) with a reason code of :data:`REASON_CODES`,
* ``merged`` rows (same columns) folded into another row as an exact duplicate or by
  the same-day rule,
* ``accounting`` per input table, asserted inside the stage:

.. math::

    n_\\text{read} = n_\\text{used} + n_\\text{rejected} + n_\\text{merged}

Each lab row gets the *first* failing check of this order (so every row has exactly
one reason): missing patient id, missing or unparseable date, unknown analyte, missing
value, not a result, qualified value (when rejected by the rule), missing or unknown
unit, implausible value, unknown or rejected patient, before birth, after death, after
the data cut. Exact duplicates are merged before the checks; same-day repeats of usable
results are folded after them.

All work is polars expressions over the whole table (no per-row Python) and every
check is per patient, so harmonising any partition of patients gives the same rows.
"""

from __future__ import annotations

from kidneycohort.harmonize._accounting import (
    harmonize_tables,
)
from kidneycohort.harmonize._rule import (
    DEFAULT_PLAUSIBLE_RANGES,
    MERGE_REASONS,
    REASON_CODES,
    HarmonizeResult,
    HarmonizeRule,
    PlausibleRange,
    unusable_tables,
)

__all__ = [
    "DEFAULT_PLAUSIBLE_RANGES",
    "MERGE_REASONS",
    "REASON_CODES",
    "HarmonizeResult",
    "HarmonizeRule",
    "PlausibleRange",
    "harmonize_tables",
    "unusable_tables",
]
