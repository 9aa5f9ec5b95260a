"""Checks of the image pair and the mask, including the texture test."""

from __future__ import annotations

import numpy as np

from ..errors import InputError, NoTextureError

# Lag-one neighbour correlation below which an image is treated as pixel noise
# only.  Independent pixel noise gives 0 +- 1/sqrt(N); a background of dots of
# >= 1 px imaged through a lens gives > 0.3 (common practice: dots of 2-3 px,
# Raffel et al. 2018, PIV -- A Practical Guide, 3rd ed.; from memory).
NOISE_CORRELATION = 0.15
# Fraction of pixels sitting at the clip level above which an image counts as
# saturated (or black) rather than textured.
SATURATED_FRACTION = 0.95


def as_image(image, name: str) -> np.ndarray:
    """Return ``image`` as a finite 2-D float32 array or raise InputError."""
    arr = np.asarray(image)
    if arr.ndim != 2:
        raise InputError(f"{name} must be a 2-D grey image, got an array of shape {arr.shape}")
    if not (np.issubdtype(arr.dtype, np.number) or arr.dtype == bool) or np.iscomplexobj(arr):
        raise InputError(f"{name} must hold real numbers, got dtype {arr.dtype}")
    out = arr.astype(np.float32, copy=False)
    bad = arr.size - int(np.count_nonzero(np.isfinite(out)))
    if bad:
        raise InputError(f"{name} has {bad} non-finite pixels (NaN or inf)")
    return out


def check_pair(reference, measurement, mask=None, *, check_reference=True):
    """Validate an image pair and mask; return float32 images and a bool mask.

    ``check_reference=False`` skips the texture test of the reference (done
    once already, e.g. by :func:`bos.displacement.correlation.prepare_reference`).

    Raises
    ------
    InputError
        Shape mismatch, non-2-D or non-finite input, bad or all-covering mask.
    NoTextureError
        An image is uniform, saturated or pixel noise only.
    """
    ref = as_image(reference, "reference")
    meas = as_image(measurement, "measurement")
    if ref.shape != meas.shape:
        raise InputError(f"reference and measurement differ in shape: {ref.shape} vs {meas.shape}")
    if min(ref.shape) < 8:
        raise InputError(f"images of shape {ref.shape} are too small (need at least 8 x 8 px)")
    if mask is None:
        m = np.zeros(ref.shape, dtype=bool)
    else:
        m = np.asarray(mask)
        if m.shape != ref.shape:
            raise InputError(f"mask shape {m.shape} does not match the image shape {ref.shape}")
        m = m.astype(bool, copy=False)
        if m.all():
            raise InputError("mask covers the whole image: nothing to measure")
    if check_reference:
        check_texture(ref, "reference", m)
    check_texture(meas, "measurement", m)
    return ref, meas, m


def check_texture(image: np.ndarray, name: str, mask: np.ndarray | None = None) -> None:
    """Raise NoTextureError when ``image`` has no usable background texture.

    Three cases are told apart: uniform (no variation), saturated (almost
    every pixel at the clip level) and pixel noise only (no correlation
    between neighbouring pixels, so nothing a correlation could follow).
    """
    # statistics from pairs of adjacent rows spread over the whole image
    # (~256 k pixels; the full image costs 0.07 s per 0.25 MP)
    ny, nx = image.shape
    step = max(1, int(ny * nx / 1.3e5))
    idx = np.arange(0, ny - 1, step)
    img, below = image[idx], image[idx + 1]
    keep = keep_below = None
    if mask is not None and mask.any():
        keep, keep_below = ~mask[idx], ~mask[idx + 1]
    vals = img[keep] if keep is not None else img.ravel()
    lo, hi = float(vals.min()), float(vals.max())
    if hi - lo <= 1e-6 * max(abs(hi), abs(lo), 1e-30):
        raise NoTextureError(f"no texture in the {name} image: it is uniform (all pixels = {hi:g})")
    for level, word in ((hi, "saturated"), (lo, "black")):
        frac = float(np.count_nonzero(vals == level)) / vals.size
        if frac >= SATURATED_FRACTION:
            raise NoTextureError(f"no texture in the {name} image: {100 * frac:.0f} % of its pixels are {word}")
    rho = _neighbour_correlation(img, below, keep, keep_below)
    if rho < NOISE_CORRELATION:
        raise NoTextureError(
            f"no texture in the {name} image: it looks like pixel noise only "
            f"(neighbour correlation {rho:.2f} < {NOISE_CORRELATION})"
        )


def _neighbour_correlation(img, below, keep, keep_below) -> float:
    """Mean lag-one correlation coefficient along rows and between adjacent rows."""
    img = img.astype(np.float64)
    below = below.astype(np.float64)
    out = []
    for a, b, k in (
        (img[:, :-1], img[:, 1:], None if keep is None else keep[:, :-1] & keep[:, 1:]),
        (img, below, None if keep is None else keep & keep_below),
    ):
        if k is not None:
            a, b = a[k], b[k]
        if a.size < 2:
            continue
        a = a - a.mean()
        b = b - b.mean()
        # sums of products, not np.vdot: the BLAS dot wakes OpenBLAS's threads, which cost
        # ~20 ms per call on a loaded machine (0.13-0.19 s per image at 1 MP -> ~2 ms)
        den = np.sqrt(float(np.sum(a * a)) * float(np.sum(b * b)))
        out.append(float(np.sum(a * b)) / den if den > 0 else 0.0)
    return float(np.mean(out)) if out else 1.0
