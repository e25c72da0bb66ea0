"""Kidney endpoints: confirmed eGFR decline, eGFR below a threshold, kidney failure,
death, kidney death and composites, as one time-to-event row per patient per endpoint.

Every endpoint is a typed definition (a pydantic model with a ``kind`` field) that a
study config fills under the same key names; the confirmation and timing rules are
their own model, :class:`EndpointRule`, with stated defaults. One call,
:func:`derive_endpoints`, turns a list of definitions into the ``endpoints`` table of
:data:`kidneycohort.schemas.ENDPOINTS`.

Time zero is the patient's ``index_date``. Follow-up ends at the earliest of the data
cut, the patient's ``end_of_followup`` and death. eGFR values on or after the onset of
kidney failure (chronic dialysis, transplant, ``kfrt_date``) and values inside a short
(acute) dialysis episode do not measure native kidney function and are never used
for decline detection [1]_.

References
----------
.. [1] Levey AS, Inker LA, Matsushita K, et al. GFR decline as an end point for
   clinical trials in CKD: a scientific workshop sponsored by the National Kidney
   Foundation and the US Food and Drug Administration. Am J Kidney Dis.
   2014;64(6):821-835. doi:10.1053/j.ajkd.2014.07.030
.. [2] Coresh J, Turin TC, Matsushita K, et al. Decline in estimated glomerular
   filtration rate and subsequent risk of end-stage renal disease and mortality.
   JAMA. 2014;311(24):2518-2531. doi:10.1001/jama.2014.6634
"""

from __future__ import annotations

from kidneycohort.endpoints._definitions import (
    NOT_EVALUABLE_REASONS,
    Composite,
    Death,
    EgfrBelow,
    EgfrDecline,
    EndpointDefinition,
    EndpointRule,
    KidneyDeath,
    KidneyFailure,
    parse_endpoint_definitions,
    usual_kidney_composite,
)
from kidneycohort.endpoints._derive import (
    derive_endpoints,
)

__all__ = [
    "NOT_EVALUABLE_REASONS",
    "Composite",
    "Death",
    "EgfrBelow",
    "EgfrDecline",
    "EndpointDefinition",
    "EndpointRule",
    "KidneyDeath",
    "KidneyFailure",
    "derive_endpoints",
    "parse_endpoint_definitions",
    "usual_kidney_composite",
]
