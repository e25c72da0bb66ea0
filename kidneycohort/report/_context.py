"""Everything the report prints, gathered from a run folder through its contract.

The context holds aggregates only: counts (small cells protected), estimates, the
formatted shared tables, figures as PNG data URIs, and the manifest's facts. Per-patient
files are read only to count and summarise; no identifier or individual date is put in.
"""

from __future__ import annotations

import base64
import datetime as dt
import logging
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Final

import polars as pl

from kidneycohort.cautions import CAUTIONS
from kidneycohort.disclosure import HIDDEN, disclosure_footnote, small_count_text, suppression_label
from kidneycohort.errors import InputDataError
from kidneycohort.labels import display_label
from kidneycohort.plots import FIGURE_TITLES, forest_rows, slope_distribution
from kidneycohort.report._equations import equation_rows
from kidneycohort.report._methods import methods_from_config, readable_key
from kidneycohort.run_folder import FILES, RunFolder

logger = logging.getLogger(__name__)

__all__ = ["SECTIONS", "Figure", "Table", "build_report_context"]

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


def _figures(run: RunFolder) -> dict[str, list[Figure]]:
    titles = FIGURE_TITLES
    wanted: list[tuple[str, str, str, str]] = [
        (
            "data",
            "attrition",
            titles["attrition"],
            "Rows by input table; patients through the derivations.",
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
        title = f"Time to {display_label(endpoint)}" if endpoint else titles["survival"]
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
    notes = []
    hidden = {suppression_label(run.small_cell_threshold), HIDDEN}
    texts = df.select(pl.all().cast(pl.String))
    if any(texts[c].str.split(" ").list.first().is_in(list(hidden)).any() for c in texts.columns):
        notes.append(disclosure_footnote(run.small_cell_threshold))
    if df.height > MAX_TABLE_ROWS:
        notes.append(
            f"First {MAX_TABLE_ROWS} of {df.height:,} rows; the full table is in the files."
        )
        df = df.head(MAX_TABLE_ROWS)
    return Table(name, title, list(df.columns), _cells(df), files, " ".join(notes))


def _model_tables(run: RunFolder) -> dict[str, list[Table]]:
    out: dict[str, list[Table]] = {"endpoints": [], "slopes": []}
    hazard_ratios = run.table_or_none("models/hazard_ratios")
    if hazard_ratios is not None and hazard_ratios.height:
        rows = forest_rows(hazard_ratios)
        shown = hazard_ratios.select("endpoint", "term", "subgroup").with_columns(
            **{
                "hazard ratio (95% CI)": rows["label"].str.split(":  ").list.last(),
                "p": rows["p"].round_sig_figs(2).cast(pl.String),
                "proportional hazards p": hazard_ratios["ph_p"].round_sig_figs(2).cast(pl.String),
            }
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


def _tables(run: RunFolder) -> tuple[dict[str, list[Table]], list[Table]]:
    """Tables by section, and the index of shared tables for the Tables section."""
    tables: dict[str, list[Table]] = {key: [] for key, _ in SECTIONS}
    index = [_shared_table(run, name) for name in TABLES if run.has(f"tables/{name}")]
    for table in index:
        tables[TABLES[table.name][1]].append(table)
    for section, extra in _model_tables(run).items():
        tables[section].extend(extra)
    return tables, index


# ---- summary ------------------------------------------------------------------------------
def _group_counts(run: RunFolder) -> pl.DataFrame | None:
    groups = run.patient_groups()
    if groups is None:
        return None
    return groups.group_by("group").agg(patients=pl.len()).sort("group")


def _slope_lines(run: RunFolder, threshold: int) -> list[str]:
    lines: list[str] = []
    slopes = run.table_or_none("slopes")
    if slopes is not None and slopes.height:
        have = slopes["equation"].drop_nulls().unique().to_list()
        equation = run.primary_equation if run.primary_equation in have else min(have)
        dist = slope_distribution(slopes, run.patient_groups(), equation=equation)
        lines += [
            f"Median eGFR slope, {row['group']}: {row['median']:.2f} mL/min/1.73 m² per year "
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
                f"{readable_key(str(row['quantity']))}, {row['contrast']}: {_estimate_text(row)}."
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


def _summary(run: RunFolder, threshold: int) -> list[str]:
    lines: list[str] = []
    # every count of people is printed as the shared tables print it (one protection)
    flow = run.printed_patient_flow()
    if flow:
        lines.append("Patients: " + "; ".join(f"{k} {v}" for k, v in flow.items()) + ".")
    group_sizes = _printed_group_sizes(run, threshold)
    if len(group_sizes) > 1:
        listed = ", ".join(f"{g} ({n})" for g, n in group_sizes.items())
        lines.append(f"Groups: {listed}.")
    lines += _slope_lines(run, threshold)
    lines += _event_lines(run)
    hazard_ratios = run.table_or_none("models/hazard_ratios")
    if hazard_ratios is not None and hazard_ratios.height:
        lines += [f"Hazard ratio, {label}." for label in forest_rows(hazard_ratios)["label"]]
    return lines


def _analysis_methods(run: RunFolder) -> list[dict[str, Any]]:
    """Methods paragraphs the analyses wrote themselves (which hazard ratio is which)."""
    out = []
    tests = run.table_or_none("models/competing_tests")
    if tests is not None and not tests.is_empty():
        sentences = list(dict.fromkeys(tests["methods"].drop_nulls().to_list()))
        out.append({"section": "Competing risks as analysed", "sentences": sentences})
    dropout = run.table_or_none("models/dropout_methods")
    if dropout is not None and not dropout.is_empty():
        sentences = dropout["paragraph"].drop_nulls().to_list()
        out.append({"section": "Slopes under informative dropout", "sentences": sentences})
    return out


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


def _event_lines(run: RunFolder) -> list[str]:
    """Events per endpoint, from the endpoint table's overall row (as it prints them)."""
    table = run.table_or_none("tables/endpoint_table")
    if table is None or not {"endpoint", "group", "events", "n_patients"} <= set(table.columns):
        return []
    overall = table.filter(pl.col("group") == "Overall")
    if overall.is_empty():  # whole-cohort analysis: one row per endpoint
        overall = table.unique("endpoint", keep="first", maintain_order=True)
    return [
        f"{display_label(name)}: {events.split(' (')[0]} events among {n} patients."
        for name, events, n in overall.select("endpoint", "events", "n_patients").rows()
    ]


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


def _provenance(run: RunFolder) -> dict[str, Any]:
    manifest = run.manifest
    return {
        "schema_version": manifest.schema_version,
        "kidneycohort_version": manifest.kidneycohort_version or "not recorded",
        "created_utc": manifest.created_utc or "not recorded",
        "seed": manifest.seed,
        "recipe": manifest.study.recipe or "not recorded",
        "overrides": list(manifest.overrides),
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


def build_report_context(run_dir: str | Path | RunFolder) -> dict[str, Any]:
    """Everything the report template prints, read from a run folder.

    Parameters
    ----------
    run_dir
        The run folder (a path or a :class:`~kidneycohort.run_folder.RunFolder`). Absent
        files are tolerated: the sections they feed say that the run did not make them.

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
    run = run_dir if isinstance(run_dir, RunFolder) else RunFolder(run_dir)
    manifest, study = run.manifest, run.manifest.study
    threshold = run.small_cell_threshold
    equation = study.primary_equation
    equations = equation_rows(run, study.equations or ([equation] if equation else []), threshold)
    labels = {e["id"]: e["label"] for e in equations}
    tables, index = _tables(run)
    accounting, by_reason = _accounting(run, threshold)
    provenance = _provenance(run)
    return {
        "title": study.name or run.path.name,
        "description": study.description or "",
        "recipe": provenance["recipe"],
        "created_utc": provenance["created_utc"],
        "primary_equation": labels.get(equation, equation) if equation else "",
        "threshold": threshold,
        "sections": [
            {"id": key, "title": title, "number": i + 1} for i, (key, title) in enumerate(SECTIONS)
        ],
        "summary": _summary(run, threshold),
        "figures": _figures(run),
        "tables": tables,
        "table_index": index,
        "xlsx": "tables/tables.xlsx" if (run.path / "tables" / "tables.xlsx").is_file() else "",
        "equations": equations,
        "methods": methods_from_config(manifest.config, labels) + _analysis_methods(run),
        "cautions": list(CAUTIONS),
        "warnings": [_ISO_DATE.sub("[date removed]", w) for w in manifest.warnings],
        "accounting": accounting,
        "accounting_by_reason": by_reason,
        # as the baseline table prints them (one protection for every output)
        "groups": [[g, n] for g, n in _printed_group_sizes(run, threshold).items()],
        "provenance": provenance,
        "generated": dt.datetime.now(dt.UTC).strftime("%Y-%m-%d %H:%M UTC"),
    }
