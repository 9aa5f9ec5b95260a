"""Shared drivers: predictor interpolation and symmetric image deformation.

Used by both the correlation and the dense-flow estimators (passed to their
private solvers with :func:`functools.partial`).
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import numpy as np
from scipy import ndimage as ndi
from scipy import sparse

from .. import _threads


def resolve_workers(workers: int | None) -> int:
    """Number of threads to use (None or <= 0: all cores, or the batch worker's budget)."""
    return _threads.resolve_workers(workers)


def spline_coefficients(image: np.ndarray, order: int, *, workers: int = 1) -> np.ndarray:
    """B-spline coefficients of ``image`` (float32), computed once per image.

    Prefiltering once and sampling with ``prefilter=False`` in every pass
    saves one full-image filter per pass and image (measured: 0.14 s per
    4 MP image).  With ``workers`` > 1 each 1-D filter runs on stripes across
    the filtered axis in threads (lines are independent, so the result is
    bit-identical; measured 0.096 -> 0.052 s per 4 MP image on 2 cores).
    """
    if order <= 1:
        return image
    parts = max(1, min(workers, min(image.shape) // 64))
    if parts == 1:
        return ndi.spline_filter(image, order=order, output=np.float32, mode="mirror")
    out = np.empty(image.shape, dtype=np.float32)
    for axis, src in ((0, image), (1, out)):
        edges = np.linspace(0, image.shape[1 - axis], parts + 1).astype(int)

        def run(k, axis=axis, src=src, edges=edges):
            sl = (slice(None), slice(edges[k], edges[k + 1]))[:: 1 if axis == 0 else -1]
            ndi.spline_filter1d(src[sl], order, axis=axis, output=out[sl], mode="mirror")

        list(pool(workers).map(run, range(parts)))
    return out


def _keys_matrix(grid, points):
    """Sparse (points x grid) matrix of Keys cubic-convolution weights (a = -0.5).

    ``grid`` must be uniformly spaced; points outside it take the edge value.
    """
    n = len(grid)
    m = len(points)
    if n == 1:
        return sparse.csr_matrix((np.ones(m), (np.arange(m), np.zeros(m, dtype=int))), shape=(m, 1))
    h = (grid[-1] - grid[0]) / (n - 1)
    t = np.clip((np.asarray(points, dtype=np.float64) - grid[0]) / h, 0.0, n - 1.0)
    i = np.minimum(np.floor(t).astype(int), n - 2)
    f = t - i
    w = np.stack([
        ((-0.5 * f + 1.0) * f - 0.5) * f,
        (1.5 * f - 2.5) * f * f + 1.0,
        ((-1.5 * f + 2.0) * f + 0.5) * f,
        (0.5 * f - 0.5) * f * f,
    ], axis=1)
    cols = np.clip(i[:, None] + np.arange(-1, 3)[None, :], 0, n - 1)
    # built directly in CSR form, 4 entries per row (edge duplicates add up in the
    # products): 0.16 -> 0.11 ms per 1200-point matrix against the (data, (i, j)) form
    return sparse.csr_matrix((w.ravel(), cols.ravel(), np.arange(0, 4 * m + 1, 4)), shape=(m, n))


def grid_to_points(grid_rows, grid_cols, values, rows, cols) -> np.ndarray:
    """Evaluate a field on a uniform grid at the tensor grid ``rows x cols`` (float32).

    Separable Keys cubic convolution through the grid values (edge values
    continued beyond the outermost grid points), applied as two sparse
    matrix products: measured 5x faster than a bicubic RectBivariateSpline
    evaluated at every pixel of a 4 MP image.
    """
    wr = _keys_matrix(np.asarray(grid_rows, dtype=float), rows)
    wc = _keys_matrix(np.asarray(grid_cols, dtype=float), cols)
    # only the grid rows the points touch (a band of a few rows needs ~10 of them):
    # with the direct CSR build below, medians of 15 (255 x 255 grid, bit-identical):
    # 7.3 -> 1.5 ms for a 72 x 1200 px band of a partial pass, 10 -> 6.3 ms for 512 x 2048 px
    g0, g1 = int(wr.indices.min()), int(wr.indices.max()) + 1
    wr = wr[:, g0:g1]
    tmp = (wc @ np.asarray(values, dtype=np.float64)[g0:g1].T).T  # (grid rows, cols), small
    # the large product in float32 (error < 3e-7 px): measured 11-22 ms -> 3 ms per
    # 512 x 2048 block
    return np.asarray(wr.astype(np.float32) @ tmp.astype(np.float32), dtype=np.float32)


_POOLS: dict[int, ThreadPoolExecutor] = {}


def pool(workers: int) -> ThreadPoolExecutor:
    """A persistent thread pool (creating threads per call cost ~0.1 s per estimate)."""
    if workers not in _POOLS:
        _POOLS[workers] = ThreadPoolExecutor(workers)
    return _POOLS[workers]


def sample(coef: np.ndarray, rr: np.ndarray, cc: np.ndarray, *, order: int, workers: int) -> np.ndarray:
    """Sample prefiltered ``coef`` at fractional positions (rr, cc), float32.

    The rows are split between ``workers`` threads (scipy.ndimage releases
    the GIL; measured 1.6x on 2 cores).
    """
    out = np.empty(rr.shape, dtype=np.float32)
    n = rr.shape[0]
    parts = max(1, min(workers, n // 16))
    edges = np.linspace(0, n, parts + 1).astype(int)

    def run(k):
        s = slice(edges[k], edges[k + 1])
        ndi.map_coordinates(
            coef, (rr[s], cc[s]), order=order, prefilter=False, output=out[s], mode="mirror"
        )

    if parts == 1:
        run(0)
    else:
        list(pool(workers).map(run, range(parts)))
    return out


def deform_pair(coef_ref, coef_meas, r0, r1, c0, c1, dyp, dxp, *, order, workers, symmetric=True, ref=None,
                where=None):
    """Deform the block rows r0:r1, cols c0:c1 of both images by the predictor.

    Symmetric (default): the reference is sampled at ``p - d/2`` and the
    measurement at ``p + d/2`` so that, for the true displacement ``d``,
    both show the background as it sits half-way (Scarano 2002,
    central-difference deformation); vectors then refer to the pair's
    mid-point.  One-sided (``symmetric=False``): the reference block is
    taken as is (``ref``) and the measurement sampled at ``p + d``; vectors
    refer to reference positions and only one image is interpolated.
    ``dyp, dxp`` hold the predictor at every block pixel.  With ``where``
    (bool, block shape) only those pixels are interpolated; the others of
    the returned blocks are 0.
    """
    rows = np.arange(r0, r1, dtype=np.float32)[:, None]
    cols = np.arange(c0, c1, dtype=np.float32)[None, :]
    if where is not None:
        rows, cols = (np.broadcast_to(v, where.shape)[where] for v in (rows, cols))
        dyp, dxp = dyp[where], dxp[where]

    def full(values):
        if where is None:
            return values
        out = np.zeros(where.shape, dtype=np.float32)
        out[where] = values
        return out

    if not symmetric:
        a = np.array(ref[r0:r1, c0:c1], dtype=np.float32)
        b = sample(coef_meas, rows + dyp, cols + dxp, order=order, workers=workers)
        return a, full(b)
    hy = 0.5 * dyp
    hx = 0.5 * dxp
    a = sample(coef_ref, rows - hy, cols - hx, order=order, workers=workers)
    b = sample(coef_meas, rows + hy, cols + hx, order=order, workers=workers)
    return full(a), full(b)
