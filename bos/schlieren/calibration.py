"""Calibrated knife-edge schlieren: picture + no-flow picture -> deflection normal to the knife.

Two ways to know the response of the rig:

* a **calibration lens** in the field of view (:class:`CalibrationLens`): a
  weak lens of known focal length ``f_L`` deflects a ray crossing it at
  ``r`` from its axis by ``eps = -r / f_L`` (toward the axis for a
  converging lens, ``f_L > 0``), so the lens image carries a known ramp of
  ``eps_n = eps . k`` and the intensity across it is the response curve;
* the **optical parameters** (:class:`SchlierenOptics`): focal length
  ``f2`` of the schlieren head, height ``h`` of the source image at the
  knife and the cutoff fraction ``c`` give the contrast law
  ``I/I0 = clip(1 + f2 eps_n / a, 0, h/a)``, ``a = (1 - c) h``.

The picture is divided by the no-flow picture (same rig, same knife
setting, no flow), which removes illumination non-uniformity and
vignetting; the ratio is 1 where nothing deflects the light.

References
----------
Settles, G. S. (2001). *Schlieren and Shadowgraph Techniques*. Springer,
ch. 3 (contrast law, measuring range) and the calibration of schlieren
pictures with a weak lens of long focal length [from memory].
Hargather, M. J. & Settles, G. S. (2012). A comparison of three
quantitative schlieren techniques. *Optics and Lasers in Engineering*
50(1), 8-17 (lens-calibrated "Schardin" schlieren compared with BOS and
rainbow schlieren) [abstract read; journal details and method details
from memory].
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..errors import InputError
from ..optics import _check_length as _positive
from ..optics import object_plane_coordinates
from ._result import file_coords
from .knife import KnifeOrientation, check_cutoff, knife_orientation

__all__ = [
    "CalibrationLens",
    "SchlierenOptics",
    "ResponseFit",
    "KnifeEdgeResult",
    "calibrate_knife_edge",
    "ratio_noise",
    "knife_edge_variables",
]

#: Pixels within this many noise sigmas of a saturation level are flagged saturated.
SATURATION_SIGMAS = 2.0
#: Camera clipping: pixel values at or above this fraction of full scale are bright-saturated.
CAMERA_CLIP = 0.999
#: No-flow pixels below this fraction of the bright no-flow level carry no light (outside the field).
MIN_LIGHT = 0.05


@dataclass(frozen=True)
class CalibrationLens:
    """A weak lens of known focal length in the field of view.

    Attributes
    ----------
    center_px : (row, col)
        Centre of the lens image in the knife-edge picture [px].
    radius_px : float
        Radius of the lens image [px].
    focal_length_m : float
        Focal length f_L [m]; positive for a converging lens, negative for a
        diverging one.  Typically metres (weak lens).
    use_fraction : float
        Only pixels within ``use_fraction * radius_px`` of the centre are
        used (the rim and mount scatter light).
    sigma_focal_length_m : float
        1-sigma uncertainty of f_L [m] (propagated to the deflection).
    """

    center_px: tuple[float, float]
    radius_px: float
    focal_length_m: float
    use_fraction: float = 0.9
    sigma_focal_length_m: float = 0.0

    def __post_init__(self) -> None:
        try:
            r, c = (float(v) for v in self.center_px)
        except (TypeError, ValueError):
            raise InputError(f"lens centre must be (row, col) in pixels, got {self.center_px!r}") from None
        if not (math.isfinite(r) and math.isfinite(c)):
            raise InputError(f"lens centre must be finite, got {self.center_px!r}")
        _positive("lens radius (px)", self.radius_px)
        f = float(self.focal_length_m)
        if not math.isfinite(f) or f == 0.0:
            raise InputError(f"lens focal length must be finite and non-zero, got {self.focal_length_m!r}")
        if not (0.1 <= float(self.use_fraction) <= 1.0):
            raise InputError(f"lens use fraction must be in [0.1, 1], got {self.use_fraction!r}")
        if not (float(self.sigma_focal_length_m) >= 0.0):
            raise InputError(f"lens focal-length uncertainty must be >= 0, got {self.sigma_focal_length_m!r}")


@dataclass(frozen=True)
class SchlierenOptics:
    """Optical parameters of a two-mirror (or two-lens) knife-edge rig.

    Attributes
    ----------
    focal_length_m : float
        Focal length f2 of the second (schlieren-head) mirror or lens [m].
    source_image_height_m : float
        Full height h of the light-source image at the knife, measured
        normal to the edge [m].
    cutoff : float
        Fraction of the source image blocked with no flow (0.5 = half); the
        unobstructed height is ``a = (1 - cutoff) * h``.
    """

    focal_length_m: float
    source_image_height_m: float
    cutoff: float = 0.5

    def __post_init__(self) -> None:
        _positive("schlieren focal length (m)", self.focal_length_m)
        _positive("source image height (m)", self.source_image_height_m)
        check_cutoff(self.cutoff)

    @property
    def unobstructed_height_m(self) -> float:
        return (1.0 - self.cutoff) * self.source_image_height_m


@dataclass
class ResponseFit:
    """Intensity-ratio response of the rig: ``R = clip(1 + s * eps_n, dark, bright)``.

    Attributes
    ----------
    method : str
        ``"lens"`` or ``"optics"``.
    law : str
        ``"linear"`` or ``"clipped"`` (linear with dark/bright plateaus).
    sensitivity_per_rad : float
        ``s = dR/d eps_n`` [1/rad] (``f2 / a`` for the contrast law).
    sigma_sensitivity_per_rad : float
        1-sigma uncertainty of ``s`` from the fit (0 for ``optics``).
    dark_level, bright_level : float
        Ratio of the dark and bright plateaus (``-inf``/``inf`` when not
        seen; the dark limit 0 of a fully blocked source is always checked).
    lens_transmission : float
        Ratio at the lens centre (glass losses, exposure change); the lens
        data are divided by it (1 for ``optics``).
    residual_rms : float
        Rms residual of the fit per lens pixel, in ratio units (NaN for optics).
    residual_rms_rad : float
        The same expressed as deflection, ``residual_rms / |s|`` [rad].
    calibrated_range_rad : (float, float)
        Deflections that the response covers unsaturated and (lens) that the
        lens data span [rad].
    n_pixels : int
        Lens pixels used.
    eps_bins, ratio_bins, count_bins : ndarray
        Binned lens data (for plots), empty for optics.
    """

    method: str
    law: str
    sensitivity_per_rad: float
    sigma_sensitivity_per_rad: float
    dark_level: float
    bright_level: float
    lens_transmission: float
    residual_rms: float
    residual_rms_rad: float
    calibrated_range_rad: tuple[float, float]
    n_pixels: int = 0
    eps_bins: np.ndarray = field(default_factory=lambda: np.empty(0))
    ratio_bins: np.ndarray = field(default_factory=lambda: np.empty(0))
    count_bins: np.ndarray = field(default_factory=lambda: np.empty(0))

    def ratio(self, eps_n) -> np.ndarray:
        """Model ratio R(eps_n) outside the lens."""
        r = 1.0 + self.sensitivity_per_rad * np.asarray(eps_n, float)
        return np.clip(r, max(self.dark_level, 0.0), self.bright_level)

    def saturation_deflections(self) -> tuple[float | None, float | None]:
        """Deflections [rad] at which the picture reaches the dark and the bright level (None if never)."""
        s = self.sensitivity_per_rad
        dark = (max(self.dark_level, 0.0) - 1.0) / s
        bright = (self.bright_level - 1.0) / s if math.isfinite(self.bright_level) else None
        return float(dark), (None if bright is None else float(bright))

    def as_attrs(self) -> dict[str, Any]:
        lo, hi = self.calibrated_range_rad
        dark_eps, bright_eps = self.saturation_deflections()
        out = {
            "method": self.method, "law": self.law,
            "sensitivity_per_rad": self.sensitivity_per_rad,
            "sigma_sensitivity_per_rad": self.sigma_sensitivity_per_rad,
            "dark_level": self.dark_level if math.isfinite(self.dark_level) else None,
            "bright_level": self.bright_level if math.isfinite(self.bright_level) else None,
            "lens_transmission": self.lens_transmission,
            "residual_rms": self.residual_rms, "residual_rms_rad": self.residual_rms_rad,
            "calibrated_range_rad": [lo, hi], "n_pixels": int(self.n_pixels),
            "dark_saturation_rad": dark_eps, "bright_saturation_rad": bright_eps,
        }
        return {k: v for k, v in out.items() if v is not None}


@dataclass
class KnifeEdgeResult:
    """A calibrated knife-edge picture.

    Attributes
    ----------
    deflection_normal : ndarray
        eps . k [rad] on the picture grid; NaN where saturated or without light.
    deflection_normal_uncertainty : ndarray
        1-sigma [rad] (noise of the ratio, fit and lens focal length).
    intensity_ratio : ndarray
        Picture / no-flow picture (NaN without light).
    saturated : ndarray of bool
        Dark or bright saturation (optical plateau or camera clipping).
    saturation : ndarray of int8
        -1 dark, +1 bright, 0 none.
    lens : ndarray of bool
        Pixels of the calibration lens image (within its radius).
    uncalibrated : ndarray of bool
        Unsaturated pixels whose deflection lies outside the calibrated range
        (extrapolated; kept but flagged).
    invalid : ndarray of bool
        No light in the no-flow picture (outside the schlieren field).
    y_m, x_m : ndarray
        Object-plane coordinates of rows and columns [m] (y down).
    orientation : KnifeOrientation
    fit : ResponseFit
    object_pixel_m : float
    noise_ratio : float
        Per-pixel 1-sigma noise of the ratio picture.
    exposure_ratio : float
        Median ratio around the lens (lens mode), 1 when both pictures had
        the same exposure and no flow reaches there; NaN for optics.
    warnings : list of str
    """

    deflection_normal: np.ndarray
    deflection_normal_uncertainty: np.ndarray
    intensity_ratio: np.ndarray
    saturated: np.ndarray
    saturation: np.ndarray
    lens: np.ndarray
    uncalibrated: np.ndarray
    invalid: np.ndarray
    y_m: np.ndarray
    x_m: np.ndarray
    orientation: KnifeOrientation
    fit: ResponseFit
    object_pixel_m: float
    noise_ratio: float
    exposure_ratio: float
    lens_spec: CalibrationLens | None = None
    optics_spec: SchlierenOptics | None = None
    warnings: list[str] = field(default_factory=list)

    def summary(self) -> dict[str, Any]:
        """Headline numbers (JSON-ready)."""
        lit = ~self.invalid
        n_lit = max(int(lit.sum()), 1)
        good = np.isfinite(self.deflection_normal) & ~self.lens & ~self.uncalibrated
        eps = self.deflection_normal[good]
        sig = self.deflection_normal_uncertainty[good]
        lo, hi = self.fit.calibrated_range_rad
        return {
            "method": self.fit.method,
            "law": self.fit.law,
            "knife_angle_deg": self.orientation.angle_deg,
            "knife_normal": list(self.orientation.normal),
            "sensitivity_per_rad": self.fit.sensitivity_per_rad,
            "sigma_sensitivity_per_rad": self.fit.sigma_sensitivity_per_rad,
            "lens_transmission": self.fit.lens_transmission,
            "fit_residual_rms": self.fit.residual_rms,
            "fit_residual_rms_rad": self.fit.residual_rms_rad,
            "calibrated_range_rad": [lo, hi],
            "dark_saturation_rad": self.fit.saturation_deflections()[0],
            "bright_saturation_rad": self.fit.saturation_deflections()[1],
            "dark_level": self.fit.dark_level if math.isfinite(self.fit.dark_level) else None,
            "bright_level": self.fit.bright_level if math.isfinite(self.fit.bright_level) else None,
            "noise_ratio": self.noise_ratio,
            "exposure_ratio": self.exposure_ratio,
            "dark_saturated_fraction": float(((self.saturation < 0) & lit).sum() / n_lit),
            "bright_saturated_fraction": float(((self.saturation > 0) & lit).sum() / n_lit),
            "uncalibrated_fraction": float((self.uncalibrated & lit).sum() / n_lit),
            "no_light_fraction": float(self.invalid.mean()),
            "min_deflection_rad": float(eps.min()) if eps.size else None,
            "max_deflection_rad": float(eps.max()) if eps.size else None,
            "median_uncertainty_rad": float(np.median(sig)) if sig.size else None,
            "warnings": list(self.warnings),
        }

    def calibration_attrs(self) -> dict[str, Any]:
        """The calibration as (nested) file attributes."""
        cal: dict[str, Any] = {
            "knife_angle_deg": self.orientation.angle_deg,
            "knife_normal_yx": list(self.orientation.normal),
            "object_pixel_m": self.object_pixel_m,
            "noise_ratio": self.noise_ratio,
            "saturation_sigmas": SATURATION_SIGMAS,
            **self.fit.as_attrs(),
        }
        if math.isfinite(self.exposure_ratio):
            cal["exposure_ratio"] = self.exposure_ratio
        if self.lens_spec is not None:
            ls = self.lens_spec
            cal["lens"] = {"center_px": [float(ls.center_px[0]), float(ls.center_px[1])],
                           "radius_px": float(ls.radius_px), "focal_length_m": float(ls.focal_length_m),
                           "sigma_focal_length_m": float(ls.sigma_focal_length_m),
                           "use_fraction": float(ls.use_fraction)}
        if self.optics_spec is not None:
            op = self.optics_spec
            cal["optics"] = {"focal_length_m": op.focal_length_m,
                             "source_image_height_m": op.source_image_height_m, "cutoff": op.cutoff}
        return cal


# --------------------------------------------------------------------------- helpers


def ratio_noise(ratio: np.ndarray, valid: np.ndarray) -> float:
    """Robust per-pixel 1-sigma noise of a smooth picture.

    From the median absolute deviation of differences between horizontal
    neighbours (``sigma = 1.4826 MAD / sqrt(2)``), which smooth flow
    structure hardly affects.

    References
    ----------
    Rousseeuw, P. J. & Croux, C. (1993). Alternatives to the median absolute
    deviation. *J. Am. Stat. Assoc.* 88, 1273-1283 (MAD consistency factor
    1.4826 for Gaussian data) [from memory].
    """
    r = np.asarray(ratio, float)
    ok = valid[:, 1:] & valid[:, :-1]
    d = (r[:, 1:] - r[:, :-1])[ok]
    d = d[np.isfinite(d)]
    if d.size < 10:
        return float("nan")
    return float(1.4826 * np.median(np.abs(d - np.median(d))) / math.sqrt(2.0))


def _quadratic_surface(rows, cols, values, at_rows, at_cols) -> np.ndarray:
    """Least-squares quadratic surface through (rows, cols, values), evaluated at (at_rows, at_cols)."""
    r0, c0 = float(np.mean(rows)), float(np.mean(cols))
    scale = max(float(np.ptp(rows)), float(np.ptp(cols)), 1.0)

    def design(r, c):
        u, v = (np.asarray(r, float) - r0) / scale, (np.asarray(c, float) - c0) / scale
        return np.column_stack([np.ones_like(u), u, v, u * u, u * v, v * v])

    coef, *_ = np.linalg.lstsq(design(rows, cols), values, rcond=None)
    return design(at_rows, at_cols) @ coef


def _bin_lens_data(eps, ratio, *, n_bins: int, min_count: int = 5):
    edges = np.linspace(eps.min(), eps.max(), n_bins + 1)
    idx = np.clip(np.digitize(eps, edges) - 1, 0, n_bins - 1)
    e_out, r_out, n_out = [], [], []
    for i in range(n_bins):
        sel = idx == i
        n = int(sel.sum())
        if n >= min_count:
            e_out.append(float(eps[sel].mean()))
            r_out.append(float(np.median(ratio[sel])))
            n_out.append(n)
    return np.array(e_out), np.array(r_out), np.array(n_out, float)


def _clipped(p, eps):
    a, b, lo, hi = p
    return np.clip(a + b * eps, lo, hi)


def _fit_clipped(e, r, w):
    """Clipped-linear fit: search the two knees over bin gaps, then refine.

    Returns (params (A, B, L, H), chi2, n_dark_plateau, n_bright_plateau).
    """
    from scipy.optimize import least_squares

    order = np.argsort(r)  # plateaus are defined by level, independent of the slope sign
    n = e.size
    best = None
    # candidate plateaus: the k lowest-ratio bins (dark) and the m highest-ratio bins (bright)
    for k in range(0, n - 3):
        for m in range(0, n - 3 - k):
            lin = order[k:n - m]
            if lin.size < 3:
                continue
            ww = w[lin]
            B, A = np.polyfit(e[lin], r[lin], 1, w=ww)
            lo = float(np.average(r[order[:k]], weights=w[order[:k]])) if k else -np.inf
            hi = float(np.average(r[order[n - m:]], weights=w[order[n - m:]])) if m else np.inf
            if lo >= hi:
                continue
            chi2 = float(np.sum((w * (_clipped((A, B, lo, hi), e) - r)) ** 2))
            if best is None or chi2 < best[1]:
                best = ((A, B, lo, hi), chi2, k, m)
    if best is None:
        return None
    (A, B, lo, hi), _, k, m = best
    free_lo, free_hi = math.isfinite(lo), math.isfinite(hi)

    def unpack(q):
        it = iter(q)
        a, b = next(it), next(it)
        return a, b, (next(it) if free_lo else -np.inf), (next(it) if free_hi else np.inf)

    x0 = [A, B] + ([lo] if free_lo else []) + ([hi] if free_hi else [])
    sol = least_squares(lambda q: w * (_clipped(unpack(q), e) - r), x0, method="lm" if len(x0) <= e.size else "trf")
    p = unpack(sol.x)
    chi2 = float(np.sum((w * (_clipped(p, e) - r)) ** 2))
    if chi2 > best[1]:  # the refinement wandered off: keep the knee-search solution
        p, chi2 = (A, B, lo, hi), best[1]
    line = p[0] + p[1] * e
    n_dark = int(np.sum(line < p[2]))
    n_bright = int(np.sum(line > p[3]))
    return p, chi2, n_dark, n_bright


def _slope_sigma(e, r, w, p) -> float:
    """1-sigma of the slope from the bins on the linear part (weighted least squares)."""
    a, b, lo, hi = p
    line = a + b * e
    sel = (line >= lo) & (line <= hi)
    if sel.sum() < 3:
        return float("nan")
    X = np.column_stack([np.ones(sel.sum()), e[sel]]) * w[sel, None]
    res = (r[sel] - line[sel]) * w[sel]
    dof = max(int(sel.sum()) - 2, 1)
    cov = np.linalg.pinv(X.T @ X) * float(res @ res) / dof
    return float(math.sqrt(max(cov[1, 1], 0.0)))


def _fit_lens(eps, ratio, *, sigma_ratio: float, law: str) -> tuple[ResponseFit, list[str]]:
    warnings: list[str] = []
    n_bins = int(np.clip(eps.size // 25, 8, 60))
    e, r, cnt = _bin_lens_data(eps, ratio, n_bins=n_bins)
    if e.size < 5:
        raise InputError(f"calibration lens gives too few usable pixels ({eps.size}); check its centre and radius")
    # weights ~ 1/sigma of a bin median (1.2533 sigma / sqrt(n) for Gaussian noise)
    sig_bin = 1.2533 * max(sigma_ratio, 1e-6) / np.sqrt(cnt)
    w = 1.0 / sig_bin
    B, A = np.polyfit(e, r, 1, w=w)
    lin_p = (A, B, -np.inf, np.inf)
    chi2_lin = float(np.sum((w * (A + B * e - r)) ** 2))
    clip = _fit_clipped(e, r, w) if law in ("auto", "clipped") else None
    use_clip = False
    if clip is not None:
        p, chi2_c, n_dark, n_bright = clip
        shows = (n_dark >= 2 or n_bright >= 2) and (chi2_lin - chi2_c) > 25.0 and chi2_c < 0.5 * chi2_lin
        use_clip = law == "clipped" or shows
    if use_clip:
        p = clip[0]
    else:
        p = lin_p
    a, b, lo, hi = p
    line = a + b * e
    n_linear = int(np.sum((line >= lo) & (line <= hi)))
    sb = _slope_sigma(e, r, w, p)
    lin_e = e[(line >= lo) & (line <= hi)]
    span = abs(b) * float(np.ptp(lin_e)) if lin_e.size else 0.0  # ratio change across the linear part
    if n_linear < 3 or not math.isfinite(sb) or abs(b) < 5.0 * sb or a <= 0 or span < max(10.0 * sigma_ratio, 0.05):
        raise InputError("calibration lens response is saturated or flat everywhere (no usable linear part): "
                         "move the knife, lower the cutoff or use a lens of longer focal length")
    # residual per lens pixel
    model = _clipped(p, eps)
    resid = float(np.sqrt(np.mean((ratio - model) ** 2)))
    T = float(a)
    s = float(b / a)
    # sigma of s = B/A: A is tightly determined at eps = 0, keep the slope term
    sigma_s = float(abs(sb / a))
    dark = float(lo / T) if math.isfinite(lo) else -np.inf
    bright = float(hi / T) if math.isfinite(hi) else np.inf
    # calibrated range: lens coverage intersected with the linear part (minus the flagging margin)
    margin = SATURATION_SIGMAS * sigma_ratio / abs(s)
    lo_eps, hi_eps = float(eps.min()), float(eps.max())
    for level in (dark, bright):
        if math.isfinite(level):
            knee = (level - 1.0) / s
            if knee < 0:
                lo_eps = max(lo_eps, knee + margin)
            else:
                hi_eps = min(hi_eps, knee - margin)
    if abs(T - 1.0) > 0.15:
        warnings.append(f"ratio at the lens centre is {T:.3f} (expected about 1): lens losses or an exposure change "
                        "between the two pictures; the lens data were normalised by it")
    fit = ResponseFit(method="lens", law="clipped" if use_clip else "linear", sensitivity_per_rad=s,
                      sigma_sensitivity_per_rad=sigma_s, dark_level=dark, bright_level=bright,
                      lens_transmission=T, residual_rms=resid, residual_rms_rad=resid / abs(b),
                      calibrated_range_rad=(lo_eps, hi_eps), n_pixels=int(eps.size),
                      eps_bins=e, ratio_bins=r / T, count_bins=cnt)
    return fit, warnings


# --------------------------------------------------------------------------- main entry


def calibrate_knife_edge(image, no_flow, *, knife, object_pixel_m: float, lens: CalibrationLens | None = None,
                         optics: SchlierenOptics | None = None, law: str = "auto",
                         full_scale: float | None = 1.0) -> KnifeEdgeResult:
    """Convert a knife-edge picture to the deflection component normal to the knife.

    Parameters
    ----------
    image, no_flow : ndarray
        The picture with flow and the no-flow picture (same rig and knife
        setting), 2-D, linear in light (or at least the same response).
    knife : str or float or KnifeOrientation
        ``"vertical"``, ``"horizontal"`` or the edge angle [deg] (see
        :mod:`bos.schlieren.knife`).
    object_pixel_m : float
        Size of one picture pixel in the object plane [m].
    lens : CalibrationLens, optional
        Calibration lens in the field (exactly one of ``lens``/``optics``).
    optics : SchlierenOptics, optional
        Optical parameters instead of a lens.
    law : {"auto", "linear", "clipped"}
        Response law fitted to the lens data; ``"auto"`` adopts the clipped
        law where the lens data show plateaus.
    full_scale : float or None
        Pixel value of camera saturation (1.0 for integer pictures read by
        :func:`bos.images.read_image`); None to skip the camera-clipping check.

    Returns
    -------
    KnifeEdgeResult

    Raises
    ------
    InputError
        Pictures of different sizes, knife orientation missing, lens centre
        outside the picture, lens response saturated everywhere, neither or
        both of ``lens``/``optics``.

    References
    ----------
    Settles (2001), *Schlieren and Shadowgraph Techniques*, ch. 3 [from memory];
    Hargather & Settles (2012), Opt. Lasers Eng. 50, 8-17.
    """
    orient: KnifeOrientation = knife_orientation(knife)
    img = np.asarray(image, float)
    ref = np.asarray(no_flow, float)
    if img.ndim != 2 or ref.ndim != 2:
        raise InputError(f"pictures must be 2-D, got shapes {img.shape} and {ref.shape}")
    if img.shape != ref.shape:
        raise InputError(f"pictures of different sizes: picture {img.shape[0]}x{img.shape[1]}, "
                         f"no-flow {ref.shape[0]}x{ref.shape[1]} (rows x cols)")
    if (lens is None) == (optics is None):
        raise InputError("give either a calibration lens (centre, radius, focal length) or the optical parameters "
                         "(schlieren focal length, source image height), not both or neither")
    if law not in ("auto", "linear", "clipped"):
        raise InputError(f"unknown response law {law!r}; use auto, linear or clipped")
    p = _positive("object pixel size", object_pixel_m)
    if not (np.all(np.isfinite(img)) and np.all(np.isfinite(ref))):
        raise InputError("pictures contain non-finite pixels")
    rows, cols = img.shape
    warnings: list[str] = []

    bright_ref = float(np.percentile(ref, 99.0))
    if not bright_ref > 0:
        raise InputError("the no-flow picture is black")
    invalid = ref < MIN_LIGHT * bright_ref
    ratio = np.where(invalid, np.nan, img / np.where(invalid, 1.0, ref))
    cam_bright = np.zeros_like(invalid)
    cam_dark = np.zeros_like(invalid)
    if full_scale is not None:
        cam_bright = img >= CAMERA_CLIP * float(full_scale)
        cam_dark = img <= (1.0 - CAMERA_CLIP) * float(full_scale)
        if (ref >= CAMERA_CLIP * float(full_scale)).mean() > 0.01:
            warnings.append("the no-flow picture is clipped (over-exposed) on more than 1 % of its pixels")

    lens_mask = np.zeros((rows, cols), bool)
    exposure = float("nan")
    if lens is not None:
        r0, c0 = (float(v) for v in lens.center_px)
        R = float(lens.radius_px)
        if not (0.0 <= r0 <= rows - 1 and 0.0 <= c0 <= cols - 1):
            raise InputError(f"lens centre ({r0:g}, {c0:g}) px is outside the picture ({rows}x{cols} px)")
        # work in the window around the lens only (large pictures)
        win = (slice(max(0, int(r0 - 1.7 * R)), min(rows, int(r0 + 1.7 * R) + 2)),
               slice(max(0, int(c0 - 1.7 * R)), min(cols, int(c0 + 1.7 * R) + 2)))
        rr, cc = np.mgrid[win]
        rho = np.hypot(rr - r0, cc - c0)
        lens_mask[win] = rho <= R
        w_invalid, w_clip = invalid[win], cam_bright[win] | cam_dark[win]
        annulus = (rho >= 1.15 * R) & (rho <= 1.6 * R) & ~w_invalid
        if annulus.sum() < 30:
            raise InputError("too few lit pixels around the lens to measure the illumination there; "
                             "check the lens centre and radius")
        use = (rho <= lens.use_fraction * R) & ~w_invalid & ~w_clip
        if use.sum() < 50:
            raise InputError(f"the calibration lens has only {int(use.sum())} usable pixels (lit, not clipped, inside "
                             f"{lens.use_fraction:g} of its radius); the lens response is saturated everywhere "
                             "or the lens lies outside the picture")
        illum = _quadratic_surface(rr[annulus], cc[annulus], ref[win][annulus], rr[use], cc[use])
        if np.any(illum <= 0):
            raise InputError("cannot estimate the illumination under the lens from its surroundings")
        lens_ratio = img[win][use] / illum
        exposure = float(np.median(ratio[win][annulus]))
        noise = ratio_noise(ratio, ~invalid & ~lens_mask & ~cam_bright & ~cam_dark)
        if not math.isfinite(noise):
            noise = float(np.std(lens_ratio))
        # eps = -r / f_L (converging lens bends rays toward its axis), projected on the knife normal
        ky, kx = orient.normal
        eps_lens = -((rr[use] - r0) * ky + (cc[use] - c0) * kx) * p / float(lens.focal_length_m)
        fit, w = _fit_lens(eps_lens, lens_ratio, sigma_ratio=noise, law=law)
        warnings += w
        if abs(exposure - 1.0) > max(0.03, 3 * noise):
            warnings.append(f"median picture/no-flow ratio around the lens is {exposure:.3f}: the exposure changed "
                            "between the pictures or flow reaches the lens; deflections are biased by "
                            f"about {(exposure - 1.0) / fit.sensitivity_per_rad:.3g} rad")
        rel_f = abs(float(lens.sigma_focal_length_m) / float(lens.focal_length_m))
    else:
        op = optics
        s = op.focal_length_m / op.unobstructed_height_m
        bright = 1.0 / (1.0 - op.cutoff)
        noise = ratio_noise(ratio, ~invalid & ~cam_bright & ~cam_dark)
        noise = noise if math.isfinite(noise) else 0.0
        margin = SATURATION_SIGMAS * noise / s
        fit = ResponseFit(method="optics", law="clipped", sensitivity_per_rad=s, sigma_sensitivity_per_rad=0.0,
                          dark_level=0.0, bright_level=bright, lens_transmission=1.0, residual_rms=float("nan"),
                          residual_rms_rad=float("nan"),
                          calibrated_range_rad=(-1.0 / s + margin, (bright - 1.0) / s - margin))
        rel_f = 0.0

    s = fit.sensitivity_per_rad
    # per-pixel ratio on the field's scale (the lens pixels divided by the lens transmission)
    field_ratio = ratio.copy()
    if lens is not None:
        field_ratio[lens_mask] = ratio[lens_mask] / fit.lens_transmission
    dark_level = max(fit.dark_level, 0.0)
    tol = SATURATION_SIGMAS * noise
    dark = (field_ratio <= dark_level + tol) | cam_dark
    bright = (field_ratio >= fit.bright_level - tol) | cam_bright
    dark &= ~invalid
    bright &= ~invalid & ~dark
    saturated = dark | bright
    eps = (field_ratio - 1.0) / s
    eps[saturated | invalid] = np.nan
    lo, hi = fit.calibrated_range_rad
    with np.errstate(invalid="ignore"):
        uncal = np.isfinite(eps) & ((eps < lo) | (eps > hi))
    rel_s = fit.sigma_sensitivity_per_rad / abs(s)
    sigma = np.sqrt((noise / abs(s)) ** 2 + (eps * rel_s) ** 2 + (eps * rel_f) ** 2)
    sigma[~np.isfinite(eps)] = np.nan
    saturation = np.where(dark, -1, np.where(bright, 1, 0)).astype(np.int8)
    y_m, x_m = object_plane_coordinates(np.arange(rows), np.arange(cols), shape=(rows, cols), object_pixel_m=p)
    frac_sat = float(saturated[~invalid].mean()) if (~invalid).any() else 0.0
    if frac_sat > 0.2:
        warnings.append(f"{100 * frac_sat:.0f} % of the lit picture is saturated: reduce the sensitivity "
                        "(smaller cutoff, larger source image) to measure these deflections")
    return KnifeEdgeResult(
        deflection_normal=eps, deflection_normal_uncertainty=sigma, intensity_ratio=ratio,
        saturated=saturated, saturation=saturation, lens=lens_mask, uncalibrated=uncal, invalid=invalid,
        y_m=np.asarray(y_m, float), x_m=np.asarray(x_m, float), orientation=orient, fit=fit, object_pixel_m=p,
        noise_ratio=float(noise), exposure_ratio=exposure, lens_spec=lens, optics_spec=optics, warnings=warnings)


def knife_edge_variables(res: KnifeEdgeResult) -> tuple[dict[str, Any], dict[str, Any], dict[str, Any]]:
    """Coordinates, variables and attributes of a knife-edge result file (for :func:`bos.store.write_result`).

    Same layout as a BOS result: ``y``/``x`` in object-plane metres (oriented
    like BOS result files) with ``row_px``/``col_px`` auxiliary coordinates, ``deflection_normal`` [rad],
    flags ``saturated``, ``lens``, ``uncalibrated``, ``invalid``, and the
    calibration under the ``calibration`` attribute group.
    """
    rows, cols = res.deflection_normal.shape
    coords = file_coords(res.y_m, res.x_m, np.arange(rows), np.arange(cols), what="knife-edge picture")

    def var(data, units, long_name, **extra):
        return {"dims": ("y", "x"), "data": np.asarray(data), "attrs": {"units": units, "long_name": long_name, **extra}}

    ky, kx = res.orientation.normal
    variables = {
        "deflection_normal": var(res.deflection_normal, "rad",
                                 "light-ray deflection component normal to the knife edge (toward higher index)",
                                 knife_angle_deg=res.orientation.angle_deg,
                                 knife_normal_yx=np.array([ky, kx]),
                                 comment="knife normal k = (k_y, k_x) in image orientation (y down); knife angle: "
                                         "edge line from the horizontal, counter-clockwise on the screen"),
        "deflection_normal_uncertainty": var(res.deflection_normal_uncertainty, "rad",
                                             "1-sigma uncertainty of deflection_normal"),
        "intensity_ratio": var(res.intensity_ratio, "1", "knife-edge picture divided by the no-flow picture"),
        "saturated": var(res.saturated.astype(bool), "1", "1 = dark or bright saturated (deflection unknown)",
                         flag_meanings="measured saturated"),
        "saturation": var(res.saturation, "1", "saturation side: -1 dark, 0 none, +1 bright",
                          flag_values=np.array([-1, 0, 1], np.int8), flag_meanings="dark none bright"),
        "lens": var(res.lens.astype(bool), "1", "1 = calibration-lens image", flag_meanings="field lens"),
        "uncalibrated": var(res.uncalibrated.astype(bool), "1",
                            "1 = outside the calibrated deflection range (extrapolated)",
                            flag_meanings="calibrated extrapolated"),
        "invalid": var(res.invalid.astype(bool), "1", "1 = no light in the no-flow picture",
                       flag_meanings="lit unlit"),
    }
    from .. import __version__

    method = "calibration lens" if res.lens_spec is not None else "schlieren optics (f2, source image height)"
    attrs = {"title": "calibrated knife-edge schlieren picture",
             "source": f"knife-edge schlieren picture calibrated with bos-toolkit {__version__} "
                       f"(bos knife-edge; {method}; {res.fit.law} response law)",
             "references": "\n".join(KNIFE_EDGE_REFERENCES),
             "coordinate_note": coords["y"]["attrs"]["description"],
             "calibration": res.calibration_attrs(), "summary": res.summary()}
    return coords, variables, attrs


#: Published methods behind a knife-edge result file (CF global attribute ``references``, one per line).
KNIFE_EDGE_REFERENCES = (
    "Settles, G. S. (2001). Schlieren and Shadowgraph Techniques. Springer, ch. 3 (knife-edge contrast law, "
    "measuring range, calibration with a weak lens).",
    "Hargather, M. J. and Settles, G. S. (2012). A comparison of three quantitative schlieren techniques. "
    "Optics and Lasers in Engineering 50, 8-17.",
)
