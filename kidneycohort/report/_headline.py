"""The report's headline: the primary endpoint and the primary slope contrast.

Every number is a text the protected shared tables print (``tables/endpoint_table``,
``tables/slope_table``): counts of people and events are never recomputed from
patient-level files, so a hidden count ('<11', '*') stays hidden here.
"""

from __future__ import annotations

import re
from typing import Any

import polars as pl

from kidneycohort.labels import display_label
from kidneycohort.report._rule import ReportRule
from kidneycohort.run_folder import RunFolder

__all__ = ["headline"]

_ESTIMATE = re.compile(
    r"^\s*(?P<estimate>-?[\d.]+)\s*\((?P<lower>-?[\d.]+) to (?P<upper>-?[\d.]+)\)"
)


def _split_estimate(text: str) -> tuple[str, str]:
    """``'0.72 (0.44 to 1.18)'`` -> ``('0.72', '0.44 to 1.18')``; other texts unchanged."""
    match = _ESTIMATE.match(text or "")
    if match is None:
        return text or "", ""
    return match["estimate"], f"{match['lower']} to {match['upper']}"


def _primary_endpoint(run: RunFolder, rule: ReportRule, names: list[str]) -> str | None:
    if rule.primary_endpoint is not None:
        return rule.primary_endpoint if rule.primary_endpoint in names else None
    definitions = (run.manifest.section("endpoints") or {}).get("definitions") or []
    ordered = [d.get("name") for d in definitions if isinstance(d, dict)]
    return next((n for n in ordered if n in names), names[0] if names else None)


def _endpoint_block(run: RunFolder, rule: ReportRule, labels: dict[str, str]) -> dict | None:
    table = run.table_or_none("tables/endpoint_table")
    if table is None or not {"endpoint", "group", "events", "n_patients"} <= set(table.columns):
        return None
    name = _primary_endpoint(run, rule, list(dict.fromkeys(table["endpoint"].to_list())))
    if name is None:
        return None
    rows = table.filter(pl.col("endpoint") == name).fill_null("")
    groups = rows.filter(pl.col("group") != "Overall") if rows.height > 1 else rows
    reference = next(
        (r["group"] for r in groups.to_dicts() if r.get("hazard_ratio") == "reference"), None
    )
    effects = []
    for row in groups.to_dicts():
        text = str(row.get("hazard_ratio") or "")
        if not text or text in ("reference", "–", "-"):
            continue
        estimate, interval = _split_estimate(text)
        estimable = bool(interval)
        effects.append(
            {
                "comparison": f"{display_label(row['group'], labels)} vs "
                f"{display_label(reference, labels)}"
                if reference
                else display_label(row["group"], labels),
                "estimate": estimate if estimable else "not estimable",
                "interval": interval,
                "p": str(row.get("p") or ""),
                "note": str(row.get("note") or ""),
            }
        )
    return {
        "code": name,
        "label": _sentence(display_label(name, labels)),
        "measure": "Hazard ratio (Cox model)",
        "groups": [
            {
                "group": display_label(r["group"], labels),
                "events": str(r["events"]).split(" (")[0],
                "events_text": str(r["events"]),
                "patients": str(r["n_patients"]),
            }
            for r in groups.to_dicts()
        ],
        "effects": effects,
    }


def _slope_quantity(rule: ReportRule, quantities: list[str]) -> str | None:
    if rule.primary_slope is not None:
        return rule.primary_slope if rule.primary_slope in quantities else None
    if "chronic_slope" in quantities:
        return "chronic_slope"
    return quantities[0] if quantities else None


def _slope_block(run: RunFolder, rule: ReportRule, labels: dict[str, str]) -> dict | None:
    table = run.table_or_none("tables/slope_table")
    if table is None or not {"contrast", "quantity", "estimate"} <= set(table.columns):
        return None
    quantity = _slope_quantity(rule, list(dict.fromkeys(table["quantity"].to_list())))
    if quantity is None:
        return None
    rows = table.filter(pl.col("quantity") == quantity).fill_null("")
    contrasts = rows.filter(pl.col("contrast").str.contains(" - ", literal=True))
    shown = contrasts if contrasts.height else rows
    effects = []
    for row in shown.to_dicts():
        groups = str(row["contrast"]).split(" - ")
        effects.append(
            {
                "comparison": " minus ".join(display_label(g, labels) for g in groups),
                "estimate": str(row["estimate"]),
                "interval": str(row.get("ci_95") or ""),
                "p": str(row.get("p") or ""),
                "patients": " vs ".join(str(row.get("n_patients") or "").split(" vs ")),
            }
        )
    per_group = rows.filter(~pl.col("contrast").str.contains(" - ", literal=True))
    return {
        "code": quantity,
        "label": _sentence(display_label(quantity, labels)),
        "unit": "mL/min/1.73 m² per year",
        "groups": [
            {
                "group": display_label(r["contrast"], labels),
                "estimate": str(r["estimate"]),
                "interval": str(r.get("ci_95") or ""),
                "patients": str(r.get("n_patients") or ""),
            }
            for r in per_group.to_dicts()
        ],
        "effects": effects,
    }


def _sentence(text: str) -> str:
    if text.startswith("eGFR"):
        return text
    return text[:1].upper() + text[1:]


def headline(run: RunFolder, rule: ReportRule, labels: dict[str, str]) -> dict[str, Any]:
    """The headline block: ``endpoint`` and ``slope`` (None when the run has neither table).

    Parameters
    ----------
    run : RunFolder
        The run folder.
    rule : ReportRule
        Which endpoint and which slope quantity lead.
    labels : dict
        Display labels of codes.

    Returns
    -------
    dict
        ``{"endpoint": {...} or None, "slope": {...} or None}``; every count and estimate
        a text of a shared table.
    """
    return {
        "endpoint": _endpoint_block(run, rule, labels),
        "slope": _slope_block(run, rule, labels),
    }
