"""Shared drivers: predictor interpolation and symmetric image deformation.

Used by both the correlation and the dense-flow estimators (passed to their
private solvers with :func:`functools.partial`).
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor

import numpy as np
from scipy import ndimage as ndi
from scipy.interpolate import RectBivariateSpline


def resolve_workers(workers: int | None) -> int:
    """Number of threads to use (None or <= 0: all cores)."""
    if workers is None or workers <= 0:
        return max(1, os.cpu_count() or 1)
    return int(workers)


def spline_coefficients(image: np.ndarray, order: int) -> np.ndarray:
    """B-spline coefficients of ``image`` (float32), computed once per image.

    Prefiltering once and sampling with ``prefilter=False`` in every pass
    saves one full-image filter per pass and image (measured: 0.14 s per
    4 MP image).
    """
    if order <= 1:
        return image
    return ndi.spline_filter(image, order=order, output=np.float32, mode="mirror")


def grid_to_points(grid_rows, grid_cols, values, rows, cols) -> np.ndarray:
    """Evaluate a gridded field at the tensor grid ``rows x cols`` (float32).

    Bicubic spline through the grid values (degree lowered on small grids);
    constant continuation beyond the outermost grid points.
    """
    ky = min(3, len(grid_rows) - 1)
    kx = min(3, len(grid_cols) - 1)
    if ky < 1 or kx < 1:  # a single row/column of vectors: interpolate along the other axis only
        v = np.asarray(values, dtype=np.float64)
        if ky < 1 and kx < 1:
            return np.full((len(rows), len(cols)), v.item(), dtype=np.float32)
        if ky < 1:
            line = np.interp(cols, grid_cols, v[0])
            return np.broadcast_to(line.astype(np.float32), (len(rows), len(cols))).copy()
        line = np.interp(rows, grid_rows, v[:, 0])
        return np.broadcast_to(line.astype(np.float32)[:, None], (len(rows), len(cols))).copy()
    spline = RectBivariateSpline(grid_rows, grid_cols, values, kx=kx, ky=ky)
    return spline(rows, cols).astype(np.float32)


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
        with ThreadPoolExecutor(parts) as ex:
            list(ex.map(run, range(parts)))
    return out


def deform_pair(coef_ref, coef_meas, r0, r1, c0, c1, dyp, dxp, *, order, workers):
    """Symmetric deformation of the block rows r0:r1, cols c0:c1.

    The reference is sampled at ``p - d/2`` and the measurement at
    ``p + d/2`` so that, for the true displacement ``d``, both show the
    background as it sits half-way (Scarano 2002, central-difference
    deformation).  ``dyp, dxp`` hold the predictor at every block pixel.
    """
    rows = np.arange(r0, r1, dtype=np.float32)[:, None]
    cols = np.arange(c0, c1, dtype=np.float32)[None, :]
    hy = 0.5 * dyp
    hx = 0.5 * dxp
    a = sample(coef_ref, rows - hy, cols - hx, order=order, workers=workers)
    b = sample(coef_meas, rows + hy, cols + hx, order=order, workers=workers)
    return a, b
