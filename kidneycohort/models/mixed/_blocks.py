r"""Per-patient sufficient statistics of a linear mixed model with one grouping level.

For patient :math:`i` with :math:`n_i` values, response :math:`y_i`, fixed-effect design
:math:`X_i` (:math:`n_i \times p`) and random-effect design :math:`Z_i`
(:math:`n_i \times q`), the Gaussian likelihood of

.. math::

    y_i = X_i \beta + Z_i b_i + \varepsilon_i, \qquad
    b_i \sim N(0, G), \qquad \varepsilon_i \sim N(0, \sigma^2_{g(i)} I_{n_i})

depends on the data only through :math:`Z_i^\top Z_i`, :math:`Z_i^\top X_i`,
:math:`Z_i^\top y_i`, :math:`n_i`, and the sums of :math:`X_i^\top X_i`,
:math:`X_i^\top y_i` and :math:`y_i^\top y_i` over the patients of each residual-variance
group :math:`g` (Henderson's mixed-model equations [1]_; Bates et al. [2]_, section 3).
:class:`PatientBlocks` holds exactly these, so memory is O(patients x q x p) and never
an n x n or n x patients matrix. Blocks of disjoint sets of patients concatenate (the
per-patient parts) and add (the group sums): :func:`combine_blocks` is the reduction a
partitioned engine runs on its driver.

References
----------
.. [1] Henderson CR. Applications of Linear Models in Animal Breeding. University of
   Guelph; 1984. (Mixed-model equations; see also Henderson CR. Best linear unbiased
   estimation and prediction under a selection model. Biometrics 1975;31:423-447.
   doi:10.2307/2529430)
.. [2] Bates D, Maechler M, Bolker B, Walker S. Fitting linear mixed-effects models
   using lme4. J Stat Softw 2015;67(1):1-48. doi:10.18637/jss.v067.i01
"""

from __future__ import annotations

import logging
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
import polars as pl

from kidneycohort._frames import FrameLike, require_columns, to_polars
from kidneycohort.errors import InputDataError, did_you_mean

logger = logging.getLogger(__name__)

__all__ = [
    "INTERCEPT",
    "PatientBlocks",
    "combine_blocks",
    "patient_blocks",
    "patient_blocks_from_frame",
]

INTERCEPT = "intercept"
"""Column name that means a column of ones when the table has no column of that name."""

_SINGLE_GROUP = "all"


@dataclass(frozen=True, eq=False)
class PatientBlocks:
    """Sufficient statistics of the mixed model, per patient and per residual group.

    Per-patient arrays are component-major (last axis = patient), see
    :mod:`kidneycohort.models.mixed._linalg`.

    Attributes
    ----------
    patient_ids : polars.Series
        One id per patient, in block order.
    fixed_names, random_names : tuple of str
        Columns of :math:`X` (p) and :math:`Z` (q).
    residual_groups : tuple of str
        Names of the residual-variance groups (``("all",)`` for one residual variance).
    residual_group : numpy.ndarray
        ``(n_patients,)`` code of each patient's residual group.
    n_values : numpy.ndarray
        ``(n_patients,)`` values per patient.
    random_cross, random_fixed, random_response : numpy.ndarray
        :math:`Z_i^\\top Z_i` ``(q, q, n)``, :math:`Z_i^\\top X_i` ``(q, p, n)``,
        :math:`Z_i^\\top y_i` ``(q, n)``.
    fixed_cross, fixed_response, response_square, group_values : numpy.ndarray
        Per residual group: :math:`\\sum X_i^\\top X_i` ``(G, p, p)``,
        :math:`\\sum X_i^\\top y_i` ``(G, p)``, :math:`\\sum y_i^\\top y_i` ``(G,)`` and
        :math:`\\sum n_i` ``(G,)``.
    """

    patient_ids: pl.Series
    fixed_names: tuple[str, ...]
    random_names: tuple[str, ...]
    residual_groups: tuple[str, ...]
    residual_group: np.ndarray
    n_values: np.ndarray
    random_cross: np.ndarray
    random_fixed: np.ndarray
    random_response: np.ndarray
    fixed_cross: np.ndarray
    fixed_response: np.ndarray
    response_square: np.ndarray
    group_values: np.ndarray

    @property
    def n_patients(self) -> int:
        """Number of patients."""
        return int(self.n_values.size)

    @property
    def n_observations(self) -> int:
        """Number of values over all patients."""
        return int(self.group_values.sum())

    def with_random_effects(
        self, effects: Sequence[str] | Mapping[str, Mapping[str, float]]
    ) -> PatientBlocks:
        r"""Blocks of a model whose random effects are linear combinations of these.

        With :math:`Z^\ast = Z T` the blocks transform as :math:`T^\top Z^\top Z T`,
        :math:`T^\top Z^\top X` and :math:`T^\top Z^\top y`, so fewer or merged random
        effects (the fallback steps) need no second pass over the rows.

        Parameters
        ----------
        effects
            Names of random effects to keep, or ``{new_name: {old_name: weight}}``
            (e.g. ``{"intercept": {"intercept": 1}, "slope": {"acute": 1, "chronic": 1}}``).
        """
        if not isinstance(effects, Mapping):
            effects = {name: {name: 1.0} for name in effects}
        transform = np.zeros((len(self.random_names), len(effects)))
        for column, weights in enumerate(effects.values()):
            for old, weight in weights.items():
                if old not in self.random_names:
                    raise InputDataError(
                        f"random effects: '{old}' is not one of {list(self.random_names)}"
                        f"{did_you_mean(old, self.random_names)}"
                    )
                transform[self.random_names.index(old), column] = weight
        cross = np.einsum("ab,acn,cd->bdn", transform, self.random_cross, transform)
        return replace(
            self,
            random_names=tuple(effects),
            random_cross=cross,
            random_fixed=np.einsum("ab,ajn->bjn", transform, self.random_fixed),
            random_response=transform.T @ self.random_response,
        )


def _as_matrix(values: Any, rows: int, names: Sequence[str], what: str) -> np.ndarray:
    matrix = np.asarray(values, dtype=float)
    if matrix.ndim == 1:
        matrix = matrix[:, None]
    if matrix.ndim != 2 or matrix.shape[0] != rows:
        raise InputDataError(
            f"{what}: expected {rows} rows (one per value), got shape {matrix.shape}"
        )
    if matrix.shape[1] != len(names):
        raise InputDataError(
            f"{what}: {matrix.shape[1]} columns but {len(names)} names {list(names)}"
        )
    if len(set(names)) != len(names):
        raise InputDataError(f"{what}: column names repeat: {list(names)}")
    bad = ~np.isfinite(matrix)
    if bad.any():
        column = int(np.argmax(bad.any(axis=0)))
        raise InputDataError(
            f"{what}: column '{names[column]}' has {int(bad[:, column].sum())} missing or "
            "infinite values; drop or fill those rows first"
        )
    return matrix


def _patient_codes(patient_ids: Any) -> tuple[np.ndarray, pl.Series]:
    """Dense codes in sorted id order (so the blocks do not depend on row order)."""
    ids = patient_ids if isinstance(patient_ids, pl.Series) else pl.Series(patient_ids)
    if ids.null_count():
        raise InputDataError(
            f"patient ids: {ids.null_count()} rows have no patient id; drop them first"
        )
    codes = (ids.rank("dense") - 1).cast(pl.Int64).to_numpy()
    return codes, ids.unique().sort().alias("patient_id")


def _residual_codes(
    groups: Any, codes: np.ndarray, n_patients: int
) -> tuple[np.ndarray, tuple[str, ...]]:
    if groups is None:
        return np.zeros(n_patients, dtype=np.int64), (_SINGLE_GROUP,)
    labels = pl.Series(groups).cast(pl.String)
    if labels.len() != codes.size or labels.null_count():
        raise InputDataError(
            "residual groups: need one non-missing group label per value "
            f"(got {labels.len()} labels, {labels.null_count()} missing, for {codes.size} values)"
        )
    levels = tuple(labels.unique().sort().to_list())
    row_group = (labels.rank("dense") - 1).cast(pl.Int64).to_numpy()
    per_patient = np.empty(n_patients, dtype=np.int64)
    per_patient[codes] = row_group
    if not np.array_equal(per_patient[codes], row_group):
        raise InputDataError(
            "residual groups: a patient's values fall in more than one residual-variance "
            "group; the group must be a patient attribute (e.g. the arm)"
        )
    return per_patient, levels


def _group_sums(
    fixed: np.ndarray, response: np.ndarray, row_group: np.ndarray, n_groups: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    cross = np.empty((n_groups, fixed.shape[1], fixed.shape[1]))
    cross_response = np.empty((n_groups, fixed.shape[1]))
    square = np.empty(n_groups)
    counts = np.empty(n_groups)
    for g in range(n_groups):  # residual groups: a handful at most
        rows = slice(None) if n_groups == 1 else row_group == g
        x, y = fixed[rows], response[rows]
        cross[g] = x.T @ x
        cross_response[g] = x.T @ y
        square[g] = y @ y
        counts[g] = y.size
    return cross, cross_response, square, counts


def patient_blocks(
    patient_ids: Any,
    response: Any,
    fixed_design: Any,
    random_design: Any,
    *,
    fixed_names: Sequence[str],
    random_names: Sequence[str],
    residual_group: Any = None,
) -> PatientBlocks:
    """Per-patient blocks from row arrays (one row per value, any row order).

    Parameters
    ----------
    patient_ids : array-like or polars.Series
        Patient of each value.
    response : array-like
        ``(n,)`` response (eGFR).
    fixed_design, random_design : array-like
        ``(n, p)`` and ``(n, q)`` design matrices.
    fixed_names, random_names : sequence of str
        Column names of the two designs.
    residual_group : array-like, optional
        Residual-variance group of each value, constant within a patient (e.g. the arm).

    Returns
    -------
    PatientBlocks
        Patients sorted by id, so the blocks do not depend on the row order.

    Raises
    ------
    InputDataError
        Missing ids, missing or infinite values, or shapes that do not match.
    """
    y = np.asarray(response, dtype=float).ravel()
    if y.size == 0:
        raise InputDataError("response: no values to model")
    if not np.isfinite(y).all():
        raise InputDataError(
            f"response: {int((~np.isfinite(y)).sum())} missing or infinite values; drop them first"
        )
    fixed = _as_matrix(fixed_design, y.size, fixed_names, "fixed design")
    random = _as_matrix(random_design, y.size, random_names, "random design")
    codes, ids = _patient_codes(patient_ids)
    if codes.size != y.size:
        raise InputDataError(f"patient ids: {codes.size} ids for {y.size} values")
    n_patients = ids.len()
    per_patient, levels = _residual_codes(residual_group, codes, n_patients)

    def per_patient_sum(values: np.ndarray) -> np.ndarray:
        return np.bincount(codes, weights=values, minlength=n_patients)

    q, p = random.shape[1], fixed.shape[1]
    cross = np.empty((q, q, n_patients))
    for a in range(q):
        for b in range(a, q):
            cross[a, b] = cross[b, a] = per_patient_sum(random[:, a] * random[:, b])
    random_fixed = np.empty((q, p, n_patients))
    for a in range(q):
        for j in range(p):
            random_fixed[a, j] = per_patient_sum(random[:, a] * fixed[:, j])
    random_response = np.stack([per_patient_sum(random[:, a] * y) for a in range(q)])
    sums = _group_sums(fixed, y, per_patient[codes], len(levels))
    logger.debug("blocks: %d values of %d patients, p=%d, q=%d", y.size, n_patients, p, q)
    return PatientBlocks(
        patient_ids=ids,
        fixed_names=tuple(fixed_names),
        random_names=tuple(random_names),
        residual_groups=levels,
        residual_group=per_patient,
        n_values=np.bincount(codes, minlength=n_patients),
        random_cross=cross,
        random_fixed=random_fixed,
        random_response=random_response,
        fixed_cross=sums[0],
        fixed_response=sums[1],
        response_square=sums[2],
        group_values=sums[3],
    )


def _design_columns(frame: pl.DataFrame, names: Sequence[str], what: str) -> np.ndarray:
    columns = []
    for name in names:
        if name == INTERCEPT and name not in frame.columns:
            columns.append(np.ones(frame.height))
            continue
        require_columns(frame, [name], "table")
        series = frame[name]
        if not (series.dtype.is_numeric() or series.dtype == pl.Boolean):
            raise InputDataError(
                f"table: {what} column '{name}' has type {series.dtype}; encode it as numbers "
                "(0/1 indicators for text)"
            )
        columns.append(series.cast(pl.Float64).fill_null(np.nan).to_numpy())
    if not columns:
        raise InputDataError(f"{what}: name at least one column")
    return np.column_stack(columns)


def patient_blocks_from_frame(
    frame: FrameLike,
    *,
    response: str,
    fixed: Sequence[str],
    random: Sequence[str],
    patient: str = "patient_id",
    residual_group: str | None = None,
) -> PatientBlocks:
    """Per-patient blocks from a long table (polars or pandas), one row per value.

    ``fixed`` and ``random`` name numeric columns; ``"intercept"`` means a column of ones
    unless the table has a column of that name. See :func:`patient_blocks`.
    """
    table = to_polars(frame, "table")
    require_columns(table, [patient, response], "table")
    if residual_group is not None:
        require_columns(table, [residual_group], "table")
    y = table[response].cast(pl.Float64).fill_null(np.nan).to_numpy()
    return patient_blocks(
        table[patient],
        y,
        _design_columns(table, fixed, "fixed-effect"),
        _design_columns(table, random, "random-effect"),
        fixed_names=fixed,
        random_names=random,
        residual_group=None if residual_group is None else table[residual_group],
    )


def combine_blocks(parts: Iterable[PatientBlocks]) -> PatientBlocks:
    """Blocks of the union of disjoint sets of patients (the driver-side reduction).

    Per-patient arrays are concatenated in the order given; group sums are added after
    aligning residual-group names. Fitting the combined blocks gives the same model as
    fitting the blocks of all rows at once (up to floating-point rounding).

    Raises
    ------
    InputDataError
        Parts with different design columns, or a patient in more than one part.
    """
    blocks = list(parts)
    if not blocks:
        raise InputDataError("combine_blocks: no blocks given")
    first = blocks[0]
    for part in blocks[1:]:
        if (part.fixed_names, part.random_names) != (first.fixed_names, first.random_names):
            raise InputDataError(
                "combine_blocks: parts have different design columns "
                f"({list(part.fixed_names)} / {list(part.random_names)} against "
                f"{list(first.fixed_names)} / {list(first.random_names)})"
            )
    ids = pl.concat([part.patient_ids for part in blocks])
    if ids.n_unique() != ids.len():
        repeated = ids.filter(ids.is_duplicated())[0]
        raise InputDataError(
            f"combine_blocks: patient '{repeated}' is in more than one part; split the rows "
            "by patient before computing blocks"
        )
    levels = tuple(sorted({name for part in blocks for name in part.residual_groups}))
    p = len(first.fixed_names)
    sums = [np.zeros((len(levels), p, p)), np.zeros((len(levels), p)), np.zeros(len(levels))]
    counts = np.zeros(len(levels))
    recoded = []
    for part in blocks:
        where = np.array([levels.index(name) for name in part.residual_groups])
        recoded.append(where[part.residual_group])
        np.add.at(sums[0], where, part.fixed_cross)
        np.add.at(sums[1], where, part.fixed_response)
        np.add.at(sums[2], where, part.response_square)
        np.add.at(counts, where, part.group_values)
    return PatientBlocks(
        patient_ids=ids,
        fixed_names=first.fixed_names,
        random_names=first.random_names,
        residual_groups=levels,
        residual_group=np.concatenate(recoded),
        n_values=np.concatenate([part.n_values for part in blocks]),
        random_cross=np.concatenate([part.random_cross for part in blocks], axis=-1),
        random_fixed=np.concatenate([part.random_fixed for part in blocks], axis=-1),
        random_response=np.concatenate([part.random_response for part in blocks], axis=-1),
        fixed_cross=sums[0],
        fixed_response=sums[1],
        response_square=sums[2],
        group_values=counts,
    )
