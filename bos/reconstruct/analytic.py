"""Analytic test pairs shipped with the library (for tests, benchmarks, users).

Abel pairs (closed-form integrals, each checked by quadrature):
every entry of :data:`ABEL_PAIRS` maps a name to a function
``pair(r_or_y, R=1.0, s=0.3) -> (f(r), F(y), dF/dy(y))`` evaluated on the
same coordinate array, where ``F`` is the forward Abel transform
``F(y) = 2 int_y^R f(r) r dr / sqrt(r^2 - y^2)`` and ``dF/dy`` is what a BOS
deflection measures (``eps = F'/n0`` for ``f = n - n0``).

Poisson pair: :func:`gaussian_potential` (a Gaussian with its analytic
gradient: a manufactured solution for the Poisson tests).
"""

from __future__ import annotations

from typing import Callable

import numpy as np


def _compact(r, R):
    return np.clip(1.0 - (np.asarray(r, dtype=float) / R) ** 2, 0.0, None)


def gaussian_pair(r, R=1.0, s=0.3):
    """f = exp(-r^2/s^2)  <->  F = sqrt(pi) s exp(-y^2/s^2) (R ignored: infinite support)."""
    r = np.asarray(r, dtype=float)
    f = np.exp(-(r**2) / s**2)
    F = np.sqrt(np.pi) * s * f
    return f, F, -2 * r / s**2 * F


def parabola_pair(r, R=1.0, s=None):
    """f = 1 - r^2/R^2  <->  F = (4/3) R (1 - y^2/R^2)^(3/2)  (compact)."""
    u = _compact(r, R)
    r = np.asarray(r, dtype=float)
    return np.where(np.abs(r) <= R, u, 0.0), 4 / 3 * R * u**1.5, -4 * r / R * np.sqrt(u)


def ellipse_pair(r, R=1.0, s=None):
    """f = sqrt(1 - r^2/R^2)  <->  F = (pi/2) R (1 - y^2/R^2)  (compact)."""
    u = _compact(r, R)
    r = np.asarray(r, dtype=float)
    inside = np.abs(r) <= R
    return np.sqrt(u), np.pi / 2 * R * u, np.where(inside, -np.pi * r / R, 0.0)


def quartic_pair(r, R=1.0, s=None):
    """f = (1 - r^2/R^2)^2  <->  F = (16/15) R (1 - y^2/R^2)^(5/2)  (compact, smooth edge)."""
    u = _compact(r, R)
    r = np.asarray(r, dtype=float)
    return u**2, 16 / 15 * R * u**2.5, -16 / 3 * r / R * u**1.5


ABEL_PAIRS: dict[str, Callable] = {
    "gaussian": gaussian_pair,
    "parabola": parabola_pair,
    "ellipse": ellipse_pair,
    "quartic": quartic_pair,
}


def gaussian_potential(y, x, *, x0=0.0, y0=0.0, s=0.3, amplitude=1.0):
    """phi = A exp(-((x-x0)^2 + (y-y0)^2)/s^2) and its gradient (dphi/dy, dphi/dx).

    ``y`` and ``x`` broadcast against each other (e.g. a column and a row).
    """
    y = np.asarray(y, dtype=float)
    x = np.asarray(x, dtype=float)
    phi = amplitude * np.exp(-((x - x0) ** 2 + (y - y0) ** 2) / s**2)
    return phi, -2 * (y - y0) / s**2 * phi, -2 * (x - x0) / s**2 * phi
