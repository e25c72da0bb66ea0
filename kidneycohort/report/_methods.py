"""The Methods section: every rule of the resolved config in plain language.

Settings whose meaning is standard have their own phrasing; every other setting is
described by its key and value, so that nothing the run used goes unreported.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Mapping
from typing import Any, Final

from kidneycohort.disclosure import disclosure_footnote

__all__ = ["methods_from_config", "readable_key"]


def readable_key(key: str) -> str:
    text = str(key).replace("_", " ").strip()
    text = re.sub(r"\begfr\b", "eGFR", text, flags=re.IGNORECASE)
    text = re.sub(r"\bpct\b", "%", text)
    return text[:1].upper() + text[1:]


def _readable_value(value: Any) -> str:
    if isinstance(value, bool):
        return "yes" if value else "no"
    if value is None:
        return "not set"
    if isinstance(value, float):
        return f"{value:g}"
    if isinstance(value, list | tuple):
        if not value:
            return "none"
        return ", ".join(_readable_value(v) for v in value)
    if isinstance(value, Mapping):
        return "; ".join(
            f"{readable_key(k).lower()} {_readable_value(v)}" for k, v in value.items()
        )
    return str(value)


# Phrasings of settings whose meaning is standard; everything else is described by its
# key and value, so that every setting found in the resolved config is reported.
_PHRASES: Final[dict[str, Callable[[Any], str]]] = {
    "knot_years": lambda v: (
        f"eGFR slopes are modelled with a linear spline with a knot at {_readable_value(v)} "
        "years: the acute slope before the knot, the chronic slope after it."
    ),
    "rapid_decline_per_year": lambda v: (
        # the rule's threshold is a rate of fall (slopes.SlopeRule); accept either sign
        f"Rapid decline: an eGFR fall faster than {_readable_value(abs(float(v)))} "
        f"mL/min/1.73 m² per year (slope below -{_readable_value(abs(float(v)))})."
    ),
    "small_cell_threshold": lambda v: (
        disclosure_footnote(int(v))
        + " The same protection applies to every table, figure and sentence of this report."
    ),
    "confirm_after_days": lambda v: (
        f"A decline counts only when a repeat value at least {v} days later confirms it."
    ),
    "min_values": lambda v: f"A per-patient slope needs at least {v} eGFR values.",
    "death_before_event": lambda v: (
        "Death before a laboratory endpoint: a competing event at the death date "
        "(cumulative incidence, subdistribution hazards)."
        if v == "competing"
        else "Death before a laboratory endpoint: censored at the last eGFR assessment "
        "(cause-specific analysis); it is not counted as a competing event."
    ),
    "lab_censoring": lambda v: (
        "Laboratory endpoints without an event are censored at the last eGFR assessment."
        if v == "last_assessment"
        else "Laboratory endpoints without an event are censored at the end of follow-up."
    ),
    "min_span_years": lambda v: (
        f"A per-patient slope needs values spanning at least {_readable_value(v)} "
        f"{'year' if float(v) == 1 else 'years'}."
    ),
    "window_days": lambda v: f"Window: {v} days.",
    "decline_pct": lambda v: f"Decline of at least {_readable_value(v)} % from baseline.",
    "exclude_settings": lambda v: (
        f"Values measured in these settings are excluded: {_readable_value(v)}."
    ),
    "seed": lambda v: f"Random seed: {v} (recorded so that any resampling can be repeated).",
}
_NOT_METHODS: Final = frozenset({"data", "output"})


def _describe(key: str, value: Any, equation_labels: Mapping[str, str]) -> list[str]:
    if key in _PHRASES and not isinstance(value, Mapping | list):
        return [_PHRASES[key](value)]
    if key in _PHRASES and key == "exclude_settings":
        return [_PHRASES[key](value)]
    if key in {"equations", "equation", "primary", "primary_equation"}:
        ids = value if isinstance(value, list) else [value]
        named = ", ".join(equation_labels.get(str(i), str(i)) for i in ids)
        return [f"{readable_key(key)}: {named}."]
    if isinstance(value, Mapping):
        inner = [s for k, v in value.items() for s in _describe(str(k), v, equation_labels)]
        return [f"{readable_key(key)}: " + " ".join(inner)] if inner else []
    if isinstance(value, list) and value and all(isinstance(v, Mapping) for v in value):
        out = []
        for item in value:
            name = item.get("name") or item.get("id") or readable_key(key)
            rest = {k: v for k, v in item.items() if k not in {"name", "id"}}
            inner = [s for k, v in rest.items() for s in _describe(str(k), v, equation_labels)]
            out.append(f"{name}: " + (" ".join(inner) if inner else "defaults."))
        return out
    return [f"{readable_key(key)}: {_readable_value(value)}."]


def methods_from_config(
    config: Mapping[str, Any], equation_labels: Mapping[str, str] | None = None
) -> list[dict[str, Any]]:
    """Plain-language description of every rule in a resolved config.

    Parameters
    ----------
    config : mapping
        ``manifest["config"]``: sections (``study``, ``egfr``, ``baseline``, ``slopes``,
        ``endpoints``, ``tables``, ...) of settings. Missing sections are simply absent
        from the description; unknown keys are described by name and value.
    equation_labels : mapping, optional
        ``{equation id: readable label}`` to name equations.

    Returns
    -------
    list of dict
        ``{"section": heading, "sentences": [...]}`` per config section, in config order
        (``data`` and ``output``, which hold file locations, are left to Provenance).
    """
    labels = dict(equation_labels or {})
    out = []
    for section, settings in (config or {}).items():
        if section in _NOT_METHODS:
            continue
        if section == "study" and isinstance(settings, Mapping):
            settings = {k: v for k, v in settings.items() if k not in {"name", "description"}}
        if isinstance(settings, Mapping):
            sentences = [s for k, v in settings.items() for s in _describe(str(k), v, labels)]
        elif isinstance(settings, list) and all(isinstance(v, Mapping) for v in settings):
            sentences = _describe(section, settings, labels)
        else:
            sentences = [f"{_readable_value(settings)}."]
        if sentences:
            out.append({"section": readable_key(section), "sentences": sentences})
    return out
