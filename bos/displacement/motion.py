"""Camera-motion removal: a global shift (or affine motion) fitted outside the flow."""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from .field import DisplacementField


@dataclass(frozen=True)
class CameraMotion:
    """Global apparent motion of the whole background [px].

    ``d(p) = shift + matrix @ (p - centre)`` with p = (row, col); ``matrix``
    is zero for a pure shift.
    """

    shift: tuple[float, float]
    matrix: np.ndarray
    centre: tuple[float, float]
    n_vectors: int

    def at(self, rows: np.ndarray, cols: np.ndarray):
        """Motion (dy, dx) on the tensor grid rows x cols."""
        yy = np.asarray(rows, dtype=float)[:, None] - self.centre[0]
        xx = np.asarray(cols, dtype=float)[None, :] - self.centre[1]
        m = self.matrix
        return (self.shift[0] + m[0, 0] * yy + m[0, 1] * xx, self.shift[1] + m[1, 0] * yy + m[1, 1] * xx)


def camera_region(image_shape, *, region="border", border_px: int | None = None) -> np.ndarray:
    """Boolean image marking the flow-free region used to fit camera motion.

    Parameters
    ----------
    image_shape : (int, int)
        Image shape (rows, cols).
    region : "border" or ndarray of bool
        ``"border"``: a band of ``border_px`` along the four edges; an array:
        True where there is no flow (returned as is after checks).
    border_px : int, optional
        Band width [px]; default 1/8 of the smaller image side.
    """
    shape = tuple(int(s) for s in image_shape)
    if isinstance(region, str):
        if region != "border":
            raise InputError(f"camera_motion must be 'border' or a boolean region image, got {region!r}")
        b = int(border_px) if border_px is not None else max(1, min(shape) // 8)
        if b < 1 or 2 * b >= min(shape):
            raise InputError(f"border_px={b} does not fit an image of {shape[0]} x {shape[1]} px")
        out = np.ones(shape, dtype=bool)
        out[b:-b, b:-b] = False
        return out
    out = np.asarray(region)
    if out.shape != shape:
        raise InputError(f"camera-motion region shape {out.shape} does not match the image shape {shape}")
    out = out.astype(bool)
    if not out.any():
        raise InputError("camera-motion region is empty")
    return out


def _bin(image, f):
    """Block mean over f x f pixels (cropped to a multiple of f)."""
    ny, nx = (image.shape[0] // f) * f, (image.shape[1] // f) * f
    return image[:ny, :nx].reshape(ny // f, f, nx // f, f).mean(axis=(1, 3))


def coarse_camera_shift(reference, measurement, region: np.ndarray, *, min_side: int = 256):
    """Integer-pixel global shift (dy, dx) of the background seen in ``region``.

    Masked normalised cross-correlation of the two images restricted to the
    flow-free region (scikit-image ``phase_cross_correlation`` with masks,
    Padfield 2012), on block-mean binned images whose smaller side stays
    >= ``min_side`` px (bin factor a power of two, at most 8), so it costs
    ~0.2 s whatever the image size.  Accuracy is the bin factor (a few px at
    most), enough to seed the window-deformation passes, which then refine it.

    Parameters
    ----------
    reference, measurement : ndarray, 2-D
        Grey images of equal shape.
    region : ndarray of bool
        True where the background is seen without flow.
    min_side : int
        Smallest side of the binned images [px].

    Returns
    -------
    (float, float)
        Shift (dy, dx) [px]: a feature at p in the reference appears at
        p + shift in the measurement.

    References
    ----------
    Padfield, D. (2012). Masked object registration in the Fourier domain.
    IEEE Trans. Image Process. 21, 2706-2718 (from memory, not in
    references.md; the method scikit-image implements).
    """
    from skimage.registration import phase_cross_correlation

    f = 1
    while 2 * f <= 8 and min(region.shape) // (2 * f) >= min_side:
        f *= 2
    ref = _bin(np.asarray(reference, dtype=np.float32), f)
    meas = _bin(np.asarray(measurement, dtype=np.float32), f)
    reg = _bin(region.astype(np.float32), f) > 0.999
    if reg.sum() < 64:
        raise InputError("camera-motion region is too small to estimate a global shift (< 64 binned pixels)")
    with np.errstate(all="ignore"):
        shift, *_ = phase_cross_correlation(ref, meas, reference_mask=reg, moving_mask=reg)
    # phase_cross_correlation returns the shift that registers the measurement onto the reference
    return (-float(shift[0]) * f, -float(shift[1]) * f)


def fit_camera_motion(field: DisplacementField, region: np.ndarray, *, model: str = "shift") -> CameraMotion:
    """Fit a global shift or affine motion to the valid vectors inside ``region``.

    Vectors further than 3 robust standard deviations (1.4826 MAD, common
    practice) from the median are left out of the fit.

    Parameters
    ----------
    field : DisplacementField
        Estimated displacement including the camera motion.
    region : ndarray of bool, image shape
        True where the background is seen without flow.
    model : {"shift", "affine"}

    Returns
    -------
    CameraMotion
    """
    if model not in ("shift", "affine"):
        raise InputError(f"camera_model must be 'shift' or 'affine', got {model!r}")
    ri = np.clip(np.rint(field.rows).astype(int), 0, region.shape[0] - 1)
    ci = np.clip(np.rint(field.cols).astype(int), 0, region.shape[1] - 1)
    sel = region[np.ix_(ri, ci)] & field.valid
    yy, xx = np.meshgrid(field.rows, field.cols, indexing="ij")
    y, x, dy, dx = yy[sel], xx[sel], field.dy[sel], field.dx[sel]
    keep = np.ones(dy.size, dtype=bool)
    for comp in (dy, dx):
        med = np.median(comp) if comp.size else 0.0
        mad = 1.4826 * np.median(np.abs(comp - med)) if comp.size else 0.0
        keep &= np.abs(comp - med) <= 3 * mad + 1e-6
    need = 3 if model == "shift" else 6
    if keep.sum() < need:
        raise InputError(
            f"camera-motion region holds only {int(keep.sum())} usable vectors (need {need}); widen the border or region"
        )
    y, x, dy, dx = y[keep], x[keep], dy[keep], dx[keep]
    centre = ((region.shape[0] - 1) / 2.0, (region.shape[1] - 1) / 2.0)
    if model == "shift":
        return CameraMotion((float(dy.mean()), float(dx.mean())), np.zeros((2, 2)), centre, int(dy.size))
    design = np.column_stack([np.ones_like(y), y - centre[0], x - centre[1]])
    cy, *_ = np.linalg.lstsq(design, dy, rcond=None)
    cx, *_ = np.linalg.lstsq(design, dx, rcond=None)
    matrix = np.array([[cy[1], cy[2]], [cx[1], cx[2]]])
    return CameraMotion((float(cy[0]), float(cx[0])), matrix, centre, int(dy.size))


def remove_camera_motion(field: DisplacementField, motion: CameraMotion) -> DisplacementField:
    """Return ``field`` with the camera motion subtracted and recorded."""
    my, mx = motion.at(field.rows, field.cols)
    params = dict(field.params)
    params["camera_affine"] = motion.matrix.tolist()
    params["camera_vectors"] = motion.n_vectors
    return dataclasses.replace(
        field, dy=field.dy - my, dx=field.dx - mx, camera_shift=motion.shift, params=params
    )
