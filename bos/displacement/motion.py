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


def _corr(a, b, shape, workers):
    """Cross-correlation sum_x a(x) b(x + u) of two real spectra, zero-padded to ``shape``."""
    from scipy import fft as sfft

    return sfft.irfft2(np.conj(a) * b, s=shape, workers=workers)


def masked_ncc_shift(reference, measurement, region: np.ndarray, *, overlap_ratio: float = 0.3,
                     workers: int = 1) -> tuple[int, int]:
    """Integer shift maximising the masked normalised cross-correlation, one mask for both images.

    The normalised correlation of the pixels of ``region`` in the reference
    with those of ``region`` in the measurement, for every shift, through
    five real forward and six real inverse FFTs (Padfield 2012, with the
    same mask on both images).  Shifts whose overlap is below
    ``overlap_ratio`` of the largest overlap are not considered.

    Written here rather than calling scikit-image's
    ``phase_cross_correlation(..., reference_mask=, moving_mask=)``, which
    gives the same shift (test): with one mask, real FFTs and the images
    cropped to the mask's bounding box, a 1 MP frame with a strip or border
    region costs a few ms instead of 155-185 ms on one core (measured with
    ``benchmarks/bench_batch.py`` frames).

    Returns
    -------
    (int, int)
        Shift (dy, dx) [px] such that a feature at p in the reference
        appears at p + shift in the measurement.

    References
    ----------
    Padfield, D. (2012). Masked object registration in the Fourier domain.
    IEEE Trans. Image Process. 21, 2706-2718.
    """
    from scipy import fft as sfft

    m = np.asarray(region, dtype=bool)
    rows, cols = np.flatnonzero(m.any(axis=1)), np.flatnonzero(m.any(axis=0))
    box = (slice(rows[0], rows[-1] + 1), slice(cols[0], cols[-1] + 1))
    m = m[box].astype(np.float32)
    f1 = np.asarray(reference, dtype=np.float32)[box]
    f2 = np.asarray(measurement, dtype=np.float32)[box]
    # centred on the region means (the normalised correlation does not change; the
    # sums of squares below then lose few digits to cancellation, so single precision
    # suffices for locating the peak)
    f1 = (f1 - f1[m > 0].mean()) * m
    f2 = (f2 - f2[m > 0].mean()) * m
    ny, nx = m.shape
    shape = (sfft.next_fast_len(2 * ny - 1, real=True), sfft.next_fast_len(2 * nx - 1, real=True))
    M, F1, F2, F11, F22 = (sfft.rfft2(x, s=shape, workers=workers) for x in (m, f1, f2, f1 * f1, f2 * f2))
    n = np.rint(_corr(M, M, shape, workers))
    s1, s2 = _corr(F1, M, shape, workers), _corr(M, F2, shape, workers)
    s11, s22 = _corr(F11, M, shape, workers), _corr(M, F22, shape, workers)
    s12 = _corr(F1, F2, shape, workers)
    with np.errstate(all="ignore"):
        nn = np.maximum(n, 1.0)
        var = np.maximum(s11 - s1 * s1 / nn, 0.0) * np.maximum(s22 - s2 * s2 / nn, 0.0)
        ncc = (s12 - s1 * s2 / nn) / np.sqrt(var)
    ok = (n >= overlap_ratio * n.max()) & (var > 1e-6 * max(float(var.max()), 1e-300)) & np.isfinite(ncc)
    if not ok.any():
        return 0, 0
    ncc = np.where(ok, ncc, -np.inf)
    i, j = np.unravel_index(int(np.argmax(ncc)), ncc.shape)
    # circular index -> signed shift
    dy = i - shape[0] if i > shape[0] // 2 else i
    dx = j - shape[1] if j > shape[1] // 2 else j
    return int(dy), int(dx)


def coarse_camera_shift(reference, measurement, region: np.ndarray, *, min_side: int = 128):
    """Integer-pixel global shift (dy, dx) of the background seen in ``region``.

    Masked normalised cross-correlation of the two images restricted to the
    flow-free region (:func:`masked_ncc_shift`, Padfield 2012), on
    block-mean binned images whose smaller side stays >= ``min_side`` px
    (bin factor a power of two, at most 8).  Accuracy is the bin factor (a
    few px at most), enough to seed the window-deformation passes, which
    then refine it.

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
    IEEE Trans. Image Process. 21, 2706-2718.
    """
    f = 1
    while 2 * f <= 8 and min(region.shape) // (2 * f) >= min_side:
        f *= 2
    ref = _bin(np.asarray(reference, dtype=np.float32), f)
    meas = _bin(np.asarray(measurement, dtype=np.float32), f)
    reg = _bin(region.astype(np.float32), f) > 0.999
    if reg.sum() < 64:
        raise InputError("camera-motion region is too small to estimate a global shift (< 64 binned pixels)")
    dy, dx = masked_ncc_shift(ref, meas, reg)
    return (float(dy * f), float(dx * f))


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
    centre = ((region.shape[0] - 1) / 2.0, (region.shape[1] - 1) / 2.0)
    return _fit(y[keep], x[keep], dy[keep], dx[keep], centre, model)


def remove_camera_motion(field: DisplacementField, motion: CameraMotion) -> DisplacementField:
    """Return ``field`` with the camera motion subtracted and recorded."""
    my, mx = motion.at(field.rows, field.cols)
    params = dict(field.params)
    params["camera_affine"] = motion.matrix.tolist()
    params["camera_vectors"] = motion.n_vectors
    return dataclasses.replace(
        field, dy=field.dy - my, dx=field.dx - mx, camera_shift=motion.shift, params=params
    )


# ---------------------------------------------------------------------------
# Flow-aware camera motion ("auto")
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class CameraFitReport:
    """How the camera motion was found (for the summary and the result file).

    Attributes
    ----------
    region : str
        Description of the candidate region.
    candidate_vectors, used_vectors : int
        Valid vectors in the candidate region, and those kept as flow-free.
    excluded_fraction : float
        Fraction of the candidate vectors rejected as carrying flow.
    residual_rms_px : (float, float)
        rms (dy, dx) of the kept vectors about the fitted motion [px].
    noise_px : float
        Per-vector noise used for the flow test [px].
    side_shifts_px : dict
        Shift fitted on each side of the region that holds enough vectors.
    consistent : bool
        False when the kept vectors do not look like one rigid motion.
    warnings : list of str
    """

    region: str
    candidate_vectors: int
    used_vectors: int
    excluded_fraction: float
    residual_rms_px: tuple[float, float]
    noise_px: float
    side_shifts_px: dict
    consistent: bool
    warnings: list


def _nan_box_mean(values: np.ndarray, weight: np.ndarray, size: int) -> tuple[np.ndarray, np.ndarray]:
    """Mean of ``values`` over a size x size box using only points with weight 1; and the count."""
    from scipy.ndimage import uniform_filter

    v = np.where(weight, values, 0.0)
    w = weight.astype(float)
    s = uniform_filter(v, size=size, mode="constant")
    n = uniform_filter(w, size=size, mode="constant")
    with np.errstate(invalid="ignore", divide="ignore"):
        return s / n, n * size * size


OVERLAP_NOISE_FACTOR = 2.0


def flow_flags(dy: np.ndarray, dx: np.ndarray, region: np.ndarray, *, sigma: tuple[float, float],
               sizes: tuple[int, ...] = (3, 7, 15), threshold: float = 4.0) -> np.ndarray:
    """Vectors of ``region`` whose neighbourhood carries a coherent signal beyond the noise.

    For each box size the mean of the residual (dy, dx) over the region's
    vectors in the box is compared with the noise of such a mean,
    ``2 sigma / sqrt(n)`` (the factor 2 for the correlation of overlapping
    windows); vectors within half a box of a significant mean are flagged.

    Parameters
    ----------
    dy, dx : ndarray
        Residual displacement [px] on the vector grid (expected zero where no flow).
    region : ndarray of bool
        Grid points to test (valid vectors only).
    sigma : (float, float)
        Per-vector 1-sigma noise of dy and dx [px].
    sizes : tuple of int
        Box sizes [vectors].
    threshold : float
        Significance in units of the box-mean noise.
    """
    from scipy.ndimage import binary_dilation

    flags = np.zeros_like(region)
    for size in sizes:
        for r, s_c in ((dy, sigma[0]), (dx, sigma[1])):
            mean, count = _nan_box_mean(np.where(region, r, 0.0), region, size)
            noise_box = OVERLAP_NOISE_FACTOR * s_c / np.sqrt(np.maximum(count, 1.0))
            flag = region & (count >= 3) & (np.abs(mean) > threshold * noise_box)
            flags |= binary_dilation(flag, iterations=max(1, size // 2)) & region
    return flags


def component_noise(field: DisplacementField, where: np.ndarray) -> tuple[float, float]:
    """Median per-vector 1-sigma of (dy, dx) over ``where`` [px] (floor 1e-4 px)."""
    out = []
    for s_c in (field.sigma_dy, field.sigma_dx):
        v = np.asarray(s_c, float)[where]
        v = v[np.isfinite(v)]
        out.append(max(float(np.median(v)) if v.size else 0.01, 1e-4))
    return out[0], out[1]


def half_sample_mode(values: np.ndarray) -> float:
    """Robust mode of a sample: the half-sample mode.

    Repeatedly keeps the half of the sorted sample with the smallest range
    until two or three values remain and returns their mean.  Unlike the
    median it is not pulled by a one-sided tail (vectors carrying flow).

    References
    ----------
    Bickel, D. R. and Fruehwirth, R. (2006). On a fast, robust estimator of
    the mode: comparisons to other robust estimators with applications.
    Computational Statistics & Data Analysis 50, 3500-3530.
    """
    v = np.sort(np.asarray(values, float)[np.isfinite(values)])
    if v.size == 0:
        return float("nan")
    while v.size > 3:
        h = (v.size + 1) // 2
        widths = v[h - 1:] - v[:v.size - h + 1]
        i = int(np.argmin(widths))
        v = v[i:i + h]
    if v.size == 3:  # the closer pair
        return float(v[:2].mean() if v[1] - v[0] < v[2] - v[1] else (v[1:].mean() if v[2] - v[1] < v[1] - v[0]
                                                                         else v[1]))
    return float(v.mean())


def _fit(y, x, dy, dx, centre, model):
    if model == "shift":
        return CameraMotion((float(dy.mean()), float(dx.mean())), np.zeros((2, 2)), centre, int(dy.size))
    design = np.column_stack([np.ones_like(y), y - centre[0], x - centre[1]])
    cy, *_ = np.linalg.lstsq(design, dy, rcond=None)
    cx, *_ = np.linalg.lstsq(design, dx, rcond=None)
    return CameraMotion((float(cy[0]), float(cx[0])), np.array([[cy[1], cy[2]], [cx[1], cx[2]]]), centre,
                        int(dy.size))


def fit_camera_motion_flow_aware(field: DisplacementField, region: np.ndarray, *, model: str = "shift",
                                 description: str = "candidate region", threshold: float = 4.0,
                                 max_iter: int = 8) -> tuple[CameraMotion, CameraFitReport]:
    """Fit camera motion only to vectors that the data show carry no flow.

    The candidate region (e.g. the border band, or the declared ambient
    region) may be crossed by the flow (a plume leaving through the top of
    the picture, a boundary layer running along the whole plate).  A flow
    signal is spatially coherent, camera noise is not: the residual about
    the current motion estimate is averaged over boxes of 5 x 5 and 11 x 11
    vectors (candidate vectors only), and a vector is rejected when either
    box mean exceeds ``threshold`` times its own noise (the noise of a box
    mean, calibrated on the box means of the kept vectors, so the
    correlation of overlapping windows is accounted for).  Rejections are
    dilated by the box half-width (flow tails), the motion is refitted to
    the rest and the test repeated until the kept set no longer changes.

    Parameters
    ----------
    field : DisplacementField
        Displacement including the camera motion.
    region : ndarray of bool, image shape
        Candidate flow-free region.
    model : {"shift", "affine"}
    description : str
        Name of the region for the report.
    threshold : float
        Rejection threshold in units of the box-mean noise (4, common practice
        for a low false-rejection rate).
    max_iter : int

    Returns
    -------
    (CameraMotion, CameraFitReport)

    Raises
    ------
    InputError
        Too few usable vectors in the candidate region.
    """
    if model not in ("shift", "affine"):
        raise InputError(f"camera_model must be 'shift' or 'affine', got {model!r}")
    ri = np.clip(np.rint(field.rows).astype(int), 0, region.shape[0] - 1)
    ci = np.clip(np.rint(field.cols).astype(int), 0, region.shape[1] - 1)
    cand = region[np.ix_(ri, ci)] & field.valid & np.isfinite(field.dy) & np.isfinite(field.dx)
    need = 3 if model == "shift" else 6
    n_cand = int(cand.sum())
    if n_cand < need:
        raise InputError(f"camera-motion region ({description}) holds only {n_cand} usable vectors "
                         f"(need {need}); widen the region or set processing.camera_motion")
    yy, xx = np.meshgrid(field.rows, field.cols, indexing="ij")
    centre = ((region.shape[0] - 1) / 2.0, (region.shape[1] - 1) / 2.0)
    # per-vector noise of each component: the estimator's own 1-sigma (median over the region);
    # box means of n vectors of windows overlapping by 50 % have ~2x the independent-noise
    # spread sigma/sqrt(n) (neighbour correlation; common practice, measured here ~1.5-2)
    sig = component_noise(field, cand)
    overlap_factor = OVERLAP_NOISE_FACTOR
    # first guess: the robust mode of 3x3 box means (flow is a one-sided tail, ambient a tight peak)
    keep = cand.copy()
    for comp, s_c in zip((field.dy, field.dx), sig):
        box, count = _nan_box_mean(np.where(cand, comp, 0.0), cand, 3)
        mode = half_sample_mode(box[cand & (count >= 3)]) if (cand & (count >= 3)).sum() >= 8 else np.median(comp[cand])
        keep &= np.abs(comp - mode) <= 3 * s_c
    if keep.sum() < need:
        keep = cand.copy()
    warnings: list[str] = []
    motion = _fit(yy[keep], xx[keep], field.dy[keep], field.dx[keep], centre, model)
    # box sizes grow over the iterations: small boxes first (robust to a biased start), then
    # larger ones (sensitive to weak, wide flow tails)
    schedule = [(3,), (3, 7)] + [(3, 7, 15)] * max(1, max_iter - 2)
    for it, sizes in enumerate(schedule):
        my, mx = motion.at(field.rows, field.cols)
        reject = flow_flags(field.dy - my, field.dx - mx, cand, sigma=sig, sizes=sizes, threshold=threshold)
        new_keep = cand & ~reject
        if new_keep.sum() < max(need, 0.05 * n_cand):
            warnings.append(f"camera motion: the flow covers nearly all of the {description} "
                            f"({int(new_keep.sum())} of {n_cand} vectors look flow-free); the fitted camera "
                            "motion may contain flow: set processing.camera_motion = \"none\" if the camera "
                            "did not move, or give a flow-free reconstruction.reference_region")
            break
        changed = not np.array_equal(new_keep, keep)
        keep = new_keep
        motion = _fit(yy[keep], xx[keep], field.dy[keep], field.dx[keep], centre, model)
        if not changed and it >= 2:
            break
    my, mx = motion.at(field.rows, field.cols)
    ry, rx = (field.dy - my)[keep], (field.dx - mx)[keep]
    rms = (float(np.sqrt(np.mean(ry ** 2))), float(np.sqrt(np.mean(rx ** 2))))
    # consistency with one rigid motion: shifts fitted on each side of the kept set must agree
    sides = {"top": yy < centre[0] - region.shape[0] / 4, "bottom": yy > centre[0] + region.shape[0] / 4,
             "left": xx < centre[1] - region.shape[1] / 4, "right": xx > centre[1] + region.shape[1] / 4}
    side_shifts = {}
    for name, where in sides.items():
        k = keep & where
        if k.sum() >= 12:
            side_shifts[name] = (float(np.mean(field.dy[k] - my[k])), float(np.mean(field.dx[k] - mx[k])),
                                 int(k.sum()))
    consistent = True
    noise = float(max(sig))
    names = list(side_shifts)
    for i, a in enumerate(names):
        for b in names[i + 1:]:
            sa, sb = side_shifts[a], side_shifts[b]
            se = overlap_factor * np.sqrt(1 / sa[2] + 1 / sb[2])
            z = max(abs(sa[0] - sb[0]) / (se * sig[0]), abs(sa[1] - sb[1]) / (se * sig[1]))
            if consistent and z > threshold:
                consistent = False
                diff = max(abs(sa[0] - sb[0]), abs(sa[1] - sb[1]))
                warnings.append(f"camera motion: the flow-free vectors are not consistent with one rigid "
                                f"{'shift' if model == 'shift' else 'motion'} ({a} and {b} parts of the "
                                f"{description} differ by {diff:.4f} px, {z:.0f} sigma): flow may reach that "
                                "region, or the camera rotated/zoomed (processing.camera_model = \"affine\")")
    if model == "shift" and keep.sum() >= 12:
        # a displacement gradient across the kept vectors: a flow tail reaching the region
        # (or a rotation/zoom of the camera), which the fitted shift then partly contains
        residual = dataclasses.replace(field, dy=field.dy - my, dx=field.dx - mx)
        grad = check_ambient_region(residual, keep, name=description, threshold=threshold)
        if grad.gradient_sigma > 2 * threshold:
            consistent = False
            warnings.append(f"camera motion: the displacement varies across the flow-free part of the {description} "
                            f"(gradient {grad.gradient_sigma:.0f} sigma): a weak flow tail may reach it, and the "
                            f"removed shift ({motion.shift[0]:+.4f}, {motion.shift[1]:+.4f}) px may contain flow; "
                            "if the camera did not move set processing.camera_motion = \"none\", otherwise choose "
                            "a region farther from the flow (or processing.camera_model = \"affine\" if the "
                            "camera rotated or zoomed)")
    report = CameraFitReport(region=description, candidate_vectors=n_cand, used_vectors=int(keep.sum()),
                             excluded_fraction=float(1 - keep.sum() / n_cand), residual_rms_px=rms,
                             noise_px=noise,
                             side_shifts_px={k: [v[0], v[1]] for k, v in side_shifts.items()},
                             consistent=consistent, warnings=warnings)
    return motion, report


@dataclass(frozen=True)
class RegionCheck:
    """Is a declared ambient (reference) region free of flow?

    Attributes
    ----------
    name : str
    vectors : int
        Valid vectors in the region.
    signal_fraction : float
        Fraction of them in a neighbourhood with a significant coherent signal.
    gradient_sigma : float
        Significance [sigma] of a displacement gradient across the region.
    sides_with_signal : list of str
        Parts of the region (top/bottom/left/right) that carry the signal.
    ambient : bool
        False when the region looks like it carries flow.
    """

    name: str
    vectors: int
    signal_fraction: float
    gradient_sigma: float
    sides_with_signal: list
    ambient: bool


def check_ambient_region(field: DisplacementField, region_grid: np.ndarray, *, name: str = "reference region",
                         threshold: float = 4.0, max_signal_fraction: float = 0.1) -> RegionCheck:
    """Check that a region declared ambient carries no displacement signal beyond its noise.

    The displacement (after camera-motion removal) of the region's valid
    vectors is tested for coherent signal with :func:`flow_flags` (box means
    against their noise) and for a gradient across the region (least-squares
    plane, slope significance).  Flow in a region used as the integration
    reference shifts every reconstructed value.

    Parameters
    ----------
    field : DisplacementField
    region_grid : ndarray of bool, grid shape
        Grid points of the region.
    name : str
    threshold : float
        Significance [sigma].
    max_signal_fraction : float
        Largest fraction of flagged vectors still called ambient.
    """
    region = np.asarray(region_grid, bool) & field.valid & np.isfinite(field.dy) & np.isfinite(field.dx)
    n = int(region.sum())
    if n < 3:
        return RegionCheck(name, n, float("nan"), float("nan"), [], True)
    sig = component_noise(field, region)
    flags = flow_flags(field.dy, field.dx, region, sigma=sig, sizes=(3, 7), threshold=threshold)
    frac = float(flags.sum() / n)
    yy, xx = np.meshgrid(field.rows, field.cols, indexing="ij")
    y, x = yy[region], xx[region]
    grad_z = 0.0
    if n >= 12 and (np.ptp(y) > 0 or np.ptp(x) > 0):
        cols = [np.ones(n)] + [v - v.mean() for v in (y, x) if np.ptp(v) > 0]
        design = np.column_stack(cols)
        cov = np.linalg.pinv(design.T @ design)
        for comp, s_c in ((field.dy, sig[0]), (field.dx, sig[1])):
            coef, *_ = np.linalg.lstsq(design, comp[region], rcond=None)
            for k in range(1, design.shape[1]):
                se = OVERLAP_NOISE_FACTOR * s_c * np.sqrt(cov[k, k])
                grad_z = max(grad_z, abs(coef[k]) / se)
    rows_c, cols_c = np.mean(field.rows), np.mean(field.cols)
    h, w = np.ptp(field.rows) or 1.0, np.ptp(field.cols) or 1.0
    sides = {"top": yy < rows_c - h / 4, "bottom": yy > rows_c + h / 4,
             "left": xx < cols_c - w / 4, "right": xx > cols_c + w / 4}
    with_signal = [s for s, where in sides.items()
                   if (region & where).sum() >= 3 and (flags & where).sum() > max_signal_fraction * (region & where).sum()]
    ambient = frac <= max_signal_fraction and grad_z <= 2 * threshold
    return RegionCheck(name, n, frac, float(grad_z), with_signal, bool(ambient))
