"""Checks that a mixed model can be estimated from its blocks, each failure one line.

Run on the (possibly combined) blocks before fitting, so that a design without
variation in time, collinear covariates, an empty group or single-value patients is
named plainly instead of surfacing as a singular matrix inside the optimiser.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from kidneycohort.errors import InputDataError
from kidneycohort.models.mixed._blocks import PatientBlocks

__all__ = ["check_estimable"]

# Relative size of the part of a column not explained by the columns before it, below
# which the column counts as a linear combination of them (common practice: a
# tolerance of about 1e-10 on a correlation-scaled cross-product matrix).
_COLLINEAR = 1e-10


def _dependent_column(cross: np.ndarray) -> tuple[int, list[int]] | None:
    """First column of a cross-product matrix that is a combination of earlier ones,
    with the earlier columns it depends on; ``None`` when the matrix has full rank."""
    scale = np.sqrt(np.diag(cross))
    scaled = cross / np.outer(scale, scale)
    for j in range(1, scaled.shape[0]):
        earlier = scaled[:j, :j]
        coefficients = np.linalg.lstsq(earlier, scaled[:j, j], rcond=None)[0]
        unexplained = scaled[j, j] - scaled[:j, j] @ coefficients
        if unexplained <= _COLLINEAR:
            weights = np.abs(coefficients)
            return j, [int(k) for k in np.flatnonzero(weights > 1e-8 * weights.max())]
    return None


def _check_columns(cross: np.ndarray, names: Sequence[str], what: str, hint: str) -> None:
    zero = np.flatnonzero(np.diag(cross) <= 0.0)
    if zero.size:
        raise InputDataError(
            f"{what}: column '{names[zero[0]]}' is zero in every row ({hint}); drop it"
        )
    dependent = _dependent_column(cross)
    if dependent is not None:
        column, on = dependent
        listed = ", ".join(f"'{names[k]}'" for k in on)
        raise InputDataError(
            f"{what}: column '{names[column]}' is a linear combination of {listed} "
            "(collinear: a column with no variation, such as time that does not vary, or "
            "duplicated covariates); drop or recode it"
        )


def check_estimable(blocks: PatientBlocks, *, reml: bool) -> None:
    """Raise :class:`~kidneycohort.errors.InputDataError` naming why the model cannot
    be fitted to ``blocks``; return quietly when it can."""
    if blocks.n_patients == 0:
        raise InputDataError("mixed model: no patients to model")
    if np.all(blocks.n_values <= 1):
        raise InputDataError(
            f"mixed model: every patient ({blocks.n_patients}) has a single value, so "
            "patient-level variation cannot be told from residual variation; a slope "
            "model needs patients with two or more values"
        )
    _check_columns(
        blocks.fixed_cross.sum(axis=0),
        blocks.fixed_names,
        "fixed effects",
        "no variation, or a group or category with no patients",
    )
    _check_columns(
        blocks.random_cross.sum(axis=-1),
        blocks.random_names,
        "random effects",
        "no variation",
    )
    parameters = len(blocks.fixed_names) if reml else 0
    if blocks.n_observations - parameters < 1:
        raise InputDataError(
            f"mixed model: {blocks.n_observations} values are too few for "
            f"{len(blocks.fixed_names)} fixed effects"
        )
    groups = np.bincount(blocks.residual_group, minlength=len(blocks.residual_groups))
    for name, count in zip(blocks.residual_groups, groups, strict=True):
        if count == 0:
            raise InputDataError(
                f"residual groups: group '{name}' has no patients; drop it from the levels"
            )
