"""Trial and cohort tables: endpoints, slopes, baseline characteristics, KDIGO grids.

Every function returns a polars DataFrame ready to print: counts and statistics are
formatted as text, and counts of people are protected by :mod:`kidneycohort.disclosure`. A count between 1
and the threshold (``TableRule.small_cell_threshold``, default 10) is shown as
``"<11"``; a percentage or rate that would reveal such a count is suppressed with it;
and where the other counts of a table (its margins, its overall column) would give a
hidden count away, further counts are hidden (``"*"``) until none can be recovered
(complementary suppression, common practice under data-use agreements). Pass one
:class:`~kidneycohort.disclosure.SharedDisclosure` to several table functions to protect
outputs shown together. :func:`suppression_footnote` words the
footnote; :func:`write_tables` writes CSV files and one XLSX workbook;
:func:`to_markdown` renders a table for the report.

Inputs of :func:`kdigo_grid_table` and :func:`baseline_characteristics_table` (argument
``categories``): one row per patient with ``patient_id``, ``g_category`` (``G1`` ...
``G5``, as :mod:`kidneycohort.kdigo` names them), ``a_category`` (``A1`` ... ``A3``),
optionally ``uacr_mg_g`` (baseline UACR in mg/g) and ``equation`` (then pass
``equation=`` when several are present). :func:`transition_table` reads the
``schemas.TRANSITIONS`` layout.
"""

from __future__ import annotations

from kidneycohort.tables._baseline import (
    baseline_characteristics_table,
)
from kidneycohort.tables._competing import (
    competing_risks_table,
)
from kidneycohort.tables._dropout import (
    dropout_table,
)
from kidneycohort.tables._endpoints import (
    endpoint_table,
)
from kidneycohort.tables._format import (
    TableRule,
    suppress_small_counts,
    suppression_footnote,
    suppression_label,
)
from kidneycohort.tables._kdigo import (
    kdigo_grid_table,
    transition_table,
)
from kidneycohort.tables._models import (
    rate_comparison_table,
    slope_table,
)
from kidneycohort.tables._write import (
    to_markdown,
    write_tables,
)

__all__ = [
    "TableRule",
    "baseline_characteristics_table",
    "competing_risks_table",
    "dropout_table",
    "endpoint_table",
    "kdigo_grid_table",
    "rate_comparison_table",
    "slope_table",
    "suppress_small_counts",
    "suppression_footnote",
    "suppression_label",
    "to_markdown",
    "transition_table",
    "write_tables",
]
