"""Registry of inversion methods and the (regularised) operator built from them."""

from __future__ import annotations

from typing import Callable

import numpy as np

from ...errors import InputError
from .onion_peeling import onion_peeling_operator
from .three_point import three_point_operator

METHODS: dict[str, Callable[[int], np.ndarray]] = {
    "three_point": three_point_operator,
    "onion_peeling": onion_peeling_operator,
}
"""name -> function m -> D, with (n - n0)/n0 = D @ eps for m samples from the axis (unit spacing)."""


def _second_difference(m):
    P = np.zeros((m - 2, m))
    idx = np.arange(m - 2)
    P[idx, idx], P[idx, idx + 1], P[idx, idx + 2] = 1.0, -2.0, 1.0
    return P


def inversion_operator(m: int, *, method: str = "three_point", regularization: float = 0.0) -> np.ndarray:
    """Linear operator ``D`` with ``(n - n0)/n0 = D @ eps`` for m samples from the axis.

    With ``regularization = alpha > 0`` the result minimises
    ``|D^-1 f - eps|^2 + alpha * |P f|^2`` (P: second difference of f), i.e.
    Tikhonov smoothing of the inverted profile; ``alpha`` is dimensionless
    (the operators are scale-free in dr).
    """
    if method not in METHODS:
        raise InputError(f"unknown Abel method {method!r}; choose from {', '.join(METHODS)}")
    if regularization < 0 or not np.isfinite(regularization):
        raise InputError(f"regularization must be >= 0, got {regularization}")
    D = METHODS[method](m)
    if regularization == 0:
        return D
    G = np.linalg.pinv(D)  # forward operator consistent with the chosen method
    P = _second_difference(m)
    return np.linalg.solve(G.T @ G + regularization * P.T @ P, G.T)


def abel_invert_deflection(eps, *, dr_m: float, method: str = "three_point",
                           regularization: float = 0.0, n0: float = 1.0) -> np.ndarray:
    """Index change n(r) - n0 from one-sided deflection samples.

    Parameters
    ----------
    eps : (..., m) ndarray
        Deflection [rad] away from the axis (positive toward larger y),
        sampled at y_j = j * dr_m, j = 0 on the axis; last axis is y.
    dr_m : float
        Sample spacing [m] (the result does not depend on it: the kernel is
        scale-free; it is checked and kept for the radii).
    method : {"three_point", "onion_peeling"}
    regularization : float
        Tikhonov parameter (0 = none).
    n0 : float
        Ambient index (the result scales with it).

    Returns
    -------
    (..., m) ndarray
        n(r_j) - n0 at r_j = j * dr_m.

    References
    ----------
    Dasch (1992), "One-dimensional tomography: a comparison of Abel,
    onion-peeling, and filtered backprojection methods", Appl. Opt. 31:1146.
    """
    eps = np.asarray(eps, dtype=float)
    if not (np.isfinite(dr_m) and dr_m > 0):
        raise InputError(f"dr_m must be positive, got {dr_m}")
    if eps.ndim == 0:
        raise InputError("eps must be at least 1-D")
    D = inversion_operator(eps.shape[-1], method=method, regularization=regularization)
    return n0 * eps @ D.T


# ---------------------------------------------------------------- symmetry axis and halves
