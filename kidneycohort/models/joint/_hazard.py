r"""Cumulative dropout hazard over time segments, per patient and quadrature node.

Within a segment :math:`[s, e)` of the time axis (the pieces of the baseline hazard
split at the knot) the log-hazard is linear in time, :math:`a + c\,t`, for the
current-value link (the true eGFR trajectory is linear there) and constant for the
random-slope link. For the piecewise-constant baseline the integrals are closed form
(Rizopoulos 2012, section 4.1):

.. math::

    E = \int_s^e e^{a + c t} dt = e^{a + c s}\,\Delta\,\varphi_1(c\Delta), \qquad
    F = \int_s^e t\,e^{a + c t} dt = e^{a + c s}\,[s\,\Delta\,\varphi_1(c\Delta)
        + \Delta^2 \varphi_2(c\Delta)],

with :math:`\Delta = e - s`, :math:`\varphi_1(x) = (e^x - 1)/x` and
:math:`\varphi_2(x) = (x e^x - e^x + 1)/x^2` (series near 0). ``E`` is the
cumulative hazard of the segment and its derivative in :math:`a`; ``F`` its
derivative in :math:`c`. For the Weibull baseline :math:`h_0(t) = \lambda \rho
t^{\rho-1}` the substitution :math:`u = t^\rho` removes the singularity at 0,
:math:`\int_s^e \lambda\rho t^{\rho-1} e^{\eta(t)} dt = \int_{s^\rho}^{e^\rho}
\lambda e^{\eta(u^{1/\rho})} du`, computed by Gauss–Legendre quadrature per segment;
it also gives :math:`K`, the derivative of the cumulative hazard in :math:`\log\rho`
(Leibniz's rule in :math:`u`, so no :math:`\log u` singularity is integrated).
"""

from __future__ import annotations

import numpy as np

__all__ = ["phi1", "phi2", "piecewise_segments", "weibull_segments"]

_SERIES = 1e-4
_LEGENDRE_NODES = 10


def phi1(x: np.ndarray) -> np.ndarray:
    r""":math:`(e^x - 1)/x`, 1 at 0."""
    small = np.abs(x) < _SERIES
    safe = np.where(small, 1.0, x)
    return np.where(small, 1.0 + x / 2.0 + x * x / 6.0, np.expm1(safe) / safe)


def phi2(x: np.ndarray) -> np.ndarray:
    r""":math:`\int_0^1 u e^{xu} du = (x e^x - e^x + 1)/x^2`, 1/2 at 0."""
    small = np.abs(x) < 1e-2
    safe = np.where(small, 1.0, x)
    series = 0.5 + x / 3.0 + x * x / 8.0 + x**3 / 30.0 + x**4 / 144.0
    return np.where(small, series, (safe * np.exp(safe) - np.expm1(safe)) / (safe * safe))


def piecewise_segments(
    a: np.ndarray, c: np.ndarray, start: np.ndarray, length: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """``E`` and ``F`` of every segment; ``a, c`` are ``(n, K, J)``, ``start, length`` ``(n, 1, J)``."""
    x = c * length
    head = np.exp(a + c * start)
    first = length * phi1(x)
    return head * first, head * (start * first + length * length * phi2(x))


def weibull_segments(
    a: np.ndarray, c: np.ndarray, start: np.ndarray, end: np.ndarray, rho: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``E, F, K`` of every segment by Gauss–Legendre in :math:`u = t^\\rho`.

    ``a`` holds :math:`\\log\\lambda + \\eta + \\alpha\\,m_a`; shapes as in
    :func:`piecewise_segments`, ``end`` instead of ``length``.
    """
    nodes, weights = np.polynomial.legendre.leggauss(_LEGENDRE_NODES)
    low, high = start**rho, end**rho
    half = (high - low) / 2.0  # (n, 1, J)
    u = low[..., None] + half[..., None] * (1.0 + nodes)  # (n, 1, J, G)
    u = np.maximum(u, 1e-300)
    t = u ** (1.0 / rho)
    values = np.exp(a[..., None] + c[..., None] * t) * (half[..., None] * weights)
    cumulative, moment = values.sum(-1), (values * t).sum(-1)
    # d/d log(rho) by Leibniz's rule: the limits u = s^rho, e^rho move, and the integrand
    # moves through t = u^(1/rho) (dt/dlog rho = -t log(u) / rho); t log u -> 0 at u = 0
    upper = np.where(end > 0, high * np.log(np.where(end > 0, end, 1.0)), 0.0)
    lower = np.where(start > 0, low * np.log(np.where(start > 0, start, 1.0)), 0.0)
    limits = rho * (upper * np.exp(a + c * end) - lower * np.exp(a + c * start))
    inside = (values * t * np.log(u)).sum(-1)
    return cumulative, moment, limits - c / rho * inside
