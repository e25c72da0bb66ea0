"""The design folder: estimates, tables, the power curve, a short HTML report, manifest.

Layout (``manifest.json`` is written last: a folder with a manifest is a finished design)::

    estimates.parquet          one row per simulated trial and analysed endpoint
    chunks/*.parquet           the same rows, one file per chunk (what a resumed run reuses)
    tables/operating_characteristics.csv/.md   every scenario, endpoint and size
    tables/power.csv/.md       under the effect: power, bias, coverage, events
    tables/type_one_error.csv/.md              under the null
    tables/true_values.csv     the true value each estimate is compared with
    tables/chunks.csv          each chunk's trials and recorded seed
    figures/power_curve.png/.svg
    report.html
    manifest.json
"""

from __future__ import annotations

import base64
import datetime as dt
import html
import json
from pathlib import Path
from typing import TYPE_CHECKING, Any

import polars as pl

from kidneycohort.cautions import CAUTIONS
from kidneycohort.design._config import DesignConfig
from kidneycohort.run_folder import markdown_table, package_versions, sha256_of

if TYPE_CHECKING:
    from kidneycohort.design._run import DesignResult

__all__ = ["power_curve_figure", "write_outputs"]

_POWER_COLUMNS = (
    "analysis",
    "endpoint",
    "sample_size",
    "trials",
    "rejection_rate",
    "rejection_rate_mc_se",
    "mean_events",
    "true_value",
    "bias",
    "bias_mc_se",
    "coverage",
    "coverage_mc_se",
    "empirical_se",
    "mean_model_se",
    "note",
)


def _write_table(frame: pl.DataFrame, folder: Path, stem: str) -> None:
    frame.write_csv(folder / f"{stem}.csv")
    shown = frame.with_columns(pl.col(pl.Float64).round(4))
    (folder / f"{stem}.md").write_text(markdown_table(shown) + "\n", encoding="utf-8")


_PANELS = {"effect": "power (treatment effect)", "null": "type I error (no effect)"}
_ANALYSES = {"slope_model": "slope model", "cox": "time to event (Cox)"}


def power_curve_figure(summary: pl.DataFrame, alpha: float) -> Any:
    """Power (and type I error under the null) against sample size: one panel per
    scenario and analysis, one line per endpoint, +/- 1.96 Monte Carlo SE bars
    (plotnine). Dotted: alpha; dashed: power 0.8 (effect panels only)."""
    from plotnine import (
        aes,
        element_blank,
        facet_grid,
        geom_errorbar,
        geom_hline,
        geom_line,
        geom_point,
        ggplot,
        labs,
        theme,
        theme_bw,
    )

    data = summary.with_columns(
        pl.col("scenario").replace_strict(_PANELS),
        pl.col("analysis").replace_strict(_ANALYSES),
        (pl.col("rejection_rate") - 1.96 * pl.col("rejection_rate_mc_se")).clip(0, 1).alias("lo"),
        (pl.col("rejection_rate") + 1.96 * pl.col("rejection_rate_mc_se")).clip(0, 1).alias("hi"),
    )
    panels = data.select("scenario", "analysis").unique()
    lines = pl.concat(
        [
            panels.with_columns(pl.lit(alpha).alias("y"), pl.lit("dotted").alias("kind")),
            panels.filter(pl.col("scenario") == _PANELS["effect"]).with_columns(
                pl.lit(0.8).alias("y"), pl.lit("dashed").alias("kind")
            ),
        ]
    )
    plot = ggplot(data.to_pandas(), aes("sample_size", "rejection_rate", colour="endpoint"))
    if summary["sample_size"].n_unique() > 1:  # a curve needs two sizes; one is points
        plot = plot + geom_line()
    for kind in ("dotted", "dashed"):
        chosen = lines.filter(pl.col("kind") == kind).to_pandas()
        plot = plot + geom_hline(aes(yintercept="y"), chosen, linetype=kind, colour="grey")
    return (
        plot
        + geom_point()
        + geom_errorbar(aes(ymin="lo", ymax="hi"), width=0)
        + facet_grid("analysis ~ scenario", scales="free_y")
        + labs(
            x="patients per trial",
            y="rejection rate",
            colour="endpoint",
            title="Power and type I error by simulation",
            caption=f"Bars: +/- 1.96 Monte Carlo SE. Dotted: alpha = {alpha:g}; dashed: power 0.8.",
        )
        + theme_bw(base_size=10)
        + theme(figure_size=(10, 7), legend_position="right", panel_grid_minor=element_blank())
    )


def _save_figure(summary: pl.DataFrame, alpha: float, figures: Path) -> list[Path]:
    import matplotlib.pyplot as plt

    plot = power_curve_figure(summary, alpha)
    paths = [figures / "power_curve.png", figures / "power_curve.svg"]
    figure = plot.draw()
    try:
        for path in paths:
            figure.savefig(path, dpi=150)
    finally:
        plt.close(figure)
    return paths


def _methods(cfg: DesignConfig, result: DesignResult, cut: dt.date) -> list[str]:
    d = cfg.design
    t = cfg.scenario.treatment
    knot = cfg.slope_model.knot_years
    return [
        f"Each simulated trial randomises its patients to control or treatment "
        f"(treatment fraction {t.fraction:g}; simple randomisation within a trial) and draws "
        "every patient's true GFR path, visits, creatinine values with within-person "
        "variation, kidney failure, death and loss to follow-up with the package's "
        "synthetic cohort generator. The treatment changes true GFR by "
        f"{t.acute_effect:g} mL/min/1.73 m² over {t.acute_days:g} days (between-patient SD "
        f"{t.acute_effect_sd:g}) and the chronic slope by {t.chronic_effect:g} "
        f"mL/min/1.73 m²/yr (SD {t.chronic_effect_sd:g}). The null scenario is the same "
        "without any treatment effect.",
        "Every trial is analysed by the study code: harmonisation, eGFR "
        f"({d.equation}), baseline, endpoint derivation (data cut {cut}), the exact "
        f"mixed-model slope engine ({'two slopes, knot at ' + format(knot, 'g') + ' years' if knot else 'one slope'}; "
        "treatment - control differences with Wald tests) and, for each time-to-event "
        "endpoint, the Cox partial likelihood (Efron ties) of treatment vs control with "
        "the study's estimability rule.",
        f"Power is the fraction of trials with a two-sided p below alpha = {d.alpha:g} "
        "(not-estimable trials count as not significant); its Monte Carlo SE is "
        "sqrt(p(1-p)/R). Bias, empirical SE and coverage are over estimable trials "
        "(Morris, White and Crowther, Stat Med 2019). Hazard ratios are on the log scale.",
        f"{d.trials} trials per sample size under the effect and {d.null_trial_count} under "
        f"the null, in chunks of {d.trials_per_chunk}; each chunk's generator seed is drawn "
        f"from numpy SeedSequence({d.seed}, spawn_key=(scenario, sample size, chunk)) and "
        "recorded in tables/chunks.csv, so results do not depend on the number of "
        f"processes. Run time {result.seconds:.0f} s ({result.chunks_run} chunks run, "
        f"{result.chunks_reused} reused from an earlier, stopped run).",
    ]


def _html_table(frame: pl.DataFrame) -> str:
    head = "".join(f"<th>{html.escape(c)}</th>" for c in frame.columns)
    body = []
    for row in frame.iter_rows():
        cells = []
        for value in row:
            if value is None:
                text = ""
            elif isinstance(value, float):
                text = f"{value:.3f}"
            else:
                text = str(value)
            cells.append(f"<td>{html.escape(text)}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def _report(cfg: DesignConfig, result: DesignResult, cut: dt.date, png: Path) -> str:
    image = base64.b64encode(png.read_bytes()).decode("ascii")
    power = result.power.select(_POWER_COLUMNS)
    null = result.type_one_error.select(
        "analysis",
        "endpoint",
        "sample_size",
        "trials",
        "rejection_rate",
        "rejection_rate_mc_se",
        "note",
    )
    parts = [
        "<!doctype html><html lang='en'><head><meta charset='utf-8'>",
        f"<title>{html.escape(cfg.design.name)}: design by simulation</title>",
        "<style>body{font-family:sans-serif;max-width:70em;margin:2em auto;padding:0 1em}"
        "table{border-collapse:collapse;font-size:85%}td,th{border:1px solid #bbb;"
        "padding:2px 6px;text-align:right}.caution{border-left:4px solid #b00;"
        "padding-left:1em}</style></head><body>",
        f"<h1>{html.escape(cfg.design.name)}: power by simulation</h1>",
        f"<p>{html.escape(cfg.design.description)}</p>" if cfg.design.description else "",
        "<div class='caution'>"
        + "".join(f"<p>{html.escape(c)}</p>" for c in CAUTIONS)
        + "<p>Simulated operating characteristics hold for the stated scenario only; they "
        "are not a prediction for a real trial.</p></div>",
        "<h2>Methods</h2>",
        *(f"<p>{html.escape(p)}</p>" for p in _methods(cfg, result, cut)),
        "<h2>Power curve</h2>",
        f"<img alt='power against sample size' src='data:image/png;base64,{image}' "
        "style='max-width:100%'>",
        "<h2>Power, bias and coverage under the treatment effect</h2>",
        "<p>Empty bias or coverage cells are not estimable; the note says why.</p>",
        _html_table(power),
        "<h2>Type I error under the null scenario</h2>",
        _html_table(null)
        if null.height
        else "<p>No null scenario was simulated (design.null_trials: 0).</p>",
        "</body></html>",
    ]
    return "\n".join(p for p in parts if p)


def write_outputs(
    cfg: DesignConfig, result: DesignResult, truth: pl.DataFrame, cut: dt.date
) -> None:
    """Write every output of a finished design into ``result.folder``; manifest last."""
    folder = result.folder
    manifest_path = folder / "manifest.json"
    manifest_path.unlink(missing_ok=True)
    tables, figures = folder / "tables", folder / "figures"
    tables.mkdir(exist_ok=True)
    figures.mkdir(exist_ok=True)
    result.estimates.write_parquet(folder / "estimates.parquet")
    _write_table(result.summary, tables, "operating_characteristics")
    _write_table(result.power.select(_POWER_COLUMNS), tables, "power")
    _write_table(
        result.type_one_error.select(
            "analysis",
            "endpoint",
            "sample_size",
            "trials",
            "rejections",
            "rejection_rate",
            "rejection_rate_mc_se",
            "bias",
            "coverage",
            "note",
        ),
        tables,
        "type_one_error",
    )
    truth.write_csv(tables / "true_values.csv")
    result.chunks.write_csv(tables / "chunks.csv")
    png, _ = _save_figure(result.summary, cfg.design.alpha, figures)
    (folder / "report.html").write_text(_report(cfg, result, cut, png), encoding="utf-8")
    outputs = sorted(
        p
        for p in folder.rglob("*")
        if p.is_file() and p.suffix != ".partial" and p.name != "manifest.json"
    )
    manifest = {
        "kind": "kidneycohort design",
        "name": cfg.design.name,
        "finished_utc": dt.datetime.now(dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "seconds": round(result.seconds, 2),
        "config": cfg.model_dump(mode="json"),
        "seed_scheme": "numpy SeedSequence(design.seed, spawn_key=(scenario code "
        "{effect: 0, null: 1}, sample size, chunk index)); reference trial: sample size 0",
        "data_cut": cut.isoformat(),
        "chunks_run": result.chunks_run,
        "chunks_reused": result.chunks_reused,
        "packages": package_versions(),
        "outputs": [
            {"path": p.relative_to(folder).as_posix(), "sha256": sha256_of(p)} for p in outputs
        ],
    }
    manifest_path.write_text(json.dumps(manifest, indent=2) + "\n", encoding="utf-8")
