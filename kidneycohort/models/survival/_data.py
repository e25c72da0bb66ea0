"""Shared preparation of the survival analyses: one endpoint's rows with group and
covariates, numbers at risk, curve values at fixed horizons.
"""

from __future__ import annotations

import logging
import warnings
from collections.abc import Sequence
from typing import SupportsFloat

import numpy as np
import pandas as pd
import polars as pl

from kidneycohort._frames import FrameLike, follows_input, to_polars
from kidneycohort.errors import InputDataError, StatisticalWarning, did_you_mean
from kidneycohort.models._design import split_complete_cases, with_group
from kidneycohort.models.survival._rule import AT_RISK_COLUMNS

__all__ = ["_curve_frame", "_estimates_at", "_finite", "_prepare", "_warn_all", "numbers_at_risk"]

logger = logging.getLogger(__name__)


def _prepare(
    endpoints: FrameLike,
    patients: FrameLike | None,
    *,
    endpoint: str | None,
    group_column: str | None,
    extra_columns: Sequence[str] = (),
) -> tuple[pl.DataFrame, pl.DataFrame, str]:
    """One endpoint's rows with ``group`` (and ``extra_columns`` from patients), complete
    cases only; returns (rows, excluded rows with reason codes, endpoint name)."""
    frame = to_polars(endpoints, "endpoints")
    if "endpoint" not in frame.columns:
        raise InputDataError("endpoints: missing required column 'endpoint'")
    names = sorted(frame["endpoint"].drop_nulls().unique().to_list())
    if endpoint is None:
        if len(names) != 1:
            raise InputDataError(
                f"endpoints: the table holds {len(names)} endpoints {names}; pass endpoint=... "
                "to choose one"
            )
        endpoint = names[0]
    elif endpoint not in names:
        raise InputDataError(
            f"endpoints: endpoint '{endpoint}' is not in the table (endpoints: {names})"
            f"{did_you_mean(endpoint, names)}"
        )
    frame = frame.filter(pl.col("endpoint") == endpoint)
    duplicated = frame.filter(pl.col("patient_id").is_duplicated())
    if duplicated.height:
        raise InputDataError(
            f"endpoints: patient '{duplicated['patient_id'][0]}' has more than one '{endpoint}' "
            "row; give one time-to-event row per patient and endpoint"
        )
    wanted = [c for c in extra_columns if c not in frame.columns]
    if wanted:
        if patients is None:
            raise InputDataError(
                f"patients: needed for columns {wanted} but not given; pass the patients table"
            )
        people = to_polars(patients, "patients")
        for name in wanted:
            if name not in people.columns:
                raise InputDataError(
                    f"patients: missing column '{name}'{did_you_mean(name, people.columns)}"
                )
        frame = frame.join(
            people.select(pl.col("patient_id").cast(frame.schema["patient_id"]), *wanted),
            on="patient_id",
            how="left",
        )
    frame = with_group(frame, patients, group_column)
    kept, excluded = split_complete_cases(frame, list(extra_columns))
    if excluded.height:
        logger.warning(
            "%s: %d patients left out of the model for missing covariates (see .excluded_)",
            endpoint,
            excluded.height,
        )
    return kept, excluded, endpoint


@follows_input
def numbers_at_risk(
    durations: pl.DataFrame, times: Sequence[float], *, groups: Sequence[str] | None = None
) -> pl.DataFrame:
    """Patients still at risk (follow-up ``years >= t``) at each of ``times`` per group.

    ``durations`` needs ``group`` and ``years``; the convention is the usual one under
    survival curves (a patient censored or with an event at ``t`` counts at ``t``).
    Returns ``group, years, n_at_risk`` with zeros where nobody is left.
    """
    grid = pl.DataFrame({"years": [float(t) for t in times]})
    present = sorted(durations["group"].unique().to_list()) if groups is None else list(groups)
    keys = pl.DataFrame({"group": present}, schema={"group": pl.String}).join(grid, how="cross")
    counted = (
        durations.select("group", pl.col("years").alias("follow_up"))
        .join(grid, how="cross")
        .group_by("group", "years")
        .agg((pl.col("follow_up") >= pl.col("years")).sum().cast(pl.Int64).alias("n_at_risk"))
    )
    return (
        keys.join(counted, on=["group", "years"], how="left")
        .with_columns(pl.col("n_at_risk").fill_null(0))
        .sort("group", "years")
        .select(AT_RISK_COLUMNS)
    )


def _estimates_at(
    curves: pl.DataFrame, horizons: Sequence[float], follow_up: pl.DataFrame
) -> pl.DataFrame:
    """Step-function value of each curve at ``horizons`` (null beyond a group's follow-up)."""
    grid = (
        pl.DataFrame({"group": sorted(curves["group"].unique().to_list())})
        .join(pl.DataFrame({"years": [float(h) for h in horizons]}), how="cross")
        .sort("years")
    )
    looked_up = grid.join_asof(
        curves.sort("group", "years"),
        on="years",
        by="group",
        strategy="backward",
        check_sortedness=False,
    ).join(follow_up, on="group", how="left")
    beyond = pl.col("years") > pl.col("max_years")
    return (
        looked_up.with_columns(
            [
                pl.when(beyond).then(None).otherwise(pl.col(c)).alias(c)
                for c in ("estimate", "lower", "upper")
            ]
        )
        .select("group", "years", "estimate", "lower", "upper", "measure")
        .sort("group", "years")
    )


def _curve_frame(
    group: str, timeline: np.ndarray, estimate: np.ndarray, bounds: pd.DataFrame, measure: str
) -> pl.DataFrame:
    # lifelines' Aalen–Johansen labels its two limits the wrong way round; order them
    limits = bounds.to_numpy(dtype=float)
    with np.errstate(invalid="ignore"):
        lower, upper = np.fmin(limits[:, 0], limits[:, 1]), np.fmax(limits[:, 0], limits[:, 1])
    return pl.DataFrame(
        {
            "group": [group] * len(timeline),
            "years": np.asarray(timeline, dtype=float),
            "estimate": np.asarray(estimate, dtype=float),
            "lower": lower,
            "upper": upper,
            "measure": [measure] * len(timeline),
        },
        schema_overrides={"group": pl.String, "measure": pl.String},
    )


def _finite(value: SupportsFloat) -> float | None:
    number = float(value)
    return number if np.isfinite(number) else None


def _warn_all(
    messages: list[str], what: str, advice: str = "inspect the data of this group"
) -> None:
    for message in dict.fromkeys(messages):
        warnings.warn(f"{what}: {message}; {advice}", StatisticalWarning, stacklevel=3)
