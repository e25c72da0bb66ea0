"""Kidney Failure Risk Equation (KFRE), 4-variable form, 2- and 5-year risk.

.. math::

    \\text{risk}(t) = 1 - S_0(t)^{\\exp(\\eta)},\\qquad
    \\eta = -0.2201\\,(\\tfrac{\\text{age}}{10} - 7.036)
           + 0.2467\\,(\\text{male} - 0.5642)
           - 0.5567\\,(\\tfrac{\\text{eGFR}}{5} - 7.222)
           + 0.4510\\,(\\ln \\text{UACR}_{\\text{mg/g}} - 5.137)

Coefficients and centring values are those of the 4-variable model of Tangri et al.
(2011) [1]_; the baseline survivals :math:`S_0(t)` are the regional recalibration of
Tangri et al. (2016) [2]_:

============================ ========== ==========
region                       S0(2 yr)   S0(5 yr)
============================ ========== ==========
``north_american``           0.9750     0.9240
``non_north_american``       0.9832     0.9365
============================ ========== ==========

The numbers above are the module constants :data:`COEFFICIENTS`, :data:`CENTRES`,
:data:`BASELINE_SURVIVAL` and the applicability limits; their publication, table and
whether each was re-read or recalled are recorded in :mod:`kidneycohort.provenance`
(ids ``kfre.*``; ``kidneycohort equations --sources`` lists them and counts the recalled
ones, which must be checked against [1]_ and [2]_ before publication use).

Applicability (enforced): the equation was developed and validated in adults with CKD
G3-G5 (eGFR < 60 mL/min/1.73 m2) not yet on kidney replacement therapy. A row outside
that population gets null risks and a reason in ``kfre_reason``
(:data:`KFRE_REASONS`). Whether a patient already receives dialysis or has a transplant
is not visible here; do not pass such patients.

References
----------
.. [1] Tangri N, Stevens LA, Griffith J, et al. A predictive model for progression of
   chronic kidney disease to kidney failure. JAMA 2011;305(15):1553-1559.
   doi:10.1001/jama.2011.451
.. [2] Tangri N, Grams ME, Levey AS, et al. Multinational assessment of accuracy of
   equations for predicting risk of kidney failure: a meta-analysis. JAMA
   2016;315(2):164-174. doi:10.1001/jama.2015.18202
"""

from __future__ import annotations

from kidneycohort.kfre._equation import (
    BASELINE_SURVIVAL,
    CENTRES,
    COEFFICIENTS,
    EGFR_BELOW,
    KFRE_REASONS,
    MIN_AGE_YEARS,
    Region,
    add_kfre_risk,
    kfre_risk,
)
from kidneycohort.kfre._inputs import (
    KFRE_SUMMARY_REASONS,
    ON_KFRT,
    kfre_at_baseline,
    kfre_inputs,
)
from kidneycohort.kfre._rule import KfreRule
from kidneycohort.kfre._summary import (
    kfre_summary_table,
)

__all__ = [
    "BASELINE_SURVIVAL",
    "CENTRES",
    "COEFFICIENTS",
    "EGFR_BELOW",
    "KFRE_REASONS",
    "KFRE_SUMMARY_REASONS",
    "MIN_AGE_YEARS",
    "ON_KFRT",
    "KfreRule",
    "Region",
    "add_kfre_risk",
    "kfre_at_baseline",
    "kfre_inputs",
    "kfre_risk",
    "kfre_summary_table",
]
