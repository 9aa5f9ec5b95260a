"""Compiled per-box kernels of :mod:`bos.reconstruct._nested` (numba, cached on disk).

One call handles a range of boxes of one level and edge signature: the
loops over boxes, front assembly and extend-add run as compiled code, the
dense factorisation and products call LAPACK/BLAS through numba.  The
kernels release the interpreter lock, so two threads can work on two halves
of a level.  Measured against the same algorithm written with batched numpy
operations (611 x 611 weighted benchmark): see docs/performance.md.
"""

from __future__ import annotations

import numpy as np
from numba import njit


SMALL = 24
"""Factorisation: separators of at most this many cells use plain loops (no LAPACK/BLAS calls,
no allocations): 16 384 leaf boxes of 4 x 4 cells (611 x 611 grid) took 57 ms through numba's
LAPACK wrappers, 47 ms with loops."""

SMALL_SOLVE = 40
"""Solves: separators of at most this many cells use loops over contiguous right-hand sides
(611 x 611, 16 right-hand sides: 0.22 s with BLAS calls per box above 24 cells, see
docs/performance.md for the measured thresholds)."""


@njit(cache=True, nogil=True)
def _chol_inv_small(A, n, L, Li):  # pragma: no cover - compiled
    """L = cholesky(A[:n, :n]) and Li = L^-1 by loops; False if A is not positive definite."""
    for j in range(n):
        s = A[j, j]
        for k in range(j):
            s -= L[j, k] * L[j, k]
        if not s > 0.0:
            return False
        d = np.sqrt(s)
        L[j, j] = d
        for i in range(j + 1, n):
            t = A[i, j]
            for k in range(j):
                t -= L[i, k] * L[j, k]
            L[i, j] = t / d
    for j in range(n):
        for i in range(j):
            Li[i, j] = 0.0
        Li[j, j] = 1.0 / L[j, j]
        for i in range(j + 1, n):
            t = 0.0
            for k in range(j, i):
                t -= L[i, k] * Li[k, j]
            Li[i, j] = t / L[i, i]
    return True


@njit(cache=True, nogil=True)
def factor_boxes(lo, hi, origins, pI, pJ, pK, pR, D, OY, OX, nS, nB,
                 U0, pos0, map0, U1, pos1, map1, Linv, W, U):  # pragma: no cover - compiled
    """Eliminate the separators of boxes ``lo:hi``: Linv = L^-1, W = L^-1 F_SB, U = F_BB - W^T W.

    Pattern entries ``p``: front slot ``(pI[p], pJ[p])`` takes the value of array
    ``pK[p]`` (0: diagonal, 1: vertical, 2: horizontal coupling) at flat cell
    ``origin + pR[p]``.  Children k = 0, 1 give their Schur complements
    ``Uk[posk[b]]`` over slots ``mapk`` of the front; ``posk`` is empty at the leaves.
    """
    nf = nS + nB
    F = np.empty((nf, nf))
    Ls = np.zeros((nS, nS))
    Wt = np.empty((nB, nS))
    for b in range(lo, hi):
        F[:, :] = 0.0
        o = origins[b]
        for p in range(pI.shape[0]):
            k = pK[p]
            c = o + pR[p]
            F[pI[p], pJ[p]] = D[c] if k == 0 else (OY[c] if k == 1 else OX[c])
        if pos0.shape[0]:
            u = U0[pos0[b]]
            for i in range(map0.shape[0]):
                mi = map0[i]
                for j in range(map0.shape[0]):
                    F[mi, map0[j]] += u[i, j]
            u = U1[pos1[b]]
            for i in range(map1.shape[0]):
                mi = map1[i]
                for j in range(map1.shape[0]):
                    F[mi, map1[j]] += u[i, j]
        if nS <= SMALL:
            Li = Linv[b]
            if not _chol_inv_small(F, nS, Ls, Li):
                return 1
            for i in range(nB):  # Wt = (L^-1 F_SB)^T, rows contiguous
                for r in range(nS):
                    t = 0.0
                    for c in range(r + 1):
                        t += Li[r, c] * F[c, nS + i]
                    Wt[i, r] = t
            for r in range(nS):
                for i in range(nB):
                    W[b, r, i] = Wt[i, r]
            for i in range(nB):
                for j in range(i, nB):
                    t = F[nS + i, nS + j]
                    for r in range(nS):
                        t -= Wt[i, r] * Wt[j, r]
                    U[b, i, j] = t
                    U[b, j, i] = t
            continue
        L = np.linalg.cholesky(np.ascontiguousarray(F[:nS, :nS]))
        Li = np.linalg.inv(L)
        Linv[b] = Li
        if nB:
            w = Li @ np.ascontiguousarray(F[:nS, nS:])
            W[b] = w
            U[b] = F[nS:, nS:] - w.T @ w
    return 0


@njit(cache=True, nogil=True)
def forward_boxes(lo, hi, Sidx, r, nB, up0, pos0, map0, up1, pos1, map1, Linv, W, y, up):  # pragma: no cover
    """Forward substitution for boxes ``lo:hi``: y = L^-1 r_S, up = r_B - W^T y (per right-hand side)."""
    nS = Sidx.shape[1]
    k = r.shape[1]
    front = np.empty((nS + nB, k))
    for b in range(lo, hi):
        front[:, :] = 0.0
        for i in range(nS):
            front[i] = r[Sidx[b, i]]
        if pos0.shape[0]:
            u = up0[pos0[b]]
            for i in range(map0.shape[0]):
                front[map0[i]] += u[i]
            u = up1[pos1[b]]
            for i in range(map1.shape[0]):
                front[map1[i]] += u[i]
        if nS <= SMALL_SOLVE:  # innermost loops over the right-hand sides (contiguous)
            for i in range(nS):
                for j in range(k):
                    y[b, i, j] = 0.0
                for c in range(i + 1):
                    a = Linv[b, i, c]
                    for j in range(k):
                        y[b, i, j] += a * front[c, j]
            for i in range(nB):
                for j in range(k):
                    up[b, i, j] = front[nS + i, j]
                for c in range(nS):
                    a = W[b, c, i]
                    for j in range(k):
                        up[b, i, j] -= a * y[b, c, j]
            continue
        yb = Linv[b] @ np.ascontiguousarray(front[:nS])
        y[b] = yb
        if nB:
            up[b] = front[nS:] - W[b].T @ yb
    return 0


@njit(cache=True, nogil=True)
def backward_boxes(lo, hi, Sidx, Bidx, x, Linv, W, y):  # pragma: no cover - compiled
    """Back substitution for boxes ``lo:hi``: x_S = L^-T (y - W x_B), written into ``x``."""
    nS = Sidx.shape[1]
    nB = Bidx.shape[1]
    k = x.shape[1]
    xb = np.empty((nB, k))
    z = np.empty((nS, k))
    for b in range(lo, hi):
        if nS <= SMALL_SOLVE:  # innermost loops over the right-hand sides (contiguous)
            for i in range(nS):
                for j in range(k):
                    z[i, j] = y[b, i, j]
                for c in range(nB):
                    a = W[b, i, c]
                    row = Bidx[b, c]
                    for j in range(k):
                        z[i, j] -= a * x[row, j]
            for i in range(nS):
                row = Sidx[b, i]
                for j in range(k):
                    x[row, j] = 0.0
                for c in range(i, nS):
                    a = Linv[b, c, i]
                    for j in range(k):
                        x[row, j] += a * z[c, j]
            continue
        yb = y[b].copy()
        if nB:
            for i in range(nB):
                xb[i] = x[Bidx[b, i]]
            yb -= W[b] @ xb
        xs = Linv[b].T @ yb
        for i in range(nS):
            x[Sidx[b, i]] = xs[i]
    return 0
