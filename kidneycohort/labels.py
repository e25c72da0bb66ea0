"""Display labels: how codes (endpoint names, groups, equation ids) read in figures and text.

A code reads as its configured label when the run has one, in this order of precedence:
``report.labels`` in the config (any code: endpoint, group, equation, quantity), the
endpoint definition's own ``label`` (without its leading "Time to"), the equation
registry's label; otherwise as the code made readable (:func:`display_label`).
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from typing import Any

__all__ = ["display_label", "label_map"]

_QUANTITIES = {
    "chronic_slope": "chronic eGFR slope",
    "acute_change": "acute eGFR change",
    "slope": "eGFR slope",
}


def display_label(code: str, labels: Mapping[str, str] | None = None) -> str:
    """The display label of ``code``: its entry in ``labels`` when present, else
    ``egfr_decline_40`` -> ``eGFR decline 40`` (underscores become spaces and "egfr" is
    written "eGFR", so codes stay recognisable).

    Parameters
    ----------
    code : str
        An endpoint name, group, equation id or model quantity.
    labels : mapping, optional
        ``{code: label}``, e.g. from :func:`label_map`.

    Returns
    -------
    str
        The label.

    Examples
    --------
    >>> display_label("egfr_below_15")
    'eGFR below 15'
    >>> display_label("active", {"active": "Active drug"})
    'Active drug'
    """
    if labels and str(code) in labels:
        return str(labels[str(code)])
    total = re.fullmatch(r"total_slope_(\d+(?:\.\d+)?)y", str(code))
    if total:
        return f"total eGFR slope over {total.group(1)} years"
    if str(code) in _QUANTITIES:
        return _QUANTITIES[str(code)]
    return re.sub(r"\begfr\b", "eGFR", str(code).replace("_", " "), flags=re.IGNORECASE)


def _endpoint_labels(config: Mapping[str, Any]) -> dict[str, str]:
    section = config.get("endpoints") or {}
    definitions = section.get("definitions") if isinstance(section, Mapping) else None
    out: dict[str, str] = {}
    for item in definitions or []:
        if not isinstance(item, Mapping) or not item.get("name") or not item.get("label"):
            continue
        text = re.sub(r"^time to (an? |the )?", "", str(item["label"]), flags=re.IGNORECASE)
        text = text.replace("mL/min/1.73m2", "mL/min/1.73 m²")
        out[str(item["name"])] = text[:1].lower() + text[1:] if text[1:2].islower() else text
    return out


def _equation_labels(config: Mapping[str, Any]) -> dict[str, str]:
    from kidneycohort.equations import REGISTRY

    ids = set((config.get("egfr") or {}).get("equations") or [])
    ids.add((config.get("study") or {}).get("primary_equation"))
    return {i: REGISTRY[i].label for i in ids if i in REGISTRY}


def label_map(config: Mapping[str, Any] | None) -> dict[str, str]:
    """``{code: display label}`` for a resolved config (``manifest.config``).

    Parameters
    ----------
    config : mapping or None
        The resolved config of a run.

    Returns
    -------
    dict
        Endpoint labels from their definitions, equation labels from the registry, and
        ``report.labels`` on top (the study's own wording wins).
    """
    config = config or {}
    labels = {**_equation_labels(config), **_endpoint_labels(config)}
    report = config.get("report") or {}
    labels.update({str(k): str(v) for k, v in (report.get("labels") or {}).items()})
    return labels
