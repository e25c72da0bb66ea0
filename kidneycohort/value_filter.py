"""Which eGFR values count: care setting and acute kidney injury (AKI) flags.

Slopes, baselines and KDIGO categories describe chronic kidney function. Results taken
in hospital or the emergency department, and results distorted by an episode of acute
kidney injury, are commonly left out of that work. This module marks such results
instead of dropping them: :func:`apply_value_filter` returns the input table with the
flag columns below added, so a user can see what was excluded and why, and every
downstream stage (:func:`kidneycohort.baseline.egfr_baseline`,
:func:`kidneycohort.slopes.egfr_slopes`, :mod:`kidneycohort.kdigo`) skips the rows with
``excluded`` true.

Columns added
-------------
``aki_flag`` (bool)
    The creatinine of this sample meets a KDIGO 2012 creatinine criterion for AKI
    against earlier samples of the same patient (null when the sample has no creatinine).
``aki_criterion`` (str)
    ``"rise_0.3_mg_dl_48h"`` or ``"ratio_1.5_7d"`` (the first one met), else null.
``aki_recovery`` (bool)
    Not itself flagged, but within ``aki_recovery_days`` after a flagged sample.
``excluded`` (bool)
    The row is left out of baseline, slope and category work.
``exclusion_reason`` (str)
    ``"setting_<setting>"``, ``"aki"``, ``"aki_recovery"`` or ``"qualified_value"`` (the
    first that applies), null when the row is used.

Qualified results: a creatinine reported as ``"<20"`` µmol/L is a detection limit, not
a value; its eGFR (``qualified`` true in the eGFR table) would show as a spike of about
160 if taken as exact. ``qualified_values: exclude`` (the default) leaves such rows out
of every downstream analysis with reason ``qualified_value``; ``use`` takes the limit
as the value (a stated substitution).

AKI criteria (KDIGO 2012 AKI guideline, section 2.1.1): an increase in serum creatinine
by at least 0.3 mg/dL within 48 hours, or to at least 1.5 times baseline known or
presumed to have occurred within the prior 7 days. The reference value for each
criterion is the lowest creatinine of the same patient in the preceding window
(``[t - 48 h, t)`` and ``[t - 7 d, t)``); using the lowest prior value as the presumed
baseline is common practice in electronic-record AKI detection. Urine-output criteria
cannot be assessed from laboratory tables and are not used.

All flags are computed per patient with window expressions only, so they are the same
on any partition of patients (DEVELOPERS.md, partition rule).
"""

from __future__ import annotations

import logging
from typing import Final, Literal

import polars as pl
from pydantic import Field

from kidneycohort import schemas
from kidneycohort._frames import FrameLike, as_int, follows_input, require_columns, to_polars
from kidneycohort._rules import RuleModel
from kidneycohort._rules import rule_error_message as rule_error_message
from kidneycohort.errors import InputDataError, did_you_mean

__all__ = [
    "AKI_CRITERIA",
    "EGFR_REQUIRED",
    "FILTER_COLUMNS",
    "KNOWN_SETTINGS",
    "ValueFilterRule",
    "apply_value_filter",
    "egfr_keys",
    "flag_aki",
    "sample_time_expr",
    "usable_egfr",
    "value_filter_reasons",
]

logger = logging.getLogger(__name__)

AKI_CRITERIA: Final = ("rise_0.3_mg_dl_48h", "ratio_1.5_7d")
"""Names of the creatinine criteria, as written to ``aki_criterion``."""

KNOWN_SETTINGS: Final = ("outpatient", "inpatient", "emergency")

EGFR_REQUIRED: Final = ("patient_id", "equation", "years_from_index", "egfr")


class ValueFilterRule(RuleModel):
    """Which eGFR results count for baseline, slope and category work.

    Field names are the keys of the ``value_filter`` section of a study config.
    """

    exclude_settings: tuple[str, ...] = Field(
        default=("inpatient", "emergency"),
        description=(
            "Care settings whose results are left out (values of the 'setting' column; "
            "results with no recorded setting are kept)."
        ),
    )
    exclude_aki: bool = Field(
        default=True,
        description="Leave out results flagged as acute kidney injury by the KDIGO creatinine criteria.",
    )
    aki_recovery_days: float = Field(
        default=30.0,
        ge=0,
        description=(
            "Days after an AKI-flagged result during which later results are also left out "
            "(recovery window; 0 keeps them)."
        ),
    )
    aki_rise_mg_dl: float = Field(
        default=0.3,
        gt=0,
        description="Absolute creatinine rise (mg/dL) that flags AKI (KDIGO 2012: 0.3).",
    )
    aki_rise_hours: float = Field(
        default=48.0,
        gt=0,
        description="Window (hours) for the absolute rise (KDIGO 2012: 48).",
    )
    aki_ratio: float = Field(
        default=1.5,
        gt=1,
        description="Ratio to the lowest prior creatinine that flags AKI (KDIGO 2012: 1.5).",
    )
    aki_ratio_days: float = Field(
        default=7.0,
        gt=0,
        description="Window (days) for the ratio criterion (KDIGO 2012: 7).",
    )
    qualified_values: Literal["exclude", "use"] = Field(
        default="exclude",
        description="eGFR from a creatinine or cystatin C reported with '<' or '>' (a "
        "limit, not a value): 'exclude' leaves it out of baselines, slopes, stages and "
        "endpoints (reason qualified_value); 'use' takes the limit as the value.",
    )


def sample_time_expr(columns: list[str]) -> pl.Expr:
    """Sample time as a datetime: ``sample_datetime`` when present, else ``sample_date``."""
    parts: list[pl.Expr] = []
    if "sample_datetime" in columns:
        parts.append(pl.col("sample_datetime").cast(pl.Datetime("us")))
    if "sample_date" in columns:
        parts.append(pl.col("sample_date").cast(pl.Date).cast(pl.Datetime("us")))
    if not parts:
        return pl.lit(None, dtype=pl.Datetime("us"))
    return pl.coalesce(parts)


@follows_input
def flag_aki(egfr: FrameLike, rule: ValueFilterRule | None = None) -> pl.DataFrame:
    """Add ``aki_flag``, ``aki_criterion`` and ``aki_recovery`` to an eGFR (or labs) table.

    The criteria are applied row by row; rows of the same patient at the same time (the
    ``egfr`` table repeats a sample once per equation) never serve as each other's
    reference. Rows without creatinine or time get null flags.

    .. math::

        \\text{AKI}(t) \\iff c_t - \\min_{[t-48h,\\,t)} c \\ge 0.3
        \\;\\lor\\; c_t \\ge 1.5 \\min_{[t-7d,\\,t)} c

    Parameters
    ----------
    egfr : polars or pandas DataFrame
        Needs ``patient_id``, ``creatinine_mg_dl`` and ``sample_datetime`` or
        ``sample_date``.
    rule : ValueFilterRule, optional
        Thresholds and the recovery window; the KDIGO defaults when omitted.

    Returns
    -------
    polars.DataFrame
        The input rows in their order with the three columns added.

    Raises
    ------
    InputDataError
        When a needed column is missing.

    References
    ----------
    .. [1] KDIGO Acute Kidney Injury Work Group. KDIGO clinical practice guideline for
       acute kidney injury. Kidney Int Suppl 2012;2:1-138, recommendation 2.1.1.
    """
    rule = rule or ValueFilterRule()
    df = to_polars(egfr, "egfr")
    require_columns(df, ("patient_id", "creatinine_mg_dl"), "egfr")
    if "sample_datetime" not in df.columns and "sample_date" not in df.columns:
        raise InputDataError(
            "egfr: missing required column 'sample_date' (or 'sample_datetime') needed for "
            "AKI flags; add it or set exclude_aki: false"
        )
    time = sample_time_expr(df.columns)
    # integer patient codes and times: sorting and windows on integers, not strings
    work = (
        df.select(
            _pid=pl.col("patient_id").cast(pl.String).rank("dense").fill_null(0).cast(pl.Int64),
            _s=time.dt.epoch("s"),
            _creat=pl.col("creatinine_mg_dl").cast(pl.Float64),
        )
        .with_row_index("_row")
        .filter(pl.col("_creat").is_not_null() & pl.col("_s").is_not_null())
    )
    # One rolling pass over the whole table instead of one per patient: each patient's
    # times (seconds) are shifted by patient_code * gap, with a gap wider than the data
    # span plus the longest window, so that no window reaches another patient. The
    # shifted time is then also the one integer the rows are sorted on.
    rise_s = round(rule.aki_rise_hours * 3600)
    ratio_s = round(rule.aki_ratio_days * 86400)
    recovery_s = round(rule.aki_recovery_days * 86400)
    lo = as_int(work["_s"].min() or 0, "first sample time (s)")
    hi = as_int(work["_s"].max() or 0, "last sample time (s)")
    gap = hi - lo + max(rise_s, ratio_s, recovery_s) + 1
    n_codes = as_int(work["_pid"].max() or 0, "largest patient code") + 1
    if n_codes.bit_length() + gap.bit_length() <= 62:
        work = work.with_columns(
            _start=pl.col("_pid") * gap, _key=pl.col("_pid") * gap + pl.col("_s") - lo
        ).sort("_key")
    else:  # too wide for one integer: number the patients in sorted order instead
        new_patient = (pl.col("_pid") != pl.col("_pid").shift(1)).fill_null(True)
        work = (
            work.sort("_pid", "_s")
            .with_columns(_start=new_patient.cast(pl.Int64).cum_sum() * gap)
            .with_columns(_key=pl.col("_start") + pl.col("_s") - lo)
        )
    creat = pl.col("_creat")
    # closed="left": the window [t - w, t) leaves out the sample itself and any row at the
    # same time (the same sample repeated under another equation)
    low_48h = creat.rolling_min_by("_key", window_size=f"{rise_s}i", closed="left")
    low_7d = creat.rolling_min_by("_key", window_size=f"{ratio_s}i", closed="left")
    # a tiny tolerance so that 1.0 -> 1.3 (a rise of 0.3 in binary floating point) counts
    eps = 1e-9
    rise = (creat - low_48h) >= rule.aki_rise_mg_dl - eps
    ratio = creat >= rule.aki_ratio * low_7d - eps
    work = work.with_columns(
        pl.when(rise)
        .then(pl.lit(AKI_CRITERIA[0]))
        .when(ratio)
        .then(pl.lit(AKI_CRITERIA[1]))
        .otherwise(pl.lit(None, dtype=pl.String))
        .alias("aki_criterion")
    ).with_columns(aki_flag=pl.col("aki_criterion").is_not_null())
    last_aki = pl.when(pl.col("aki_flag")).then(pl.col("_key")).forward_fill()
    work = work.with_columns(
        aki_recovery=(
            ~pl.col("aki_flag")
            & (last_aki >= pl.col("_start")).fill_null(False)
            & ((pl.col("_key") - last_aki) <= recovery_s)
            & pl.lit(recovery_s > 0)
        )
    )
    flags = work.select("_row", "aki_criterion", "aki_flag", "aki_recovery").sort("_row")
    if flags.height == df.height:
        out = df.with_columns(flags.drop("_row"))
    else:
        out = (
            df.with_row_index("_row")
            .join(flags, on="_row", how="left", maintain_order="left")
            .drop("_row")
        )
    logger.info(
        "AKI flags: %d rows flagged, %d in recovery windows",
        int(flags["aki_flag"].sum()),
        int(flags["aki_recovery"].sum()),
    )
    return out


@follows_input
def apply_value_filter(egfr: FrameLike, rule: ValueFilterRule | None = None) -> pl.DataFrame:
    """Mark the results that do not count, keeping every row (see module docstring).

    Parameters
    ----------
    egfr : polars or pandas DataFrame
        An ``egfr`` table (``schemas.EGFR``); ``setting`` is needed when
        ``exclude_settings`` is not empty, ``creatinine_mg_dl`` when ``exclude_aki``.
    rule : ValueFilterRule, optional
        Defaults to ``ValueFilterRule()`` (inpatient and emergency results and AKI left out).

    Returns
    -------
    polars.DataFrame
        The input with ``excluded`` and ``exclusion_reason`` (and the AKI flag columns
        when ``exclude_aki``) added; no row is removed.

    Raises
    ------
    InputDataError
        When a column the rule needs is missing.
    """
    rule = rule or ValueFilterRule()
    df = to_polars(egfr, "egfr")
    for setting in rule.exclude_settings:
        if setting not in KNOWN_SETTINGS:
            logger.warning(
                "value_filter.exclude_settings: %r is not one of %s%s",
                setting,
                ", ".join(KNOWN_SETTINGS),
                did_you_mean(setting, KNOWN_SETTINGS),
            )
    reasons: list[pl.Expr] = []
    if rule.exclude_settings:
        if "setting" not in df.columns:
            raise InputDataError(
                "egfr: missing column 'setting' needed by value_filter.exclude_settings="
                f"{list(rule.exclude_settings)}; add it or set exclude_settings: []"
            )
        # spellings are normalised once per distinct value, not once per row
        spellings = df.select(pl.col("setting").cast(pl.String).unique().drop_nulls().alias("raw"))
        spellings = spellings.with_columns(
            setting=pl.col("raw").str.strip_chars().str.to_lowercase()
        ).filter(pl.col("setting").is_in(list(rule.exclude_settings)))
        reasons.append(
            pl.col("setting")
            .cast(pl.String)
            .replace_strict(
                spellings["raw"],
                "setting_" + spellings["setting"],
                default=None,
                return_dtype=pl.String,
            )
        )
    if rule.exclude_aki:
        df = flag_aki(df, rule)
        reasons.append(
            pl.when(pl.col("aki_flag").fill_null(False))
            .then(pl.lit("aki"))
            .when(pl.col("aki_recovery").fill_null(False))
            .then(pl.lit("aki_recovery"))
        )
    if rule.qualified_values == "exclude" and "qualified" in df.columns:
        flag = (
            pl.col("qualified").str.to_lowercase().is_in(["true", "1", "yes"])
            if df.schema["qualified"] == pl.String
            else pl.col("qualified").cast(pl.Boolean)
        )
        reasons.append(pl.when(flag.fill_null(False)).then(pl.lit("qualified_value")))
    reason = pl.coalesce(reasons) if reasons else pl.lit(None, dtype=pl.String)
    df = df.with_columns(exclusion_reason=reason.cast(pl.String)).with_columns(
        excluded=pl.col("exclusion_reason").is_not_null()
    )
    logger.info("value filter: %d of %d rows excluded", int(df["excluded"].sum()), df.height)
    return df


def usable_egfr(
    egfr: FrameLike, value_filter: ValueFilterRule | None, name: str = "egfr"
) -> pl.DataFrame:
    """The eGFR rows a derivation may use, with ``_days`` (days from index) added.

    Shared by the baseline, slope and category stages: checks the contract columns,
    applies ``value_filter`` when given (or honours an ``excluded`` column already
    present; without either, rows from a qualified result are still excluded), and keeps
    rows with a finite eGFR. The full input is returned as well
    via :func:`egfr_keys` so that no patient disappears from an output.
    """
    df = to_polars(egfr, name)
    require_columns(df, EGFR_REQUIRED, name)
    df = df.with_columns(
        pl.col("patient_id").cast(pl.String),
        pl.col("equation").cast(pl.String),
        pl.col("years_from_index").cast(pl.Float64),
        pl.col("egfr").cast(pl.Float64),
    )
    if value_filter is not None:
        df = apply_value_filter(df, value_filter)
    elif "qualified" in df.columns and "excluded" not in df.columns:
        # no value filter chosen: a limit ("<x") is still never used as a value
        df = apply_value_filter(df, ValueFilterRule(exclude_settings=(), exclude_aki=False))
    if "excluded" not in df.columns:
        df = df.with_columns(excluded=pl.lit(False))
    # rounding to a microsecond keeps -365 days exactly -365 after the years round trip
    return df.with_columns(
        _days=(pl.col("years_from_index") * schemas.DAYS_PER_YEAR).round(6),
        _finite=pl.col("egfr").is_not_null() & pl.col("egfr").is_finite(),
    )


FILTER_COLUMNS: Final = (
    "sample_date",
    "sample_datetime",
    "setting",
    "creatinine_mg_dl",
    "qualified",
    "excluded",
    "exclusion_reason",
)
"""eGFR columns the value filter reads (or gives, when a table was filtered before)."""


def value_filter_reasons(egfr: pl.DataFrame, rule: ValueFilterRule | None) -> pl.Series:
    """Why each row of ``egfr`` does not count (null when it does), as text.

    With ``rule`` the reasons of :func:`apply_value_filter`. Without it an ``excluded``
    column already in the table is honoured (its ``exclusion_reason``, else
    ``"excluded"``) and a qualified result ("<20") is still never used as a value
    (``qualified_value``), as in :func:`usable_egfr`. For the models that read eGFR
    rows directly (the mixed and joint slope models), so that they use the values the
    baseline, slope and category stages use.
    """
    if rule is not None:
        flagged = apply_value_filter(egfr, rule)
    elif "excluded" in egfr.columns:
        stated = (
            pl.col("exclusion_reason").cast(pl.String).fill_null("excluded")
            if "exclusion_reason" in egfr.columns
            else pl.lit("excluded")
        )
        flagged = egfr.select(
            exclusion_reason=pl.when(pl.col("excluded").fill_null(False)).then(stated)
        )
    elif "qualified" in egfr.columns:
        flagged = apply_value_filter(egfr, ValueFilterRule(exclude_settings=(), exclude_aki=False))
    else:
        return pl.repeat(None, egfr.height, dtype=pl.String, eager=True).alias("exclusion_reason")
    return flagged["exclusion_reason"].cast(pl.String)


def egfr_keys(df: pl.DataFrame) -> pl.DataFrame:
    """Every (patient_id, equation) present in a table, in first-seen order."""
    return df.select("patient_id", "equation").unique(maintain_order=True)
