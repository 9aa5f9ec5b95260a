"""Dense optical flow: iterative symmetric Lucas-Kanade seeded by correlation."""

from __future__ import annotations

from functools import partial

import numpy as np
from scipy import ndimage as ndi

from ..errors import InputError
from . import _deform
from ._inputs import check_pair
from .correlation import _reference_bias, correlate
from .field import DisplacementField
from .validation import replace_invalid

# Conditioning limit: pixels whose local structure tensor has a smaller
# eigenvalue below this fraction of the image median are flagged invalid
# (no texture in the integration window).
MIN_EIGEN_FRACTION = 1e-3


def _lk_strip(coef_ref, coef_meas, weight, dyp, dxp, r0, r1, *, sigma, iterations, order, workers):
    """Iterative symmetric Lucas-Kanade on rows r0:r1 (a strip with halo).

    ``dyp, dxp`` (strip shape) are refined in place.  Returns the smaller
    eigenvalue of the structure tensor, the displacement covariance
    diagonal and the last update size.
    """
    nx = coef_ref.shape[1]
    filt = partial(ndi.gaussian_filter, sigma=sigma, mode="nearest", truncate=3.0)
    wsum = None if weight is None else filt(weight)
    for _ in range(iterations):
        a, b = _deform.deform_pair(coef_ref, coef_meas, r0, r1, 0, nx, dyp, dxp, order=order, workers=workers)
        gy = 0.5 * (np.gradient(a, axis=0) + np.gradient(b, axis=0))
        gx = 0.5 * (np.gradient(a, axis=1) + np.gradient(b, axis=1))
        e = b - a
        del a, b
        prods = [gy * gy, gy * gx, gx * gx, gy * e, gx * e]
        if weight is not None:
            prods = [p * weight for p in prods]
        syy, syx, sxx, sye, sxe = _deform.pool(workers).map(filt, prods)  # ndimage releases the GIL
        del prods
        det = syy * sxx - syx * syx
        with np.errstate(all="ignore"):
            # b - a ~ -g . delta  (a, b deformed by the current estimate)
            ddy = -(sxx * sye - syx * sxe) / det
            ddx = -(syy * sxe - syx * sye) / det
        ok = np.isfinite(ddy) & np.isfinite(ddx) & (det > 0)
        ddy = np.where(ok, np.clip(ddy, -1.0, 1.0), 0.0).astype(np.float32)
        ddx = np.where(ok, np.clip(ddx, -1.0, 1.0), 0.0).astype(np.float32)
        dyp += ddy
        dxp += ddx
    # noise of the linearised residual after the update, and the covariance
    # s^2 (sum w^2) A^-1 with Gaussian weights of unit sum: sum w^2 = 1/(4 pi sigma^2)
    r = e + gy * ddy + gx * ddx
    s2 = filt(r * r if weight is None else r * r * weight)
    if wsum is not None:
        with np.errstate(all="ignore"):
            s2 = s2 / wsum
            syy, syx, sxx = syy / wsum, syx / wsum, sxx / wsum
            det = syy * sxx - syx * syx
    n_eff = 4.0 * np.pi * sigma**2
    with np.errstate(all="ignore"):
        var_y = s2 * sxx / det / n_eff
        var_x = s2 * syy / det / n_eff
        tr = 0.5 * (syy + sxx)
        lam_min = tr - np.sqrt(np.maximum(tr * tr - det, 0.0))
    return lam_min, var_y, var_x, np.hypot(ddy, ddx)


def optical_flow(reference, measurement, *, mask=None, sigma=4.0, iterations=2, order=3,
                 seed_windows=(64, 32, 16), correct_bias=True, strip_rows=512, workers=None,
                 epsilon=0.1, threshold=2.0, initial=None) -> DisplacementField:
    """Dense (per-pixel) displacement by iterative symmetric Lucas-Kanade.

    A correlation estimate (:func:`correlate` with ``seed_windows``) seeds a
    per-pixel field; each iteration deforms both images symmetrically by the
    current field (cubic B-spline), and solves, at every pixel, the 2 x 2
    least-squares system of the brightness-constancy residual weighted by a
    Gaussian window of ``sigma`` px.  Images are processed in row strips
    with a halo so memory stays bounded.

    Parameters
    ----------
    reference, measurement : ndarray, 2-D
        Grey images of equal shape.
    mask : ndarray of bool, optional
        True where there is no data; left out of every local fit.
    sigma : float
        Standard deviation of the Gaussian integration window [px] (sets the
        spatial resolution, ~2.5 sigma).
    iterations : int
        Lucas-Kanade refinements after the correlation seed.
    order : {1, 3, 5}
        B-spline order of the deformation.
    seed_windows : sequence of int
        Window sizes of the seeding correlation.
    correct_bias : bool
        Remove the interpolation bias measured by :func:`deformation_bias`.
    strip_rows : int
        Rows per processed strip (memory bound).
    workers : int, optional
        Threads (default: all cores).
    epsilon, threshold : float
        Normalised median test of the seed.
    initial : (float, float), optional
        Uniform first predictor (dy, dx) [px] of the seeding correlation.

    Returns
    -------
    DisplacementField
        One vector per pixel (``rows = arange(ny)``, ``cols = arange(nx)``);
        ``sigma_dy, sigma_dx`` from the least-squares covariance
        ``s^2 A^-1 / (4 pi sigma^2)`` with ``s^2`` the local residual variance.

    References
    ----------
    Lucas, B. D. and Kanade, T. (1981). An iterative image registration
    technique with an application to stereo vision. Proc. IJCAI, 674-679.
    Le Besnerais, G. and Champagnat, F. (2005). Dense optical flow by
    iterative local window registration. Proc. ICIP, I-137.
    """
    ref, meas, m = check_pair(reference, measurement, mask)
    if sigma <= 0 or int(iterations) < 1:
        raise InputError(f"sigma must be > 0 and iterations >= 1, got {sigma} and {iterations}")
    workers = _deform.resolve_workers(workers)
    # symmetric seed, consistent with the symmetric Lucas-Kanade warps below
    seed = correlate(ref, meas, mask=m, windows=seed_windows, final_iterations=1, order=order,
                     deformation="symmetric", epsilon=epsilon, threshold=threshold, correct_bias=False,
                     workers=workers, initial=initial)

    fill = ~seed.valid
    if fill.all():
        raise InputError("the seeding correlation found no valid vector")
    s_dy = replace_invalid(np.where(fill, np.nan, seed.dy))
    s_dx = replace_invalid(np.where(fill, np.nan, seed.dx))
    ny, nx = ref.shape
    coef_ref = _deform.spline_coefficients(ref, order, workers=workers)
    coef_meas = _deform.spline_coefficients(meas, order, workers=workers)
    weight_all = None if not m.any() else (~m).astype(np.float32)
    dy = np.empty((ny, nx), dtype=np.float32)
    dx = np.empty((ny, nx), dtype=np.float32)
    sdy = np.empty((ny, nx), dtype=np.float32)
    sdx = np.empty((ny, nx), dtype=np.float32)
    lam = np.empty((ny, nx), dtype=np.float32)
    step = np.empty((ny, nx), dtype=np.float32)
    halo = int(np.ceil(3 * sigma)) + 4
    cols = np.arange(nx, dtype=np.float64)
    for s0 in range(0, ny, int(strip_rows)):
        s1 = min(ny, s0 + int(strip_rows))
        r0, r1 = max(0, s0 - halo), min(ny, s1 + halo)
        rows = np.arange(r0, r1, dtype=np.float64)
        pdy = _deform.grid_to_points(seed.rows, seed.cols, s_dy, rows, cols)
        pdx = _deform.grid_to_points(seed.rows, seed.cols, s_dx, rows, cols)
        w = None if weight_all is None else weight_all[r0:r1]
        lm, vy, vx, st = _lk_strip(coef_ref, coef_meas, w, pdy, pdx, r0, r1, sigma=sigma,
                                   iterations=int(iterations), order=order, workers=workers)
        keep = slice(s0 - r0, s1 - r0)
        dy[s0:s1], dx[s0:s1] = pdy[keep], pdx[keep]
        sdy[s0:s1], sdx[s0:s1] = np.sqrt(vy[keep]), np.sqrt(vx[keep])
        lam[s0:s1], step[s0:s1] = lm[keep], st[keep]
    # mid-point (symmetric deformation) -> reference positions: d_ref(p) = d_mid(p + d/2)
    rr = np.arange(ny, dtype=np.float32)[:, None]
    cc = np.arange(nx, dtype=np.float32)[None, :]
    ry, rx = dy, dx
    for _ in range(2):
        q = (rr + 0.5 * ry, cc + 0.5 * rx)
        ry = ndi.map_coordinates(dy, q, order=1, mode="nearest", output=np.float32)
        rx = ndi.map_coordinates(dx, q, order=1, mode="nearest", output=np.float32)
    dy, dx = ry, rx
    if correct_bias and order > 1:
        # interpolation bias of the deformation (deformation_bias), removed from the result:
        # measured better here than cancelling it inside each warp (0.001 vs 0.003 px)
        bias = _reference_bias(ref, window=16, order=order, symmetric=True, direct=False, workers=workers)
        dy -= bias(dy)
        dx -= bias(dx)
    sub = (slice(None, None, 7), slice(None, None, 7))  # median of a 1/49 subsample is enough
    lam_ref = float(np.nanmedian(lam[sub][~m[sub]])) if (~m[sub]).any() else float(np.nanmedian(lam))
    invalid = ~np.isfinite(dy) | ~np.isfinite(dx) | ~(lam > MIN_EIGEN_FRACTION * lam_ref) | (step > 0.5)
    invalid &= ~m
    gone = invalid | m
    for arr in (dy, dx, sdy, sdx):
        arr[gone] = np.nan
    params = dict(sigma=sigma, iterations=iterations, order=order, seed_windows=tuple(seed_windows),
                  correct_bias=correct_bias, uncertainty="least-squares covariance of the local fit",
                  seed_invalid_fraction=float(seed.invalid.mean()))
    return DisplacementField(
        dy=dy, dx=dx, rows=np.arange(ny, dtype=float), cols=np.arange(nx, dtype=float), masked=m.copy(),
        invalid=invalid, sigma_dy=sdy, sigma_dx=sdx, camera_shift=(0.0, 0.0), method="flow", params=params,
    )
