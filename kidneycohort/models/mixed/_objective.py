r"""The profiled ML / REML deviance of a one-level linear mixed model and its gradient.

Write the covariance of patient :math:`i`'s values as :math:`\sigma^2 H_i` with

.. math::

    H_i = \rho_{g(i)} I_{n_i} + Z_i \Lambda \Lambda^\top Z_i^\top, \qquad
    G = \sigma^2 \Lambda\Lambda^\top,

:math:`\Lambda` lower triangular (the relative covariance factor of Bates et al. [1]_,
section 3; diagonal for a diagonal :math:`G`) and :math:`\rho_g = e^{2\eta_g}` the
residual-variance ratio of group :math:`g` to the first group (:math:`\eta_1 = 0`).
With :math:`\beta` and :math:`\sigma^2` profiled out, the deviance (minus twice the
log-likelihood) is

.. math::

    d(\theta) = \sum_i \log|H_i| + n\,[1 + \log(2\pi r^2 / n)], \qquad
    d_R(\theta) = \sum_i \log|H_i| + \log|M| + (n-p)\,[1 + \log(2\pi r^2/(n-p))]

for ML and REML, where :math:`M = \sum_i X_i^\top H_i^{-1} X_i`,
:math:`\hat\beta = M^{-1} \sum_i X_i^\top H_i^{-1} y_i` (the generalised least-squares
solution, equal to the solution of Henderson's mixed-model equations [2]_) and
:math:`r^2 = \sum_i e_i^\top H_i^{-1} e_i`, :math:`e_i = y_i - X_i\hat\beta`. With
:math:`w_i = 1/\rho_{g(i)}`, :math:`P_i = w_i Z_i^\top Z_i` and the Cholesky factor
:math:`L_i L_i^\top = I + \Lambda^\top P_i \Lambda` every term comes from the q x q
and q x p blocks (Woodbury identity and matrix determinant lemma):

.. math::

    \log|H_i| = 2 \log|L_i| - n_i \log w_i, \qquad
    X_i^\top H_i^{-1} X_i = w_i X_i^\top X_i - C_i^\top C_i, \quad
    C_i = L_i^{-1} \Lambda^\top w_i Z_i^\top X_i .

The gradient is analytic. With :math:`D = \Lambda\Lambda^\top` and
:math:`c = n / r^2` (ML) or :math:`(n-p)/r^2` (REML),

.. math::

    \frac{\partial d}{\partial D} = \sum_i Z_i^\top H_i^{-1} Z_i
        - c \sum_i a_i a_i^\top
        - [\text{REML}] \sum_i Z_i^\top H_i^{-1} X_i M^{-1} X_i^\top H_i^{-1} Z_i,
    \qquad a_i = Z_i^\top H_i^{-1} e_i,

and :math:`\partial d / \partial \Lambda = 2 (\partial d/\partial D) \Lambda`
(the envelope theorem removes the terms in :math:`\hat\beta`). For a ratio,
:math:`\partial H_i/\partial\eta_g = 2\rho_g I` for the patients of group :math:`g`, and
:math:`\partial d/\partial \eta_g = \sum_{i \in g} 2\rho_g\,[\operatorname{tr} H_i^{-1}
- c\,\lVert H_i^{-1} e_i\rVert^2 - [\text{REML}]\operatorname{tr}(M^{-1} X_i^\top H_i^{-2}
X_i)]`, again from blocks.

References
----------
.. [1] Bates D, Maechler M, Bolker B, Walker S. Fitting linear mixed-effects models
   using lme4. J Stat Softw 2015;67(1):1-48. doi:10.18637/jss.v067.i01
.. [2] Henderson CR. Best linear unbiased estimation and prediction under a selection
   model. Biometrics 1975;31:423-447. doi:10.2307/2529430
.. [3] Laird NM, Ware JH. Random-effects models for longitudinal data. Biometrics
   1982;38:963-974. doi:10.2307/2529876
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal, TypedDict

import numpy as np

from kidneycohort.models.mixed._blocks import PatientBlocks
from kidneycohort.models.mixed._linalg import (
    backward_solve,
    batched_cholesky,
    contract_columns,
    forward_solve,
    gram,
    left_multiply,
    pair_contract,
    quadratic_sum,
    transpose,
)

__all__ = ["Covariance", "Evaluation", "PatientPredictions", "ProfiledDeviance"]

Covariance = Literal["unstructured", "diagonal"]

_LOG_2PI = float(np.log(2.0 * np.pi))


@dataclass(frozen=True)
class Evaluation:
    """The deviance at one parameter vector, with what the results are built from."""

    value: float
    gradient: np.ndarray | None
    beta: np.ndarray
    fixed_precision: np.ndarray
    penalised_rss: float


@dataclass(frozen=True)
class PatientPredictions:
    r"""Per-patient quantities at the fitted parameters, relative to :math:`\sigma^2`.

    ``random_effects`` is :math:`\hat b_i` ``(q, n)``; ``conditional`` is
    :math:`\Lambda A_i^{-1}\Lambda^\top` ``(q, q, n)`` (so that
    :math:`\operatorname{Var}(b_i \mid y) = \sigma^2 \times` it); ``fixed_link`` is
    :math:`J_i = \Lambda A_i^{-1}\Lambda^\top w_i Z_i^\top X_i` ``(q, p, n)``.
    """

    random_effects: np.ndarray
    conditional: np.ndarray
    fixed_link: np.ndarray


def moment_start(blocks: PatientBlocks) -> np.ndarray | None:
    r"""A starting value of :math:`D = G/\sigma^2` by the method of moments.

    With :math:`\tilde\beta` the pooled least-squares fit, each patient whose
    :math:`Z_i^\top Z_i` is invertible gives :math:`r_i = (Z_i^\top Z_i)^{-1} Z_i^\top
    (y_i - X_i\tilde\beta)`, with :math:`E[r_i r_i^\top] \approx \sigma^2 D +
    \sigma^2 (Z_i^\top Z_i)^{-1}`; the pooled residual sum of squares :math:`T` has
    :math:`E[T] \approx \sum_i \operatorname{tr}(Z_i^\top Z_i\, \sigma^2 D) + n\sigma^2`.
    Solving both for :math:`\sigma^2` and :math:`D` (clipped to be positive definite)
    costs one pass over the blocks and usually saves many optimiser iterations.
    Returns ``None`` when fewer than q + 2 patients are usable or the moments are not.
    """
    q = len(blocks.random_names)
    fixed_cross = blocks.fixed_cross.sum(axis=0)
    fixed_response = blocks.fixed_response.sum(axis=0)
    beta = np.linalg.lstsq(fixed_cross, fixed_response, rcond=None)[0]
    total = float(
        blocks.response_square.sum() - 2.0 * fixed_response @ beta + beta @ fixed_cross @ beta
    )
    usable = blocks.n_values > q
    cross = blocks.random_cross[:, :, usable]
    if cross.shape[-1] < q + 2:
        return None
    with np.errstate(invalid="ignore", divide="ignore"):
        lower = batched_cholesky(cross)
        lower_inverse = forward_solve(lower, np.broadcast_to(np.eye(q)[:, :, None], cross.shape))
        inverse = pair_contract(lower_inverse, lower_inverse)
        resid = blocks.random_response[:, usable] - contract_columns(
            blocks.random_fixed[:, :, usable], beta
        )
        coefficients = backward_solve(lower, forward_solve(lower, resid))
    fine = np.isfinite(coefficients).all(axis=0) & np.isfinite(inverse).all(axis=(0, 1))
    if fine.sum() < q + 2:
        return None
    spread = coefficients[:, fine] @ coefficients[:, fine].T / fine.sum()
    mean_inverse = inverse[:, :, fine].mean(axis=-1)
    cross_total = blocks.random_cross.sum(axis=-1)
    denominator = blocks.n_observations - float(np.trace(cross_total @ mean_inverse))
    sigma2 = (total - float(np.trace(cross_total @ spread))) / denominator
    if not (np.isfinite(sigma2) and sigma2 > 0.0 and denominator > 0.0):
        return None
    values, vectors = np.linalg.eigh((spread - sigma2 * mean_inverse) / sigma2)
    floor = 1e-2 * max(float(values.max()), 1e-2)
    return (vectors * np.maximum(values, floor)) @ vectors.T


class _Factorised(TypedDict):
    """The per-patient factorisation at one parameter vector (see the module docstring)."""

    factor: np.ndarray
    group_weights: np.ndarray
    weights: np.ndarray | None  # per patient; None with one residual group
    cross: np.ndarray
    lam_cross: np.ndarray
    lower: np.ndarray
    stacked: np.ndarray
    solved: np.ndarray


class ProfiledDeviance:
    """Profiled deviance of ``blocks`` as a function of the covariance parameters.

    Parameters are ``theta`` (the entries of the lower triangle of :math:`\\Lambda`, row
    by row, or its diagonal) followed by :math:`\\eta_g` for each residual group but the
    first when ``residual_by_group``.
    """

    def __init__(
        self,
        blocks: PatientBlocks,
        *,
        covariance: Covariance,
        reml: bool,
        residual_by_group: bool,
    ) -> None:
        self.blocks = blocks
        self.reml = reml
        self.q = len(blocks.random_names)
        self.p = len(blocks.fixed_names)
        by_group = residual_by_group and len(blocks.residual_groups) > 1
        self.groups = blocks.residual_groups if by_group else ("all",)
        if by_group:
            self.codes: np.ndarray | None = blocks.residual_group
            self.fixed_cross = blocks.fixed_cross
            self.fixed_response = blocks.fixed_response
            self.response_square = blocks.response_square
            self.group_values = blocks.group_values
        else:
            self.codes = None
            self.fixed_cross = blocks.fixed_cross.sum(axis=0, keepdims=True)
            self.fixed_response = blocks.fixed_response.sum(axis=0, keepdims=True)
            self.response_square = blocks.response_square.sum(keepdims=True)
            self.group_values = blocks.group_values.sum(keepdims=True)
        if covariance == "diagonal":
            self.theta_index = [(i, i) for i in range(self.q)]
        else:
            self.theta_index = [(i, j) for i in range(self.q) for j in range(i + 1)]
        self.n_theta = len(self.theta_index)
        self.stacked = np.concatenate(
            [blocks.random_fixed, blocks.random_response[:, None, :]], axis=1
        )
        self.n_parameters = self.n_theta + len(self.groups) - 1
        self.n = float(self.group_values.sum())
        self.dof = self.n - (self.p if reml else 0)

    # ---- parameters -----------------------------------------------------------------

    def bounds(self) -> list[tuple[float | None, float | None]]:
        """Diagonal entries of Lambda are non-negative (lme4's constraint); the rest free."""
        theta = [(0.0, None) if i == j else (None, None) for i, j in self.theta_index]
        return theta + [(-15.0, 15.0)] * (len(self.groups) - 1)

    def start(self) -> np.ndarray:
        """Moment estimates from per-patient least squares (:func:`moment_start`), or
        lme4's default (Lambda = identity) when they are not usable; equal residual
        variances."""
        relative = moment_start(self.blocks)
        if relative is None:
            factor = np.eye(self.q)
        elif len(self.theta_index) == self.q:  # diagonal
            factor = np.diag(np.sqrt(np.diag(relative)))
        else:
            factor = np.linalg.cholesky(relative)
        theta = [factor[i, j] for i, j in self.theta_index]
        return np.array(theta + [0.0] * (len(self.groups) - 1))

    def factor(self, x: np.ndarray) -> np.ndarray:
        """The relative covariance factor Lambda (q x q) of parameter vector ``x``."""
        factor = np.zeros((self.q, self.q))
        for value, (i, j) in zip(x[: self.n_theta], self.theta_index, strict=True):
            factor[i, j] = value
        return factor

    def log_ratios(self, x: np.ndarray) -> np.ndarray:
        """eta_g for every residual group (0 for the first)."""
        return np.concatenate([[0.0], x[self.n_theta :]])

    def _weights(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray | None]:
        group_weights = np.exp(-2.0 * self.log_ratios(x))
        if self.codes is None:
            return group_weights, None
        return group_weights, group_weights[self.codes]

    # ---- evaluation -----------------------------------------------------------------

    def _factorise(self, x: np.ndarray) -> _Factorised:
        """Per-patient pieces shared by the value, the gradient and the predictions."""
        factor = self.factor(x)
        group_weights, weights = self._weights(x)
        cross = self.blocks.random_cross
        if weights is not None:
            cross = cross * weights
        lam_cross = left_multiply(factor.T, cross)  # Lambda' P_i
        inner = left_multiply(factor.T, transpose(lam_cross))  # Lambda' P_i Lambda
        for a in range(self.q):
            inner[a, a] += 1.0
        lower = batched_cholesky(inner)
        stacked = self.stacked if weights is None else self.stacked * weights
        solved = forward_solve(lower, left_multiply(factor.T, stacked))
        return {
            "factor": factor,
            "group_weights": group_weights,
            "weights": weights,
            "cross": cross,
            "lam_cross": lam_cross,
            "lower": lower,
            "stacked": stacked,
            "solved": solved,
        }

    def __call__(self, x: np.ndarray, *, gradient: bool = True) -> Evaluation:
        """Deviance (ML) or REML criterion at ``x``, with its gradient when asked."""
        parts = self._factorise(x)
        group_weights, p = parts["group_weights"], self.p
        reduced = gram(parts["solved"])
        precision = np.tensordot(group_weights, self.fixed_cross, axes=1) - reduced[:p, :p]
        cross_response = group_weights @ self.fixed_response - reduced[:p, p]
        response_square = group_weights @ self.response_square - reduced[p, p]
        chol = np.linalg.cholesky(precision)
        beta = np.linalg.solve(chol.T, np.linalg.solve(chol, cross_response))
        rss = float(response_square - beta @ cross_response)
        if not rss > 0.0:
            raise np.linalg.LinAlgError("penalised residual sum of squares is not positive")
        log_det = 2.0 * float(np.log(parts["lower"][np.arange(self.q), np.arange(self.q)]).sum())
        log_det += float(2.0 * self.log_ratios(x) @ self.group_values)
        value = log_det + self.dof * (1.0 + _LOG_2PI + np.log(rss / self.dof))
        if self.reml:
            value += 2.0 * float(np.log(np.diag(chol)).sum())
        grad = self._gradient(x, parts, beta, chol, rss) if gradient else None
        return Evaluation(float(value), grad, beta, precision, rss)

    def _gradient(
        self,
        x: np.ndarray,
        parts: _Factorised,
        beta: np.ndarray,
        chol: np.ndarray,
        rss: float,
    ) -> np.ndarray:
        p, factor = self.p, parts["factor"]
        solved = parts["solved"]
        reduced_cross = forward_solve(parts["lower"], parts["lam_cross"])  # E = L^-1 Lambda' P
        sum_zhz = parts["cross"].sum(axis=-1) - gram(reduced_cross)
        stacked = parts["stacked"]
        scaled_resid = stacked[:, p, :] - contract_columns(stacked[:, :p, :], beta)
        reduced_resid = solved[:, p, :] - contract_columns(solved[:, :p, :], beta)
        scores = scaled_resid - (reduced_cross * reduced_resid[:, None, :]).sum(axis=0)
        scale = self.dof / rss
        d_matrix = sum_zhz - scale * (scores @ scores.T)
        if self.reml:
            zhx = stacked[:, :p, :] - pair_contract(reduced_cross, solved[:, :p, :])
            chol_inv = np.linalg.inv(chol)
            d_matrix -= quadratic_sum(zhx, chol_inv.T @ chol_inv)
        d_factor = 2.0 * (d_matrix @ factor)
        grad = np.array([d_factor[i, j] for i, j in self.theta_index])
        if self.codes is not None:
            ratios = self._ratio_gradient(self.codes, parts, beta, chol, scale)
            grad = np.concatenate([grad, ratios])
        return grad

    def _ratio_gradient(
        self,
        codes: np.ndarray,
        parts: _Factorised,
        beta: np.ndarray,
        chol: np.ndarray,
        scale: float,
    ) -> np.ndarray:
        blocks, w = self.blocks, parts["group_weights"][codes]  # the per-patient weights
        cross = blocks.random_cross
        relative = forward_solve(
            parts["lower"], np.broadcast_to(parts["factor"].T[:, :, None], cross.shape)
        )
        conditional = pair_contract(relative, relative)  # Q_i = Lambda A_i^-1 Lambda'
        trace_qs = (conditional * cross).sum(axis=(0, 1))
        trace_inverse = w * blocks.n_values - w**2 * trace_qs
        resid = blocks.random_response - contract_columns(blocks.random_fixed, beta)
        q_resid = (conditional * resid[None, :, :]).sum(axis=1)
        s_q_resid = (cross * q_resid[None, :, :]).sum(axis=1)
        per_patient = trace_inverse - scale * (
            -2.0 * w**3 * (resid * q_resid).sum(axis=0) + w**4 * (q_resid * s_q_resid).sum(axis=0)
        )
        resid_square = (
            self.response_square
            - 2.0 * self.fixed_response @ beta
            + np.einsum("gjk,j,k->g", self.fixed_cross, beta, beta)
        )
        group_w = parts["group_weights"]
        per_group = -scale * group_w**2 * resid_square
        if self.reml:
            chol_inv = np.linalg.inv(chol)
            precision_inv = chol_inv.T @ chol_inv
            whitened = left_multiply(chol_inv, transpose(blocks.random_fixed))  # (p, q, n)
            q_white = left_multiply(
                chol_inv, transpose(pair_contract(conditional, blocks.random_fixed))
            )
            s_q_white = pair_contract(cross, transpose(q_white))
            per_patient -= -2.0 * w**3 * (whitened * q_white).sum(axis=(0, 1)) + w**4 * (
                transpose(q_white) * s_q_white
            ).sum(axis=(0, 1))
            per_group -= group_w**2 * np.einsum("jk,gkj->g", precision_inv, self.fixed_cross)
        totals = np.bincount(codes, weights=per_patient, minlength=len(self.groups)) + per_group
        return (2.0 / group_w * totals)[1:]

    # ---- predictions ----------------------------------------------------------------

    def predictions(self, x: np.ndarray, beta: np.ndarray) -> PatientPredictions:
        r"""BLUPs :math:`\hat b_i = \Lambda L_i^{-\top} L_i^{-1} \Lambda^\top w_i Z_i^\top
        (y_i - X_i\hat\beta)` and the per-patient matrices of their variances."""
        parts = self._factorise(x)
        p, lower, factor = self.p, parts["lower"], parts["factor"]
        solved = parts["solved"]
        reduced_resid = solved[:, p, :] - contract_columns(solved[:, :p, :], beta)
        effects = left_multiply(factor, backward_solve(lower, reduced_resid))
        relative = forward_solve(
            lower, np.broadcast_to(factor.T[:, :, None], self.blocks.random_cross.shape)
        )
        link = left_multiply(factor, backward_solve(lower, solved[:, :p, :]))
        return PatientPredictions(effects, pair_contract(relative, relative), link)
