"""Everything the report prints, gathered from a run folder through its contract.

The context holds aggregates only: counts (small cells protected), estimates, the
formatted shared tables, figures as PNG data URIs, and the manifest's facts. Per-patient
files are read only to count and summarise; no identifier or individual date is put in.
"""

from __future__ import annotations

import base64
import datetime as dt
import logging
import os
import re
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath, PureWindowsPath
from typing import Any, Final

import polars as pl

from kidneycohort.cautions import CAUTIONS
from kidneycohort.disclosure import small_count_text
from kidneycohort.errors import InputDataError
from kidneycohort.labels import display_label, label_map
from kidneycohort.plots import FIGURE_TITLES, forest_rows, slope_distribution
from kidneycohort.report._equations import equation_rows
from kidneycohort.report._headline import headline
from kidneycohort.report._methods import methods_from_config, readable_key
from kidneycohort.report._rule import ReportRule
from kidneycohort.run_folder import FILES, RunFolder, table_footnotes

logger = logging.getLogger(__name__)

__all__ = ["ALWAYS", "SECTIONS", "Figure", "Table", "build_report_context", "present_sections"]

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
"""(anchor, heading) of every report section, in order. A section whose data the run
does not have is left out (:func:`present_sections`); the KDIGO section is headed
"KDIGO categories" when the run made no transition table or figure."""

ALWAYS: Final = frozenset({"summary", "data", "methods", "cautions", "provenance"})
"""Sections every report has, whatever the run made."""

# shared tables of the run-folder contract: (title, section), in the order listed
TABLES: Final[dict[str, tuple[str, str]]] = {
    "baseline_characteristics": ("Baseline characteristics", "baseline"),
    "slope_table": ("eGFR slopes", "slopes"),
    "dropout_analysis": ("eGFR slopes under informative dropout", "slopes"),
    "kdigo_grid": ("KDIGO GFR x albuminuria grid", "kdigo"),
    "transition_matrix": ("KDIGO category transitions", "kdigo"),
    "endpoint_table": ("Endpoints", "endpoints"),
    "incidence_rates": ("Incidence rates", "endpoints"),
    "kfre_summary": ("Kidney Failure Risk Equation at baseline (2- and 5-year risk)", "endpoints"),
    "competing_risks": (
        "Competing risks: subdistribution (Fine–Gray) and cause-specific hazard ratios",
        "endpoints",
    ),
}
# a table with one of these columns is individual-level and is never printed
IDENTIFIER_COLUMNS: Final = frozenset(
    {"patient_id", "usubjid", "subjid", "person_id", "mrn", "sample_date", "birth_date"}
)
MAX_TABLE_ROWS: Final = 200
_ISO_DATE = re.compile(r"\b\d{4}-\d{2}-\d{2}\b")
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
    notes: list[str] = field(default_factory=list)


def _cells(df: pl.DataFrame) -> list[list[str]]:
    return [["" if v is None else str(v) for v in row] for row in df.rows()]


# ---- figures ------------------------------------------------------------------------------
def _figure(run: RunFolder, stem: str, title: str, caption: str = "") -> Figure | None:
    path = run.path / "figures" / f"{stem}.png"
    if not path.is_file():
        return None
    data = path.read_bytes()
    if not data.startswith(_PNG_SIGNATURE):
        logger.warning("figures/%s.png is not a PNG file; left out of the report", stem)
        return None
    uri = "data:image/png;base64," + base64.b64encode(data).decode("ascii")
    return Figure(stem=stem, title=title, data_uri=uri, caption=caption)


def _figures(run: RunFolder, labels: dict[str, str]) -> dict[str, list[Figure]]:
    titles = FIGURE_TITLES
    wanted: list[tuple[str, str, str, str]] = [
        (
            "data",
            "patient_flow",
            titles["patient_flow"],
            "Patients of the patients table by group, from enrolment to the analysis; the "
            "rows of every input table are accounted for in the tables above "
            "(figures/attrition.png draws them).",
        ),
        ("slopes", "egfr_trajectories", titles["egfr_trajectories"], ""),
        ("slopes", "model_trajectories", titles["model_trajectories"], ""),
        ("slopes", "slope_distribution", titles["slope_distribution"], ""),
        ("kdigo", "kdigo_grid", titles["kdigo_grid"], ""),
        ("kdigo", "transition_matrix", titles["transition_matrix"], ""),
    ]
    folder = run.path / "figures"
    for path in sorted(folder.glob("survival*.png")) if folder.is_dir() else []:
        endpoint = path.stem.removeprefix("survival").lstrip("_")
        title = f"Time to {display_label(endpoint, labels)}" if endpoint else titles["survival"]
        wanted.append(("endpoints", path.stem, title, ""))
    wanted.append(("endpoints", "forest_hazard_ratios", titles["forest_hazard_ratios"], ""))
    figures: dict[str, list[Figure]] = {key: [] for key, _ in SECTIONS}
    for section, stem, title, caption in wanted:
        figure = _figure(run, stem, title, caption)
        if figure is not None:
            figures[section].append(figure)
    return figures


# ---- tables -------------------------------------------------------------------------------
def _shared_table(run: RunFolder, name: str) -> Table:
    title = TABLES[name][0]
    files = [f for f in FILES[f"tables/{name}"].files if (run.path / f).is_file()]
    try:
        df = run.table(f"tables/{name}")
    except pl.exceptions.ComputeError as exc:
        raise InputDataError(
            f"tables/{name}.csv: not a readable CSV table ({exc}); re-run the tables step"
        ) from None
    bad = sorted(IDENTIFIER_COLUMNS & {c.lower() for c in df.columns})
    if bad:
        logger.warning("tables/%s.csv has individual-level column %s; not printed", name, bad[0])
        return Table(name, title, [], [], files, f"Not printed: it has the column '{bad[0]}'.")
    # the footnotes the Markdown file and the workbook print under the same table
    notes = table_footnotes(name, df)
    if df.height > MAX_TABLE_ROWS:
        notes.append(
            f"First {MAX_TABLE_ROWS} of {df.height:,} rows; the full table is in the files."
        )
        df = df.head(MAX_TABLE_ROWS)
    return Table(name, title, list(df.columns), _cells(df), files, notes=notes)


def _p_text(p: pl.Expr | pl.Series) -> pl.Expr:
    """A p value as the shared tables print it: three decimals, ``<0.001`` below."""
    value = pl.lit(p) if isinstance(p, pl.Series) else p
    return (
        pl.when(value.is_null() | value.is_nan())
        .then(pl.lit(""))
        .when(value < 0.001)
        .then(pl.lit("<0.001"))
        .otherwise(value.round(3).cast(pl.String).str.pad_end(5, "0"))
    )


def _reference(run: RunFolder) -> str | None:
    """The study's reference group (``study.reference_group``)."""
    value = (run.manifest.config.get("study") or {}).get("reference_group")
    return str(value) if value else None


def _model_tables(run: RunFolder, labels: dict[str, str]) -> dict[str, list[Table]]:
    out: dict[str, list[Table]] = {"endpoints": [], "slopes": []}
    hazard_ratios = run.table_or_none("models/hazard_ratios")
    if hazard_ratios is not None and hazard_ratios.height:
        rows = forest_rows(hazard_ratios, labels=labels, reference_group=_reference(run))
        shown = rows.select(
            pl.col("endpoint_label").alias("endpoint"),
            "comparison",
            "subgroup",
            rows["label"].str.split(":  ").list.last().alias("hazard ratio (95% CI)"),
            _p_text(pl.col("p")).alias("p"),
            _p_text(hazard_ratios["ph_p"].cast(pl.Float64)).alias("proportional hazards p"),
        )
        out["endpoints"].append(
            Table("hazard_ratios", "Hazard ratios (Cox models)", list(shown.columns), _cells(shown))
        )
    summary = run.table_or_none("models/slope_summary")
    if summary is not None and summary.height and not run.has("tables/slope_table"):
        shown = summary.with_columns(pl.col(pl.Float64).round_sig_figs(3)).cast(pl.String)
        out["slopes"].append(
            Table("slope_summary", "Slope model summary", list(shown.columns), _cells(shown))
        )
    return out


def _tables(run: RunFolder, labels: dict[str, str]) -> tuple[dict[str, list[Table]], list[Table]]:
    """Tables by section, and the index of shared tables for the Tables section."""
    tables: dict[str, list[Table]] = {key: [] for key, _ in SECTIONS}
    index = [_shared_table(run, name) for name in TABLES if run.has(f"tables/{name}")]
    for table in index:
        # an empty table (e.g. competing risks without a competing death) is listed in
        # the Tables section, not printed as a heading over nothing
        if table.rows or table.note:
            tables[TABLES[table.name][1]].append(table)
    for section, extra in _model_tables(run, labels).items():
        tables[section].extend(extra)
    return tables, index


# ---- summary ------------------------------------------------------------------------------
def _group_counts(run: RunFolder) -> pl.DataFrame | None:
    groups = run.patient_groups()
    if groups is None:
        return None
    return groups.group_by("group").agg(patients=pl.len()).sort("group")


def _shown_groups(text: str, labels: dict[str, str]) -> str:
    """A group, or a contrast ``a - b`` of groups, in display labels."""
    return " - ".join(display_label(part, labels) for part in str(text).split(" - "))


def _slope_lines(run: RunFolder, threshold: int, labels: dict[str, str]) -> list[str]:
    lines: list[str] = []
    slopes = run.table_or_none("slopes")
    if slopes is not None and slopes.height:
        have = slopes["equation"].drop_nulls().unique().to_list()
        equation = run.primary_equation if run.primary_equation in have else min(have)
        dist = slope_distribution(slopes, run.patient_groups(), equation=equation)
        lines += [
            f"Median eGFR slope, {_shown_groups(row['group'], labels)}: {row['median']:.2f} mL/min/1.73 m² per year "
            f"(IQR {row['q1']:.2f} to {row['q3']:.2f}; n={row['n']:,})."
            for row in dist.filter(pl.col("n") > threshold).to_dicts()
        ]
    fit = run.table_or_none("models/slope_model_fit")
    if fit is not None:
        lines += [
            f"Slope model ({row['engine']} engine): {row['description']}" for row in fit.to_dicts()
        ]
    summary = run.table_or_none("models/slope_summary")
    if summary is not None:
        # the between-group differences are the key results of a trial; per-group
        # estimates are in the slope table
        differences = summary.filter(pl.col("contrast").str.contains(" - "))
        for row in (differences if differences.height else summary.head(6)).to_dicts():
            lines.append(
                f"{readable_key(str(row['quantity']))}, {_shown_groups(row['contrast'], labels)}: "
                f"{_estimate_text(row)}."
            )
    return lines


def _estimate_text(row: dict[str, Any]) -> str:
    """``estimate (95% CI lower to upper); p = ...``; "not estimable" without an estimate."""
    if row.get("estimate") is None:
        return "not estimable"
    text = f"{row['estimate']:.2f}"
    if row.get("lower") is not None and row.get("upper") is not None:
        text += f" (95% CI {row['lower']:.2f} to {row['upper']:.2f})"
    p = row.get("p")
    if p is not None:
        text += "; p < 0.001" if p < 0.001 else f"; p = {p:.3f}"
    return text


def _summary(run: RunFolder, threshold: int, labels: dict[str, str]) -> list[str]:
    lines: list[str] = []
    # every count of people is printed as the shared tables print it (one protection)
    flow = run.printed_patient_flow()
    if flow:
        lines.append("Patients: " + "; ".join(f"{k} {v}" for k, v in flow.items()) + ".")
    group_sizes = _printed_group_sizes(run, threshold)
    if len(group_sizes) > 1:
        listed = ", ".join(f"{display_label(g, labels)} ({n})" for g, n in group_sizes.items())
        lines.append(f"Groups: {listed}.")
    lines += _slope_lines(run, threshold, labels)
    lines += _event_lines(run, labels)
    hazard_ratios = run.table_or_none("models/hazard_ratios")
    if hazard_ratios is not None and hazard_ratios.height:
        rows = forest_rows(hazard_ratios, labels=labels, reference_group=_reference(run))
        lines += [f"Hazard ratio, {label.replace(':  ', ': ')}." for label in rows["label"]]
    return lines


def _method_facts(run: RunFolder) -> dict[str, Any]:
    """What the run recorded about its own analyses, for the Methods prose: the slope
    model's fit, the competing-risks analysis' own methods texts, software versions."""
    tests = run.table_or_none("models/competing_tests")
    fit = run.table_or_none("models/slope_model_fit")
    manifest = run.manifest
    return {
        "slope_model_fit": [] if fit is None else fit.to_dicts(),
        "competing_methods": []
        if tests is None or "methods" not in tests.columns
        else list(dict.fromkeys(tests.drop_nulls("methods").select("endpoint", "methods").rows())),
        "kidneycohort_version": manifest.kidneycohort_version,
        "packages": dict(manifest.packages),
        "seed": manifest.seed,
    }


def _dropout_methods(run: RunFolder) -> list[dict[str, Any]]:
    """The paragraph the dropout analysis wrote about itself (models/dropout_methods)."""
    dropout = run.table_or_none("models/dropout_methods")
    if dropout is None or dropout.is_empty() or "paragraph" not in dropout.columns:
        return []
    sentences = dropout["paragraph"].drop_nulls().to_list()
    return [{"section": "Slopes under informative dropout", "sentences": sentences}]


def _with_analysis_methods(
    methods: list[dict[str, Any]], extra: list[dict[str, Any]]
) -> list[dict[str, Any]]:
    """``extra`` paragraphs placed before software and the list of other settings."""
    tail = [m for m in methods if m["section"] in ("Software", "Other settings")]
    return [m for m in methods if m not in tail] + extra + tail


def _printed_group_sizes(run: RunFolder, threshold: int) -> dict[str, str]:
    """Patients per group as the baseline table prints them (its N row)."""
    table = run.table_or_none("tables/baseline_characteristics")
    if table is not None and "characteristic" in table.columns:
        n_row = table.filter(pl.col("characteristic") == "N")
        groups = [c for c in table.columns if c not in ("characteristic", "statistic", "level")]
        if n_row.height:
            return {g: str(n_row[g][0]) for g in groups if g != "Overall"}
    counts = _group_counts(run)
    if counts is None:
        return {}
    return {g: small_count_text(int(n), threshold) for g, n in counts.rows()}


def _event_lines(run: RunFolder, labels: dict[str, str]) -> list[str]:
    """Events per endpoint, from the endpoint table's overall row (as it prints them)."""
    table = run.table_or_none("tables/endpoint_table")
    if table is None or not {"endpoint", "group", "events", "n_patients"} <= set(table.columns):
        return []
    overall = table.filter(pl.col("group") == "Overall")
    if overall.is_empty():  # whole-cohort analysis: one row per endpoint
        overall = table.unique("endpoint", keep="first", maintain_order=True)
    return [
        f"{_capital(display_label(name, labels))}: {events.split(' (')[0]} events among "
        f"{n} patients."
        for name, events, n in overall.select("endpoint", "events", "n_patients").rows()
    ]


def _capital(text: str) -> str:
    return text if text.startswith("eGFR") else text[:1].upper() + text[1:]


# ---- accounting and provenance ------------------------------------------------------------
def _accounting(run: RunFolder, threshold: int) -> tuple[list[list[str]], list[list[str]]]:
    manifest = run.manifest
    rows = [
        [
            a.table,
            *(
                small_count_text(n, threshold)
                for n in (a.rows_read, a.rows_used, a.rows_rejected, a.rows_merged)
            ),
        ]
        for a in manifest.accounting
    ]
    reasons = [
        [r.table, r.reason, small_count_text(r.rows, threshold)]
        for r in manifest.accounting_by_reason
    ]
    return rows, reasons


_WINDOWS_ABSOLUTE = re.compile(r"^(?:[A-Za-z]:[\\/]|\\\\)")


def relative_override(override: str, run_path: Path) -> str:
    """``key=/abs/path`` as ``key=<path relative to the run folder>``; other overrides as
    given. A report travels; the machine's folder layout is not printed.

    Parameters
    ----------
    override : str
        One ``--set`` override as recorded in the manifest.
    run_path : Path
        The run folder, which relative paths start from.

    Returns
    -------
    str
        The override with an absolute path made relative (POSIX separators).
    """
    key, sep, value = override.partition("=")
    text = value.strip().strip("'\"")
    if not sep:
        return override
    if _WINDOWS_ABSOLUTE.match(text):
        return f"{key}={PureWindowsPath(text).name}"
    if not PurePosixPath(text).is_absolute():
        return override
    try:
        relative = os.path.relpath(text, run_path.resolve())
    except ValueError:  # another drive
        relative = PurePosixPath(text).name
    return f"{key}={PurePosixPath(*Path(relative).parts).as_posix()}"


_ABSOLUTE_PATH = re.compile(r"(?<![\w.:/])/(?:[\w.-]+/)+[\w.-]+")


def _relative_path(path: str, run_path: Path) -> str:
    return relative_override(f"x={path}", run_path).partition("=")[2]


def _provenance(run: RunFolder) -> dict[str, Any]:
    manifest = run.manifest
    return {
        "schema_version": manifest.schema_version,
        "kidneycohort_version": manifest.kidneycohort_version or "not recorded",
        "created_utc": manifest.created_utc or "not recorded",
        "seed": manifest.seed,
        "recipe": manifest.study.recipe or "not recorded",
        "overrides": [relative_override(o, run.path) for o in manifest.overrides],
        "inputs": [
            {
                "path": Path(i.path).name if i.path else i.table,
                "sha256": (i.sha256 or "")[:16],
                "rows": f"{i.rows:,}" if i.rows is not None else "",
            }
            for i in manifest.inputs
        ],
        "packages": sorted(manifest.packages.items()),
        "steps": [
            {
                "name": s.name,
                "seconds": f"{s.seconds:.2f}",
                "rows_out": f"{s.rows_out:,}" if s.rows_out is not None else "",
            }
            for s in manifest.steps
        ],
        "files": sorted(
            str(p.relative_to(run.path))
            for p in run.path.rglob("*")
            if p.is_file() and p.name != "report.html" and not p.name.startswith(".")
        ),
    }


def present_sections(
    figures: dict[str, list[Figure]],
    tables: dict[str, list[Table]],
    *,
    equations: bool,
    index: bool,
) -> list[dict[str, Any]]:
    """The sections a report shows, numbered in order: those of :data:`ALWAYS`, and
    each other section only when the run has figures or tables for it.

    Parameters
    ----------
    figures, tables
        What each section would show, by section id.
    equations, index
        Whether the run records eGFR equations; whether it wrote shared tables.

    Returns
    -------
    list of dict
        ``{"id", "title", "number"}`` per section shown.
    """
    has = {key for key, _ in SECTIONS if figures.get(key) or tables.get(key)}
    has |= ALWAYS | ({"equations"} if equations else set()) | ({"tables"} if index else set())
    titles = dict(SECTIONS)
    transitions = any(f.stem == "transition_matrix" for f in figures.get("kdigo", [])) or any(
        t.name == "transition_matrix" for t in tables.get("kdigo", [])
    )
    if not transitions:
        titles["kdigo"] = "KDIGO categories"
    shown = [key for key, _ in SECTIONS if key in has]
    return [{"id": key, "title": titles[key], "number": i + 1} for i, key in enumerate(shown)]


def build_report_context(
    run_dir: str | Path | RunFolder, *, rule: ReportRule | None = None
) -> dict[str, Any]:
    """Everything the report template prints, read from a run folder.

    Parameters
    ----------
    run_dir
        The run folder (a path or a :class:`~kidneycohort.run_folder.RunFolder`). Absent
        files are tolerated: a section without data is left out
        (:func:`present_sections`).
    rule
        Report options; by default the run's ``report`` config section.

    Returns
    -------
    dict
        Template variables: ``title``, ``sections`` (those shown), ``present`` (their
        ids), ``summary``, ``figures`` (by section),
        ``tables`` (by section), ``equations``, ``methods``, ``cautions``, ``warnings``,
        ``provenance``, ``accounting``.

    Raises
    ------
    InputDataError
        When ``run_dir`` is not a folder or a run-folder file is unreadable.
    """
    run = run_dir if isinstance(run_dir, RunFolder) else RunFolder(run_dir)
    manifest, study = run.manifest, run.manifest.study
    threshold = run.small_cell_threshold
    rule = rule or ReportRule.model_validate(manifest.section("report"))
    display = label_map(manifest.config)
    display.update(rule.labels)
    equation = study.primary_equation
    equations = equation_rows(run, study.equations or ([equation] if equation else []), threshold)
    labels = {e["id"]: e["label"] for e in equations}
    tables, index = _tables(run, display)
    figures = _figures(run, display)
    accounting, by_reason = _accounting(run, threshold)
    provenance = _provenance(run)
    sections = present_sections(figures, tables, equations=bool(equations), index=bool(index))
    return {
        "title": study.name or run.path.name,
        "description": study.description or "",
        "recipe": provenance["recipe"],
        "created_utc": provenance["created_utc"],
        "primary_equation": labels.get(equation, equation) if equation else "",
        "threshold": threshold,
        "sections": sections,
        "present": [section["id"] for section in sections],
        "headline": headline(run, rule, display),
        "summary": _summary(run, threshold, display),
        "figures": figures,
        "tables": tables,
        "table_index": index,
        "xlsx": "tables/tables.xlsx" if (run.path / "tables" / "tables.xlsx").is_file() else "",
        "equations": equations,
        "methods": _with_analysis_methods(
            methods_from_config(manifest.config, {**display, **labels}, facts=_method_facts(run)),
            _dropout_methods(run),
        ),
        "cautions": list(CAUTIONS),
        "warnings": [
            _ABSOLUTE_PATH.sub(
                lambda m: _relative_path(m[0], run.path), _ISO_DATE.sub("[date removed]", w)
            )
            for w in manifest.warnings
        ],
        "accounting": accounting,
        "accounting_by_reason": by_reason,
        # as the baseline table prints them (one protection for every output)
        "groups": [
            [display_label(g, display), n] for g, n in _printed_group_sizes(run, threshold).items()
        ],
        "provenance": provenance,
        "generated": dt.datetime.now(dt.UTC).strftime("%Y-%m-%d %H:%M UTC"),
    }
