r"""Log-likelihood of the shared-random-effects joint model and its analytic gradient.

For patient :math:`i` in group :math:`g`, with :math:`z(t)` the time design
(:math:`(1, t)` or the spline :math:`(1, \min(t,k), \max(t-k,0))`):

.. math::

    y_{ij} = z(t_{ij})^\top(\beta_g + b_i) + \varepsilon_{ij}, \quad
    b_i = L v_i,\ v_i \sim N(0, I_q),\ \varepsilon_{ij} \sim N(0, \sigma^2),

    h_i(t \mid b_i) = h_0(t)\exp\{\gamma_g + \alpha\, m_i(t)\}, \quad
    m_i(t) = z(t)^\top(\beta_g + b_i) \text{ (current value) or } b_{i,\text{slope}},

with :math:`G = LL^\top` (spherical random effects :math:`v`, as in Henderson, Diggle
& Dobson 2000 and Rizopoulos 2012, chapter 4). The marginal likelihood of a patient is

.. math::

    \ell_i = \log \int p(y_i \mid v)\,\phi(v)\, h_i(T_i\mid v)^{\delta_i}
        e^{-H_i(T_i\mid v)}\,dv .

**Adaptive Gauss–Hermite quadrature.** The integral is taken against a Gaussian
:math:`q_i = N(\mu_i, R_iR_i^\top)`, the exact posterior of :math:`v_i` given
:math:`y_i` under the mixed-model part at the grid's parameters
(:math:`A_i = I + L^\top Z_i^\top Z_i L/\sigma^2`, :math:`\mu_i = A_i^{-1}L^\top
Z_i^\top(y_i - Z_i\beta_g)/\sigma^2`, :math:`R_iR_i^\top = A_i^{-1}`), with the
product rule of probabilists' Hermite nodes :math:`x_k` and weights :math:`w_k`:

.. math::

    \ell_i \approx \log \sum_k \frac{w_k}{(2\pi)^{q/2}}\,
        \frac{p(y_i \mid v_{ik})\,\phi(v_{ik})\,S_i(v_{ik})}{q_i(v_{ik})}, \qquad
        v_{ik} = \mu_i + R_i x_k .

The nodes are held fixed while the parameters move (so the gradient below is exact
for the fixed-grid objective) and re-centred between optimisation stages. With
:math:`\alpha = 0` the ratio :math:`p(y\mid v)\phi(v)/q(v)` equals :math:`p(y_i)` at
every node, so the likelihood is exactly the mixed-model ML likelihood plus the
survival likelihood for any number of nodes.

**Gradient.** With :math:`\pi_{ik}` the normalised node weights, every score is
:math:`\sum_k \pi_{ik}\,\partial \log f_{ik}/\partial\theta`; the longitudinal score in
the patient coefficients :math:`\theta_{ik} = \beta_g + Lv_{ik}` is
:math:`(Z^\top y - Z^\top Z\theta)/\sigma^2`, the survival score is
:math:`\alpha\,[\delta z(T) - \sum_j (E_j z_{a,j} + F_j z_{c,j})]` (segments of
:mod:`~kidneycohort.models.joint._hazard`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.special import logsumexp

from kidneycohort.models.joint._data import JointData
from kidneycohort.models.joint._hazard import piecewise_segments, weibull_segments

__all__ = ["Grid", "JointLikelihood", "Layout"]

_LOG_2PI = float(np.log(2.0 * np.pi))


@dataclass(frozen=True)
class Layout:
    """Where each parameter sits in the vector, and its name."""

    n_groups: int
    q: int
    baseline: str
    n_baseline: int
    names: tuple[str, ...]
    beta: slice
    log_sigma: int
    chol: slice
    gamma: slice
    alpha: int
    hazard: slice

    @classmethod
    def build(
        cls, groups: list[str], slope_terms: list[str], baseline: str, n_baseline: int
    ) -> Layout:
        q = 1 + len(slope_terms)
        terms = ["intercept", *slope_terms]
        names = [f"{g}: {t}" for g in groups for t in terms]
        beta = slice(0, len(names))
        names.append("log_residual_sd")
        chol_names = [
            f"log_chol({terms[a]})" if a == b else f"chol({terms[a]}, {terms[b]})"
            for a in range(q)
            for b in range(a + 1)
        ]
        start = len(names)
        names.extend(chol_names)
        chol = slice(start, len(names))
        start = len(names)
        names.extend(f"log_hazard_ratio({g})" for g in groups[1:])
        gamma = slice(start, len(names))
        names.append("association")
        alpha = len(names) - 1
        start = len(names)
        if baseline == "piecewise":
            names.extend(f"log_baseline_hazard({p + 1})" for p in range(n_baseline))
        else:
            names.extend(["log_weibull_scale", "log_weibull_shape"])
        return cls(
            len(groups),
            q,
            baseline,
            n_baseline,
            tuple(names),
            beta,
            beta.stop,
            chol,
            gamma,
            alpha,
            slice(start, len(names)),
        )

    @property
    def size(self) -> int:
        return len(self.names)

    def factor(self, x: np.ndarray) -> np.ndarray:
        """:math:`L` (lower triangular, positive diagonal)."""
        q = self.q
        out = np.zeros((q, q))
        rows, cols = np.tril_indices(q)
        out[rows, cols] = x[self.chol]
        diagonal = np.arange(q)
        out[diagonal, diagonal] = np.exp(out[diagonal, diagonal])
        return out


@dataclass(frozen=True)
class Grid:
    """Fixed quadrature nodes ``v`` ``(n, K, q)`` and the per-node constant ``offset``."""

    nodes: np.ndarray
    offset: np.ndarray


class JointLikelihood:
    """Log-likelihood and gradient of :class:`JointData` under a :class:`Layout`."""

    def __init__(
        self,
        data: JointData,
        layout: Layout,
        *,
        association: str,
        cuts: np.ndarray,
        quadrature_nodes: int,
        longitudinal_only: bool = False,
    ) -> None:
        self.data, self.layout, self.association = data, layout, association
        self.longitudinal_only = longitudinal_only
        self.quadrature_nodes = quadrature_nodes
        knot = data.knot
        edges = np.unique(np.concatenate([[0.0], cuts, [] if knot is None else [knot]]))
        self.edges = np.concatenate([edges, [np.inf]])
        lower = self.edges[:-1]
        self.piece = np.searchsorted(np.concatenate([[0.0], cuts]), lower, side="right") - 1
        q = layout.q
        # z(t) = z_a + z_c t inside each segment
        after = (knot is not None) & (lower >= (knot if knot is not None else np.inf))
        self.z_a = np.zeros((lower.size, q))
        self.z_c = np.zeros((lower.size, q))
        if association == "slope":
            self.z_a[:, q - 1] = 1.0
        else:
            self.z_a[:, 0] = 1.0
            if knot is None:
                self.z_c[:, 1] = 1.0
            else:
                self.z_a[after, 1] = knot
                self.z_a[after, 2] = -knot
                self.z_c[~after, 1] = 1.0
                self.z_c[after, 2] = 1.0
        time = data.time[:, None]
        self.seg_start = np.minimum(lower[None, :], time)[:, None, :]
        self.seg_end = np.minimum(self.edges[1:][None, :], time)[:, None, :]
        self.seg_length = self.seg_end - self.seg_start
        self.event_segment = np.searchsorted(lower, data.time, side="left") - 1
        self.event_segment = np.clip(self.event_segment, 0, lower.size - 1)
        self.event_z = (
            self.z_a[self.event_segment] + self.z_c[self.event_segment] * data.time[:, None]
        )
        self.event_piece = self.piece[self.event_segment]
        nodes, weights = np.polynomial.hermite_e.hermegauss(quadrature_nodes)
        mesh = np.meshgrid(*([nodes] * q), indexing="ij")
        self.unit_nodes = np.stack([m.ravel() for m in mesh], axis=1)  # (K, q)
        log_w = np.meshgrid(*([np.log(weights)] * q), indexing="ij")
        self.log_weights: np.ndarray = (
            np.sum([w.ravel() for w in log_w], axis=0) - q / 2.0 * _LOG_2PI
        )

    # ---- the adaptive grid --------------------------------------------------------

    def grid(self, x: np.ndarray) -> Grid:
        """Nodes centred at each patient's posterior of :math:`v` given the eGFR values."""
        lay, data = self.layout, self.data
        factor = lay.factor(x)
        sigma2 = np.exp(2.0 * x[lay.log_sigma])
        beta = x[lay.beta].reshape(lay.n_groups, lay.q)[data.group_code]
        precision = np.einsum("ab,nbc,cd->nad", factor.T, data.cross, factor) / sigma2
        precision += np.eye(lay.q)
        resid = data.cross_response - np.einsum("nab,nb->na", data.cross, beta)
        covariance = np.linalg.inv(precision)
        covariance = (covariance + np.swapaxes(covariance, 1, 2)) / 2.0
        mean = np.einsum("nab,nb->na", covariance, resid @ factor) / sigma2
        root = np.linalg.cholesky(covariance)
        nodes = mean[:, None, :] + np.einsum("nab,kb->nka", root, self.unit_nodes)
        log_det = np.log(np.diagonal(root, axis1=1, axis2=2)).sum(axis=1)
        offset = (
            self.log_weights[None, :]
            + 0.5 * (self.unit_nodes**2).sum(axis=1)[None, :]
            + log_det[:, None]
            - 0.5 * (nodes**2).sum(axis=2)
        )
        return Grid(nodes, offset)

    # ---- value and gradient -------------------------------------------------------

    def _hazard_terms(self, x: np.ndarray, link: np.ndarray) -> dict[str, np.ndarray]:
        lay, data = self.layout, self.data
        alpha = x[lay.alpha]
        gamma = np.concatenate([[0.0], x[lay.gamma]])[data.group_code]
        m_a = np.einsum("nkq,jq->nkj", link, self.z_a)
        m_c = np.einsum("nkq,jq->nkj", link, self.z_c)
        hazard = x[lay.hazard]
        event_link = np.einsum("nkq,nq->nk", link, self.event_z)
        if lay.baseline == "piecewise":
            a = (hazard[self.piece] + gamma[:, None])[:, None, :] + alpha * m_a
            e, f = piecewise_segments(a, alpha * m_c, self.seg_start, self.seg_length)
            k = None
            log_base = hazard[self.event_piece]
        else:
            rho = float(np.exp(hazard[1]))
            a = (hazard[0] + gamma)[:, None, None] + alpha * m_a
            e, f, k = weibull_segments(a, alpha * m_c, self.seg_start, self.seg_end, rho)
            log_base = hazard[0] + hazard[1] + (rho - 1.0) * np.log(data.time)
        log_hazard = (log_base + gamma)[:, None] + alpha * event_link
        return {"E": e, "F": f, "K": k, "log_hazard": log_hazard, "event_link": event_link}

    def __call__(
        self, x: np.ndarray, grid: Grid, *, gradient: bool = True, per_patient: bool = False
    ) -> tuple[float, np.ndarray | None] | np.ndarray:
        lay, data = self.layout, self.data
        factor = lay.factor(x)
        log_sigma = x[lay.log_sigma]
        sigma2 = np.exp(2.0 * log_sigma)
        beta = x[lay.beta].reshape(lay.n_groups, lay.q)[data.group_code]  # (n, q)
        effects = grid.nodes @ factor.T  # b = L v, (n, K, q)
        theta = beta[:, None, :] + effects
        cross_theta = np.einsum("nab,nkb->nka", data.cross, theta)
        rss = (
            data.response_square[:, None]
            - 2.0 * np.einsum("nq,nkq->nk", data.cross_response, theta)
            + np.einsum("nkq,nkq->nk", theta, cross_theta)
        )
        log_long = -0.5 * (data.n_values[:, None] * (_LOG_2PI + 2.0 * log_sigma) + rss / sigma2)
        link = theta if self.association == "current_value" else effects
        total = grid.offset + log_long
        terms: dict[str, np.ndarray] | None = None
        cumulative = np.zeros(1)
        if not self.longitudinal_only:
            terms = self._hazard_terms(x, link)
            cumulative = terms["E"].sum(axis=2)
            total = total + data.event[:, None] * terms["log_hazard"] - cumulative
        per = logsumexp(total, axis=1)
        if per_patient:
            return per
        value = float(per.sum())
        if not gradient:
            return value, None
        weights = np.exp(total - per[:, None])  # (n, K)
        return value, self._gradient(
            x, weights, grid, factor, sigma2, theta, cross_theta, rss, link, terms, cumulative
        )

    def _gradient(
        self,
        x: np.ndarray,
        weights: np.ndarray,
        grid: Grid,
        factor: np.ndarray,
        sigma2: float,
        theta: np.ndarray,
        cross_theta: np.ndarray,
        rss: np.ndarray,
        link: np.ndarray,
        terms: dict[str, np.ndarray] | None,
        cumulative: np.ndarray,
    ) -> np.ndarray:
        lay, data = self.layout, self.data
        alpha = x[lay.alpha]
        event = data.event[:, None]
        grad = np.zeros(lay.size)
        score_long = (data.cross_response[:, None, :] - cross_theta) / sigma2  # (n, K, q)
        if terms is None:  # the mixed model alone
            link_score = np.zeros_like(score_long)
        else:  # derivative of log S_i in the link coefficients, divided by alpha
            link_score = (
                event[..., None] * self.event_z[:, None, :]
                - np.einsum("nkj,jq->nkq", terms["E"], self.z_a)
                - np.einsum("nkj,jq->nkq", terms["F"], self.z_c)
            )
        score_effects = score_long + alpha * link_score
        score_beta = score_long + (
            alpha * link_score if self.association == "current_value" else 0.0
        )
        per_beta = np.einsum("nk,nkq->nq", weights, score_beta)
        grad[lay.beta] = np.stack(
            [
                np.bincount(data.group_code, per_beta[:, a], minlength=lay.n_groups)
                for a in range(lay.q)
            ],
            axis=1,
        ).ravel()
        grad[lay.log_sigma] = float((weights * (rss / sigma2 - data.n_values[:, None])).sum())
        d_factor = np.einsum("nk,nka,nkb->ab", weights, score_effects, grid.nodes)
        rows, cols = np.tril_indices(lay.q)
        d_chol = d_factor[rows, cols]
        diagonal = rows == cols
        d_chol[diagonal] *= factor[rows[diagonal], cols[diagonal]]
        grad[lay.chol] = d_chol
        if terms is None:
            return grad
        e = terms["E"]
        survival = weights * (event - cumulative)
        by_group = np.bincount(data.group_code, survival.sum(axis=1), minlength=lay.n_groups)
        grad[lay.gamma] = by_group[1:]
        grad[lay.alpha] = float((weights * np.einsum("nkq,nkq->nk", link, link_score)).sum())
        if lay.baseline == "piecewise":
            piece_e = np.einsum("nk,nkj->nj", weights, e)
            seg_sum = piece_e.sum(axis=0)
            hazard_grad = np.bincount(self.piece, seg_sum, minlength=lay.n_baseline)
            hazard_grad = (
                np.bincount(self.event_piece, data.event, minlength=lay.n_baseline) - hazard_grad
            )
            grad[lay.hazard] = hazard_grad
        else:
            rho = float(np.exp(x[lay.hazard][1]))
            scale = float(survival.sum())
            shape = data.event * (1.0 + rho * np.log(data.time))
            shape_total = float(shape.sum()) - float((weights * terms["K"].sum(axis=2)).sum())
            grad[lay.hazard] = [scale, shape_total]
        return grad
