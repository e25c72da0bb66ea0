"""``report.html``: one self-contained page that summarises a run folder.

The page is rendered with Jinja2 from ``templates/report.html.j2``. Figures are
embedded as base64 PNG data URIs and the CSS is inline, so the file opens offline with
no server and fetches nothing. It holds aggregates only: no patient identifiers and no
individual dates. As a second line of defence every printed value passes through a
filter that replaces any token equal to a patient id of the run (ids are looked up
lazily in the run's per-patient files, never loaded whole).

Sections (always all eleven, in this order; a section whose files the recipe did not
make says so): summary, data and attrition, eGFR equations, baseline characteristics,
trajectories and slopes, KDIGO categories and transitions, endpoints and survival,
tables, methods, cautions, provenance.
"""

from __future__ import annotations

import base64
import datetime as dt
import logging
import re
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Final

import jinja2
import markupsafe
import polars as pl

from kidneycohort import plots
from kidneycohort.cautions import CAUTIONS
from kidneycohort.disclosure import small_count_text
from kidneycohort.errors import InputDataError
from kidneycohort.labels import display_label

logger = logging.getLogger(__name__)

SECTIONS: Final = (
    ("summary", "Summary"),
    ("data", "Data and attrition"),
    ("equations", "eGFR equations"),
    ("baseline", "Baseline characteristics"),
    ("slopes", "Trajectories and slopes"),
    ("kdigo", "KDIGO categories and transitions"),
    ("endpoints", "Endpoints and survival"),
    ("tables", "Tables"),
    ("methods", "Methods"),
    ("cautions", "Cautions"),
    ("provenance", "Provenance"),
)
"""(anchor, heading) of every report section, in order."""

# tables of the run-folder contract, in the order the Tables section lists them
KNOWN_TABLES: Final = (
    "baseline_characteristics",
    "slope_table",
    "kdigo_grid",
    "transition_matrix",
    "endpoint_table",
    "incidence_rates",
    "kfre_summary",
)
TABLE_TITLES: Final[dict[str, str]] = {
    "baseline_characteristics": "Baseline characteristics",
    "slope_table": "eGFR slopes",
    "kdigo_grid": "KDIGO GFR x albuminuria grid",
    "transition_matrix": "KDIGO category transitions",
    "endpoint_table": "Endpoints",
    "incidence_rates": "Incidence rates",
    "kfre_summary": "Kidney Failure Risk Equation at baseline (2- and 5-year risk)",
}
# a table with one of these columns is individual-level and is never printed
IDENTIFIER_COLUMNS: Final = frozenset(
    {"patient_id", "usubjid", "subjid", "person_id", "mrn", "sample_date", "birth_date"}
)
PER_PATIENT_FILES: Final = (
    "labs.parquet",
    "egfr.parquet",
    "baseline.parquet",
    "slopes.parquet",
    "stages.parquet",
    "transitions.parquet",
    "endpoints.parquet",
)
MAX_TABLE_ROWS: Final = 200
REDACTED: Final = "[id removed]"
_ISO_DATE = re.compile(r"\b\d{4}-\d{2}-\d{2}\b")
_TOKEN = re.compile(r"[A-Za-z0-9][A-Za-z0-9_.:\-]*[A-Za-z0-9]|[A-Za-z0-9]")
_PNG_SIGNATURE: Final = b"\x89PNG\r\n\x1a\n"


@dataclass
class Figure:
    """One embedded figure: file stem, title, PNG data URI, caption."""

    stem: str
    title: str
    data_uri: str
    caption: str = ""


@dataclass
class Table:
    """One printed table (all cells as text)."""

    name: str
    title: str
    columns: list[str]
    rows: list[list[str]]
    files: list[str] = field(default_factory=list)
    note: str = ""


# ---- reading the run folder -------------------------------------------------------------


def _figure(run: Path, stem: str, title: str, caption: str = "") -> Figure | None:
    path = run / "figures" / f"{stem}.png"
    if not path.is_file():
        return None
    data = path.read_bytes()
    if not data.startswith(_PNG_SIGNATURE):
        logger.warning("figures/%s.png is not a PNG file; left out of the report", stem)
        return None
    uri = "data:image/png;base64," + base64.b64encode(data).decode("ascii")
    return Figure(stem=stem, title=title, data_uri=uri, caption=caption)


def _table(run: Path, name: str) -> Table | None:
    path = run / "tables" / f"{name}.csv"
    if not path.is_file():
        return None
    try:
        df = pl.read_csv(path, infer_schema=False)
    except pl.exceptions.ComputeError as exc:
        raise InputDataError(
            f"tables/{name}.csv: not a readable CSV table ({exc}); re-run the tables step"
        ) from exc
    files = [
        f"tables/{name}.{ext}"
        for ext in ("csv", "md")
        if (run / "tables" / f"{name}.{ext}").is_file()
    ]
    title = TABLE_TITLES.get(name, name.replace("_", " ").capitalize())
    bad = sorted(IDENTIFIER_COLUMNS & {c.lower() for c in df.columns})
    if bad:
        logger.warning("tables/%s.csv has individual-level column %s; not printed", name, bad[0])
        return Table(name, title, [], [], files, f"Not printed: it has the column '{bad[0]}'.")
    note = ""
    if df.height > MAX_TABLE_ROWS:
        note = f"First {MAX_TABLE_ROWS} of {df.height:,} rows; the full table is in the files."
        df = df.head(MAX_TABLE_ROWS)
    rows = [["" if v is None else str(v) for v in row] for row in df.rows()]
    return Table(name, title, list(df.columns), rows, files, note)


def _frame_table(name: str, title: str, df: pl.DataFrame, note: str = "") -> Table:
    rows = [["" if v is None else str(v) for v in row] for row in df.rows()]
    return Table(name, title, list(df.columns), rows, [], note)


def _read(run: Path, relative: str) -> pl.DataFrame | None:
    path = run / relative
    return pl.read_parquet(path) if path.is_file() else None


def _patient_id_tokens(run: Path, tokens: Iterable[str]) -> set[str]:
    """The tokens (printed words) that are patient ids of the run.

    The few thousand printed tokens are semi-joined against the ids of the per-patient
    files, scanned lazily, so a cohort of millions is never held as Python strings.
    """
    candidates = pl.DataFrame({"token": sorted(set(tokens))}, schema={"token": pl.String})
    if candidates.is_empty():
        return set()
    sources: list[pl.LazyFrame] = []
    for name in PER_PATIENT_FILES:
        path = run / name
        if path.is_file() and "patient_id" in pl.read_parquet_schema(path):
            sources.append(pl.scan_parquet(path).select(pl.col("patient_id").cast(pl.String)))
    if (run / "rejected_rows.csv").is_file():
        scan = pl.scan_csv(run / "rejected_rows.csv", infer_schema=False)
        if "patient_id" in scan.collect_schema().names():
            sources.append(scan.select(pl.col("patient_id").cast(pl.String)))
    if not sources:
        return set()
    ids = pl.concat(sources).drop_nulls().unique()
    hits = candidates.lazy().join(ids, left_on="token", right_on="patient_id", how="semi")
    return set(hits.collect()["token"].to_list())


# ---- plain-language methods -------------------------------------------------------------


def _readable_key(key: str) -> str:
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
            f"{_readable_key(k).lower()} {_readable_value(v)}" for k, v in value.items()
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
        f"Counts from 1 to {v} are shown as <{int(v) + 1} in tables and figures."
    ),
    "confirm_after_days": lambda v: (
        f"A decline counts only when a repeat value at least {v} days later confirms it."
    ),
    "min_values": lambda v: f"A per-patient slope needs at least {v} eGFR values.",
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
        return [f"{_readable_key(key)}: {named}."]
    if isinstance(value, Mapping):
        inner = [s for k, v in value.items() for s in _describe(str(k), v, equation_labels)]
        return [f"{_readable_key(key)}: " + " ".join(inner)] if inner else []
    if isinstance(value, list) and value and all(isinstance(v, Mapping) for v in value):
        out = []
        for item in value:
            name = item.get("name") or item.get("id") or _readable_key(key)
            rest = {k: v for k, v in item.items() if k not in {"name", "id"}}
            inner = [s for k, v in rest.items() for s in _describe(str(k), v, equation_labels)]
            out.append(f"{name}: " + (" ".join(inner) if inner else "defaults."))
        return out
    return [f"{_readable_key(key)}: {_readable_value(value)}."]


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
            out.append({"section": _readable_key(section), "sentences": sentences})
    return out


# ---- equations --------------------------------------------------------------------------


def _spec_value(spec: Any, name: str) -> Any:
    if isinstance(spec, Mapping):
        return spec.get(name)
    return getattr(spec, name, None)


def _registry() -> Mapping[str, Any]:
    try:
        from kidneycohort.equations import REGISTRY
    except ImportError:  # the registry is optional for a report
        return {}
    if isinstance(REGISTRY, Mapping):
        return REGISTRY
    return {str(_spec_value(s, "id")): s for s in REGISTRY}


def _age_range(spec: Any) -> str:
    low, high = _spec_value(spec, "min_age"), _spec_value(spec, "max_age")
    if low is None and high is None:
        return "not stated"
    if high is None:
        return f"{low:g} years and over"
    return f"{(low or 0):g} to under {high:g} years"


def _equation_rows(run: Path, ids: list[str], threshold: int) -> list[dict[str, Any]]:
    registry = _registry()
    observed: dict[str, dict[str, Any]] = {}
    egfr_path = run / "egfr.parquet"
    if egfr_path.is_file():
        names = pl.read_parquet_schema(egfr_path)
        if "equation" in names:
            aggs = [
                pl.len().alias("values"),
                (pl.col("egfr").is_not_null() & pl.col("egfr").is_not_nan())
                .sum()
                .alias("computed"),
            ]
            if "age_years" in names:
                aggs += [
                    pl.col("age_years").min().alias("age_min"),
                    pl.col("age_years").max().alias("age_max"),
                ]
            stats = pl.scan_parquet(egfr_path).group_by("equation").agg(aggs).collect()
            observed = {r["equation"]: r for r in stats.to_dicts()}
            ids = ids or sorted(observed)
    rows = []
    for eq in ids:
        spec = registry.get(eq)
        seen = observed.get(eq, {})
        age = ""
        if seen.get("age_min") is not None:
            age = f"{seen['age_min']:.0f} to {seen['age_max']:.0f} years"
        rows.append(
            {
                "id": eq,
                "label": _spec_value(spec, "label") or eq,
                "in_registry": spec is not None,
                "reference": _spec_value(spec, "reference") or "",
                "doi": _spec_value(spec, "doi") or "",
                "population": _spec_value(spec, "population") or "",
                "ages": _age_range(spec) if spec is not None else "not in the registry",
                "unit": (_spec_value(spec, "output_unit") or "").replace("1.73 m2", "1.73 m²"),
                "observed_ages": age,
                "n_values": small_count_text(int(seen["values"]), threshold) if seen else "",
                "n_computed": small_count_text(int(seen["computed"]), threshold) if seen else "",
            }
        )
    return rows


# ---- context ----------------------------------------------------------------------------


def _group_counts(run: Path) -> pl.DataFrame | None:
    groups = plots.patient_groups(run)
    if groups is None:
        return None
    return groups.group_by("group").agg(patients=pl.len()).sort("group")


def _summary(
    run: Path, manifest: Mapping[str, Any], threshold: int, equation: str | None
) -> list[str]:
    lines: list[str] = []
    flow = plots.patient_flow(run, equation)
    if flow:
        lines.append(
            "Patients: "
            + "; ".join(f"{k} {small_count_text(v, threshold)}" for k, v in flow.items())
            + "."
        )
    counts = _group_counts(run)
    if counts is not None and counts.height > 1:
        lines.append(
            "Groups: "
            + ", ".join(f"{g} ({small_count_text(n, threshold)})" for g, n in counts.rows())
            + "."
        )
    slopes = _read(run, "slopes.parquet")
    if slopes is not None and slopes.height:
        eq = (
            equation
            if "equation" in slopes.columns and equation in slopes["equation"].to_list()
            else None
        )
        if eq is None and "equation" in slopes.columns:
            eq = sorted(slopes["equation"].drop_nulls().unique().to_list())[0]
        dist = plots.slope_distribution(slopes, plots.patient_groups(run), equation=eq)
        for row in dist.filter(pl.col("n") > threshold).to_dicts():
            lines.append(
                f"Median eGFR slope, {row['group']}: {row['median']:.2f} mL/min/1.73 m² per year "
                f"(IQR {row['q1']:.2f} to {row['q3']:.2f}; n={row['n']:,})."
            )
    summary = _read(run, "models/slope_summary.parquet")
    if summary is not None and {"contrast", "quantity", "estimate"} <= set(summary.columns):
        # the between-group differences are the key results of a trial; per-group
        # estimates are in the slope table
        differences = summary.filter(pl.col("contrast").cast(pl.String).str.contains(" - "))
        shown = differences if differences.height else summary.head(6)
        for row in shown.to_dicts():
            ci = ""
            if row.get("lower") is not None and row.get("upper") is not None:
                ci = f" (95% CI {row['lower']:.2f} to {row['upper']:.2f})"
            p_value = row.get("p")
            p_text = ""
            if p_value is not None:
                p_text = "; p < 0.001" if p_value < 0.001 else f"; p = {p_value:.3f}"
            lines.append(
                f"{_readable_key(str(row['quantity']))}, {row['contrast']}: "
                f"{row['estimate']:.2f}{ci}{p_text}."
            )
    endpoints = _read(run, "endpoints.parquet")
    if endpoints is not None and {"endpoint", "event"} <= set(endpoints.columns):
        events = endpoints.group_by("endpoint", maintain_order=True).agg(
            patients=pl.len(), events=pl.col("event").cast(pl.Int64).sum()
        )
        for name, n, e in events.rows():
            lines.append(
                f"{display_label(name)}: {small_count_text(int(e), threshold)} events among "
                f"{small_count_text(int(n), threshold)} patients."
            )
    hrs = _read(run, "models/hazard_ratios.parquet")
    if hrs is not None and hrs.height:
        for label in plots.forest_rows(hrs)["label"].to_list():
            lines.append(f"Hazard ratio, {label}.")
    return lines


def build_report_context(run_dir: str | Path) -> dict[str, Any]:
    """Everything the report template prints, read from a run folder.

    Parameters
    ----------
    run_dir : path
        The run folder (see DESIGN.md, run-folder contract). Absent files are tolerated:
        the sections they feed say that the run did not make them.

    Returns
    -------
    dict
        Template variables: ``title``, ``sections``, ``summary``, ``figures`` (by section),
        ``tables`` (by section), ``equations``, ``methods``, ``cautions``, ``warnings``,
        ``provenance``, ``accounting``.

    Raises
    ------
    InputDataError
        When ``run_dir`` is not a folder or a run-folder file is unreadable.
    """
    run = Path(run_dir)
    if not run.is_dir():
        raise InputDataError(f"run_dir: '{run}' is not a folder; pass the run folder path")
    manifest = plots.read_manifest(run)
    config = manifest.get("config") or {}
    study = manifest.get("study") or {}
    threshold = plots.small_cell_threshold_of(manifest)
    equation = study.get("primary_equation")
    eq_ids = [str(e) for e in (study.get("equations") or ([equation] if equation else []))]
    equations = _equation_rows(run, eq_ids, threshold)
    labels = {e["id"]: e["label"] for e in equations}

    titles = plots.FIGURE_TITLES
    figures: dict[str, list[Figure]] = {key: [] for key, _ in SECTIONS}

    def add(section: str, stem: str, title: str, caption: str = "") -> None:
        fig = _figure(run, stem, title, caption)
        if fig is not None:
            figures[section].append(fig)

    add(
        "data",
        "attrition",
        titles["attrition"],
        "Rows by input table; patients through the derivations.",
    )
    add("slopes", "egfr_trajectories", titles["egfr_trajectories"])
    add("slopes", "model_trajectories", titles["model_trajectories"])
    add("slopes", "slope_distribution", titles["slope_distribution"])
    add("kdigo", "kdigo_grid", titles["kdigo_grid"])
    add("kdigo", "transition_matrix", titles["transition_matrix"])
    figure_dir = run / "figures"
    survival = sorted(figure_dir.glob("survival*.png")) if figure_dir.is_dir() else []
    for path in survival:
        endpoint = path.stem.removeprefix("survival").lstrip("_")
        add(
            "endpoints",
            path.stem,
            f"Time to {display_label(endpoint)}" if endpoint else titles["survival"],
        )
    add("endpoints", "forest_hazard_ratios", titles["forest_hazard_ratios"])

    tables: dict[str, list[Table]] = {key: [] for key, _ in SECTIONS}
    placement = {
        "baseline_characteristics": "baseline",
        "slope_table": "slopes",
        "kdigo_grid": "kdigo",
        "transition_matrix": "kdigo",
        "endpoint_table": "endpoints",
        "incidence_rates": "endpoints",
        "kfre_summary": "endpoints",
    }
    table_dir = run / "tables"
    present = sorted(p.stem for p in table_dir.glob("*.csv")) if table_dir.is_dir() else []
    ordered = [n for n in KNOWN_TABLES if n in present] + [
        n for n in present if n not in KNOWN_TABLES
    ]
    index: list[Table] = []
    for name in ordered:
        table = _table(run, name)
        if table is None:
            continue
        index.append(table)
        tables[placement.get(name, "tables")].append(table)
    hrs = _read(run, "models/hazard_ratios.parquet")
    if hrs is not None and hrs.height:
        rows = plots.forest_rows(hrs)
        shown = hrs.select(
            [c for c in ("endpoint", "term", "subgroup") if c in hrs.columns]
        ).with_columns(
            **{
                "hazard ratio (95% CI)": rows["label"].str.split(":  ").list.last(),
                "p": rows["p"].round_sig_figs(2).cast(pl.String),
            },
            **(
                {"proportional hazards p": hrs["ph_p"].round_sig_figs(2).cast(pl.String)}
                if "ph_p" in hrs.columns
                else {}
            ),
        )
        tables["endpoints"].append(
            _frame_table("hazard_ratios", "Hazard ratios (Cox models)", shown)
        )
    slope_summary = _read(run, "models/slope_summary.parquet")
    if slope_summary is not None and slope_summary.height and "slope_table" not in present:
        shown = slope_summary.with_columns(pl.col(pl.Float64).round_sig_figs(3)).cast(pl.String)
        tables["slopes"].append(_frame_table("slope_summary", "Slope model summary", shown))
    xlsx = "tables/tables.xlsx" if (table_dir / "tables.xlsx").is_file() else ""

    accounting = manifest.get("accounting") or []
    by_reason = manifest.get("accounting_by_reason") or []
    acc_rows = [
        [
            str(a.get("table", "")),
            *(
                small_count_text(int(a.get(k) or 0), threshold)
                for k in ("rows_read", "rows_used", "rows_rejected", "rows_merged")
            ),
        ]
        for a in accounting
    ]
    reason_rows = [
        [
            str(r.get("table", "")),
            str(r.get("reason", "")),
            small_count_text(int(r.get("rows") or 0), threshold),
        ]
        for r in by_reason
    ]
    groups = _group_counts(run)

    provenance = {
        "schema_version": manifest.get("schema_version", "not recorded"),
        "kidneycohort_version": manifest.get("kidneycohort_version", "not recorded"),
        "created_utc": manifest.get("created_utc", "not recorded"),
        "seed": manifest.get("seed", "not recorded"),
        "recipe": study.get("recipe")
        or (config.get("study") or {}).get("recipe")
        or "not recorded",
        "overrides": [str(o) for o in manifest.get("overrides") or []],
        "inputs": [
            {
                "path": Path(str(i.get("path", ""))).name,
                "sha256": str(i.get("sha256", ""))[:16],
                "rows": f"{int(i['rows']):,}"
                if isinstance(i.get("rows"), int)
                else str(i.get("rows", "")),
            }
            for i in manifest.get("inputs") or []
        ],
        "packages": sorted((str(k), str(v)) for k, v in (manifest.get("packages") or {}).items()),
        "steps": [
            {
                "name": str(s.get("name", "")),
                "seconds": f"{float(s['seconds']):.2f}"
                if isinstance(s.get("seconds"), int | float)
                else "",
                "rows_out": f"{int(s['rows_out']):,}" if isinstance(s.get("rows_out"), int) else "",
            }
            for s in manifest.get("steps") or []
        ],
        "files": sorted(
            str(p.relative_to(run))
            for p in run.rglob("*")
            if p.is_file() and p.name != "report.html" and not p.name.startswith(".")
        ),
    }
    warnings = [_ISO_DATE.sub("[date removed]", str(w)) for w in manifest.get("warnings") or []]
    name = study.get("name") or (config.get("study") or {}).get("name") or run.name
    description = (
        (config.get("study") or {}).get("description", "")
        if isinstance(config.get("study"), Mapping)
        else ""
    )
    return {
        "title": str(name),
        "description": str(description),
        "recipe": provenance["recipe"],
        "created_utc": provenance["created_utc"],
        "primary_equation": labels.get(str(equation), str(equation)) if equation else "",
        "threshold": threshold,
        "sections": [
            {"id": key, "title": title, "number": i + 1} for i, (key, title) in enumerate(SECTIONS)
        ],
        "summary": _summary(run, manifest, threshold, equation),
        "figures": figures,
        "tables": tables,
        "table_index": index,
        "xlsx": xlsx,
        "equations": equations,
        "methods": methods_from_config(config, labels),
        "cautions": list(CAUTIONS),
        "warnings": warnings,
        "accounting": acc_rows,
        "accounting_by_reason": reason_rows,
        "groups": [[g, small_count_text(int(n), threshold)] for g, n in groups.rows()]
        if groups is not None
        else [],
        "provenance": provenance,
        "generated": dt.datetime.now(dt.UTC).strftime("%Y-%m-%d %H:%M UTC"),
    }


# ---- rendering --------------------------------------------------------------------------


def _environment(finalize: Callable[[Any], Any]) -> jinja2.Environment:
    return jinja2.Environment(
        loader=jinja2.PackageLoader("kidneycohort.report", "templates"),
        autoescape=jinja2.select_autoescape(["html", "j2"], default=True),
        undefined=jinja2.StrictUndefined,
        finalize=finalize,
        trim_blocks=True,
        lstrip_blocks=True,
    )


def render_report(context: Mapping[str, Any], *, hide: Iterable[str] = ()) -> str:
    """Render the report template with ``context``; tokens in ``hide`` become ``[id removed]``.

    Data URIs are printed unchanged.
    """
    hidden = set(hide)

    def finalize(value: Any) -> Any:
        # Markup is the output of a macro, whose own expressions were finalized already
        if not hidden or not isinstance(value, str) or isinstance(value, markupsafe.Markup):
            return value
        if value.startswith("data:image/"):
            return value
        return _TOKEN.sub(lambda m: REDACTED if m.group(0) in hidden else m.group(0), value)

    return _environment(finalize).get_template("report.html.j2").render(**context)


def _printed_tokens(context: Mapping[str, Any]) -> set[str]:
    tokens: set[str] = set()

    def collect(value: Any) -> Any:
        if isinstance(value, markupsafe.Markup) or not isinstance(value, str):
            return value
        if not value.startswith("data:image/"):
            tokens.update(_TOKEN.findall(value))
        return value

    _environment(collect).get_template("report.html.j2").render(**context)
    return tokens


def write_report(run_dir: str | Path, *, output: str | Path | None = None) -> Path:
    """Render ``report.html`` for a run folder (figures embedded, CSS inline, offline).

    Call :func:`kidneycohort.plots.write_figures` first so the figures exist; a report
    without figures says where each figure would be.

    Parameters
    ----------
    run_dir : path
        The run folder.
    output : path, optional
        Where to write (default ``run_dir/report.html``).

    Returns
    -------
    Path
        The written file.
    """
    run = Path(run_dir)
    context = build_report_context(run)
    hide = _patient_id_tokens(run, _printed_tokens(context))
    if hide:
        logger.warning("report: %d printed values equal to patient ids were removed", len(hide))
    html = render_report(context, hide=hide)
    path = Path(output) if output is not None else run / "report.html"
    path.write_text(html, encoding="utf-8")
    logger.info("wrote %s (%d kB)", path, len(html) // 1024)
    return path


__all__ = [
    "SECTIONS",
    "build_report_context",
    "methods_from_config",
    "render_report",
    "write_report",
]
