"""The Methods section: prose in the register of a journal methods section, written from
the resolved config of the run (and the facts the run recorded about its own fits).

Each paragraph is built from the rule objects' values, so a changed rule changes its
sentence. Settings with no phrasing of their own are listed under "Other settings" by key
and value, so that nothing the run used goes unreported.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Mapping
from typing import Any, Final

from kidneycohort.disclosure import disclosure_footnote

__all__ = ["methods_from_config", "readable_key"]

Config = Mapping[str, Any]


def readable_key(key: str) -> str:
    """``rapid_decline_per_year`` -> ``Rapid decline per year`` ("egfr" as "eGFR")."""
    text = str(key).replace("_", " ").strip()
    text = re.sub(r"\begfr\b", "eGFR", text, flags=re.IGNORECASE)
    text = re.sub(r"\bpct\b", "%", text)
    return text[:1].upper() + text[1:]


def _num(value: Any) -> str:
    return f"{float(value):g}"


def _plural(value: Any, unit: str) -> str:
    return f"{_num(value)} {unit}" + ("" if float(value) == 1 else "s")


def _list(items: list[str]) -> str:
    if len(items) <= 1:
        return "".join(items)
    return ", ".join(items[:-1]) + " and " + items[-1]


def _value(value: Any) -> str:
    if isinstance(value, bool):
        return "yes" if value else "no"
    if value is None:
        return "not set"
    if isinstance(value, float):
        return _num(value)
    if isinstance(value, list | tuple):
        return ", ".join(_value(v) for v in value) or "none"
    if isinstance(value, Mapping):
        return "; ".join(f"{readable_key(k).lower()} {_value(v)}" for k, v in value.items())
    return str(value)


# ---- paragraphs ---------------------------------------------------------------------------
def _equation_citation(eq: str, labels: Mapping[str, str]) -> str:
    from kidneycohort.equations import REGISTRY

    spec = REGISTRY.get(eq)
    if spec is None:
        return f"{labels.get(eq, eq)} (not in the kidneycohort equation registry)"
    doi = f"; doi:{spec.doi}" if getattr(spec, "doi", None) else ""
    return f"the {spec.label} equation ({spec.reference}{doi})"


def _competing(facts: Mapping[str, Any], labels: Mapping[str, str]) -> list[str]:
    """The competing-risks analysis' own methods texts, one per distinct wording: a text
    repeated for several endpoints is written once, naming them."""
    by_text: dict[str, list[str]] = {}
    for endpoint, text in facts.get("competing_methods") or []:
        template = text.replace(endpoint, "{endpoint}") if endpoint else text
        by_text.setdefault(template, []).append(endpoint)
    out = []
    for template, endpoints in by_text.items():
        names = _list([labels.get(e, e) for e in endpoints if e])
        first = template.replace(
            "{endpoint}", f"each endpoint ({names})" if len(endpoints) > 1 else names, 1
        )
        out.append(first.replace("{endpoint}", "the endpoint" if len(endpoints) > 1 else names))
    return out


def _egfr(config: Config, labels: Mapping[str, str]) -> list[str]:
    egfr, study = config.get("egfr") or {}, config.get("study") or {}
    primary = study.get("primary_equation")
    ids = list(dict.fromkeys([e for e in [primary, *(egfr.get("equations") or [])] if e]))
    if not ids:
        return []
    role = ", the primary equation of the analyses," if primary else ""
    out = [f"GFR was estimated with {_equation_citation(ids[0], labels)}{role} in mL/min/1.73 m²."]
    if len(ids) > 1:
        others = [_equation_citation(e, labels) for e in ids[1:]]
        out.append(f"For comparison, eGFR was also computed with {_list(others)}.")
    if "apply_race_coefficient" in egfr:
        out.append(
            "A race coefficient was applied where an equation has one."
            if egfr["apply_race_coefficient"]
            else "No race coefficient was applied."
        )
    if "allow_outside_age" in egfr:
        out.append(
            "Values were computed outside an equation's validated age range."
            if egfr["allow_outside_age"]
            else "No value was computed outside an equation's validated age range."
        )
    return out


def _values(config: Config) -> list[str]:
    rule, harmonize = config.get("value_filter") or {}, config.get("harmonize") or {}
    out = []
    ranges = harmonize.get("plausible_ranges") or {}
    if ranges:
        parts = [
            f"{readable_key(k).lower()} {_num(v['low'])} to {_num(v['high'])} {v.get('unit', '')}".strip()
            for k, v in ranges.items()
            if isinstance(v, Mapping) and {"low", "high"} <= set(v)
        ]
        out.append(f"Results outside plausible ranges ({'; '.join(parts)}) were rejected.")
    if harmonize.get("same_day_rule"):
        out.append(
            f"Several results of one analyte on one day were combined ({harmonize['same_day_rule']})."
        )
    settings = list(rule.get("exclude_settings") or [])
    if settings:
        out.append(
            f"Results measured in the {_list(settings)} setting"
            f"{'s' if len(settings) > 1 else ''} were not used for baselines, slopes or endpoints."
        )
    if rule.get("exclude_aki"):
        out.append(
            "Creatinine results during acute kidney injury by the KDIGO 2012 creatinine "
            f"criteria (a rise of at least {_num(rule.get('aki_rise_mg_dl', 0.3))} mg/dL within "
            f"{_num(rule.get('aki_rise_hours', 48))} hours, or to at least "
            f"{_num(rule.get('aki_ratio', 1.5))} times the lowest prior value within "
            f"{_plural(rule.get('aki_ratio_days', 7), 'day')}) were excluded, together with "
            f"results in the following {_plural(rule.get('aki_recovery_days', 0), 'day')}."
        )
    elif "exclude_aki" in rule:
        out.append("Results during acute kidney injury were not excluded.")
    qualified = rule.get("qualified_values")
    if qualified:
        out.append(
            "Results reported as a limit ('<' or '>') were "
            + ("excluded from derivations." if qualified == "exclude" else "used at the limit.")
        )
    return out


_BASELINE_METHODS: Final[dict[str, Callable[[Config], str]]] = {
    "last_in_window": lambda b: "the last eGFR value",
    "mean_in_window": lambda b: f"the {b.get('mean_type', 'arithmetic')} mean of the eGFR values",
    "median_in_window": lambda b: "the median of the eGFR values",
    "mean_last_n": lambda b: (
        f"the {b.get('mean_type', 'arithmetic')} mean of the last {b.get('n', 2)} eGFR values"
    ),
}


def _baseline(config: Config) -> list[str]:
    base = config.get("baseline") or {}
    method = base.get("method")
    if method not in _BASELINE_METHODS:
        return []
    start, end = float(base.get("window_start_days", 0)), float(base.get("window_end_days", 0))
    text = (
        f"Baseline eGFR was {_BASELINE_METHODS[method](base)} from {_num(abs(start))} days "
        f"{'before' if start < 0 else 'after'} to {_num(abs(end))} days "
        f"{'before' if end < 0 else 'after'} the index date"
    )
    if method == "mean_last_n":
        text += (
            f"; patients with fewer than {base.get('n', 2)} values had no baseline."
            if base.get("require_n")
            else f" (fewer if fewer than {base.get('n', 2)} were available)."
        )
    else:
        text += "."
    return [text]


def _slopes(config: Config) -> list[str]:
    rule = config.get("slopes") or {}
    if not rule:
        return []
    out = [
        "Per-patient eGFR slopes were estimated by ordinary least squares in patients with "
        f"at least {rule.get('min_values', 3)} values spanning at least "
        f"{_plural(rule.get('min_span_years', 1), 'year')}."
    ]
    if rule.get("rapid_decline_per_year") is not None:
        rate = _num(abs(float(rule["rapid_decline_per_year"])))
        out.append(
            f"Rapid decline was defined as a fall faster than {rate} mL/min/1.73 m² per year "
            f"(slope below -{rate})."
        )
    return out


def _endpoint_definition(item: Mapping[str, Any], labels: Mapping[str, str]) -> str:
    name = str(item.get("name") or item.get("kind"))
    label = labels.get(name, name)
    kind = item.get("kind")
    if kind == "egfr_decline":
        what = f"a decline in eGFR of at least {_num(item.get('percent', 0))}% from baseline"
    elif kind == "egfr_below":
        what = f"an eGFR below {_num(item.get('threshold', 0))} mL/min/1.73 m²"
        if item.get("and_decline_percent") is not None:
            what += f" and at least {_num(item['and_decline_percent'])}% below baseline"
    elif kind == "kidney_failure":
        parts = [
            p
            for p, on in (
                ("chronic dialysis", item.get("dialysis", True)),
                ("kidney transplantation", item.get("transplant", True)),
            )
            if on
        ]
        what = f"kidney failure ({_list(parts) or 'as recorded'})"
    elif kind == "kidney_death":
        what = "death from a kidney cause"
    elif kind == "death":
        what = "death from any cause"
    elif kind == "composite":
        comps = [labels.get(c, c) for c in item.get("components") or []]
        what = f"the first of {_list(comps)}"
    else:
        what = _value({k: v for k, v in item.items() if k not in {"name", "label", "paramcd"}})
    return f"{label[:1].upper() + label[1:]} ({name}): {what}."


def _confirmation(rule: Mapping[str, Any]) -> list[str]:
    after = rule.get("confirm_after_days", 28)
    if rule.get("confirmation") == "sustained_to_end":
        text = (
            "A qualifying eGFR value counted only when every later eligible value also "
            f"qualified, at least one of them {after} days or more later"
        )
    else:
        text = (
            "A qualifying eGFR value counted only when the next eligible value at least "
            f"{after} days later also qualified"
        )
        if rule.get("confirm_within_days") is not None:
            text += f" (within {rule['confirm_within_days']} days)"
    out = [text + "."]
    unconfirmed = rule.get("unconfirmed_last_value")
    if unconfirmed == "event_if_death_or_failure":
        out.append(
            "An unconfirmed last qualifying value counted when death or kidney failure "
            f"followed within {rule.get('death_or_failure_within_days', 30)} days."
        )
    elif unconfirmed == "event":
        out.append("An unconfirmed last qualifying value counted as an event.")
    elif unconfirmed == "censor":
        out.append("An unconfirmed last qualifying value did not count as an event.")
    if rule.get("event_date"):
        out.append(
            "The event date was the "
            + (
                "first qualifying value's date."
                if rule["event_date"] == "first_qualifying"
                else "confirming value's date."
            )
        )
    if rule.get("grace_period_days"):
        out.append(
            f"Values in the first {rule['grace_period_days']} days after the index date did "
            "not trigger events."
        )
    if rule.get("min_dialysis_days") is not None:
        out.append(
            f"Dialysis counted as kidney failure when it lasted at least "
            f"{rule['min_dialysis_days']} days (or had no recorded end)."
        )
    return out


def _endpoints(config: Config, labels: Mapping[str, str]) -> list[str]:
    section = config.get("endpoints") or {}
    definitions = [d for d in section.get("definitions") or [] if isinstance(d, Mapping)]
    if not definitions:
        return []
    out = [_endpoint_definition(d, labels) for d in definitions]
    out += _confirmation(section.get("rule") or {})
    return out


def _censoring(config: Config) -> list[str]:
    rule = (config.get("endpoints") or {}).get("rule") or {}
    study = config.get("study") or {}
    out = []
    if rule.get("lab_censoring") == "last_assessment":
        out.append(
            "Patients without an eGFR-based event were censored at their last eligible "
            "eGFR assessment."
        )
    elif rule.get("lab_censoring") == "end_of_followup":
        out.append(
            "Patients without an eGFR-based event were censored at the end of follow-up "
            "(kidney failure, end of follow-up or the data cut, whichever came first)."
        )
    death = rule.get("death_before_event")
    if death == "competing":
        out.append(
            "Death before an eGFR-based endpoint was a competing event at the death date "
            "(cumulative incidence, subdistribution hazards)."
        )
    elif death:
        out.append(
            "Death before an eGFR-based endpoint was censored at the last eGFR assessment "
            "(cause-specific analysis), not counted as a competing event."
        )
    if study.get("data_cut"):
        out.append(f"Follow-up ended at the data cut of {study['data_cut']} at the latest.")
    return out


_STRUCTURES: Final = {
    "unstructured": "correlated random intercepts and slopes (unstructured covariance)",
    "diagonal": "uncorrelated random intercepts and slopes (diagonal covariance)",
    "intercept_and_slope": "a random intercept and one random slope",
    "intercept": "a random intercept",
}
_ENGINES: Final = {
    "exact": "the exact per-patient-block REML engine of kidneycohort",
    "statsmodels": "statsmodels MixedLM",
}


def _slope_model(config: Config, labels: Mapping[str, str], facts: Mapping[str, Any]) -> list[str]:
    rule = config.get("slope_model") or {}
    if not rule:
        return []
    study = config.get("study") or {}
    knot = rule.get("knot_years")
    equation = rule.get("equation") or study.get("primary_equation")
    if knot is not None:
        fixed = (
            f"a linear spline in time with a knot at {_plural(knot, 'year')} (an acute slope "
            "before the knot and a chronic slope after it)"
        )
    else:
        fixed = "a linear term in time (one slope)"
    group = rule.get("group_column") or study.get("group_column")
    if group:
        fixed += f", each by {group}"
    covariates = list(rule.get("covariates") or [])
    if covariates:
        fixed += f", adjusted for {_list(covariates)}"
    out = [
        f"eGFR over time{f' ({labels.get(equation, equation)})' if equation else ''} was "
        f"analysed with a linear mixed model: fixed effects {fixed}; random effects "
        f"{_STRUCTURES.get(str(rule.get('random_effects')), rule.get('random_effects'))} per "
        "patient, with simpler structures tried in turn if the model did not converge."
    ]
    fit = facts.get("slope_model_fit") or []
    estimation = "restricted maximum likelihood (REML)"
    engine = _ENGINES.get(str(rule.get("engine")), rule.get("engine"))
    out.append(f"The model was estimated by {estimation} with {engine}.")
    for row in fit:
        structure = _STRUCTURES.get(row.get("structure"), row.get("structure"))
        state = "converged" if row.get("converged") else "did not converge"
        out.append(
            f"The fitted model used {structure}; it {state} "
            f"after {row.get('iterations')} iterations."
        )
    horizons = [str(_num(h)) for h in rule.get("horizons_years") or []]
    if horizons and knot is not None:
        out.append(
            f"Total slopes were reported over {_list(horizons)} years"
            + (
                f", differences against {rule['reference_group']}"
                if rule.get("reference_group")
                else ""
            )
            + f", with {_num(100 * float(rule.get('confidence', 0.95)))}% confidence intervals."
        )
    if rule.get("max_years") is not None:
        out.append(f"Values after {_plural(rule['max_years'], 'year')} were left out.")
    return out


def _survival(config: Config, facts: Mapping[str, Any], labels: Mapping[str, str]) -> list[str]:
    rule = config.get("survival") or {}
    steps = set(config.get("recipe_steps") or [])
    if not rule:
        return []
    level = _num(100 * float(rule.get("confidence", 0.95)))
    out = []
    if "kaplan_meier" in steps or not steps:
        out.append(
            "Event-free probability was estimated by the Kaplan–Meier method with "
            f"{level}% pointwise confidence limits from Greenwood's variance (log(-log) "
            "scale) and compared between groups by the log-rank test."
        )
    if "cumulative_incidence" in steps:
        out.append(
            "Cumulative incidence with death as a competing event was estimated by the "
            f"Aalen–Johansen method, with {level}% pointwise limits from its Greenwood-type "
            "delta-method variance (log(-log) scale)."
        )
    if "cox" in steps or not steps:
        text = "Hazard ratios came from Cox proportional-hazards models (Efron ties)"
        if rule.get("reference_group"):
            text += f" against {rule['reference_group']}"
        if rule.get("covariates"):
            text += f", adjusted for {_list(list(rule['covariates']))}"
        if rule.get("strata"):
            text += f", stratified by {_list(list(rule['strata']))}"
        out.append(
            text + "; proportional hazards were checked with the scaled Schoenfeld residual "
            "test (Kaplan–Meier time transform)."
        )
        out.append(
            "A hazard ratio was reported only when each compared group had at least "
            f"{rule.get('min_events_per_group', 1)} "
            f"event{'s' if rule.get('min_events_per_group', 1) != 1 else ''}; otherwise it "
            "is shown as not estimable, with the reason."
        )
    if rule.get("subgroups"):
        out.append(f"Subgroup hazard ratios were estimated by {_list(list(rule['subgroups']))}.")
    return out + _competing(facts, labels)


def _software(facts: Mapping[str, Any]) -> list[str]:
    version = facts.get("kidneycohort_version")
    packages = dict(facts.get("packages") or {})
    if not version and not packages:
        return []
    listed = [f"{name} {v}" for name, v in sorted(packages.items()) if name != "kidneycohort"]
    text = f"Analyses were run with kidneycohort {version or '(version not recorded)'}"
    out = [text + (f" ({_list(listed)})." if listed else ".")]
    if facts.get("seed") is not None:
        out.append(f"The random seed was {facts['seed']}.")
    return out


# settings phrased above; the rest of each section is listed by key and value
_PHRASED: Final[dict[str, set[str]]] = {
    "study": {
        "name",
        "description",
        "primary_equation",
        "data_cut",
        "recipe",
        "seed",
        "group_column",
        "reference_group",
    },
    "egfr": {"equations", "apply_race_coefficient", "allow_outside_age"},
    "value_filter": {
        "exclude_settings",
        "exclude_aki",
        "aki_rise_mg_dl",
        "aki_rise_hours",
        "aki_ratio",
        "aki_ratio_days",
        "aki_recovery_days",
        "qualified_values",
    },
    "baseline": {"method", "window_start_days", "window_end_days", "n", "require_n", "mean_type"},
    "slopes": {"min_values", "min_span_years", "rapid_decline_per_year"},
    "endpoints": {"definitions", "rule"},
    "slope_model": {
        "knot_years",
        "horizons_years",
        "covariates",
        "group_column",
        "reference_group",
        "equation",
        "max_years",
        "random_effects",
        "confidence",
        "engine",
    },
    "survival": {
        "group_column",
        "reference_group",
        "covariates",
        "strata",
        "confidence",
        "min_events_per_group",
        "subgroups",
        "competing_risks",
    },
    "tables": {"small_cell_threshold"},
}
# file locations, presentation and bookkeeping belong to Provenance, not Methods
_NOT_METHODS: Final = frozenset(
    {"data", "output", "figures", "report", "recipe_steps", "adam", "harmonize"}
)


def _other(config: Config) -> list[str]:
    out = []
    for section, settings in config.items():
        if section in _NOT_METHODS:
            continue
        if not isinstance(settings, Mapping):
            out.append(f"{readable_key(section)}: {_value(settings)}.")
            continue
        rest = {k: v for k, v in settings.items() if k not in _PHRASED.get(section, set())}
        out += [
            f"{readable_key(section)}, {readable_key(k).lower()}: {_value(v)}."
            for k, v in rest.items()
        ]
    return out


def methods_from_config(
    config: Config,
    equation_labels: Mapping[str, str] | None = None,
    *,
    facts: Mapping[str, Any] | None = None,
) -> list[dict[str, Any]]:
    """Methods prose for a resolved config, paragraph by paragraph.

    Parameters
    ----------
    config : mapping
        ``manifest["config"]``: the resolved sections (``study``, ``egfr``,
        ``value_filter``, ``baseline``, ``slopes``, ``endpoints``, ``slope_model``,
        ``survival``, ``tables``...). Missing sections give no paragraph; settings without
        a phrasing of their own are listed under "Other settings".
    equation_labels : mapping, optional
        ``{code: display label}`` of equations, endpoints and groups.
    facts : mapping, optional
        What the run recorded about itself: ``slope_model_fit`` (rows of
        ``models/slope_model_fit``), ``competing_methods`` (``(endpoint, methods text)``
        pairs of ``models/competing_tests``), ``kidneycohort_version`` and ``packages``
        (manifest).

    Returns
    -------
    list of dict
        ``{"section": heading, "sentences": [...]}`` per paragraph, in the order of a
        methods section.
    """
    config = config or {}
    labels = dict(equation_labels or {})
    facts = facts or {}
    threshold = (config.get("tables") or {}).get("small_cell_threshold")
    paragraphs = [
        ("Estimated GFR", _egfr(config, labels)),
        ("Laboratory values", _values(config)),
        ("Baseline", _baseline(config)),
        ("Per-patient slopes", _slopes(config)),
        ("Endpoints and confirmation", _endpoints(config, labels)),
        ("Censoring", _censoring(config)),
        ("eGFR slope model", _slope_model(config, labels, facts)),
        ("Survival analysis", _survival(config, facts, labels)),
        (
            "Small-cell protection",
            [disclosure_footnote(int(threshold))] if threshold is not None else [],
        ),
        ("Software", _software(facts)),
        ("Other settings", _other(config)),
    ]
    return [{"section": title, "sentences": s} for title, s in paragraphs if s]
