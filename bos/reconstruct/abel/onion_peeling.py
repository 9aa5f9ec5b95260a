"""Derivative-form onion peeling: rings of constant radial index gradient.

References
----------
Dasch (1992), "One-dimensional tomography: a comparison of Abel,
onion-peeling, and filtered backprojection methods", Appl. Opt. 31:1146
(onion peeling).
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np

from ...errors import InputError
from ._kernel import _kernel_integrals


@lru_cache(maxsize=16)
def onion_peeling_operator(m: int) -> np.ndarray:
    """Derivative-form onion-peeling operator (unit spacing), ``(n-n0)/n0 = D @ eps``.

    Ring k is the annulus [k - 1/2, k + 1/2] (ring 0: [0, 1/2]) with constant
    dn/dr = q_k.  The deflection of the ray at y_i = i is
    eps_i = (2 y_i / n0) sum_k q_k int_ring dr / sqrt(r^2 - y_i^2)
    (lower triangular, exact); on the axis eps_0 = 0 carries no information,
    so q_0 = q_1 is assumed.  n at the sample radii follows by integrating
    q inwards from n0 at the outer edge m - 1/2.
    """
    if m < 3:
        raise InputError(f"onion_peeling Abel inversion needs at least 3 samples, got {m}")
    G = np.zeros((m, m))
    for i in range(1, m):
        k = np.arange(i, m, dtype=float)
        lo = np.maximum(k - 0.5, i)
        i0, _ = _kernel_integrals(float(i), lo, k + 0.5)
        G[i, i:] = 2 * i * i0
    G[0, 0], G[0, 1] = 1.0, -1.0  # closes the system: q_0 = q_1
    Q = np.linalg.solve(G, np.eye(m))  # q = Q @ eps (column 0 carries the closure, eps_0 -> 0)
    Q[:, 0] = 0.0
    # n_i - n0 = -int_{r_i}^{m-1/2} q dr = -(q_i * 1/2 + sum_{k>i} q_k) for i >= 1; -(q_0/2 + ...) at 0
    L = np.triu(np.ones((m, m)), k=1) + 0.5 * np.eye(m)
    return -L @ Q
