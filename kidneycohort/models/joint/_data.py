"""The joint model's data: eGFR rows up to dropout, dropout time and status per patient,
and the per-patient sufficient statistics of the longitudinal part.

Dropout time is the earliest event among the dropout endpoints; a patient without one is
censored at the earliest end of follow-up among those endpoints. eGFR values after the
dropout time, before index or missing are left out with a reason code (``excluded_``).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import polars as pl

from kidneycohort._frames import FrameLike, require_columns, to_polars
from kidneycohort.errors import InputDataError, did_you_mean
from kidneycohort.models._design import one_equation
from kidneycohort.value_filter import value_filter_reasons

__all__ = ["JointData", "joint_data", "time_design"]

WHOLE_COHORT = "all"


@dataclass(frozen=True)
class JointData:
    """Everything the likelihood needs, one entry per patient (sorted by id).

    ``cross`` is :math:`Z_i^\\top Z_i` ``(n, q, q)``, ``cross_response`` is
    :math:`Z_i^\\top y_i` ``(n, q)``, ``response_square`` is :math:`y_i^\\top y_i`.
    Row arrays (``row_patient``, ``row_response``, ``row_design``) keep the values for
    the separate mixed model and the imputation.
    """

    patient_ids: np.ndarray
    groups: list[str]
    group_code: np.ndarray
    n_values: np.ndarray
    cross: np.ndarray
    cross_response: np.ndarray
    response_square: np.ndarray
    time: np.ndarray
    event: np.ndarray
    row_patient: np.ndarray
    row_years: np.ndarray
    row_response: np.ndarray
    row_design: np.ndarray
    knot: float | None
    excluded: pl.DataFrame

    @property
    def n_patients(self) -> int:
        return int(self.patient_ids.size)

    @property
    def n_events(self) -> int:
        return int(self.event.sum())


def time_design(years: np.ndarray, knot: float | None) -> np.ndarray:
    r"""Rows :math:`z(t)`: :math:`(1, t)`, or :math:`(1, \min(t,k), \max(t-k,0))` with a knot."""
    years = np.asarray(years, dtype=float)
    if knot is None:
        return np.stack([np.ones_like(years), years], axis=-1)
    return np.stack(
        [np.ones_like(years), np.minimum(years, knot), np.maximum(years - knot, 0.0)], axis=-1
    )


def dropout_times(endpoints: FrameLike, names: Sequence[str]) -> pl.DataFrame:
    """``patient_id, dropout_years, dropout`` (1 event, 0 censored) per patient."""
    frame = to_polars(endpoints, "endpoints")
    require_columns(frame, ("patient_id", "endpoint", "years", "event"), "endpoints")
    present = sorted(frame["endpoint"].drop_nulls().unique().to_list())
    for name in names:
        if name not in present:
            raise InputDataError(
                f"endpoints: dropout endpoint '{name}' is not in the table (endpoints: "
                f"{present}){did_you_mean(name, present)}"
            )
    rows = frame.filter(pl.col("endpoint").is_in(list(names))).with_columns(
        pl.col("patient_id").cast(pl.String),
        pl.col("years").cast(pl.Float64),
        (pl.col("event").fill_null(0).cast(pl.Int64) == 1).alias("_event"),
    )
    return (
        rows.group_by("patient_id")
        .agg(
            pl.col("years").filter(pl.col("_event")).min().alias("_event_years"),
            pl.col("years").min().alias("_censor_years"),
            pl.col("_event").any().alias("dropout"),
        )
        .select(
            "patient_id",
            pl.coalesce("_event_years", "_censor_years").alias("dropout_years"),
            pl.col("dropout").cast(pl.Float64),
        )
    )


def _patients(patients: FrameLike | None, group_column: str | None) -> pl.DataFrame:
    if group_column is None:
        if patients is None:
            return pl.DataFrame(schema={"patient_id": pl.String, "_group": pl.String})
        people = to_polars(patients, "patients")
        return people.select(
            pl.col("patient_id").cast(pl.String), pl.lit(WHOLE_COHORT).alias("_group")
        )
    if patients is None:
        raise InputDataError(f"patients: needed for the group column '{group_column}'; pass it")
    people = to_polars(patients, "patients")
    if group_column not in people.columns:
        raise InputDataError(
            f"patients: missing column '{group_column}'{did_you_mean(group_column, people.columns)}"
        )
    require_columns(people, ("patient_id",), "patients")
    if people["patient_id"].is_duplicated().any():
        raise InputDataError("patients: a patient_id appears more than once; give one row each")
    return people.select(
        pl.col("patient_id").cast(pl.String), pl.col(group_column).cast(pl.String).alias("_group")
    )


def _rows_with_reasons(
    egfr: FrameLike,
    patients: pl.DataFrame,
    dropout: pl.DataFrame,
    equation: str | None,
    whole_cohort: bool,
) -> pl.DataFrame:
    table = one_equation(to_polars(egfr, "egfr"), equation)
    values = table.select(
        pl.col("patient_id").cast(pl.String),
        pl.col("years_from_index").cast(pl.Float64),
        pl.col("egfr").cast(pl.Float64),
        # a value the study's value filter left out (marked by the caller), or a limit
        value_filter_reasons(table, None).alias("_value_filter"),
    )
    del table
    rows = values.join(patients, on="patient_id", how="left").join(
        dropout, on="patient_id", how="left"
    )
    if whole_cohort:
        rows = rows.with_columns(pl.col("_group").fill_null(WHOLE_COHORT))
    years = pl.col("years_from_index")
    reason = (
        pl.when(pl.col("egfr").is_null() | pl.col("egfr").is_nan())
        .then(pl.lit("egfr_missing"))
        .when(years.is_null() | years.is_nan())
        .then(pl.lit("years_missing"))
        .when(years < 0)
        .then(pl.lit("before_index"))
        .when(pl.col("_value_filter").is_not_null())
        .then(pl.col("_value_filter"))
        .when(pl.col("_group").is_null())
        .then(pl.lit("group_missing"))
        .when(pl.col("dropout_years").is_null())
        .then(pl.lit("no_dropout_row"))
        .when(pl.col("dropout_years") <= 0)
        .then(pl.lit("no_follow_up"))
        .when(years > pl.col("dropout_years"))
        .then(pl.lit("after_dropout"))
        .otherwise(None)
    )
    return rows.with_columns(reason.alias("reason"))


def joint_data(
    egfr: FrameLike,
    patients: FrameLike | None,
    endpoints: FrameLike,
    *,
    group_column: str | None,
    dropout_endpoints: Sequence[str],
    equation: str | None,
    knot: float | None,
) -> JointData:
    """Prepare the data of the joint model (see the module docstring)."""
    people = _patients(patients, group_column)
    dropout = dropout_times(endpoints, dropout_endpoints)
    rows = _rows_with_reasons(egfr, people, dropout, equation, group_column is None)
    excluded = (
        rows.filter(pl.col("reason").is_not_null())
        .group_by("reason")
        .agg(
            pl.len().cast(pl.Int64).alias("n_rows"),
            pl.col("patient_id").n_unique().cast(pl.Int64).alias("n_patients"),
        )
        .sort("reason")
    )
    used = rows.filter(pl.col("reason").is_null()).sort("patient_id", "years_from_index")
    if used.height == 0:
        raise InputDataError("egfr: no usable eGFR values left (none before dropout with a group)")
    per_patient = used.group_by("patient_id", maintain_order=True).agg(
        pl.col("_group").first(), pl.col("dropout_years").first(), pl.col("dropout").first()
    )
    ids = per_patient["patient_id"].to_numpy()
    codes = np.searchsorted(ids, used["patient_id"].to_numpy())
    n = ids.size
    y = used["egfr"].to_numpy()
    years = used["years_from_index"].to_numpy()
    z = time_design(years, knot)
    q = z.shape[1]
    cross = np.empty((n, q, q))
    for a in range(q):
        for b in range(a, q):
            cross[:, a, b] = cross[:, b, a] = np.bincount(codes, z[:, a] * z[:, b], minlength=n)
    cross_response = np.stack(
        [np.bincount(codes, z[:, a] * y, minlength=n) for a in range(q)], axis=1
    )
    groups = sorted(per_patient["_group"].unique().to_list())
    group_values = per_patient["_group"].to_numpy()
    return JointData(
        patient_ids=ids,
        groups=groups,
        group_code=np.searchsorted(np.array(groups), group_values),
        n_values=np.bincount(codes, minlength=n).astype(float),
        cross=cross,
        cross_response=cross_response,
        response_square=np.bincount(codes, y * y, minlength=n),
        time=per_patient["dropout_years"].to_numpy().astype(float),
        event=per_patient["dropout"].to_numpy().astype(float),
        row_patient=codes,
        row_years=years,
        row_response=y,
        row_design=z,
        knot=knot,
        excluded=excluded,
    )


def with_values(
    data: JointData, patient: np.ndarray, years: np.ndarray, response: np.ndarray
) -> JointData:
    """The same patients with other eGFR values (``patient`` indexes ``data.patient_ids``);
    used to refit completed data sets."""
    from dataclasses import replace

    n = data.n_patients
    z = time_design(years, data.knot)
    q = z.shape[1]
    cross = np.empty((n, q, q))
    for a in range(q):
        for b in range(a, q):
            cross[:, a, b] = cross[:, b, a] = np.bincount(patient, z[:, a] * z[:, b], minlength=n)
    return replace(
        data,
        n_values=np.bincount(patient, minlength=n).astype(float),
        cross=cross,
        cross_response=np.stack(
            [np.bincount(patient, z[:, a] * response, minlength=n) for a in range(q)], axis=1
        ),
        response_square=np.bincount(patient, response * response, minlength=n),
        row_patient=patient,
        row_years=years,
        row_response=response,
        row_design=z,
    )


def reorder_groups(data: JointData, reference: str) -> JointData:
    """The same data with ``reference`` as group code 0 (the others in sorted order)."""
    if reference not in data.groups:
        raise InputDataError(
            f"reference_group: '{reference}' is not a group (groups: {data.groups})"
            f"{did_you_mean(reference, data.groups)}"
        )
    order = [reference, *[g for g in data.groups if g != reference]]
    mapping = np.array([order.index(g) for g in data.groups])
    from dataclasses import replace

    return replace(data, groups=order, group_code=mapping[data.group_code])
