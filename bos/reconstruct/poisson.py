"""Least-squares integration of a measured gradient field (Poisson problem).

Given a gradient field ``(gy, gx)`` sampled on a regular grid of cell centres,
find the scalar field ``phi`` whose discrete gradient best matches it:

    minimise  sum_faces  w_f * ((phi_b - phi_a) / h - g_f)**2

where a face joins two neighbouring valid cells a, b, ``h`` is the grid step
along the face normal and ``g_f`` the mean of the two measured gradient
components across the face.  The normal equations are the 5-point Poisson
equation  -lap(phi) = -div(g)  with natural (Neumann, ``dphi/dnu = g.nu``)
conditions on every domain edge; Dirichlet values may be imposed on the edges
of the rectangle (they live on the cell edge, half a step outside the
outermost vectors).

Solvers (registry :data:`SOLVERS`, all solve the same discrete problem):

``"dct"``
    fast transform solver for full rectangles without weights: the Kronecker
    sum of 1-D operators is diagonalised by DCT-II (Neumann/Neumann), DST-II
    (Dirichlet/Dirichlet), DST-IV / DCT-IV (mixed) along each axis.
``"pcg"``
    matrix-free conjugate gradients on masked and/or weighted domains,
    preconditioned by the rectangle DCT solver (the default there).
``"multigrid"``
    sparse normal equations on masked, irregular domains with weights,
    solved by CG preconditioned with an aggregation multigrid V-cycle
    (2 x 2 cell blocks, Galerkin coarse operators with over-correction,
    pyamg smoothers); robust for any mask and weights (fallback of "pcg").
``"sparse"``
    the same sparse system solved directly by scipy's sparse LU in the
    grid's nested-dissection order (reference; factorised once for the
    Monte Carlo uncertainty).

References
----------
Simchony, Chellappa & Shao (1990), IEEE TPAMI 12:435 (DCT Poisson solver) [M].
Strang (1999), SIAM Rev. 41:135 (the discrete cosine transform) [M].
Southwell (1980), JOSA 70:998 (zonal least squares from slopes) [M].
Harker & O'Leary (2008, 2015) (global least-squares integration) [M].
Braess (1995), Computing 55:379 (aggregation multigrid with over-correction) [M].
[M]: cited from memory, not checked against the original.
"""

from __future__ import annotations

import copy
from typing import Callable

import numpy as np
import scipy.fft as sfft
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from scipy.sparse import csgraph
from scipy import ndimage

from .._threads import resolve_workers
from ..errors import InputError

EDGES = ("top", "bottom", "left", "right")
"""Edge names: ``top`` = row 0, ``bottom`` = last row, ``left`` = column 0,
``right`` = last column (y points down)."""

SOLVERS: dict[str, Callable] = {}
"""name -> factory(problem) returning ``solve(rhs_grid, rtol=None) -> phi_grid`` (set up once, reused;
``rtol`` overrides the iterative solvers' relative residual tolerance for one call)."""

PCG_MAX_WEIGHT_SPREAD = 30.0
"""``method="auto"`` on weighted problems: the DCT-preconditioned CG only when the positive weights
span at most this factor (max/min), else the multigrid solver straight away.  The DCT
preconditioner is the unweighted operator, so the preconditioned condition number grows with the
spread: on the 4 MP demo-like field (1/sigma^2 spanning x600) CG hit its 200-iteration limit
(2.6 s) where multigrid needed 13 iterations (0.44 s incl. set-up); on a 24 MP run this happened
for the main solve and for each Monte Carlo sample."""


def _register(name):
    def deco(fn):
        SOLVERS[name] = fn
        return fn

    return deco


# ---------------------------------------------------------------- problem set-up


class _Problem:
    """Validated inputs shared by all solvers."""

    def __init__(self, gy, gx, spacing_m, mask, invalid, weights, boundary, dirichlet):
        gy = np.asarray(gy, dtype=float)
        gx = np.asarray(gx, dtype=float)
        if gy.ndim != 2 or gy.shape != gx.shape:
            raise InputError(f"gy and gx must be 2-D arrays of one shape, got {gy.shape} and {gx.shape}")
        if min(gy.shape) < 2:
            raise InputError(f"gradient field must be at least 2 x 2, got {gy.shape}")
        self.shape = gy.shape
        self.hy, self.hx = _spacing(spacing_m)
        excluded = np.zeros(self.shape, bool)
        for name, flag in (("mask", mask), ("invalid", invalid)):
            if flag is not None:
                flag = np.asarray(flag, dtype=bool)
                if flag.shape != self.shape:
                    raise InputError(f"{name} shape {flag.shape} does not match the field {self.shape}")
                excluded |= flag
        finite = np.isfinite(gy)
        finite &= np.isfinite(gx)
        if not finite.all():
            bad = int((~excluded & ~finite).sum())
            if bad:
                raise InputError(f"gradient field has {bad} NaN/inf vectors not flagged masked or invalid")
        self.weighted = weights is not None
        self.wy, self.wx = _weights(weights, self.shape) if self.weighted else (None, None)
        if self.weighted:
            excluded |= (self.wy <= 0) & (self.wx <= 0)
        self.valid = ~excluded
        self.rectangle = bool(self.valid.all())
        if not self.rectangle and not self.valid.any():
            raise InputError("no valid vectors: the whole domain is masked or invalid")
        # a full rectangle keeps the caller's arrays (no copies on the fast path; never written to)
        self.gy = gy if self.rectangle else np.where(self.valid, gy, 0.0)
        self.gx = gx if self.rectangle else np.where(self.valid, gx, 0.0)
        self.dirichlet = _dirichlet(boundary, dirichlet, self.shape)

    def weight(self, axis):
        """Per-cell weights of the y (axis 0) or x (axis 1) component, or None when unweighted."""
        return (self.wy, self.wx)[axis] if self.weighted else None


def _spacing(spacing_m):
    s = np.atleast_1d(np.asarray(spacing_m, dtype=float))
    if s.size == 1:
        s = np.repeat(s, 2)
    if s.size != 2 or not np.all(np.isfinite(s)) or np.any(s <= 0):
        raise InputError(f"spacing_m must be a positive number or (dy, dx) pair, got {spacing_m!r}")
    return float(s[0]), float(s[1])


def _weights(weights, shape):
    if weights is None:
        return np.ones(shape), np.ones(shape)
    if isinstance(weights, (tuple, list)):
        if len(weights) != 2:
            raise InputError("weights must be one array or a (weight_y, weight_x) pair")
        wy, wx = (np.asarray(w, dtype=float) for w in weights)
    else:
        wy = wx = np.asarray(weights, dtype=float)
    for w in (wy, wx):
        if w.shape != shape:
            raise InputError(f"weights shape {w.shape} does not match the field {shape}")
    wy = np.where(np.isfinite(wy), wy, 0.0)
    wx = np.where(np.isfinite(wx), wx, 0.0)
    if np.any(wy < 0) or np.any(wx < 0):
        raise InputError("weights must be >= 0 (use 1/sigma**2)")
    return wy, wx


def _dirichlet(boundary, dirichlet, shape):
    if boundary not in ("neumann", "dirichlet", "mixed"):
        raise InputError(f"boundary must be 'neumann', 'dirichlet' or 'mixed', got {boundary!r}")
    values = {}
    for edge, v in (dirichlet or {}).items():
        if edge not in EDGES:
            raise InputError(f"unknown edge {edge!r}; use one of {', '.join(EDGES)}")
        n = shape[1] if edge in ("top", "bottom") else shape[0]
        arr = np.broadcast_to(np.asarray(v, dtype=float), (n,)).copy() if np.ndim(v) <= 1 else None
        if arr is None or arr.shape != (n,) or not np.all(np.isfinite(arr)):
            raise InputError(f"Dirichlet values for edge {edge!r} must be a finite scalar or {n} values")
        values[edge] = arr
    if boundary == "dirichlet" and set(values) != set(EDGES):
        raise InputError("boundary='dirichlet' needs values for all four edges in dirichlet={...}")
    if boundary == "neumann" and values:
        boundary = "mixed"
    return values


# ---------------------------------------------------------------- DCT solver


def _dct_axis(kind_start, kind_end, m):
    """Transform type and eigenvalues of the 1-D operator (step 1) on m cells.

    The 1-D normal-equation operator is tridiagonal [-1, 2, -1] with the first
    (last) diagonal entry 1 at a Neumann end and 3 at a Dirichlet end (edge
    value half a cell outside).  Its eigenvectors are the DCT-II (N/N),
    DST-II (D/D), DST-IV (D/N) and DCT-IV (N/D) bases.
    """
    k = np.arange(m)
    if kind_start == "n" and kind_end == "n":
        return sfft.dct, sfft.idct, 2, 2 - 2 * np.cos(np.pi * k / m)
    if kind_start == "d" and kind_end == "d":
        return sfft.dst, sfft.idst, 2, 2 - 2 * np.cos(np.pi * (k + 1) / m)
    lam = 2 - 2 * np.cos(np.pi * (k + 0.5) / m)
    if kind_start == "d":
        return sfft.dst, sfft.idst, 4, lam
    return sfft.dct, sfft.idct, 4, lam


@_register("dct")
def prepare_dct(pb: _Problem):
    """DCT/DST solver on a full rectangle without weights."""
    if not pb.rectangle or pb.weighted:
        raise InputError("the 'dct' solver needs a full rectangle without weights; use method='multigrid'")
    return lambda rhs, rtol=None: _dct_solve(pb, rhs)


def _dct_solve(pb: _Problem, rhs):
    """Apply the inverse of the unweighted rectangle operator (pseudo-inverse if all Neumann)."""
    ny, nx = pb.shape
    d = pb.dirichlet
    ty = _dct_axis("d" if "top" in d else "n", "d" if "bottom" in d else "n", ny)
    tx = _dct_axis("d" if "left" in d else "n", "d" if "right" in d else "n", nx)
    # the caller's rhs is a scratch array (built for this solve), so transform in place
    c = ty[0](rhs, type=ty[2], norm="ortho", axis=0, workers=-1, overwrite_x=True)
    c = tx[0](c, type=tx[2], norm="ortho", axis=1, workers=-1, overwrite_x=True)
    lam_y, lam_x = ty[3] / pb.hy**2, tx[3] / pb.hx**2
    singular = lam_y[0] + lam_x[0] == 0
    for r0 in range(0, ny, 64):  # row blocks: no full-size eigenvalue array
        lam = lam_y[r0:r0 + 64, None] + lam_x[None, :]
        if r0 == 0 and singular:
            lam[0, 0] = 1.0
        c[r0:r0 + 64] /= lam
    if singular:
        c[0, 0] = 0.0  # the free constant (all-Neumann): set later by the reference level
    c = ty[1](c, type=ty[2], norm="ortho", axis=0, workers=-1, overwrite_x=True)
    return tx[1](c, type=tx[2], norm="ortho", axis=1, workers=-1, overwrite_x=True)


def _edge_terms(pb: _Problem, edge):
    """Slice of the edge cells, the gradient extrapolated to h/4 outside them, step, sign."""
    if edge in ("top", "bottom"):
        g, h = pb.gy, pb.hy
        first, second, sign = (g[0], g[1], 1) if edge == "top" else (g[-1], g[-2], -1)
        sl = (0, slice(None)) if edge == "top" else (-1, slice(None))
    else:
        g, h = pb.gx, pb.hx
        first, second, sign = (g[:, 0], g[:, 1], 1) if edge == "left" else (g[:, -1], g[:, -2], -1)
        sl = (slice(None), 0) if edge == "left" else (slice(None), -1)
    return sl, (5 * first - second) / 4, h, sign


# ---------------------------------------------------------------- sparse solvers


def _faces(pb: _Problem):
    """Face weights and mean gradients on the grid (zero weight where a cell is invalid).

    Returns ``[(wf_y, gf_y), (wf_x, gf_x)]`` with shapes (ny-1, nx) and (ny, nx-1);
    the weight is the scalar 1.0 on an unweighted full rectangle (fast path).
    The face weights depend only on the weights and flags: they are computed
    once per problem and reused (Monte Carlo samples share them).
    """
    cached = pb.__dict__.setdefault("face_weights", [])
    out = []
    for axis, g in ((0, pb.gy), (1, pb.gx)):
        a = [slice(None)] * 2
        b = [slice(None)] * 2
        a[axis], b[axis] = slice(None, -1), slice(1, None)
        a, b = tuple(a), tuple(b)
        gf = g[a] + g[b]
        gf *= 0.5
        if len(cached) > axis:
            out.append((cached[axis], gf))
            continue
        w = pb.weight(axis)
        if w is not None:
            wa, wb = np.where(pb.valid[a], w[a], 0.0), np.where(pb.valid[b], w[b], 0.0)
            with np.errstate(divide="ignore", invalid="ignore"):
                wf = np.where((wa > 0) & (wb > 0), 2.0 * wa * wb / (wa + wb), 0.0)
        elif pb.rectangle:
            wf = 1.0
        else:
            wf = (pb.valid[a] & pb.valid[b]).astype(float)
        cached.append(wf)
        out.append((wf, gf))
    return out


def _grid_system(pb: _Problem, *, rhs_only: bool = False):
    """Diagonal, face couplings and right-hand side of the normal equations on the full grid."""
    if rhs_only and pb.rectangle and not pb.weighted:
        return _rhs_unit(pb)
    faces = _faces(pb)
    diag = None if rhs_only else np.zeros(pb.shape)
    rhs = np.zeros(pb.shape)
    couplings = []
    for (wf, gf), axis, h in zip(faces, (0, 1), (pb.hy, pb.hx)):
        lo = (slice(None, -1), slice(None)) if axis == 0 else (slice(None), slice(None, -1))
        hi = (slice(1, None), slice(None)) if axis == 0 else (slice(None), slice(1, None))
        q = gf
        q *= wf / h if np.ndim(wf) else 1.0 / h
        rhs[lo] -= q
        rhs[hi] += q
        c = wf / h**2
        couplings.append(c)
        if diag is not None:
            diag[lo] += c
            diag[hi] += c
    for edge, bvals in pb.dirichlet.items():
        sl, g_edge, h, sign = _edge_terms(pb, edge)
        w = pb.weight(0 if edge in ("top", "bottom") else 1)
        w = pb.valid[sl].astype(float) if w is None else np.where(pb.valid[sl], w[sl], 0.0)
        # half-cell face equation (phi_0 - b)/(h/2) = g_edge with weight w/2
        if diag is not None:
            diag[sl] += 2 * w / h**2
        rhs[sl] += w * (sign * g_edge / h + 2 * bvals / h**2)
    if rhs_only:
        return rhs
    return diag, couplings[0], couplings[1], rhs


def _rhs_stack(pb: _Problem, gy, gx):
    """Right-hand sides for a stack of gradient fields ``(m, ny, nx)``: the same numbers as
    ``_grid_system(..., rhs_only=True)`` field by field (test), with the problem's weights, flags and
    Dirichlet edges (their values taken as zero: Monte Carlo noise).  One pass over the stack instead of
    m calls: 256^2, 32 samples, 20 -> 9 ms."""
    rhs = np.zeros(gy.shape)
    for (wf, _), g, axis, h in zip(_faces(pb), (gy, gx), (1, 2), (pb.hy, pb.hx)):
        lo = (slice(None), slice(None, -1)) if axis == 1 else (slice(None), slice(None), slice(None, -1))
        hi = (slice(None), slice(1, None)) if axis == 1 else (slice(None), slice(None), slice(1, None))
        q = g[lo] + g[hi]
        q *= 0.5 * wf / h if np.ndim(wf) else 0.5 / h
        rhs[lo] -= q
        rhs[hi] += q
    for edge in pb.dirichlet:
        row = edge in ("top", "bottom")
        g, h = (gy, pb.hy) if row else (gx, pb.hx)
        k0, k1, sign = {"top": (0, 1, 1), "bottom": (-1, -2, -1), "left": (0, 1, 1), "right": (-1, -2, -1)}[edge]
        sl = (slice(None), k0) if row else (slice(None), slice(None), k0)
        second = (slice(None), k1) if row else (slice(None), slice(None), k1)
        w = pb.weight(0 if row else 1)
        w = pb.valid[_edge_slice(edge)].astype(float) if w is None else np.where(
            pb.valid[_edge_slice(edge)], w[_edge_slice(edge)], 0.0)
        rhs[sl] += w * sign * (5 * g[sl] - g[second]) / (4 * h)
    return rhs


def _rhs_unit(pb: _Problem, block_rows: int = 64):
    """Right-hand side on an unweighted full rectangle, in cache-sized row blocks.

    Interior: (g_{i-1} - g_{i+1}) / (2h) along each axis; edge cells keep their
    single face.  Blocking keeps the temporaries in cache (4096^2: 0.85 s for
    whole-array passes -> see benchmarks/bench_poisson.py for the total).
    """
    gy, gx = pb.gy, pb.gx
    ny, nx = pb.shape
    cy, cx = 0.5 / pb.hy, 0.5 / pb.hx
    rhs = np.empty(pb.shape)
    for r0 in range(0, ny, block_rows):
        r1 = min(ny, r0 + block_rows)
        a0, a1 = max(r0, 1), min(r1, ny - 1)
        if a1 > a0:
            np.subtract(gy[a0 - 1:a1 - 1], gy[a0 + 1:a1 + 1], out=rhs[a0:a1])
        if r0 == 0:
            np.add(gy[0], gy[1], out=rhs[0])
            np.negative(rhs[0], out=rhs[0])
        if r1 == ny:
            np.add(gy[-2], gy[-1], out=rhs[-1])
        blk = rhs[r0:r1]
        blk *= cy
        tmp = gx[r0:r1, :-2] - gx[r0:r1, 2:]
        tmp *= cx
        blk[:, 1:-1] += tmp
        blk[:, 0] -= (gx[r0:r1, 0] + gx[r0:r1, 1]) * cx
        blk[:, -1] += (gx[r0:r1, -2] + gx[r0:r1, -1]) * cx
    for edge, bvals in pb.dirichlet.items():
        sl, g_edge, h, sign = _edge_terms(pb, edge)
        rhs[sl] += sign * g_edge / h + 2 * bvals / h**2
    return rhs


def _sparse_system(pb: _Problem):
    """Normal equations A phi = b on the valid cells (compressed numbering), made regular.

    The CSR arrays are written directly: row-major numbering makes the five
    stencil columns (up, left, centre, right, down) already sorted, so no COO
    sort or duplicate summation is needed.  Measured on the masked 2048^2
    benchmark: 4.4 s (COO from concatenated index lists, then a CSR sum for
    the pinned cells) -> ~1 s.  Free constants are pinned by
    :func:`_pin_free_parts`.
    """
    diag, cy, cx, rhs = _grid_system(pb)
    valid = pb.valid
    n = int(valid.sum())
    itype = np.int32 if 5 * n < 2**31 else np.int64
    index = np.full(pb.shape, -1, dtype=itype)
    index[valid] = np.arange(n, dtype=itype)
    ny, nx = pb.shape
    cy = np.broadcast_to(cy, (ny - 1, nx))
    cx = np.broadcast_to(cx, (ny, nx - 1))
    vals = np.empty((n, 5))
    cols = np.empty((n, 5), dtype=itype)
    grid = np.zeros(pb.shape)
    gidx = np.zeros(pb.shape, dtype=itype)
    for k, (c, dst, src) in enumerate((
            (cy, np.s_[1:], np.s_[:-1]), (cx, np.s_[:, 1:], np.s_[:, :-1]), (None, None, None),
            (cx, np.s_[:, :-1], np.s_[:, 1:]), (cy, np.s_[:-1], np.s_[1:]))):
        if c is None:
            vals[:, k] = diag[valid]
            cols[:, k] = np.arange(n, dtype=itype)
            continue
        grid.fill(0.0)
        np.negative(c, out=grid[dst])
        gidx[dst] = index[src]
        vals[:, k] = grid[valid]
        cols[:, k] = gidx[valid]
    # a valid cell whose faces all have zero weight (e.g. w_y > 0 = w_x next to cells with
    # w_y = 0) has an empty row: pin it (phi = 0 there, as CG leaves it) so that A is regular
    vals[vals[:, 2] == 0.0, 2] = 1.0
    before_diag = (vals[:, 0] != 0).astype(itype) + (vals[:, 1] != 0)
    # 5 slots per row, absent neighbours as explicit zeros that scipy removes in place (C++;
    # vals/cols are overwritten): 0.5-0.9 s -> ~0.1 s against boolean compression at 2048^2
    A = sp.csr_matrix((vals.ravel(), cols.ravel(), np.arange(0, 5 * n + 1, 5, dtype=itype)), shape=(n, n))
    A.eliminate_zeros()
    A.has_sorted_indices = True
    diag_pos = A.indptr[:-1] + before_diag
    _pin_free_parts(pb, A, diag_pos)
    return A, rhs[valid], index


def _pin_free_parts(pb: _Problem, A, diag_pos):
    """Pin the first cell of every part of the face graph that no Dirichlet edge fixes (in place).

    Pinning adds the equation phi_a = 0 (scaled like the row) to a system
    whose other equations do not see a constant shift of that part, so the
    least-squares solution is unchanged up to the part's constant.  Parts are
    the connected components of the face graph: with weights, zero-weight
    faces can split a connected set of valid cells (scipy's
    ``connected_components``; without weights it is the 4-connected labelling
    of the valid cells).  A part is fixed when some row has a Dirichlet term,
    i.e. a row sum clearly above zero.
    """
    if pb.weighted:
        labels = csgraph.connected_components(A, directed=False)[1]
    else:
        labels = ndimage.label(pb.valid)[0][pb.valid] - 1
    d = A.data[diag_pos]
    fixed = (A @ np.ones(A.shape[0])) > 1e-8 * d
    anchored = np.bincount(labels, weights=fixed) > 0
    parts, first = np.unique(labels, return_index=True)
    pin = diag_pos[first[~anchored[parts]]]
    A.data[pin] *= 2.0


def _scatter(pb: _Problem, x, index):
    out = np.full(pb.shape, np.nan)
    out[pb.valid] = x[index[pb.valid]]
    return out


def _on_valid(pb: _Problem, index, solve_vec):
    """Wrap a solver of the compressed system as grid rhs -> grid solution."""

    def solve(rhs, rtol=None):
        return _scatter(pb, solve_vec(rhs[pb.valid], rtol), index)

    return solve


def _grid_nested_dissection(index, leaf: int = 16):
    """Fill-reducing elimination order of the valid cells: nested dissection by grid lines.

    The box is split by its middle row or column (across its longer side); the
    two halves are ordered first (recursively), the separating line last, so
    eliminating one half never fills the other.  Boxes of at most ``leaf``
    cells keep row-major order.  ``index`` holds the compressed number of each
    grid cell (-1 where invalid); returns the compressed numbers in elimination
    order.  On a 2-D grid this ordering gives O(n log n) fill and O(n^1.5)
    factorisation work (George 1973).

    Written by hand (the geometry is known, so no graph partitioner is
    needed) and measured on the weighted 611^2 benchmark (373 321 unknowns,
    SuperLU in symmetric mode): ordering 0.09 s, factorisation 1.4 s against
    2.5 s with SuperLU's own minimum-degree ordering (MMD on A + A^T); METIS
    nested dissection (pymetis) took 1.7 s to order for a 1.3 s factorisation;
    leaves of 16 cells factorised faster than leaves of 64 (1.4 vs 1.9 s).

    References
    ----------
    George (1973), SIAM J. Numer. Anal. 10:345 (nested dissection of a regular finite element mesh) [M].
    """
    out = []

    def split(r0, r1, c0, c1):
        if (r1 - r0) * (c1 - c0) <= leaf:
            box = index[r0:r1, c0:c1]
            out.append(box[box >= 0])
            return
        if r1 - r0 >= c1 - c0:
            m = (r0 + r1) // 2
            split(r0, m, c0, c1)
            split(m + 1, r1, c0, c1)
            line = index[m, c0:c1]
        else:
            m = (c0 + c1) // 2
            split(r0, r1, c0, m)
            split(r0, r1, m + 1, c1)
            line = index[r0:r1, m]
        out.append(line[line >= 0])

    split(0, index.shape[0], 0, index.shape[1])
    return np.concatenate(out)


@_register("sparse")
def prepare_sparse(pb: _Problem, *, ordering: str = "nested_dissection"):
    """Direct sparse LU of the normal equations (scipy's SuperLU; reference solver).

    The matrix is symmetric positive definite (free constants pinned), so
    SuperLU runs in symmetric mode (no pivoting) on the matrix permuted to
    the grid's nested-dissection order (:func:`_grid_nested_dissection`;
    ``ordering="mmd"``: SuperLU's minimum-degree ordering of A + A^T, as
    before, 2.5 s instead of 1.4 s at 373 321 unknowns).  The returned
    function also solves blocks of right-hand sides (``solve.block``,
    compressed numbering ``solve.index``), which the Monte Carlo uncertainty
    uses.
    """
    A, _, index = _sparse_system(pb)
    options = dict(diag_pivot_thresh=0.0, options=dict(SymmetricMode=True))
    if ordering == "mmd":
        block = spla.splu(A.tocsc(), permc_spec="MMD_AT_PLUS_A", **options).solve
    elif ordering == "nested_dissection":
        order = _grid_nested_dissection(index)
        lu = spla.splu(A[order][:, order].tocsc(), permc_spec="NATURAL", **options)

        def block(b):
            x = np.empty_like(b, dtype=float)
            x[order] = lu.solve(b[order])
            return x
    else:
        raise InputError(f"unknown ordering {ordering!r}; use 'nested_dissection' or 'mmd'")
    solve = _on_valid(pb, index, lambda b, rtol: block(b))
    solve.block, solve.index = block, index
    return solve


@_register("direct")
def prepare_direct(pb: _Problem):
    """Exact solve by nested dissection on the grid (the project's own multifrontal Cholesky).

    The normal equations (free constants pinned, as for ``"sparse"``) are
    factorised once by :class:`bos.reconstruct._nested.GridCholesky`: the grid
    is cut by lines into boxes of (almost) equal size and each level of boxes
    is eliminated by compiled per-box kernels (dense fronts); invalid cells
    are decoupled unit rows.
    Factor and solve cost are set out in :data:`MC_DIRECT_MAX_UNKNOWNS`.  Like
    ``"sparse"`` the returned function also solves blocks of right-hand sides
    (``solve.block``, compressed numbering ``solve.index``).
    """
    from ._nested import GridCholesky

    A, _, index = _sparse_system(pb)
    ny, nx = pb.shape
    diag = np.ones(pb.shape)
    diag[pb.valid] = A.diagonal()
    offs = []
    for ia, ib in ((index[:-1], index[1:]), (index[:, :-1], index[:, 1:])):
        off = np.zeros(ia.shape)
        ok = (ia >= 0) & (ib >= 0)
        off[ok] = np.asarray(A[ia[ok], ib[ok]]).ravel()
        offs.append(off)
    del A
    chol = GridCholesky(diag, offs[0], offs[1])
    cells = np.flatnonzero(pb.valid.ravel())  # compressed numbering = row-major order of the valid cells

    def block(b):
        if cells.size == ny * nx:  # full rectangle: compressed numbering = grid order
            return chol.solve(b)
        full = np.zeros((ny * nx, b.shape[1]))
        full[cells] = b
        return chol.solve(full)[cells]

    solve = _on_valid(pb, index, lambda b, rtol: block(b[:, None])[:, 0])
    solve.block, solve.index = block, index
    return solve


def _aggregate_2x2(valid):
    """Piecewise-constant prolongation onto 2 x 2 blocks of the grid, and the coarse valid mask.

    Row k of ``P`` (fine valid cell k, row-major numbering) has a single 1 in
    the column of the block that holds the cell; a block is a coarse unknown
    when any of its cells is valid.
    """
    ny, nx = valid.shape
    cy, cx = (ny + 1) // 2, (nx + 1) // 2
    padded = np.zeros((2 * cy, 2 * cx), bool)
    padded[:ny, :nx] = valid
    coarse = padded.reshape(cy, 2, cx, 2).any(axis=(1, 3))
    nc = int(coarse.sum())
    cidx = np.full((cy, cx), -1, dtype=np.int32)
    cidx[coarse] = np.arange(nc, dtype=np.int32)
    fi, fj = np.nonzero(valid)
    n = fi.size
    P = sp.csr_matrix((np.ones(n), cidx[fi // 2, fj // 2], np.arange(n + 1, dtype=np.int32)), shape=(n, nc))
    return P, coarse


def _multigrid_hierarchy(A, valid, *, max_coarse: int = 1000):
    """Aggregation multigrid on the grid: 2 x 2 cell blocks, Galerkin coarse operators halved.

    With piecewise-constant transfer the Galerkin operator ``P^T A P`` is a
    5-point operator on the coarse grid (weights and masks carried along
    algebraically) that is twice the re-discretised one, so each coarse
    operator is scaled by 1/2 (the usual over-correction of unsmoothed
    aggregation; with the factor 1 CG needed 45 instead of 9-13 iterations on
    the masked 512^2 benchmark).  Smoother: symmetric Gauss-Seidel (pyamg),
    so the V-cycle is a symmetric preconditioner for CG.

    Measured against pyamg's Ruge-Stuben solver (symmetric Gauss-Seidel, as
    before) on the masked 2048^2 benchmark: set-up ~6 s -> 0.4-0.8 s,
    operator complexity 2.2 -> 1.33, 13 -> 9 CG iterations at rtol 1e-9.  With
    weights (masked 512^2, smooth x4, step x400, random x10, 20 % zero
    weights, x/y weights differing by up to 1e4; and the weighted demo
    plate) it needed 9-45 iterations where Ruge-Stuben needed 10-191, and
    no Ruge-Stuben interpolation is involved, so pyamg's compiled code
    prints nothing (its classical interpolation wrote "Inner denominator was
    zero." to stdout whenever an F-point had a strong F-neighbour sharing no
    C-point with it, which anisotropic weights produce on the 5-point
    stencil).  Smoothed aggregation (pyamg defaults and tuned variants) was
    3-10x slower here.

    References
    ----------
    Braess (1995), Computing 55:379 (piecewise-constant aggregation, scaled
    coarse-grid correction) [M].
    """
    from pyamg.multilevel import MultilevelSolver
    from pyamg.relaxation.smoothing import change_smoothers

    levels = [MultilevelSolver.Level()]
    levels[0].A = A
    mask = valid
    while levels[-1].A.shape[0] > max_coarse and min(mask.shape) > 2:
        P, mask = _aggregate_2x2(mask)
        level = levels[-1]
        level.P, level.R = P, P.T.tocsr()
        coarse = MultilevelSolver.Level()
        coarse.A = (level.R @ (level.A @ P)).tocsr()
        coarse.A *= 0.5
        levels.append(coarse)
    ml = MultilevelSolver(levels, coarse_solver="splu")
    sgs = ("gauss_seidel", {"sweep": "symmetric"})
    change_smoothers(ml, sgs, sgs)
    return ml


def _v_cycle(ml):
    """One V-cycle from a zero initial guess as a function r -> approximately A^-1 r.

    Written out (9 lines) instead of ``ml.aspreconditioner()``, which also
    computes two fine-grid residual norms per call that CG does not need.
    """
    levels = ml.levels

    def cycle(b, lvl=0):
        level = levels[lvl]
        if lvl == len(levels) - 1:
            return ml.coarse_solver(level.A, b)
        x = np.zeros_like(b)
        level.presmoother(level.A, x, b)
        x += level.P @ cycle(level.R @ (b - level.A @ x), lvl + 1)
        level.postsmoother(level.A, x, b)
        return x

    return cycle


@_register("multigrid")
def prepare_multigrid(pb: _Problem, *, rtol: float = 1e-8, maxiter: int = 1000):
    """Sparse normal equations solved by CG with an aggregation multigrid preconditioner.

    Robust for strongly varying weights and any mask (the fallback of
    "pcg"); the hierarchy is built once per problem and reused for every
    right-hand side (Monte Carlo samples).  See :func:`_multigrid_hierarchy`.
    """
    A, _, index = _sparse_system(pb)
    cycle = _v_cycle(_multigrid_hierarchy(A, pb.valid))
    n = A.shape[0]
    M = spla.LinearOperator((n, n), matvec=cycle, dtype=float)
    return _on_valid(pb, index, lambda b, tol: spla.cg(A, b, M=M, rtol=tol or rtol, maxiter=maxiter)[0])


@_register("pcg")
def prepare_pcg(pb: _Problem, *, rtol: float = 1e-9, maxiter: int = 200):
    """Matrix-free conjugate gradients preconditioned by the rectangle DCT solver.

    The operator is applied on the full grid from the face weights (masked
    cells have no faces); the preconditioner is the exact inverse of the
    unweighted operator on the enclosing rectangle, restricted to the valid
    cells.  Measured: 14 iterations for a disc-shaped hole at 128^2, 256^2
    and 512^2 (independent of the grid size); with weights on the same masked
    512^2 grid 30-43 iterations (smooth x4, step x400 and random x10 weight
    variations), 1.2-8x faster than the AMG solver.  No matrix assembly.
    Falls back to the multigrid solver if it does not converge, and then
    uses it directly for every later right-hand side of the same operator
    (Monte Carlo samples), never re-running the failing CG.  (Scaling
    the preconditioner by the weighted diagonal was tried and made
    convergence worse.)
    """
    diag, cy, cx, _ = _grid_system(pb)
    valid = pb.valid
    shape = pb.shape

    def matvec(v):
        u = np.zeros(shape)
        u[valid] = v
        out = diag * u
        out[:-1] -= cy * u[1:]
        out[1:] -= cy * u[:-1]
        out[:, :-1] -= cx * u[:, 1:]
        out[:, 1:] -= cx * u[:, :-1]
        return out[valid]

    def precond(r):
        u = np.zeros(shape)
        u[valid] = r
        return _dct_solve(pb, u)[valid]

    n = int(valid.sum())
    A = spla.LinearOperator((n, n), matvec=matvec, dtype=float)
    M = spla.LinearOperator((n, n), matvec=precond, dtype=float)
    fallback = []

    def solve(rhs, rtol_call=None):
        if fallback:  # CG already failed on this operator: do not run it again
            return fallback[0](rhs, rtol_call)
        x, info = spla.cg(A, rhs[valid], M=M, rtol=rtol_call or rtol, maxiter=maxiter)
        if info != 0:
            fallback.append(prepare_multigrid(pb, rtol=rtol))
            return fallback[0](rhs, rtol_call)
        out = np.full(shape, np.nan)
        out[valid] = x
        return out

    return solve


# ---------------------------------------------------------------- public API


def integrate_gradient(
    gy,
    gx,
    *,
    spacing_m,
    mask=None,
    invalid=None,
    weights=None,
    boundary: str = "neumann",
    dirichlet: dict | None = None,
    reference_region=None,
    reference_value: float = 0.0,
    method: str = "auto",
) -> np.ndarray:
    """Integrate a gradient field to a scalar field by least squares.

    Parameters
    ----------
    gy, gx : (ny, nx) ndarray
        Gradient components d(phi)/dy and d(phi)/dx [unit of phi per metre],
        sampled at cell centres; y grows with the row index.
    spacing_m : float or (float, float)
        Grid step [m], one value or ``(dy, dx)``.
    mask, invalid : (ny, nx) bool ndarray, optional
        True where there is no data (user mask) or the vector was rejected.
        Those cells are left out and come back as NaN.  NaN in ``gy``/``gx``
        anywhere else raises :class:`~bos.errors.InputError`.
    weights : ndarray or (ndarray, ndarray), optional
        Per-vector weights, typically ``1/sigma**2`` (one array for both
        components or a ``(w_y, w_x)`` pair).  A face between two cells gets
        the harmonic mean ``2/(1/w_a + 1/w_b)`` of the two weights (the
        inverse variance of the mean of their gradients, up to a factor 2).
    boundary : {"neumann", "dirichlet", "mixed"}
        ``"neumann"``: natural condition dphi/dnu = g.nu on every edge that
        has no Dirichlet value.  ``"dirichlet"``: all four edges need values.
    dirichlet : dict, optional
        Known values on rectangle edges, ``{"top"|"bottom"|"left"|"right":
        scalar or 1-D array}``; imposed on the cell edge half a step outside
        the outermost vectors.  Edges not listed stay Neumann.
    reference_region : bool ndarray or edge name, optional
        Where ``phi`` is known to equal ``reference_value``; the free
        constant is set so the mean over the valid cells of the region is
        ``reference_value``.  Connected parts of the domain that neither touch
        the region nor a Dirichlet edge come back as NaN (their level is
        unknown).  Without a region or Dirichlet values each connected part
        has zero mean.
    reference_value : float
        Value of ``phi`` in the reference region.
    method : {"auto", "dct", "pcg", "multigrid", "direct", "sparse"}
        Solver from :data:`SOLVERS`; ``"auto"`` uses ``"dct"`` on full
        unweighted rectangles, ``"multigrid"`` when the weights span more than
        :data:`PCG_MAX_WEIGHT_SPREAD`, and ``"pcg"`` otherwise (it falls back
        to ``"multigrid"`` if CG does not converge).  ``"direct"`` (the grid
        Cholesky) and ``"sparse"`` (SuperLU) factorise.

    Returns
    -------
    phi : (ny, nx) ndarray
        Integrated field (NaN outside the solved domain).

    References
    ----------
    Simchony, Chellappa & Shao (1990), IEEE TPAMI 12:435; Southwell (1980),
    JOSA 70:998 (both from memory).
    """
    pb, solve = _prepare(gy, gx, spacing_m, mask, invalid, weights, boundary, dirichlet, method)
    _region(reference_region, pb.shape)  # validate before solving
    return _set_level(pb, solve(_grid_system(pb, rhs_only=True)), reference_region, reference_value)


MC_DIRECT_MAX_UNKNOWNS = 1_000_000
"""With uncertainty and ``method="auto"``: problems needing an iterative solver that have at most
this many valid cells are factorised once by the grid Cholesky (``"direct"``,
:func:`prepare_direct`; SuperLU, ``"sparse"``, if the compiled kernels cannot load) and the main
solve and all Monte Carlo samples reuse the factors (exact solves in blocks of right-hand sides).
Main solve + 32 samples, weighted benchmark (``benchmarks/bench_poisson.py --weighted-only``,
quiet machine, medians of 3, in units of one ``auto`` multigrid solve): 256^2 3.0-3.6, 512^2
2.5-2.9, 611^2 (373 321 cells, a 24 MP run) 2.0-2.4 (0.85-1.02 s), 1000^2 2.1 (3.15 s, peak
+1.8 GB); SuperLU in nested-dissection order in the same runs: 5.5-5.9 / 5.4-5.8 / 4.9-6.0 / 5.5.
Larger problems (not measured) use multigrid samples."""


def _prepare(gy, gx, spacing_m, mask, invalid, weights, boundary, dirichlet, method, *, samples=False):
    pb = _Problem(gy, gx, spacing_m, mask, invalid, weights, boundary, dirichlet)
    if method == "auto":
        method = auto_method(pb)
        if samples and method != "dct" and int(pb.valid.sum()) <= MC_DIRECT_MAX_UNKNOWNS:
            method = "direct" if _compiler_available() else "sparse"
    if method not in SOLVERS:
        raise InputError(f"unknown integration method {method!r}; choose from {', '.join(SOLVERS)}")
    pb.method = method
    return pb, SOLVERS[method](pb)


def _compiler_available() -> bool:
    """The ``"direct"`` solver's compiled kernels can be loaded (numba imports and can compile or
    read its cache); else ``method="auto"`` factorises with SuperLU (``"sparse"``)."""
    global _COMPILER
    if _COMPILER is None:
        try:
            from . import _nested_kernels  # noqa: F401 - numba decorates (and locates its cache) here
        except Exception:  # noqa: BLE001 - numba missing or broken, or no writable cache directory
            _COMPILER = False
        else:
            _COMPILER = True
    return _COMPILER


_COMPILER: bool | None = None


PRELOAD_THREAD = "bos-preload-direct-solver"


def preload_direct_solver() -> None:
    """Load the ``"direct"`` solver's compiled kernels in a background thread (numba import and
    cached machine code, ~0.5 s on first use in a process; see :func:`._nested.warm_up`).  Threads
    named ``bos-preload-*`` are waited for before the figures fork (``bos.plots``)."""
    import threading

    def work():
        try:
            if _compiler_available():
                from ._nested import warm_up

                warm_up()
        except Exception:  # noqa: BLE001 - the reconstruction reports real problems itself
            pass

    threading.Thread(target=work, name=PRELOAD_THREAD, daemon=True).start()


def auto_method(pb: _Problem) -> str:
    """Solver name that ``method="auto"`` picks for a problem (see :data:`PCG_MAX_WEIGHT_SPREAD`)."""
    if not pb.weighted:
        return "dct" if pb.rectangle else "pcg"
    w = np.concatenate([pb.wy[pb.valid], pb.wx[pb.valid]])
    w = w[w > 0]
    return "pcg" if w.size and w.max() <= PCG_MAX_WEIGHT_SPREAD * w.min() else "multigrid"


def _set_level(pb: _Problem, phi, reference_region, reference_value):
    """Fix the free constant of every connected part of the domain (vectorised over parts).

    Parts touching a Dirichlet edge keep their level; others are shifted so the
    reference region's mean is ``reference_value`` (or to zero mean without a
    region); parts with neither come back NaN when a region was given.
    """
    return _leveler(pb, reference_region, reference_value)(phi)


def _leveler(pb: _Problem, reference_region, reference_value):
    """``phi -> phi`` with every part's free constant fixed (see :func:`_set_level`); the
    labelling of the domain is done once, so Monte Carlo samples reuse it."""
    region = _region(reference_region, pb.shape)
    if pb.rectangle and not pb.dirichlet:  # one component, free constant (fast path)
        def level_rectangle(phi):
            phi += (reference_value - phi[region].mean()) if region is not None else -phi.mean()
            return phi

        return level_rectangle
    labels, sel, counts, free, inside, target = _parts(pb, region, reference_value)
    sel = sel.ravel()

    def level(phi):
        vals = np.where(pb.valid, phi, 0.0).ravel()
        sums = np.bincount(sel, weights=vals, minlength=len(counts))
        shift = np.zeros(len(counts))
        shift[free] = target - sums[free] / counts[free]
        return np.where(inside, phi + shift[labels], np.nan)

    return level


def _parts(pb: _Problem, region, reference_value):
    """Connected parts of the domain and how their levels are fixed.

    Returns the part labels (grid, 0 outside), the part each cell's value is averaged into
    (0: not averaged), the count of averaged cells per part, which parts are shifted to the
    target, which cells keep a value, and the target."""
    labels, count = ndimage.label(pb.valid)
    anchored = np.zeros(count + 1, bool)
    for edge in pb.dirichlet:
        anchored[np.unique(labels[_edge_slice(edge)])] = True
    anchored[0] = False
    if region is None:
        sel = labels
        target = 0.0
    else:
        ref = region & pb.valid
        if not ref.any():
            raise InputError("reference region contains no valid vectors")
        sel = np.where(ref, labels, 0)
        target = reference_value
    counts = np.bincount(sel.ravel(), minlength=count + 1)
    free = (counts > 0) & ~anchored
    free[0] = False
    keep = anchored | free
    if region is None:
        keep[1:] = True
    inside = pb.valid & keep[labels]
    return labels, sel, counts, free, inside, target


def _block_leveler(pb: _Problem, reference_region):
    """:func:`_leveler` with reference value 0 for blocks of solutions in the compressed numbering
    (valid cells in row-major order, one column per sample), in place; NaN where the level is unknown."""
    region = _region(reference_region, pb.shape)
    if pb.rectangle and not pb.dirichlet:
        ridx = np.flatnonzero(region.ravel()) if region is not None else None

        def level_rectangle(X):
            X -= (X[ridx] if ridx is not None else X).mean(axis=0)
            return X

        return level_rectangle
    labels, sel, counts, free, inside, _ = _parts(pb, region, 0.0)
    valid = pb.valid
    lab, inside = labels[valid], inside[valid]
    n = lab.size
    average = sp.csr_matrix((np.ones(n), (sel[valid], np.arange(n))), shape=(len(counts), n))

    def level(X):
        sums = average @ X
        shift = np.zeros(sums.shape)
        shift[free] = -sums[free] / counts[free, None]
        X += shift[lab]
        X[~inside] = np.nan
        return X

    return level


def _edge_slice(edge):
    return {"top": (0, slice(None)), "bottom": (-1, slice(None)),
            "left": (slice(None), 0), "right": (slice(None), -1)}[edge]


def _region(reference_region, shape):
    if reference_region is None:
        return None
    if isinstance(reference_region, str):
        if reference_region not in EDGES:
            raise InputError(f"unknown reference edge {reference_region!r}; use one of {', '.join(EDGES)}")
        region = np.zeros(shape, bool)
        region[_edge_slice(reference_region)] = True
        return region
    region = np.asarray(reference_region, dtype=bool)
    if region.shape != shape:
        raise InputError(f"reference region shape {region.shape} does not match the field {shape}")
    if not region.any():
        raise InputError("reference region is empty")
    return region


MC_RTOL = 1e-3
"""Relative residual tolerance of the Monte Carlo samples' solves (the main solve keeps 1e-8/1e-9)."""


def integrate_gradient_uncertainty(
    gy, gx, *, sigma_y, sigma_x, spacing_m, mask=None, invalid=None, weights=None, boundary="neumann",
    dirichlet=None, reference_region=None, method="auto", n_samples: int = 32, seed: int = 0,
    rtol: float = MC_RTOL, progress: Callable[[float], None] | None = None,
) -> np.ndarray:
    """1-sigma uncertainty of :func:`integrate_gradient` by Monte Carlo.

    The gradient is perturbed with independent random noise of standard
    deviations ``sigma_y``, ``sigma_x`` (same unit as the gradient; random
    signs +-sigma, see :func:`_random_signs`) and integrated ``n_samples``
    times with the same options (weights, boundary, reference region;
    Dirichlet values are exact); the root mean square of the samples is
    returned.  The integration is linear and unbiased, so this estimates
    the exact linear propagation ``sigma_i^2 = sum_k L_ik^2 sigma_k^2``;
    its relative precision is at most ``1/sqrt(2 n_samples)`` (12.5 % at
    32) at every point.

    Cost: the solver is set up once.  With ``method="auto"`` a problem of
    at most :data:`MC_DIRECT_MAX_UNKNOWNS` cells that needs an iterative
    solver is factorised once (the grid Cholesky, ``"direct"``) and the
    samples are solved exactly in blocks of right-hand sides (16, or all
    of them up to :data:`MC_ONE_BLOCK_MAX_UNKNOWNS` cells, pipelined with
    the building of the next block); larger ones use multigrid (no
    failing-CG detour, see :data:`PCG_MAX_WEIGHT_SPREAD`) and every sample
    is solved only to the relative residual ``rtol`` (default
    :data:`MC_RTOL`; 3-4 instead of 11-13 multigrid-CG iterations, the
    variance changes by ~1 % against exact solves).  BLAS is limited to one
    thread (CG's small dot products wake OpenBLAS's threads, which costs
    more than the products on a busy machine).

    Parameters
    ----------
    gy, gx : ndarray
        Measured gradient (only its shape and NaN pattern matter).
    sigma_y, sigma_x : ndarray or float
        1-sigma uncertainty of each gradient component.
    n_samples : int
        Number of Monte Carlo realisations (>= 2).
    seed : int
        Seed of the random generator (results are reproducible).
    rtol : float
        Relative residual tolerance of each sample's solve.
    progress : callable, optional
        ``progress(fraction)`` after each sample (0..1).
    Other parameters
        As for :func:`integrate_gradient`.

    References
    ----------
    Hutchinson (1989), Commun. Stat. Simul. Comput. 18:1059 (stochastic
    estimation with random probe vectors) [M]; Bekas, Kokiopoulou & Saad
    (2007), Appl. Numer. Math. 57:1214 (stochastic estimation of a matrix
    diagonal) [M].
    """
    pb, solve = _prepare(gy, gx, spacing_m, mask, invalid, weights, boundary, dirichlet, method, samples=True)
    _region(reference_region, pb.shape)
    return _monte_carlo(pb, solve, sigma_y, sigma_x, reference_region, n_samples=n_samples, seed=seed,
                        rtol=rtol, progress=progress)


def integrate_gradient_with_uncertainty(
    gy, gx, *, sigma_y, sigma_x, spacing_m, mask=None, invalid=None, weights=None, boundary="neumann",
    dirichlet=None, reference_region=None, reference_value: float = 0.0, method="auto", n_samples: int = 32,
    seed: int = 0, rtol: float = MC_RTOL, progress: Callable[[float], None] | None = None,
) -> tuple[np.ndarray, np.ndarray, str]:
    """:func:`integrate_gradient` and :func:`integrate_gradient_uncertainty` with one solver set-up.

    Returns
    -------
    phi, sigma_phi : ndarray
        Integrated field and its 1-sigma uncertainty (NaN outside the solved domain).
    solver : str
        Name of the solver used (``"auto"`` resolved).
    """
    if n_samples < 2:
        raise InputError(f"n_samples must be >= 2, got {n_samples}")
    pb, solve = _prepare(gy, gx, spacing_m, mask, invalid, weights, boundary, dirichlet, method, samples=True)
    _region(reference_region, pb.shape)
    n_steps = n_samples + 1
    rhs = _grid_system(pb, rhs_only=True)
    if getattr(solve, "block", None) is not None:  # direct solver: the main solve rides with the samples
        if progress is not None:
            progress(1.0 / n_steps)  # the factorisation is done
        step = None if progress is None else (lambda f: progress((1.0 + f * n_samples) / n_steps))
        sigma, x = _monte_carlo(pb, solve, sigma_y, sigma_x, reference_region, n_samples=n_samples, seed=seed,
                                rtol=rtol, progress=step, lead=rhs[pb.valid])
        phi = _set_level(pb, _scatter(pb, x, solve.index), reference_region, reference_value)
        return phi, sigma, pb.method
    phi = _set_level(pb, solve(rhs), reference_region, reference_value)
    if progress is not None:
        progress(1.0 / n_steps)
    step = None if progress is None else (lambda f: progress((1.0 + f * n_samples) / n_steps))
    sigma = _monte_carlo(pb, solve, sigma_y, sigma_x, reference_region, n_samples=n_samples, seed=seed,
                         rtol=rtol, progress=step)
    return phi, sigma, pb.method


MC_ONE_BLOCK_MAX_UNKNOWNS = 150_000
"""Direct solver: problems of at most this many cells solve all Monte Carlo samples in one block of
right-hand sides (the per-block fixed cost dominates: 256^2, 0.19 s against 0.20-0.24 s in blocks
of 16); larger ones in blocks of 16, pipelined (611^2: 1.0-1.2 s against 1.2-1.8 s in one block)."""


def _random_signs(rng, shape):
    """Independent random signs +-1 (Rademacher) as floats, from the generator's raw bytes.

    Unit variance like a standard normal but ~10x cheaper to draw (611^2: 0.4 ms of bytes against
    4 ms of normals; 64 draws per 32-sample uncertainty), and the diagonal estimator's variance is
    no larger: Var(x_i^2) = 2 (sum_k T_ik^2)^2 - 2 sum_k T_ik^4 against 2 (sum_k T_ik^2)^2.
    """
    n = int(np.prod(shape))
    bits = np.unpackbits(np.frombuffer(rng.bytes((n + 7) // 8), dtype=np.uint8), count=n)
    out = bits.reshape(shape).astype(float)
    out *= -2.0
    out += 1.0
    return out


def _monte_carlo(pb: _Problem, solve, sigma_y, sigma_x, reference_region, *, n_samples, seed, rtol, progress,
                 lead=None):
    """Root mean square of ``n_samples`` solutions for random gradient noise (zero-mean exactly).

    ``lead``: a right-hand side (compressed numbering) solved in the first block of a direct
    solver; then returns ``(sigma, solution of lead)``.
    """
    from threadpoolctl import threadpool_limits

    if n_samples < 2:
        raise InputError(f"n_samples must be >= 2, got {n_samples}")
    noise = copy.copy(pb)  # same operator, weights and flags; data replaced by noise
    noise.dirichlet = {e: np.zeros_like(v) for e, v in pb.dirichlet.items()}
    level = _leveler(noise, reference_region, 0.0)
    rng = np.random.default_rng(seed)
    shape = pb.shape
    sy = np.where(pb.valid, np.nan_to_num(np.broadcast_to(np.asarray(sigma_y, dtype=float), shape)), 0.0)
    sx = np.where(pb.valid, np.nan_to_num(np.broadcast_to(np.asarray(sigma_x, dtype=float), shape)), 0.0)
    acc = np.zeros(shape)
    block = getattr(solve, "block", None)  # direct solver: blocks of right-hand sides, exact
    n_valid = int(pb.valid.sum())
    rectangle = n_valid == pb.valid.size
    STACK = 8  # samples drawn together (bounded temporaries); block sizes are multiples of it
    chunk = (n_samples if n_valid <= MC_ONE_BLOCK_MAX_UNKNOWNS else 2 * STACK) if block is not None else STACK
    if block is not None:  # blocks: level and square in the compressed numbering (no grids per sample)
        level_block = _block_leveler(noise, reference_region)
        acc_c = np.zeros(n_valid)

    def rhs_block(count, first):
        """Right-hand sides of ``count`` samples as columns (compressed numbering), after ``lead``
        when ``first``: written column by column, no list of grids to stack."""
        extra = 1 if first and lead is not None else 0
        b = np.empty((count + extra, n_valid)).T  # columns contiguous while filling, (n, k) view
        if extra:
            b[:, 0] = lead
        for j0 in range(extra, count + extra, STACK):
            m = min(STACK, count + extra - j0)
            r = noise_rhs(m)
            b[:, j0:j0 + m] = (r.reshape(m, -1) if rectangle else r[:, pb.valid]).T
        return b

    def noise_rhs(m):
        """Right-hand sides (m, ny, nx) of the next m samples' noise (drawn m at a time, so every
        solver path sees the same noise for a seed: blocks hold whole stacks)."""
        signs = _random_signs(rng, (m, 2) + shape)
        signs[:, 0] *= sy
        signs[:, 1] *= sx
        return _rhs_stack(noise, signs[:, 0], signs[:, 1])

    def add(phis, done):
        for i, phi in enumerate(phis, start=done - len(phis) + 1):
            phi = level(phi)
            phi *= phi
            np.add(acc, phi, out=acc)
            if progress is not None:
                progress(i / n_samples)

    def add_block(x, done):
        x = level_block(x)
        np.add(acc_c, np.einsum("ij,ij->i", x, x), out=acc_c)
        if progress is not None:
            progress(done / n_samples)

    lead_x = []

    def take_lead(x):
        if lead is not None and not lead_x:
            lead_x.append(x[:, 0].copy())
            return x[:, 1:]
        return x

    # The direct solvers release the interpreter lock while solving: with two cores a block is
    # solved in a second thread while this one builds the next right-hand sides (pipelined, one
    # solve in flight; results added in sample order, so bit-identical to one thread).  611 x 611
    # weighted problem, whole call: 0.88 s, against 0.90-1.05 s with two solves in flight (each
    # with its own two threads).
    threads = min(2, resolve_workers()) if block is not None else 1  # budget of a batch worker, else cores
    with threadpool_limits(limits=1, user_api="blas"):
        if threads > 1:
            from collections import deque
            from concurrent.futures import ThreadPoolExecutor

            with ThreadPoolExecutor(threads) as ex:
                pending: deque = deque()
                for k0 in range(0, n_samples, chunk):
                    b = rhs_block(min(chunk, n_samples - k0), k0 == 0)
                    pending.append((min(k0 + chunk, n_samples), ex.submit(block, b)))
                    while len(pending) > 1:
                        done, fut = pending.popleft()
                        add_block(take_lead(fut.result()), done)
                while pending:
                    done, fut = pending.popleft()
                    add_block(take_lead(fut.result()), done)
        else:
            for k0 in range(0, n_samples, chunk):
                if block is not None:
                    add_block(take_lead(block(rhs_block(min(chunk, n_samples - k0), k0 == 0))),
                              min(k0 + chunk, n_samples))
                else:
                    # chunk = STACK: the samples' noise as for blocks; each solved and added in turn
                    add([solve(r, rtol) for r in noise_rhs(min(chunk, n_samples - k0))],
                        min(k0 + chunk, n_samples))
    if block is not None:
        acc = np.full(shape, np.nan)
        acc[pb.valid] = acc_c
    # the samples' mean is known to be zero (linear map of zero-mean noise): divide by n, not n - 1
    sigma = np.sqrt(acc / n_samples)
    if lead is not None:
        if not lead_x:
            raise ValueError("a lead right-hand side needs a direct (block) solver")
        return sigma, lead_x[0]
    return sigma
