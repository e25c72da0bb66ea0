"""A small, realistic run folder simulated from scratch (for figure and report tests).

The folder follows the run-folder contract (DESIGN.md) so the figure and report tests do
not depend on the other stages. Values are invented: a made-up two-arm study at two
made-up sites. Models are stand-ins fitted with general-purpose libraries: an ordinary
least-squares linear spline for the trajectories (instead of the mixed model),
lifelines' Kaplan–Meier, Aalen–Johansen and Cox fitters for the survival outputs.
"""

from __future__ import annotations

import datetime as dt
import json
from collections.abc import Iterable
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl
from lifelines import AalenJohansenFitter, CoxPHFitter, KaplanMeierFitter
from lifelines.statistics import proportional_hazard_test

from kidneycohort._frames import conform
from kidneycohort.run_folder import FILES
from kidneycohort.schemas import BASELINE, EGFR, ENDPOINTS, LABS, REJECTED, SLOPES, TRANSITIONS
from kidneycohort.tables import kdigo_grid_table, transition_table

PRIMARY = "ckd_epi_2021_cr"
SECONDARY = "ckd_epi_2021_crcys"
GROUPS = ("placebo", "active")
VISITS = (0.0, 0.25, 0.5, 1.0, 1.5, 2.0, 2.5, 3.0)
KNOT = 0.25
THRESHOLD = 10
AT_RISK_YEARS = (0.0, 1.0, 2.0, 3.0)
G_CUTS = ((90, "G1"), (60, "G2"), (45, "G3a"), (30, "G3b"), (15, "G4"), (-1e9, "G5"))
# KDIGO 2012 heat map, written out again here (independently of the library) to colour
# the simulated grid: rows G1..G5, columns A1..A3.
RISK_ROWS = {
    "G1": ("low", "moderately_increased", "high"),
    "G2": ("low", "moderately_increased", "high"),
    "G3a": ("moderately_increased", "high", "very_high"),
    "G3b": ("high", "very_high", "very_high"),
    "G4": ("very_high", "very_high", "very_high"),
    "G5": ("very_high", "very_high", "very_high"),
}
REJECT_REASONS = {"value_not_numeric": 14, "unit_unknown": 3, "date_before_birth": 25}


def g_category(expr: pl.Expr) -> pl.Expr:
    out = pl.when(expr >= G_CUTS[0][0]).then(pl.lit(G_CUTS[0][1]))
    for cut, name in G_CUTS[1:]:
        out = out.when(expr >= cut).then(pl.lit(name))
    return out.otherwise(None)


def _to_contract(file: str, df: pl.DataFrame) -> pl.DataFrame:
    """``df`` in the declared layout of run-folder file ``file`` (missing columns null)."""
    entry = FILES[file.removesuffix(".parquet")]
    if entry.schema is None:
        return df
    extra = [c for c in entry.optional if c in df.columns]
    return conform(df, entry.schema).hstack(df.select(extra))


def _small(n: pl.Expr) -> pl.Expr:
    return (
        pl.when(n.is_between(1, THRESHOLD))
        .then(pl.lit(f"<{THRESHOLD + 1}"))
        .otherwise(n.cast(pl.String))
    )


def simulate(n_patients: int = 160, seed: int = 7) -> dict[str, pl.DataFrame]:
    """Patients and their eGFR values for the invented study (numpy, no loops)."""
    rng = np.random.default_rng(seed)
    sites = rng.choice(["NORTHFIELD", "LAKESIDE"], n_patients)
    ids = np.char.add(
        np.char.add(np.char.add("KC-", sites), "-"),
        np.char.zfill(np.arange(1, n_patients + 1).astype(str), 4),
    )
    group = np.where(np.arange(n_patients) % 2 == 0, GROUPS[0], GROUPS[1])
    index = np.datetime64("2019-03-01") + rng.integers(0, 500, n_patients).astype("timedelta64[D]")
    patients = pl.DataFrame(
        {
            "patient_id": ids,
            "group": group,
            "index_date": index.astype("datetime64[D]"),
            "age_at_index": rng.normal(62, 9, n_patients).round(1),
            "sex": rng.choice(["female", "male"], n_patients),
            "baseline_true": rng.normal(52, 14, n_patients).clip(16, 120),
            "slope_true": np.where(group == "active", -1.8, -3.2) + rng.normal(0, 2.2, n_patients),
            "uacr": np.exp(rng.normal(4.3, 1.4, n_patients)),
            "death_years": rng.exponential(25, n_patients),
        }
    )
    visits = pl.DataFrame({"visit": np.arange(len(VISITS)), "planned": VISITS})
    grid = patients.join(visits, how="cross")
    m = grid.height
    jitter = np.where(grid["planned"].to_numpy() > 0, rng.normal(0, 12, m), 0).round()
    dropped = rng.random(m) < 0.08
    acute = np.where(grid["group"].to_numpy() == "active", -3.0, 0.0)
    t = grid["planned"].to_numpy() + jitter / 365.25
    egfr_true = (
        grid["baseline_true"].to_numpy()
        + acute * np.minimum(t, KNOT) / KNOT
        + grid["slope_true"].to_numpy() * np.maximum(t - KNOT, 0)
    )
    value = (egfr_true + rng.normal(0, 3.5, m)).clip(4, 140)
    egfr = (
        grid.with_columns(
            years_from_index=pl.Series(t.round(4)),
            egfr=pl.Series(value.round(1)),
            sample_date=pl.col("index_date")
            + pl.duration(days=pl.Series((t * 365.25).round().astype(int))),
        )
        .filter(pl.Series(~dropped) | (pl.col("visit") == 0))
        .with_columns(
            equation=pl.lit(PRIMARY),
            egfr_unit=pl.lit("mL/min/1.73m2"),
            age_years=pl.col("age_at_index") + pl.col("years_from_index"),
            creatinine_mg_dl=(pl.lit(140.0) / pl.col("egfr")).round(2),
            setting=pl.lit("outpatient"),
        )
    )
    # a few values that could not be computed, as the eGFR stage reports them
    egfr = egfr.with_columns(
        egfr=pl.when(pl.int_range(pl.len()) % 97 == 5).then(None).otherwise(pl.col("egfr")),
        egfr_reason=pl.when(pl.int_range(pl.len()) % 97 == 5).then(pl.lit("creatinine_missing")),
    )
    second = egfr.with_columns(equation=pl.lit(SECONDARY), egfr=(pl.col("egfr") * 1.04).round(1))
    return {"patients": patients, "egfr": pl.concat([egfr, second])}


def _ols_spline(egfr: pl.DataFrame) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Group-wise OLS on the linear spline basis (1, min(t,k), max(t-k,0))."""
    grid = np.union1d(np.linspace(0, 3, 31), [KNOT])
    traj, summary = [], []
    for group in GROUPS:  # two study arms, not patients
        d = egfr.filter(pl.col("group") == group)
        t = d["years_from_index"].to_numpy()
        y = d["egfr"].to_numpy()
        x = np.column_stack([np.ones_like(t), np.minimum(t, KNOT), np.maximum(t - KNOT, 0)])
        beta, *_ = np.linalg.lstsq(x, y, rcond=None)
        resid = y - x @ beta
        cov = np.linalg.inv(x.T @ x) * (resid @ resid) / (len(y) - 3)
        xg = np.column_stack(
            [np.ones_like(grid), np.minimum(grid, KNOT), np.maximum(grid - KNOT, 0)]
        )
        mean = xg @ beta
        se = np.sqrt(np.einsum("ij,jk,ik->i", xg, cov, xg))
        traj.append(
            pl.DataFrame(
                {
                    "model": "linear spline (knot 3 months)",
                    "group": group,
                    "years": grid,
                    "mean": mean,
                    "lower": mean - 1.96 * se,
                    "upper": mean + 1.96 * se,
                }
            )
        )
        summary.append(
            pl.DataFrame(
                {
                    "model": "linear spline (knot 3 months)",
                    "contrast": group,
                    "quantity": ["acute_slope", "chronic_slope"],
                    "estimate": beta[1:] * np.array([KNOT, 1.0]),
                    "se": np.sqrt(np.diag(cov)[1:]) * np.array([KNOT, 1.0]),
                }
            )
        )
    s = pl.concat(summary).with_columns(
        lower=pl.col("estimate") - 1.96 * pl.col("se"),
        upper=pl.col("estimate") + 1.96 * pl.col("se"),
        p=pl.lit(None, dtype=pl.Float64),
    )
    return pl.concat(traj), s


def _endpoints(egfr: pl.DataFrame, patients: pl.DataFrame, no_events: bool) -> pl.DataFrame:
    base = egfr.filter(pl.col("visit") == 0).select("patient_id", b="egfr")
    last = egfr.group_by("patient_id").agg(last=pl.col("years_from_index").max())
    d = egfr.join(base, on="patient_id").filter(pl.col("egfr").is_not_null())
    hit = (
        d.filter((pl.col("egfr") <= 0.6 * pl.col("b")) & (pl.col("visit") > 0))
        .group_by("patient_id")
        .agg(hit=pl.col("years_from_index").min())
    )
    fail = (
        d.filter((pl.col("egfr") < 15) & (pl.col("visit") > 0))
        .group_by("patient_id")
        .agg(fail=pl.col("years_from_index").min())
    )
    p = (
        patients.select("patient_id", "group", "index_date", "death_years")
        .join(last, on="patient_id", how="left")
        .join(hit, on="patient_id", how="left")
        .join(fail, on="patient_id", how="left")
    )
    if no_events:
        p = p.with_columns(hit=pl.lit(None, dtype=pl.Float64), fail=pl.lit(None, dtype=pl.Float64))
    rows = []
    for name, column in (("egfr_decline_40pct", "hit"), ("kidney_failure", "fail")):
        ended_by_death = pl.col("death_years") < pl.min_horizontal(
            pl.col(column).fill_null(99), pl.col("last")
        )
        years = pl.min_horizontal(pl.col(column).fill_null(pl.col("last")), pl.col("death_years"))
        rows.append(
            p.with_columns(
                endpoint=pl.lit(name),
                years=years,
                event=(pl.col(column).is_not_null() & ~ended_by_death).cast(pl.Int8),
                competing=ended_by_death.cast(pl.Int8),
            ).with_columns(
                start_date=pl.col("index_date"),
                end_date=pl.col("index_date")
                + pl.duration(days=(pl.col("years") * 365.25).round().cast(pl.Int64)),
                reason=pl.when(pl.col("event") == 1)
                .then(pl.lit(name))
                .when(pl.col("competing") == 1)
                .then(pl.lit("death"))
                .otherwise(pl.lit("end_of_followup")),
            )
        )
    return pl.concat(rows)


def _survival(endpoints: pl.DataFrame) -> tuple[pl.DataFrame, pl.DataFrame, pl.DataFrame]:
    curves, risk, hrs = [], [], []
    for endpoint in endpoints["endpoint"].unique(maintain_order=True).to_list():
        e = endpoints.filter(pl.col("endpoint") == endpoint)
        cumulative = endpoint == "kidney_failure"
        for group in GROUPS:  # arms, not patients
            g = e.filter(pl.col("group") == group)
            if cumulative:
                status = (g["event"] + 2 * g["competing"]).to_numpy()
                fitter = AalenJohansenFitter(calculate_variance=True)
                fitter.fit(g["years"].to_numpy(), status, event_of_interest=1)
                est = fitter.cumulative_density_.iloc[:, 0]
                ci = fitter.confidence_interval_
            else:
                fitter = KaplanMeierFitter()
                fitter.fit(g["years"].to_numpy(), g["event"].to_numpy())
                est = fitter.survival_function_.iloc[:, 0]
                ci = fitter.confidence_interval_
            curves.append(
                pl.DataFrame(
                    {
                        "endpoint": endpoint,
                        "group": group,
                        "years": est.index.to_numpy(dtype=float),
                        "estimate": est.to_numpy(dtype=float),
                        "lower": ci.iloc[:, 0].to_numpy(dtype=float),
                        "upper": ci.iloc[:, 1].to_numpy(dtype=float),
                        "measure": "cumulative_incidence" if cumulative else "survival",
                    }
                )
            )
            times = pl.DataFrame({"years": AT_RISK_YEARS})
            risk.append(
                times.join(g.select("years").rename({"years": "t"}), how="cross")
                .group_by("years")
                .agg(n_at_risk=(pl.col("t") >= pl.col("years")).sum().cast(pl.Int64))
                .with_columns(endpoint=pl.lit(endpoint), group=pl.lit(group))
            )
        if int(e["event"].sum()) >= 2:
            cox = CoxPHFitter()
            frame = e.select(
                "years", "event", active=(pl.col("group") == "active").cast(pl.Int8)
            ).to_pandas()
            cox.fit(frame, duration_col="years", event_col="event")
            s = cox.summary.loc["active"]
            ph = proportional_hazard_test(cox, frame, time_transform="rank").summary["p"].iloc[0]
            hrs.append(
                {
                    "endpoint": endpoint,
                    "term": "active vs placebo",
                    "hr": float(s["exp(coef)"]),
                    "hr_lower": float(s["exp(coef) lower 95%"]),
                    "hr_upper": float(s["exp(coef) upper 95%"]),
                    "p": float(s["p"]),
                    "ph_p": float(ph),
                }
            )
    at_risk = (
        pl.concat(risk)
        .select("endpoint", "group", "years", "n_at_risk")
        .sort("endpoint", "group", "years")
    )
    return (
        pl.concat(curves),
        at_risk,
        pl.DataFrame(
            hrs,
            schema={
                "endpoint": pl.String,
                "term": pl.String,
                "hr": pl.Float64,
                "hr_lower": pl.Float64,
                "hr_upper": pl.Float64,
                "p": pl.Float64,
                "ph_p": pl.Float64,
            },
        ),
    )


def _write_table(run: Path, name: str, df: pl.DataFrame, sheets: dict[str, pl.DataFrame]) -> None:
    (run / "tables").mkdir(exist_ok=True)
    df.write_csv(run / "tables" / f"{name}.csv")
    header = "| " + " | ".join(df.columns) + " |"
    rule = "|" + "---|" * len(df.columns)
    body = ["| " + " | ".join("" if v is None else str(v) for v in row) + " |" for row in df.rows()]
    (run / "tables" / f"{name}.md").write_text(
        "\n".join([header, rule, *body]) + "\n", encoding="utf-8"
    )
    sheets[name] = df


def build_run_folder(
    run: Path,
    *,
    n_patients: int = 160,
    seed: int = 7,
    omit: Iterable[str] = (),
    recipe: str = "two_arm_trial",
    no_events: bool = False,
) -> dict[str, Any]:
    """Write a complete run folder to ``run``; return what tests need to check it.

    ``omit`` lists run-folder files (relative paths) not to write, as a recipe that
    does not make them would.
    """
    run.mkdir(parents=True, exist_ok=True)
    omit = set(omit)
    sim = simulate(n_patients, seed)
    patients, egfr = sim["patients"], sim["egfr"]
    primary = egfr.filter(pl.col("equation") == PRIMARY)

    labs = primary.select(
        "patient_id",
        "sample_date",
        sample_datetime=pl.col("sample_date").cast(pl.Datetime("us")),
        analyte=pl.lit("creatinine"),
        value="creatinine_mg_dl",
        unit=pl.lit("mg/dL"),
        reported_value=pl.col("creatinine_mg_dl").cast(pl.String),
        reported_unit=pl.lit("mg/dL"),
        setting="setting",
        source=pl.lit("labs.csv"),
        source_row=pl.int_range(1, pl.len() + 1),
        n_collapsed=pl.lit(1, dtype=pl.Int32),
    )
    reasons = [r for r, n in REJECT_REASONS.items() for _ in range(n)]
    rejected = pl.DataFrame(
        {
            "table": "labs",
            "source": "labs.csv",
            "source_row": np.arange(len(reasons)) + labs.height + 1,
            "patient_id": patients["patient_id"].to_numpy()[np.arange(len(reasons)) % n_patients],
            "reason": reasons,
            "detail": "simulated",
        }
    )
    merged = 9
    files: dict[str, pl.DataFrame] = {
        "labs.parquet": conform(labs, LABS),
        "egfr.parquet": conform(egfr, EGFR),
    }
    base = egfr.filter(pl.col("visit") == 0).join(
        patients.select("patient_id", "group"), on="patient_id", how="left", suffix="_p"
    )
    baseline = base.select(
        "patient_id",
        "equation",
        baseline_egfr="egfr",
        baseline_date="sample_date",
        baseline_n_values=pl.lit(1, dtype=pl.Int32),
        baseline_method=pl.lit("value at randomisation"),
        baseline_reason=pl.when(pl.col("egfr").is_null()).then(pl.lit("no_value_in_window")),
    )
    files["baseline.parquet"] = conform(baseline, BASELINE).join(
        patients.select("patient_id", "group"), on="patient_id"
    )

    ok = egfr.filter(pl.col("egfr").is_not_null())
    slopes = (
        ok.group_by("patient_id", "equation")
        .agg(
            n_values=pl.len().cast(pl.Int32),
            span_years=pl.col("years_from_index").max() - pl.col("years_from_index").min(),
            slope_per_year=pl.cov("years_from_index", "egfr") / pl.col("years_from_index").var(),
            mean_t=pl.col("years_from_index").mean(),
            mean_y=pl.col("egfr").mean(),
        )
        .with_columns(
            intercept=pl.col("mean_y") - pl.col("slope_per_year") * pl.col("mean_t"),
            eligible=(pl.col("n_values") >= 3) & (pl.col("span_years") >= 1.0),
        )
        .with_columns(
            ineligible_reason=pl.when(~pl.col("eligible")).then(pl.lit("too_few_values")),
            rapid_decline=pl.col("eligible") & (pl.col("slope_per_year") < -5),
        )
    )
    files["slopes.parquet"] = conform(slopes, SLOPES).join(
        patients.select("patient_id", "group"), on="patient_id"
    )

    p_uacr = patients.select("patient_id", "uacr")
    stages = (
        base.filter(pl.col("equation") == PRIMARY)
        .join(p_uacr, on="patient_id")
        .select(
            "patient_id",
            "equation",
            stage_date="sample_date",
            g_category=g_category(pl.col("egfr")),
            a_category=pl.when(pl.col("uacr") < 30)
            .then(pl.lit("A1"))
            .when(pl.col("uacr") <= 300)
            .then(pl.lit("A2"))
            .otherwise(pl.lit("A3")),
        )
    )
    files["stages.parquet"] = stages
    risk = pl.DataFrame(
        {
            "g_category": [g for g in RISK_ROWS for _ in range(3)],
            "a_category": ["A1", "A2", "A3"] * len(RISK_ROWS),
            "risk": [r for row in RISK_ROWS.values() for r in row],
        }
    )
    grid = (
        stages.filter(pl.col("g_category").is_not_null())
        .group_by("g_category", "a_category")
        .agg(n=pl.len().cast(pl.Int64))
        .join(risk, on=["g_category", "a_category"], how="left")
        .sort("g_category", "a_category")
    )

    last = (
        ok.filter(pl.col("equation") == PRIMARY)
        .sort("years_from_index")
        .group_by("patient_id")
        .agg(pl.col("egfr").last(), pl.col("sample_date").last())
    )
    transitions = (
        stages.join(last, on="patient_id")
        .with_columns(to_category=g_category(pl.col("egfr")))
        .filter(
            pl.col("g_category").is_not_null() & (pl.col("g_category") != pl.col("to_category"))
        )
        .select(
            "patient_id",
            "equation",
            axis=pl.lit("G"),
            transition_date="sample_date",
            from_category="g_category",
            to_category="to_category",
        )
        .with_columns(
            direction=pl.when(pl.col("to_category") > pl.col("from_category"))
            .then(pl.lit("worsening"))
            .otherwise(pl.lit("improvement"))
        )
    )
    files["transitions.parquet"] = conform(transitions, TRANSITIONS)
    counts = (
        transitions.group_by("from_category", "to_category")
        .agg(n=pl.len().cast(pl.Int64))
        .sort("from_category", "to_category")
    )

    primary_g = primary.join(
        patients.select("patient_id", "group"), on="patient_id", how="left", suffix="_p"
    )
    endpoints = _endpoints(primary_g, patients, no_events)
    files["endpoints.parquet"] = conform(endpoints, ENDPOINTS).join(
        patients.select("patient_id", "group"), on="patient_id"
    )
    curves, at_risk, hrs = _survival(endpoints)
    trajectories, slope_summary = _ols_spline(primary_g.filter(pl.col("egfr").is_not_null()))
    models = {
        "models/survival_curves.parquet": curves,
        "models/at_risk.parquet": at_risk,
        "models/hazard_ratios.parquet": hrs,
        "models/trajectories.parquet": trajectories,
        "models/slope_summary.parquet": slope_summary,
        "models/kdigo_grid.parquet": grid,
        "models/transition_counts.parquet": counts,
    }
    files.update(models)
    (run / "models").mkdir(exist_ok=True)
    for name, df in files.items():
        if name not in omit and name != "stages.parquet":  # stages stay in memory
            _to_contract(name, df).write_parquet(run / name)
    if "rejected_rows.csv" not in omit:
        conform(rejected, REJECTED).write_csv(run / "rejected_rows.csv")

    # ---- tables (aggregates only, small cells already protected as the tables stage does)
    sheets: dict[str, pl.DataFrame] = {}
    py = endpoints.group_by("endpoint", "group").agg(
        patients=pl.len(),
        events=pl.col("event").sum().cast(pl.Int64),
        person_years=pl.col("years").sum(),
    )
    endpoint_table = py.sort("endpoint", "group").select(
        "endpoint",
        "group",
        patients=_small(pl.col("patients")),
        events=_small(pl.col("events")),
        person_years=pl.col("person_years").round(1),
        rate_per_100py=(100 * pl.col("events") / pl.col("person_years")).round(2),
    )
    tables = {
        "endpoint_table": endpoint_table,
        "incidence_rates": endpoint_table.select(
            "endpoint", "group", "events", "person_years", "rate_per_100py"
        ),
        "slope_table": slope_summary.select(
            "model",
            "contrast",
            "quantity",
            pl.col("estimate").round(2),
            pl.col("lower").round(2),
            pl.col("upper").round(2),
        ),
        "baseline_characteristics": patients.join(
            base.filter(pl.col("equation") == PRIMARY).select("patient_id", "egfr"), on="patient_id"
        )
        .group_by("group")
        .agg(
            patients=pl.len().cast(pl.String),
            age_mean=pl.col("age_at_index").mean().round(1),
            female_pct=(100 * (pl.col("sex") == "female").mean()).round(1),
            egfr_mean=pl.col("egfr").mean().round(1),
        )
        .sort("group"),
        # the shared KDIGO tables as the tables stage prints them (protected, long layout)
        "kdigo_grid": kdigo_grid_table(
            grid.select(
                pl.col("g_category").repeat_by("n").explode(),
                pl.col("a_category").repeat_by("n").explode(),
            )
            .drop_nulls()
            .with_row_index("patient_id")
            .with_columns(pl.col("patient_id").cast(pl.String))
        ),
        "transition_matrix": transition_table(transitions),
    }
    for name, df in tables.items():
        if f"tables/{name}.csv" not in omit:
            _write_table(run, name, df, sheets)
    if sheets and "tables/tables.xlsx" not in omit:
        import xlsxwriter

        with xlsxwriter.Workbook(run / "tables" / "tables.xlsx") as book:
            for name, df in sheets.items():
                df.write_excel(book, worksheet=name[:31])

    accounting = [
        {
            "table": "labs",
            "rows_read": labs.height + len(reasons) + merged,
            "rows_used": labs.height,
            "rows_rejected": len(reasons),
            "rows_merged": merged,
        },
        {
            "table": "patients",
            "rows_read": n_patients,
            "rows_used": n_patients,
            "rows_rejected": 0,
            "rows_merged": 0,
        },
    ]
    by_reason = [{"table": "labs", "reason": r, "rows": n} for r, n in REJECT_REASONS.items()]
    config = {
        "study": {
            "name": "Invented Northfield-Lakeside trial",
            "recipe": recipe,
            "seed": seed,
            "description": "Simulated two-arm study for tests.",
        },
        "data": {
            "patients": {"path": "patients.csv"},
            "labs": {"path": "labs.csv", "columns": {"result": "value"}},
        },
        "output": {"xlsx": True, "markdown": True},
        "egfr": {
            "equations": [PRIMARY, SECONDARY],
            "primary": PRIMARY,
            "exclude_settings": ["inpatient"],
        },
        "baseline": {"method": "value at randomisation", "window_days": 90},
        "slopes": {
            "min_values": 3,
            "min_span_years": 1.0,
            "rapid_decline_per_year": 5.0,
        },
        "slope_model": {"knot_years": KNOT},
        "endpoints": {
            "definitions": [
                {"name": "egfr_decline_40pct", "decline_pct": 40, "confirm_after_days": 28},
                {"name": "kidney_failure", "components": ["dialysis", "transplant"]},
            ]
        },
        "tables": {"small_cell_threshold": THRESHOLD},
    }
    manifest = {
        "schema_version": "1.0",
        "kidneycohort_version": "0.1.0",
        "created_utc": "2026-01-15T09:30:00Z",
        "config": config,
        "overrides": ["slopes.knot_years=0.25"],
        "inputs": [
            {"table": "patients", "path": "patients.csv", "sha256": "a" * 64, "rows": n_patients},
            {
                "table": "labs",
                "path": "labs.csv",
                "sha256": "b" * 64,
                "rows": accounting[0]["rows_read"],
            },
        ],
        "packages": {"python": "3.11", "polars": pl.__version__, "numpy": np.__version__},
        "seed": seed,
        "accounting": accounting,
        "accounting_by_reason": by_reason,
        "steps": [
            {"name": "harmonise", "seconds": 0.12, "rows_out": labs.height},
            {"name": "egfr", "seconds": 0.05, "rows_out": egfr.height},
            {"name": "baseline", "seconds": 0.01, "rows_out": baseline.height},
        ],
        "warnings": [
            f"egfr: {egfr['egfr'].null_count()} values not computable (creatinine_missing)",
            f"labs: a sample on {dt.date(2019, 5, 2).isoformat()} is before index",
        ],
        "study": {
            "name": config["study"]["name"],
            "recipe": recipe,
            "primary_equation": PRIMARY,
            "equations": [PRIMARY, SECONDARY],
        },
    }
    if "manifest.json" not in omit:
        (run / "manifest.json").write_text(json.dumps(manifest, indent=2), encoding="utf-8")
    (run / "run.log").write_text("simulated run\n", encoding="utf-8")
    (run / "warnings.txt").write_text("\n".join(manifest["warnings"]) + "\n", encoding="utf-8")
    return {
        "run": run,
        "patients": patients,
        "egfr": egfr,
        "endpoints": endpoints,
        "stages": stages,
        "transitions": transitions,
        "slopes": files["slopes.parquet"],
        "manifest": manifest,
        "files": files,
        "tables": tables,
    }
