"""The tables an endpoint derivation reads, prepared once: patients with follow-up and
kidney-failure onset, events, baselines and eGFR values with the next value after each.
"""

from __future__ import annotations

import datetime as dt
import logging
from collections.abc import Iterable
from typing import Final

import numpy as np
import polars as pl

from kidneycohort import schemas
from kidneycohort._frames import FrameLike, conform, require_columns, to_polars
from kidneycohort.errors import ConfigError, InputDataError, did_you_mean

__all__ = [
    "_Context",
    "_parse_date",
    "_patient_frame",
    "_prepare_baseline",
    "_prepare_egfr",
    "_prepare_events",
    "_prepare_patients",
]

logger = logging.getLogger(__name__)


# Composite integer sort key: patient code in the high bits, day number in the low bits.
_DAY_SLOTS: Final = np.int64(2**32)


_DAY_OFFSET: Final = np.int64(2**31)


# ------------------------------------------------------------------- input handling
def _parse_date(value: dt.date | str, field: str) -> dt.date:
    if isinstance(value, dt.datetime):
        return value.date()
    if isinstance(value, dt.date):
        return value
    try:
        return dt.date.fromisoformat(str(value))
    except ValueError:
        raise ConfigError(
            f"{field}: expected a date (YYYY-MM-DD), got {value!r}; give e.g. '2024-06-30'"
        ) from None


def _dates_as_date(df: pl.DataFrame, columns: Iterable[str], name: str) -> pl.DataFrame:
    """Cast date-like columns to Date (ISO strings parsed; datetimes truncated)."""
    exprs = []
    for column in columns:
        if column not in df.columns:
            continue
        dtype = df.schema[column]
        if dtype == pl.String:
            bad = df.filter(
                pl.col(column).is_not_null()
                & pl.col(column).str.to_date("%Y-%m-%d", strict=False).is_null()
            )
            if bad.height:
                raise InputDataError(
                    f"{name}: column '{column}' has {bad.height} values that are not dates "
                    f"(first: {bad[column][0]!r}); use YYYY-MM-DD"
                )
            exprs.append(pl.col(column).str.to_date("%Y-%m-%d", strict=False))
        elif isinstance(dtype, pl.Datetime):
            exprs.append(pl.col(column).dt.date())
        elif dtype not in (pl.Date, pl.Null):
            raise InputDataError(
                f"{name}: column '{column}' must hold dates, got type {dtype}; convert it to dates"
            )
    return df.with_columns(exprs) if exprs else df


def _prepare_patients(patients: FrameLike) -> pl.DataFrame:
    df = to_polars(patients, "patients")
    require_columns(df, ("patient_id", "index_date"), "patients")
    df = _dates_as_date(
        df, ("index_date", "death_date", "kfrt_date", "end_of_followup"), "patients"
    )
    cols = ("patient_id", "index_date", "death_date", "kfrt_date", "end_of_followup")
    df = conform(df, {c: schemas.PATIENTS[c] for c in cols})
    if df["patient_id"].null_count():
        raise InputDataError("patients: column 'patient_id' has missing values; fill them")
    dup = df.filter(pl.col("patient_id").is_duplicated())
    if dup.height:
        raise InputDataError(
            f"patients: patient_id must be unique, got {dup.height} duplicated rows "
            f"(first: {dup['patient_id'][0]!r}); keep one row per patient"
        )
    return df


def _prepare_events(events: FrameLike | None) -> pl.DataFrame:
    schema = schemas.EVENTS
    if events is None:
        return pl.DataFrame(schema=schema)
    df = to_polars(events, "events")
    require_columns(df, schemas.EVENTS_REQUIRED, "events")
    df = _dates_as_date(df, ("event_date", "end_date"), "events")
    df = conform(df, schema).with_columns(pl.col("event").str.strip_chars().str.to_lowercase())
    unknown = df.filter(
        ~pl.col("event").is_in(schemas.CANONICAL_EVENTS) | pl.col("event").is_null()
    )
    if unknown.height:
        got = unknown["event"][0]
        raise InputDataError(
            f"events: column 'event' has {unknown.height} unknown values (first: {got!r})"
            f"{did_you_mean(str(got), schemas.CANONICAL_EVENTS)}; use one of "
            + ", ".join(schemas.CANONICAL_EVENTS)
            + " (map site codes first)"
        )
    undated = df.filter(pl.col("event_date").is_null())
    if undated.height:
        raise InputDataError(
            f"events: column 'event_date' is missing on {undated.height} rows "
            f"(first patient {undated['patient_id'][0]!r}); date them or remove them"
        )
    return df


def _prepare_baseline(baseline: FrameLike, equation: str) -> pl.DataFrame:
    df = to_polars(baseline, "baseline")
    require_columns(df, ("patient_id", "equation", "baseline_egfr"), "baseline")
    df = conform(
        df.select("patient_id", "equation", "baseline_egfr"),
        {
            "patient_id": pl.String(),
            "equation": pl.String(),
            "baseline_egfr": pl.Float64(),
        },
    )
    equations = df["equation"].unique().drop_nulls().to_list()
    df = df.filter(pl.col("equation") == equation)
    if df.height == 0 and equations:
        raise InputDataError(
            f"baseline: no rows for equation {equation!r}{did_you_mean(equation, equations)}; "
            f"available: {', '.join(sorted(equations))}"
        )
    dup = df.filter(pl.col("patient_id").is_duplicated())
    if dup.height:
        raise InputDataError(
            f"baseline: more than one row per patient for equation {equation!r} "
            f"(first: {dup['patient_id'][0]!r}); keep one baseline per patient"
        )
    bad = df.filter(pl.col("baseline_egfr") <= 0)
    if bad.height:
        raise InputDataError(
            f"baseline: baseline_egfr must be positive, got {bad['baseline_egfr'][0]} for "
            f"patient {bad['patient_id'][0]!r}"
        )
    return df.select(
        "patient_id",
        pl.col("baseline_egfr").fill_nan(None).alias("baseline_egfr"),
    )


def _prepare_egfr(egfr: FrameLike, equation: str, needed: bool) -> pl.DataFrame:
    if not needed:
        return pl.DataFrame(
            schema={"patient_id": pl.String(), "date": pl.Date(), "egfr": pl.Float64()}
        )
    df = to_polars(egfr, "egfr")
    require_columns(df, ("patient_id", "sample_date", "equation", "egfr"), "egfr")
    df = _dates_as_date(df, ("sample_date",), "egfr")
    df = df.select(
        pl.col("patient_id").cast(pl.String),
        pl.col("sample_date").alias("date"),
        pl.col("equation").cast(pl.String),
        pl.col("egfr").cast(pl.Float64),
    )
    equations = df["equation"].unique().drop_nulls().to_list()
    df = df.filter(pl.col("equation") == equation)
    if df.height == 0 and equations:
        raise InputDataError(
            f"egfr: no rows for equation {equation!r}{did_you_mean(equation, equations)}; "
            f"available: {', '.join(sorted(equations)) or 'none'}"
        )
    unusable = df.filter(
        pl.col("egfr").is_null() | pl.col("egfr").is_nan() | pl.col("date").is_null()
    ).height
    if unusable:
        logger.info("egfr: %d rows without a computed eGFR or a date are not assessments", unusable)
    return df.filter(
        pl.col("egfr").is_not_null() & pl.col("egfr").is_not_nan() & pl.col("date").is_not_null()
    ).select("patient_id", "date", "egfr")


# -------------------------------------------------------------------- patient frame
def _patient_frame(patients: pl.DataFrame, events: pl.DataFrame, data_cut: dt.date) -> pl.DataFrame:
    """One row per patient: time zero, follow-up end, death, kidney death, transplant."""
    unknown = events.join(patients.select("patient_id"), on="patient_id", how="anti").height
    if unknown:
        logger.warning("events: %d rows name patients not in the patients table; not used", unknown)
    per_event = events.group_by("patient_id").agg(
        pl.col("event_date")
        .filter(pl.col("event").is_in(["death", "kidney_death"]))
        .min()
        .alias("_death_ev"),
        pl.col("event_date").filter(pl.col("event") == "kidney_death").min().alias("_kdeath_ev"),
        pl.col("event_date").filter(pl.col("event") == "transplant").min().alias("transplant_date"),
    )
    cut = pl.lit(data_cut, dtype=pl.Date)
    p = (
        patients.sort("patient_id")
        .with_row_index("pcode")
        .with_columns(pl.col("pcode").cast(pl.Int64))
        .join(per_event, on="patient_id", how="left")
        .with_columns(
            pl.min_horizontal("death_date", "_death_ev").alias("death_date"),
            pl.min_horizontal("end_of_followup", cut).alias("fu_end"),
        )
        .with_columns(
            # A kidney_death record attributes the patient's (earliest) death to kidney causes.
            pl.when(pl.col("_kdeath_ev").is_not_null())
            .then(pl.col("death_date"))
            .alias("kidney_death_date"),
            pl.when(pl.col("end_of_followup").is_not_null() & (pl.col("end_of_followup") < cut))
            .then(pl.lit("end_of_followup"))
            .otherwise(pl.lit("data_cut"))
            .alias("fu_end_reason"),
        )
    )
    beyond = (
        events.join(p.select("patient_id", "fu_end"), on="patient_id")
        .filter(pl.col("event_date") > pl.col("fu_end"))
        .height
    )
    if beyond:
        logger.info("events: %d rows dated after the end of follow-up are not used", beyond)
    disagree = p.filter(pl.col("_kdeath_ev") != pl.col("death_date")).height
    if disagree:
        logger.warning(
            "events: %d kidney_death dates differ from the earliest death date; the earliest is used",
            disagree,
        )
    return p.drop("_death_ev", "_kdeath_ev")


def _kidney_failure_onset(
    p: pl.DataFrame, events: pl.DataFrame, min_days: int
) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Per-patient onset of each kidney-failure source, and the acute dialysis episodes."""
    dialysis = (
        events.filter(pl.col("event") == "dialysis")
        .join(p.select("patient_id", "pcode", "death_date", "transplant_date"), on="patient_id")
        .with_columns(
            (
                pl.col("end_date").is_null()
                | ((pl.col("end_date") - pl.col("event_date")).dt.total_days() >= min_days)
                | (
                    pl.col("death_date").is_not_null()
                    & (pl.col("end_date") >= pl.col("death_date"))
                )
                | (
                    pl.col("transplant_date").is_not_null()
                    & (pl.col("end_date") >= pl.col("transplant_date"))
                )
            ).alias("chronic")
        )
    )
    onset = (
        dialysis.filter("chronic")
        .group_by("pcode")
        .agg(pl.col("event_date").min().alias("dialysis_date"))
    )
    acute = dialysis.filter(~pl.col("chronic")).select(
        "pcode", pl.col("event_date").alias("start"), pl.col("end_date").alias("end")
    )
    kf = (
        p.select("pcode", "transplant_date", "kfrt_date")
        .join(onset, on="pcode", how="left", maintain_order="left")
        .with_columns(
            pl.min_horizontal("dialysis_date", "transplant_date", "kfrt_date").alias("kf_date")
        )
    )
    return kf, acute


def _key_expr() -> pl.Expr:
    """Sort key of (patient, day): pcode in the high bits, day number in the low bits."""
    return pl.col("pcode").cast(pl.Int64) * int(_DAY_SLOTS) + (
        pl.col("date").cast(pl.Int32).cast(pl.Int64) + int(_DAY_OFFSET)
    )


def _keys(pcode: pl.Series, date: pl.Series) -> np.ndarray:
    return pcode.to_numpy().astype(np.int64) * _DAY_SLOTS + (
        date.to_physical().to_numpy().astype(np.int64) + _DAY_OFFSET
    )


def _inside_acute_episode(values: pl.DataFrame, acute: pl.DataFrame) -> np.ndarray:
    """Boolean mask: value date falls inside a short dialysis episode of its patient."""
    if acute.height == 0 or values.height == 0:
        return np.zeros(values.height, dtype=bool)
    # Running maximum of episode ends covers overlapping episodes (sorted cumulative trick).
    ep = acute.sort("pcode", "start").with_columns(
        pl.col("end").cum_max().over("pcode").alias("end")
    )
    ekey = _keys(ep["pcode"], ep["start"])
    vkey = values["key"].to_numpy()
    j = np.searchsorted(ekey, vkey, side="right") - 1
    jj = np.clip(j, 0, None)
    same = (j >= 0) & (ep["pcode"].to_numpy()[jj] == values["pcode"].to_numpy())
    end_days = ep["end"].to_physical().to_numpy()[jj]
    return same & (end_days >= values["date"].to_physical().to_numpy())


def _with_next_value(values: pl.DataFrame, after_days: int) -> pl.DataFrame:
    """Add the first value of the same patient at least ``after_days`` later.

    ``values`` must be sorted by (pcode, date) with one row per patient and date.
    """
    n = values.height
    if n == 0:
        return values.with_columns(
            pl.lit(None, dtype=pl.Date).alias("next_date"),
            pl.lit(None, dtype=pl.Float64).alias("next_egfr"),
        )
    key = values["key"].to_numpy()
    idx = np.minimum(np.searchsorted(key, key + np.int64(after_days), side="left"), n)
    pcode = values["pcode"].to_numpy()
    idx_c = np.minimum(idx, n - 1)
    found = (idx < n) & (pcode[idx_c] == pcode)
    return (
        values.with_columns(
            pl.Series(
                "next_date", values["date"].to_physical().to_numpy()[idx_c], dtype=pl.Int32
            ).cast(pl.Date),
            pl.Series("next_egfr", values["egfr"].to_numpy()[idx_c], dtype=pl.Float64),
            pl.Series("_found", found, dtype=pl.Boolean),
        )
        .with_columns(
            pl.when("_found").then(pl.col("next_date")).alias("next_date"),
            pl.when("_found").then(pl.col("next_egfr")).alias("next_egfr"),
        )
        .drop("_found")
    )


# ------------------------------------------------------------------ the derivation
class _Context:
    """Inputs prepared once and the per-rules caches of eligible values.

    Internally a patient is its integer ``pcode`` (row number in ``patient_id`` order),
    so per-value lookups of patient columns are gathers rather than string joins.
    """

    def __init__(
        self,
        p: pl.DataFrame,
        events: pl.DataFrame,
        egfr: pl.DataFrame,
        baseline: pl.DataFrame,
    ) -> None:
        self.p = p.join(baseline, on="patient_id", how="left", maintain_order="left")
        self.events = events
        self.egfr = egfr
        self._coded: pl.DataFrame | None = None
        self._kf: dict[int, tuple[pl.DataFrame, pl.DataFrame]] = {}
        self._base: dict[int, pl.DataFrame] = {}
        self._values: dict[int, tuple[pl.DataFrame, pl.DataFrame]] = {}
        self._next: dict[tuple[int, int], pl.DataFrame] = {}

    def kidney_failure(self, min_days: int) -> tuple[pl.DataFrame, pl.DataFrame]:
        if min_days not in self._kf:
            self._kf[min_days] = _kidney_failure_onset(self.p, self.events, min_days)
        return self._kf[min_days]

    def patient_base(self, min_days: int) -> pl.DataFrame:
        """Patients (in pcode order) with kidney-failure onset and not-evaluable reasons."""
        if min_days not in self._base:
            kf, _ = self.kidney_failure(min_days)
            self._base[min_days] = self.p.join(
                kf.select("pcode", "dialysis_date", "kf_date"),
                on="pcode",
                how="left",
                maintain_order="left",
            ).with_columns(
                pl.when(pl.col("index_date").is_null())
                .then(pl.lit("no_index_date"))
                .when(pl.col("fu_end") < pl.col("index_date"))
                .then(
                    pl.when(pl.col("fu_end_reason") == "data_cut")
                    .then(pl.lit("index_after_data_cut"))
                    .otherwise(pl.lit("end_of_followup_before_index"))
                )
                .when(pl.col("death_date") < pl.col("index_date"))
                .then(pl.lit("death_before_index"))
                .alias("not_evaluable"),
                pl.when(pl.col("kf_date") < pl.col("index_date"))
                .then(pl.lit("kidney_failure_before_index"))
                .alias("prevalent_kf"),
            )
        return self._base[min_days]

    def coded_egfr(self) -> pl.DataFrame:
        """eGFR as (pcode, date, egfr), sorted, one assessment per patient and day."""
        if self._coded is None:
            coded = (
                self.egfr.join(self.p.select("patient_id", "pcode"), on="patient_id", how="inner")
                .select(_key_expr().alias("key"), "pcode", "date", "egfr")
                .sort("key")
            )
            orphans = self.egfr.height - coded.height
            if orphans:
                logger.warning(
                    "egfr: %d assessments of patients not in the patients table; not used", orphans
                )
            repeat = (pl.col("pcode") == pl.col("pcode").shift(1)) & (
                pl.col("date") == pl.col("date").shift(1)
            )
            if coded.select(repeat.any()).item():
                # Several values on one day (repeat draws) are one assessment: their mean
                # (common practice).
                coded = (
                    coded.group_by("key", "pcode", "date")
                    .agg(pl.col("egfr").mean())
                    .sort("key")
                    .select("key", "pcode", "date", "egfr")
                )
            self._coded = coded
        return self._coded

    def values(self, min_days: int) -> tuple[pl.DataFrame, pl.DataFrame]:
        """Eligible eGFR assessments (after index, within follow-up, native kidney) with
        their patient's columns, and each patient's last eligible assessment date."""
        if min_days not in self._values:
            base = self.patient_base(min_days)
            _, acute = self.kidney_failure(min_days)
            coded = self.coded_egfr()
            pcode = coded["pcode"]
            joined = coded.with_columns(
                base[c].gather(pcode)
                for c in ("index_date", "fu_end", "death_date", "kf_date", "baseline_egfr")
            )
            in_window = joined.filter(
                (pl.col("date") > pl.col("index_date"))
                & (pl.col("date") <= pl.col("fu_end"))
                & (pl.col("death_date").is_null() | (pl.col("date") <= pl.col("death_date")))
            )
            native = in_window.filter(
                pl.col("kf_date").is_null() | (pl.col("date") < pl.col("kf_date"))
            )
            acute_mask = _inside_acute_episode(native, acute)
            logger.info(
                "endpoints: %d eligible eGFR assessments; set aside %d after kidney failure and "
                "%d inside acute dialysis episodes",
                native.height - int(acute_mask.sum()),
                in_window.height - native.height,
                int(acute_mask.sum()),
            )
            native = native.filter(pl.Series(~acute_mask))
            last = native.filter(
                pl.col("pcode") != pl.col("pcode").shift(-1, fill_value=-1)
            ).select("pcode", pl.col("date").alias("last_date"))
            self._values[min_days] = (native, last)
        return self._values[min_days]

    def values_with_next(self, min_days: int, after_days: int) -> pl.DataFrame:
        key = (min_days, after_days)
        if key not in self._next:
            self._next[key] = _with_next_value(self.values(min_days)[0], after_days)
        return self._next[key]
