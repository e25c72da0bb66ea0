"""Figures of a run: eGFR trajectories, slopes, survival, hazard ratios, KDIGO, attrition.

Every figure is a function that takes the run folder's tables (polars or pandas) and
returns a plotnine object, so it can be used on its own, restyled with ``+ theme(...)``
and saved anywhere. Each figure has a *data layer* function next to it that returns the
exact table the figure draws (``egfr_time_bins``, ``slope_distribution``,
``survival_steps``, ``forest_rows``, ``kdigo_grid_cells``, ``transition_cells``,
``attrition_boxes``); tests check those tables against the tables they summarise.

Conventions shared by all figures:

* colours come from the Okabe–Ito palette, which stays distinguishable under the common
  colour-vision deficiencies [1]_; a group keeps the same colour in every figure of a run
  (:func:`group_palette` assigns colours in sorted group order);
* axes carry units (mL/min/1.73 m², years);
* counts from 1 to the small-cell threshold (default 10) are printed as ``"<11"``, the
  same protection the tables apply (common practice in data-use agreements).

:func:`write_figures` draws every figure a run folder has data for, as PNG and SVG, into
``figures/``.

References
----------
.. [1] Okabe M, Ito K. Color Universal Design (CUD): how to make figures and
   presentations that are friendly to colorblind people. J*Fly, 2002/2008.
   https://jfly.uni-koeln.de/color/
.. [2] KDIGO 2012 Clinical Practice Guideline for the Evaluation and Management of
   Chronic Kidney Disease. Kidney Int Suppl 2013;3:1-150. doi:10.1038/kisup.2012.73
.. [3] Schulz KF, Altman DG, Moher D. CONSORT 2010 statement. BMJ 2010;340:c332.
   doi:10.1136/bmj.c332
"""

from __future__ import annotations

from kidneycohort.plots._attrition import (
    attrition_boxes,
    attrition_figure,
)
from kidneycohort.plots._kdigo import (
    kdigo_grid_cells,
    kdigo_grid_figure,
    transition_cells,
    transition_heatmap_figure,
)
from kidneycohort.plots._patient_flow import (
    patient_flow_boxes,
    patient_flow_figure,
)
from kidneycohort.plots._slopes import (
    slope_density,
    slope_distribution,
    slope_distribution_figure,
)
from kidneycohort.plots._style import (
    ALL_PATIENTS,
    GROUP_COLOURS,
    KDIGO_RISK,
    KDIGO_RISK_COLOURS,
    OKABE_ITO,
    RAPID_DECLINE_PER_YEAR,
    group_palette,
)
from kidneycohort.plots._survival import (
    forest_figure,
    forest_rows,
    survival_figure,
    survival_steps,
)
from kidneycohort.plots._trajectories import (
    egfr_time_bins,
    egfr_trajectory_figure,
    model_trajectory_figure,
)
from kidneycohort.plots._write import (
    FIGURE_TITLES,
    FigureRule,
    draw_figures,
    write_figures,
)

__all__ = [
    "ALL_PATIENTS",
    "FIGURE_TITLES",
    "GROUP_COLOURS",
    "KDIGO_RISK",
    "KDIGO_RISK_COLOURS",
    "OKABE_ITO",
    "RAPID_DECLINE_PER_YEAR",
    "FigureRule",
    "attrition_boxes",
    "attrition_figure",
    "draw_figures",
    "egfr_time_bins",
    "egfr_trajectory_figure",
    "forest_figure",
    "forest_rows",
    "group_palette",
    "kdigo_grid_cells",
    "kdigo_grid_figure",
    "model_trajectory_figure",
    "patient_flow_boxes",
    "patient_flow_figure",
    "slope_density",
    "slope_distribution",
    "slope_distribution_figure",
    "survival_figure",
    "survival_steps",
    "transition_cells",
    "transition_heatmap_figure",
    "write_figures",
]
