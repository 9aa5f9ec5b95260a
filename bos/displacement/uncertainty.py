"""Per-vector random uncertainty of the displacement estimators."""

from __future__ import annotations

import numpy as np

from ._peak import gauss3

# Uncertainty reported where the statistics cannot be formed (no positive
# correlation at the +-1 px samples) [px]: half a pixel, the largest error a
# converged sub-pixel fit can make.
FALLBACK_SIGMA = 0.5


def correlation_statistics(a: np.ndarray, b: np.ndarray, *, sums=None):
    """1-sigma uncertainty of converged window-deformation vectors.

    For deformed, zero-mean windows ``a, b`` (stack (n, W, W)) the
    correlation at lag 0 and +-1 px is a sum of pixel products.  The
    difference ``C(+1) - C(-1)`` would be zero for a perfect match; its
    spread ``sigma_dC`` (sum over the window of the squared deviation of the
    per-pixel terms ``a(x) b(x+1) - a(x+1) b(x)`` from their mean) is
    propagated through the three-point Gaussian fit:
    ``sigma = |x(C- + s/2, C+ - s/2) - x(C- - s/2, C+ + s/2)| / 2``.

    Parameters
    ----------
    a, b : ndarray, shape (n, W, W)
        Zero-mean (masked pixels zeroed) deformed windows of the reference
        and the measurement.
    sums : tuple, optional
        ``(C0, (C-_y, C+_y), (C-_x, C+_x))`` per window when already known
        (the direct-sum peak of the final pass computes them), saving three
        of the five sums (measured 0.033 -> 0.028 s per 16 000 windows of 16 px).

    Returns
    -------
    sigma_y, sigma_x : ndarray, shape (n,)
        Random uncertainty of the displacement components [px].

    References
    ----------
    Wieneke, B. (2015). PIV uncertainty quantification from correlation
    statistics. Meas. Sci. Technol. 26, 074002.
    Sciacchitano, A. (2019). Uncertainty quantification in particle image
    velocimetry. Meas. Sci. Technol. 30, 092001.
    """
    c0 = (np.einsum("kij,kij->k", a, b) if sums is None else sums[0]).astype(np.float64)
    out = []
    for k, axis in enumerate((1, 2)):
        lo = [slice(None)] * 3
        hi = [slice(None)] * 3
        lo[axis] = slice(None, -1)
        hi[axis] = slice(1, None)
        s = a[tuple(lo)] * b[tuple(hi)]  # terms of C(+1) = sum a(x) b(x+1)
        if sums is None:
            cp = s.sum(axis=(1, 2)).astype(np.float64)
        s -= a[tuple(hi)] * b[tuple(lo)]  # per-pixel terms of C(+1) - C(-1)
        if sums is None:
            cm = cp - s.sum(axis=(1, 2)).astype(np.float64)
        else:
            cm, cp = (np.asarray(v, dtype=np.float64) for v in sums[1 + k])
        npix = s.shape[1] * s.shape[2]
        var = np.einsum("kij,kij->k", s, s).astype(np.float64) - (cp - cm) ** 2 / npix
        sd = np.sqrt(np.maximum(var, 0.0))
        x_hi = gauss3(cm - sd / 2, c0, cp + sd / 2)
        x_lo = gauss3(cm + sd / 2, c0, cp - sd / 2)
        sig = np.abs(x_hi - x_lo) / 2
        ok = (cm - sd / 2 > 0) & (cp - sd / 2 > 0) & (c0 > 0)
        out.append(np.where(ok, sig, FALLBACK_SIGMA))
    return out[0], out[1]
