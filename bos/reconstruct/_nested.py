"""Direct Cholesky solver for symmetric 5-point operators on a grid (nested dissection, dense fronts).

The grid is cut recursively by single grid lines into boxes of (almost) equal
size (George's nested dissection), down to leaf boxes of at most 5 x 5
cells.  Every box eliminates its separator line (a leaf: all its cells)
against the cells just outside it (its *front*), after adding the dense
Schur complements of its two children (multifrontal elimination).  The boxes of
one level have at most four shapes (the cuts halve every band of rows or
columns, rounding down and up), so a level is one compiled call per shape,
*edge signature* (which box sides lie on the grid edge and so have no outside
cells) and thread: about 15 levels of a few groups.  The factors are
kept as ``L^-1`` and ``L^-1 F_SB`` per box, so the solves are matrix
products (blocks of right-hand sides at once).

Written by hand: no wheel on PyPI gives a supernodal Cholesky with an
optimised BLAS here (scikit-sparse has none; cholespy bundles the reference
BLAS; MUMPS' wheel needs numpy 1; PARDISO via MKL is a 230 MB download and
was slower here), and scipy's SuperLU, with scalar kernels, took 1.2-2.1 s to
factorise the weighted 611 x 611 benchmark (373 321 unknowns).  Measured on
that benchmark (``benchmarks/bench_poisson.py``, warm): factorisation
~0.5 s, 16 right-hand sides ~0.15 s.  The same algorithm written with
batched numpy operations took 1.1-1.9 s to factorise (the many small boxes
of the lower levels cost numpy's per-call and strided-copy overheads), hence
the compiled kernels (:mod:`._nested_kernels`).

References
----------
George (1973), SIAM J. Numer. Anal. 10:345 (nested dissection of a regular mesh) [M].
Duff & Reid (1983), ACM TOMS 9:302 (the multifrontal method) [M].
Liu (1992), SIAM Rev. 34:82 (the multifrontal method for sparse factorisation) [M].
[M]: cited from memory.
"""

from __future__ import annotations

import functools
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from .._threads import resolve_workers
from ..errors import InputError

MAX_LEAF = 5
"""Boxes are cut until no side is longer than this (cells), so leaves have 2-5 cells a side.
611 x 611 and 256 x 256, factorisation: 5 was as fast as or faster than 4, 6 and 8 (256^2: 0.10 s
against 0.13-0.19 s with 8)."""


class _Group:
    """Boxes of one level sharing a shape and an edge signature (structure only)."""

    __slots__ = ("sig", "tiles", "origins", "S", "B", "nS", "pattern", "maps", "Sidx", "Bidx")


def _front(h, w, split, sig):
    """Cells a box of h x w eliminates (its separator line, or all cells of a leaf) and the cells
    just outside it (sides not on the grid edge), as (row, col) relative to the box origin."""
    if split == "row":
        S = [((h - 1) // 2, c) for c in range(w)]
    elif split == "col":
        S = [(r, (w - 1) // 2) for r in range(h)]
    else:
        S = [(r, c) for r in range(h) for c in range(w)]
    return S, _boundary(h, w, sig)


def _boundary(h, w, sig):
    top, bottom, left, right = sig
    B = []
    if not top:
        B += [(-1, c) for c in range(w)]
    if not bottom:
        B += [(h, c) for c in range(w)]
    if not left:
        B += [(r, -1) for r in range(h)]
    if not right:
        B += [(r, w) for r in range(h)]
    return B


def _child_sig(sig, split, k):
    top, bottom, left, right = sig
    if split == "row":
        return (top, False, left, right) if k == 0 else (False, bottom, left, right)
    return (top, bottom, left, False) if k == 0 else (top, bottom, False, right)


_NO_CHILD = (np.zeros((0, 0, 0)), np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64))
"""Stand-in for a child's (Schur complements or update vectors, positions, slot map) at the leaves."""


class GridCholesky:
    """Factorisation of a symmetric positive definite 5-point operator on an (ny, nx) grid.

    Parameters
    ----------
    diag : (ny, nx) ndarray
        Diagonal entries.
    off_y : (ny - 1, nx) ndarray
        Entry coupling cell (i, j) with (i + 1, j).
    off_x : (ny, nx - 1) ndarray
        Entry coupling cell (i, j) with (i, j + 1).

    ``solve(b)`` takes grid-flat right-hand sides ``(ny * nx,)`` or
    ``(ny * nx, k)`` and returns the solutions in the same layout.
    Raises :class:`~bos.errors.InputError` if the matrix is not positive definite.
    """

    def __init__(self, diag, off_y, off_x):
        from . import _nested_kernels as kern

        self._kern = kern
        diag = np.asarray(diag, dtype=float)
        ny, nx = diag.shape
        self.shape = (ny, nx)
        OY = np.zeros((ny, nx))  # OY[r, c]: coupling (r, c)-(r + 1, c); zero on the last row
        OY[:-1] = off_y
        OX = np.zeros((ny, nx))
        OX[:, :-1] = off_x
        self.levels = _structure(ny, nx)
        need, have = factor_memory_bytes(ny, nx), _available_memory_bytes()
        if have is not None and need > 0.8 * have:
            raise InputError(f"the direct solver needs about {need / 1e9:.1f} GB for a {ny} x {nx} grid, more than "
                             f"the {have / 1e9:.1f} GB available; use solver = \"multigrid\"")
        self._threads = min(2, resolve_workers())  # the batch worker's budget, else all cores (2 used)
        self._factors = {}  # (level, group key) -> (L^-1, L^-1 F_SB) per box
        arrays = (np.ascontiguousarray(diag).ravel(), OY.ravel(), OX.ravel())
        schur = {}  # the Schur complements a level passes to its parent
        with ThreadPoolExecutor(self._threads) as pool, _blas_threads() as blas:
            for lev in reversed(range(len(self.levels))):
                # levels of many boxes: one box per kernel call per thread, BLAS on one thread (two
                # threads each running a 2-thread BLAS made those levels 2-5x slower); the top
                # levels (1-3 large boxes): BLAS on all cores
                few = max(len(g.origins) for g in self.levels[lev]["groups"].values()) < 4
                blas(None if few else 1)
                schur = self._factor_level(lev, arrays, pool, schur)

    def _ranges(self, nbox):
        """Box ranges for the threads: two halves when there are enough boxes (the kernels release
        the interpreter lock), else one range (a few large boxes: BLAS uses the cores)."""
        if self._threads < 2 or nbox < 4:
            return [(0, nbox)]
        return [(0, nbox // 2), (nbox // 2, nbox)]

    # ------------------------------------------------------------------ factorisation

    def _factor_level(self, lev, arrays, pool, child_schur):
        """Factor the boxes of level ``lev``; returns their Schur complements (for the parents)."""
        schur = {}
        for key, g in self.levels[lev]["groups"].items():
            nbox, nS, nB = len(g.origins), g.nS, len(g.B)
            Linv = np.empty((nbox, nS, nS))
            W = np.empty((nbox, nS, nB))
            U = schur[key] = np.empty((nbox, nB, nB))
            kids = []
            for csig, pos, m in g.maps:
                kids += [child_schur[csig], pos, m]
            if not kids:
                kids = [*_NO_CHILD, *_NO_CHILD]
            pI, pJ, pK, pR = g.pattern
            try:
                failed = sum(_run(pool, self._kern.factor_boxes, self._ranges(nbox), g.origins, pI, pJ, pK, pR,
                                  *arrays, nS, nB, *kids, Linv, W, U))
            except np.linalg.LinAlgError:
                failed = 1
            if failed:
                raise InputError("the integration system is not positive definite (direct solver)")
            self._factors[lev, key] = (Linv, W)
        return schur

    # ------------------------------------------------------------------ solves

    def solve(self, b):
        """Solve for grid-flat right-hand sides ``(ny * nx,)`` or ``(ny * nx, k)``."""
        b = np.asarray(b, dtype=float)
        vec = b.ndim == 1
        ny, nx = self.shape
        k = 1 if vec else b.shape[1]
        r = np.array(b.reshape(ny * nx, k), dtype=float, order="C")  # a copy: the solution is written here
        kern = self._kern
        ys = {}
        up = {}
        with ThreadPoolExecutor(self._threads) as pool, _blas_threads() as blas:
            blas(1)
            for lev in reversed(range(len(self.levels))):  # forward: leaves to root
                level = self.levels[lev]
                new_up = {}
                for key, g in level["groups"].items():
                    nbox, nS, nB = len(g.origins), g.nS, len(g.B)
                    Linv, W = self._factors[lev, key]
                    kids = []
                    for csig, pos, m in g.maps:
                        kids += [up[csig], pos, m]
                    if not kids:
                        kids = [*_NO_CHILD, *_NO_CHILD]
                    y = np.empty((nbox, nS, k))
                    u = np.empty((nbox, nB, k))
                    _run(pool, kern.forward_boxes, self._ranges(nbox), g.Sidx, r, nB, *kids, Linv, W, y, u)
                    ys[lev, key] = y
                    new_up[key] = u
                up = new_up
            x = r  # every cell is written once, by the box that eliminated it
            for lev, level in enumerate(self.levels):  # backward: root to leaves
                for key, g in level["groups"].items():
                    y = ys.pop((lev, key))
                    Linv, W = self._factors[lev, key]
                    _run(pool, kern.backward_boxes, self._ranges(len(g.origins)), g.Sidx, g.Bidx, x, Linv, W, y)
        return x[:, 0] if vec else x


def _run(pool, kernel, ranges, *args):
    """``kernel(lo, hi, *args)`` for each box range: the last in this thread, the others in the pool
    (one hand-over per extra range; a single range never leaves this thread)."""
    jobs = [pool.submit(kernel, lo, hi, *args) for lo, hi in ranges[:-1]]
    lo, hi = ranges[-1]
    out = [kernel(lo, hi, *args)]
    return out + [job.result() for job in jobs]


@functools.lru_cache(maxsize=2)
def _structure(ny, nx):
    """Levels of boxes of an (ny, nx) grid, root first (structure only, cached: the frames of a
    batch share it).  The grid is a product of row bands and column bands; a
    split cuts every band of one direction by its line ``(size - 1) // 2``, so the band sizes
    of a level differ by at most one and a level has at most 4 box shapes (x 9 edge signatures)."""
    levels = []
    rows, cols = [(0, ny)], [(0, nx)]  # bands: (first cell, size)
    while True:
        hmax, wmax = max(b[1] for b in rows), max(b[1] for b in cols)
        split = None if max(hmax, wmax) <= MAX_LEAF else ("row" if hmax >= wmax else "col")
        nby, nbx = len(rows), len(cols)
        r0, hs = np.array(rows).T
        c0, ws = np.array(cols).T
        ti, tj = np.meshgrid(np.arange(nby), np.arange(nbx), indexing="ij")
        code = 8 * (ti == 0) + 4 * (ti == nby - 1) + 2 * (tj == 0) + (tj == nbx - 1)
        keys = (hs[ti] * (nx + 1) + ws[tj]) * 16 + code
        groups = {}
        pos = np.empty((nby, nbx), dtype=np.int64)
        for key in np.unique(keys):
            c = int(key % 16)
            h, w = divmod(int(key // 16), nx + 1)
            sig = (bool(c & 8), bool(c & 4), bool(c & 2), bool(c & 1))
            sel = keys == key
            g = _Group()
            g.sig = (h, w, sig)
            g.tiles = np.argwhere(sel)  # row-major order
            pos[sel] = np.arange(len(g.tiles))
            g.origins = r0[g.tiles[:, 0]] * nx + c0[g.tiles[:, 1]]
            S, B = _front(h, w, split, sig)
            g.nS = len(S)
            g.S = np.array([r * nx + c for r, c in S], dtype=np.int64)
            g.B = np.array([r * nx + c for r, c in B], dtype=np.int64).reshape(-1)
            g.pattern = _pattern(S, B, nx)
            g.Sidx = g.origins[:, None] + g.S[None, :]
            g.Bidx = g.origins[:, None] + g.B[None, :]
            g.maps = []
            if split is not None:
                slot = {rc: i for i, rc in enumerate(S + B)}
                for k in (0, 1):
                    if split == "row":
                        hc, wc, dr, dc = ((h - 1) // 2, w, 0, 0) if k == 0 else (h // 2, w, (h - 1) // 2 + 1, 0)
                    else:
                        hc, wc, dr, dc = (h, (w - 1) // 2, 0, 0) if k == 0 else (h, w // 2, 0, (w - 1) // 2 + 1)
                    csig = _child_sig(sig, split, k)
                    cB = _boundary(hc, wc, csig)
                    m = np.array([slot[(r + dr, c + dc)] for r, c in cB], dtype=np.int64)
                    ctile = (g.tiles * [2, 1] + [k, 0]) if split == "row" else (g.tiles * [1, 2] + [0, k])
                    g.maps.append([(hc, wc, csig), ctile, m])
            groups[g.sig] = g
        levels.append(dict(split=split, groups=groups, pos=pos))
        if split is None:
            break
        bands = rows if split == "row" else cols
        halves = []
        for a, size in bands:
            halves += [(a, (size - 1) // 2), (a + (size - 1) // 2 + 1, size // 2)]
        if split == "row":
            rows = halves
        else:
            cols = halves
    for lev, level in enumerate(levels[:-1]):  # children's positions in their groups
        for g in level["groups"].values():
            for item in g.maps:
                ctile = item[1]
                item[1] = np.ascontiguousarray(levels[lev + 1]["pos"][ctile[:, 0], ctile[:, 1]])
    return levels


def factor_memory_bytes(ny: int, nx: int) -> int:
    """Memory [bytes] the factorisation of an (ny, nx) grid holds at its peak: the factors, two
    levels of Schur complements and the structure's index arrays (611 x 611: 0.34 GB)."""
    levels = _structure(ny, nx)
    groups = [g for level in levels for g in level["groups"].values()]
    factors = sum(len(g.origins) * g.nS * (g.nS + len(g.B)) for g in groups)
    schur = max(sum(len(g.origins) * len(g.B) ** 2 for g in level["groups"].values()) for level in levels)
    index = sum(g.Sidx.size + g.Bidx.size for g in groups)
    return 8 * (factors + 2 * schur + index)


def _available_memory_bytes():
    """MemAvailable from /proc/meminfo (Linux), else None (no check)."""
    try:
        with open("/proc/meminfo") as f:
            for line in f:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        return None
    return None


def warm_up() -> None:
    """Load the compiled kernels: factorise and solve a 3 x 3 grid.

    The first use in a process imports numba (~0.35 s) and loads the cached machine code (~0.15 s);
    ``bos run`` does this in the background while the displacement is estimated.  The kernels
    have one type signature each (every array is C-contiguous int64/float64), so this tiny problem
    loads exactly the code a large one runs (test)."""
    g = GridCholesky(np.full((3, 3), 4.0), -np.ones((2, 3)), -np.ones((3, 2)))
    g.solve(np.ones((9, 2)))


class _blas_threads:
    """Context manager yielding ``set(limit)``: BLAS thread limit (None = the library default)."""

    _controller = None  # inspecting the loaded libraries takes ~3 ms: once per process

    def __enter__(self):
        if _blas_threads._controller is None:
            from threadpoolctl import ThreadpoolController

            _blas_threads._controller = ThreadpoolController()
        self._ctl = _blas_threads._controller
        self._limit = None
        self._ctx = None
        return self._set

    def _set(self, limit):
        if limit == self._limit:
            return
        if self._ctx is not None:
            self._ctx.restore_original_limits()
            self._ctx = None
        if limit is not None:
            self._ctx = self._ctl.limit(limits=limit, user_api="blas")
        self._limit = limit

    def __exit__(self, *exc):
        self._set(None)
        return False


def _pattern(S, B, NX):
    """Entries of A inside a front: kind ('D' diagonal, 'Y' vertical, 'X' horizontal coupling) ->
    (row slots, column slots, relative flat offset of the cell holding the value)."""
    slot = {rc: i for i, rc in enumerate(S + B)}
    nS = len(S)
    out = {"D": ([], [], []), "Y": ([], [], []), "X": ([], [], [])}

    def put(kind, i, j, cell):
        I, J, rel = out[kind]
        I.append(i)
        J.append(j)
        rel.append(cell[0] * NX + cell[1])
        if j >= nS:  # boundary rows are not visited: mirror
            I.append(j)
            J.append(i)
            rel.append(cell[0] * NX + cell[1])

    for i, (r, c) in enumerate(S):
        put("D", i, i, (r, c))
        for (rr, cc), kind, cell in (((r + 1, c), "Y", (r, c)), ((r - 1, c), "Y", (r - 1, c)),
                                     ((r, c + 1), "X", (r, c)), ((r, c - 1), "X", (r, c - 1))):
            j = slot.get((rr, cc))
            if j is not None:
                put(kind, i, j, cell)
    I, J, K, R = [], [], [], []
    for code, kind in enumerate(("D", "Y", "X")):
        I += out[kind][0]
        J += out[kind][1]
        K += [code] * len(out[kind][0])
        R += out[kind][2]
    return tuple(np.array(v, dtype=np.int64) for v in (I, J, K, R))
