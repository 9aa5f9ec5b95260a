"""Derivative-form three-point Abel inversion (counterpart of Dasch 1992's three-point method).

References
----------
Dasch (1992), Appl. Opt. 31:1146; references.md section 5.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np

from ...errors import InputError
from ._kernel import _kernel_integrals


@lru_cache(maxsize=16)
def three_point_operator(m: int) -> np.ndarray:
    """Derivative-form three-point operator (unit spacing), ``(n-n0)/n0 = D @ eps``.

    eps on interval j is eps_j + s_j (y - j) with s_j = (eps_{j+1} - eps_{j-1})/2;
    eps_{-1} = -eps_1 (odd symmetry about the axis) and eps_m = 0 (ambient
    beyond the last sample).  Row i integrates from y = i (r_i) outward.
    """
    if m < 3:
        raise InputError(f"three_point Abel inversion needs at least 3 samples, got {m}")
    D = np.zeros((m, m))
    j = np.arange(m, dtype=float)
    for i in range(m):
        lo = np.maximum(j[i:] - 0.5, i)
        hi = np.minimum(j[i:] + 0.5, m - 1)  # the data end at the last sample
        i0, i1 = _kernel_integrals(float(i), lo, hi)
        # integral of (eps_j + s_j (y - j)) over the interval = eps_j*i0 + s_j*(i1 - j*i0)
        if i == 0:
            i0[0] = 0.0  # eps_0 = 0 on the axis by symmetry; the log-singular term drops (y - 0 = y)
        c_eps = i0
        c_slope = i1 - j[i:] * i0
        row = np.zeros(m + 1)
        idx = np.arange(i, m)
        row[idx] += c_eps
        row[np.minimum(idx + 1, m)] += 0.5 * c_slope
        lower = idx - 1
        neg = lower < 0
        np.add.at(row, np.where(neg, 1, lower), np.where(neg, 0.5, -0.5) * c_slope)
        D[i] = -row[:m] / np.pi
    return D
