"""Synthetic forward model: random-dot backgrounds, exact rendering, known fields.

The model has three layers:

1. **Background** (:func:`random_dots`): an analytic list of Gaussian dots
   (centres in sensor pixels, per-dot amplitude, one e^-2 diameter) on a
   uniform base level.  Nothing is pre-rendered.
2. **Rendering** (:func:`render`): every pixel integrates the background
   over its own area, evaluated *analytically* (erf form of the integrated
   Gaussian) at the displaced sample position ``p - d(p)``, so features move
   by ``+d`` (docs/architecture.md).  No interpolation of a pre-rendered
   image is involved, so the imposed displacement is the exact truth.
   Camera effects: Gaussian defocus blur (folded analytically into the dot
   profile), global camera shift, photon shot noise, read noise, saturation
   and quantisation to the bit depth.
3. **Known fields**: deflection fields (radians) of analytic refractive-index
   objects and of gridded (e.g. CFD) fields, and the conversion to sensor
   displacement through a :class:`bos.optics.Rig`.

Conventions (binding, docs/architecture.md): arrays are (row, col) = (y, x),
y points down in the image and in the object plane, field pairs are ordered
(y-component, x-component), deflection points toward higher refractive
index and ``d_px = -(M Z_D / pixel_pitch) * eps``.

Image units: :func:`render` returns float64 images in *counts* of the chosen
bit depth (full scale ``2**bit_depth - 1``); with ``quantize=True`` (default)
the values are integers stored as float.

Performance (measured on one core of the 2-core development machine, numpy
2.4 / scipy 1.17; see docs/synthetic.md for the table): the work scales with
the number of dots times the patch area evaluated per dot.  Rendering splats
each dot into a small pixel patch ("scatter"), which for the usual dot
densities is ~10x less work than gathering nearby dots for every pixel.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np
from scipy import special

from .errors import InputError

__all__ = [
    "DotBackground",
    "SyntheticPair",
    "random_dots",
    "render",
    "render_pair",
    "evaluate_displacement",
]

# Relative truncation of the Gaussian dot: contributions below
# exp(-TRUNC_SIGMAS**2 / 2) ~ 8e-7 of the dot amplitude are dropped.
TRUNC_SIGMAS = 5.3
# Dots processed per vectorised chunk (bounds the temporary memory:
# chunk * patch_area * ~6 float64 arrays).
_CHUNK_ELEMENTS = 4_000_000


# ---------------------------------------------------------------------------
# Background
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class DotBackground:
    """Analytic random-dot background.

    Intensities are fractions of the camera full scale (1.0 = saturation).
    The background intensity at a point q (pixels) is
    ``base + sum_k amplitude_k * exp(-8 |q - c_k|^2 / dot_diameter_px^2)``.

    Attributes
    ----------
    centres_y, centres_x : ndarray
        Dot centres in sensor pixels of the reference image (row, col);
        the centre of pixel (i, j) is at (i, j).
    amplitude : ndarray
        Peak intensity of each dot (fraction of full scale).
    dot_diameter_px : float
        e^-2 intensity diameter of every dot (pixels); sigma = diameter / 4.
    base : float
        Uniform background level (fraction of full scale).
    shape : tuple of int
        Image shape the background was made for.
    margin_px : float
        Extra dot-field border beyond the image on every side (pixels); the
        rendered sample positions p - d(p) must stay within it.
    """

    centres_y: np.ndarray
    centres_x: np.ndarray
    amplitude: np.ndarray
    dot_diameter_px: float
    base: float
    shape: tuple[int, int]
    margin_px: float
    density: float = field(default=0.0)
    seed: int | None = field(default=None)

    @property
    def n_dots(self) -> int:
        """Number of dots in the field (including the margin)."""
        return int(self.centres_x.size)

    @property
    def sigma_px(self) -> float:
        """Gaussian standard deviation of a dot (pixels)."""
        return self.dot_diameter_px / 4.0


def _check_shape(shape: Any, name: str = "shape") -> tuple[int, int]:
    try:
        rows, cols = (int(v) for v in shape)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be two integers (rows, cols), got {shape!r}") from None
    if rows < 1 or cols < 1:
        raise InputError(f"{name} must be positive, got {(rows, cols)}")
    return rows, cols


def _check_finite_positive(value: float, name: str, *, allow_zero: bool = False) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be a number, got {value!r}") from None
    if not math.isfinite(v) or v < 0 or (v == 0 and not allow_zero):
        raise InputError(f"{name} must be {'non-negative' if allow_zero else 'positive'} and finite, got {value!r}")
    return v


def random_dots(
    *,
    shape: tuple[int, int],
    dot_diameter_px: float = 2.5,
    density: float = 0.5,
    contrast: float = 1.0,
    seed: int | None = 0,
    margin_px: float | None = None,
    base: float = 0.05,
) -> DotBackground:
    """Make an analytic random-dot background.

    Dot centres are uniformly (Poisson-process) distributed over the image
    plus a margin; amplitudes are uniform in ``contrast * [0.45, 0.75]`` of
    full scale on a base level ``base``, so overlapping dots rarely saturate.

    Parameters
    ----------
    shape : (rows, cols)
        Image size in pixels.
    dot_diameter_px : float
        e^-2 diameter of the dot images in pixels (2-3 px avoids peak
        locking; references.md section 3 [M]).
    density : float
        Fraction of the area covered by dot discs of the e^-2 diameter
        (counted without overlap), in (0, 5]: the number of dots per px^2 is
        ``density / (pi * dot_diameter_px**2 / 4)``.  0.5 with 2.5 px dots
        gives 0.10 dots/px^2, i.e. ~26 dots in a 16x16 px window.
    contrast : float
        Scale of the dot amplitudes, in (0, 1.5].
    seed : int or None
        Random seed (None: fresh entropy).
    margin_px : float, optional
        Width of the dot field outside the image on every side (pixels).
        Default ``16 + 2 * dot_diameter_px``; displacements (plus camera
        shift) larger than about ``margin_px - 2 * dot_diameter_px`` are
        refused by :func:`render`.
    base : float
        Background level between dots (fraction of full scale), in [0, 1).

    Returns
    -------
    DotBackground
    """
    rows, cols = _check_shape(shape)
    diameter = _check_finite_positive(dot_diameter_px, "dot_diameter_px")
    if diameter < 0.3 or diameter > 64:
        raise InputError(f"dot_diameter_px must be within [0.3, 64] px, got {dot_diameter_px}")
    dens = _check_finite_positive(density, "density")
    if dens > 5:
        raise InputError(f"density (area fraction covered by dots) must be <= 5, got {density}")
    con = _check_finite_positive(contrast, "contrast")
    if con > 1.5:
        raise InputError(f"contrast must be <= 1.5, got {contrast}")
    base = float(base)
    if not (0.0 <= base < 1.0):
        raise InputError(f"base level must be within [0, 1), got {base}")
    margin = 16.0 + 2.0 * diameter if margin_px is None else _check_finite_positive(margin_px, "margin_px", allow_zero=True)

    rng = np.random.default_rng(seed)
    y0, y1 = -0.5 - margin, rows - 0.5 + margin
    x0, x1 = -0.5 - margin, cols - 0.5 + margin
    area = (y1 - y0) * (x1 - x0)
    per_px2 = dens / (math.pi * diameter**2 / 4.0)
    n = int(rng.poisson(per_px2 * area))
    cy = rng.uniform(y0, y1, n)
    cx = rng.uniform(x0, x1, n)
    amp = con * rng.uniform(0.45, 0.75, n)
    return DotBackground(
        centres_y=cy,
        centres_x=cx,
        amplitude=amp,
        dot_diameter_px=diameter,
        base=base,
        shape=(rows, cols),
        margin_px=margin,
        density=dens,
        seed=seed,
    )


# ---------------------------------------------------------------------------
# Displacement handling
# ---------------------------------------------------------------------------


def evaluate_displacement(displacement: Any, *, shape: tuple[int, int], strip_rows: int = 512) -> tuple[np.ndarray, np.ndarray] | None:
    """Turn a displacement specification into two float64 arrays (d_y, d_x).

    Parameters
    ----------
    displacement : None, (d_y, d_x) arrays of ``shape``, or callable
        A callable is called as ``f(rows, cols) -> (d_y, d_x)`` on 2-D pixel
        coordinate arrays (evaluated in row strips to bound memory).
    shape : (rows, cols)

    Returns
    -------
    (d_y, d_x) in pixels, or None when ``displacement`` is None.
    """
    rows, cols = _check_shape(shape)
    if displacement is None:
        return None
    if callable(displacement):
        dy = np.empty((rows, cols))
        dx = np.empty((rows, cols))
        cc = np.arange(cols, dtype=float)
        for r0 in range(0, rows, strip_rows):
            r1 = min(rows, r0 + strip_rows)
            rr, ccg = np.meshgrid(np.arange(r0, r1, dtype=float), cc, indexing="ij")
            out = displacement(rr, ccg)
            try:
                sy, sx = out
            except (TypeError, ValueError):
                raise InputError("displacement callable must return a pair (d_y, d_x)") from None
            dy[r0:r1] = np.broadcast_to(np.asarray(sy, dtype=float), rr.shape)
            dx[r0:r1] = np.broadcast_to(np.asarray(sx, dtype=float), rr.shape)
    else:
        try:
            sy, sx = displacement
        except (TypeError, ValueError):
            raise InputError("displacement must be a pair (d_y, d_x) of arrays or a callable") from None
        dy = np.asarray(sy, dtype=float)
        dx = np.asarray(sx, dtype=float)
        if dy.shape != (rows, cols) or dx.shape != (rows, cols):
            raise InputError(f"displacement arrays must have the image shape {(rows, cols)}, got {dy.shape} and {dx.shape}")
    if not (np.isfinite(dy).all() and np.isfinite(dx).all()):
        raise InputError("displacement contains NaN or infinite values")
    return dy, dx


def _lipschitz(dy: np.ndarray, dx: np.ndarray, strip_rows: int = 256) -> float:
    """Max-norm bound of the displacement Jacobian from neighbour differences (row strips)."""
    g = np.zeros((2, 2))  # g[i, j] = max |d(component i) / d(axis j)|
    rows = dy.shape[0]
    for i, a in enumerate((dy, dx)):
        for r0 in range(0, rows, strip_rows):
            blk = a[r0 : r0 + strip_rows + 1]
            if blk.shape[0] > 1:
                g[i, 0] = max(g[i, 0], float(np.abs(np.diff(blk, axis=0)).max()))
            if blk.shape[1] > 1:
                g[i, 1] = max(g[i, 1], float(np.abs(np.diff(blk, axis=1)).max()))
    return float(g.sum(axis=1).max())


# ---------------------------------------------------------------------------
# Rendering
# ---------------------------------------------------------------------------


def _pixel_integral(u: np.ndarray, sigma: float) -> np.ndarray:
    """Integral of exp(-t^2 / (2 sigma^2)) over t in [u - 1/2, u + 1/2]."""
    k = 1.0 / (sigma * math.sqrt(2.0))
    c = sigma * math.sqrt(math.pi / 2.0)
    return c * (special.erf((u + 0.5) * k) - special.erf((u - 0.5) * k))


class _PixelIntegralTable:
    """Linear-interpolation table of :func:`_pixel_integral` (hand-written for speed).

    scipy's erf costs ~40 ns per value on the development machine; the
    table lookup is ~4x cheaper.  With step 1/1024 px the interpolation
    error is below h^2/8 * max|F''| ~ 3e-7 of the dot peak (measured max
    |table - erf form| is printed by tests/test_synthetic.py).
    """

    def __init__(self, sigma: float, extent: float, step: float = 1.0 / 1024.0):
        self.extent = float(extent)
        self.inv_step = 1.0 / step
        u = np.arange(-self.extent, self.extent + 2 * step, step)
        self.values = _pixel_integral(u, sigma)
        self.slopes = np.append(np.diff(self.values), 0.0)
        self.last = float(u.size - 2)

    def __call__(self, u: np.ndarray) -> np.ndarray:
        t = (u + self.extent) * self.inv_step
        np.clip(t, 0.0, self.last, out=t)
        i = t.astype(np.intp)
        t -= i
        t *= self.slopes[i]
        t += self.values[i]
        return t


def _splat(
    image: np.ndarray,
    bg: DotBackground,
    sigma: float,
    amp_scale: float,
    disp: tuple[np.ndarray, np.ndarray] | None,
    shift: tuple[float, float],
    gradient_bound: float,
) -> None:
    """Add all dot contributions to ``image`` (fractions of full scale).

    Uniform displacement: separable square patch, exact erf form.  Varying
    displacement: each dot is splatted onto a disc of pixels around the
    pixel it lands on; every pixel of the disc uses its *own* displacement,
    so the result equals a per-pixel evaluation.  The disc radius covers all
    pixels whose sample point lies within the dot reach, given the landing
    error and the gradient bound G: |p - p*| <= reach / (1 - G).
    """
    rows, cols = image.shape
    sy, sx = shift
    cy_all, cx_all, amp_all = bg.centres_y, bg.centres_x, bg.amplitude * amp_scale
    if disp is None:
        # Uniform displacement: the dot lands at c + shift; separable patch.
        reach = 0.5 + TRUNC_SIGMAS * sigma  # per-axis: |u| beyond gets < 8e-7
        half = int(math.ceil(reach))
        py = cy_all + sy
        px = cx_all + sx
    else:
        # 2-D reach: a pixel whose centre is farther than this from the
        # sample point gets < 8e-7 of the peak (pixel half-diagonal 0.71).
        reach = math.sqrt(0.5) + TRUNC_SIGMAS * sigma
        table = _PixelIntegralTable(sigma, reach + 2.0)
        # Solve p = c + d(p) for the landing pixel by fixed-point iteration
        # (a contraction when the displacement gradient bound G < 1).
        dy, dx = disp
        dyf, dxf = dy.ravel(), dx.ravel()
        py = cy_all + sy
        px = cx_all + sx
        for _ in range(3):
            flat = np.clip(np.rint(py), 0, rows - 1).astype(np.intp) * cols + np.clip(np.rint(px), 0, cols - 1).astype(np.intp)
            py = cy_all + sy + dyf[flat]
            px = cx_all + sx + dxf[flat]
        # landing error <= 0.5 (rounding) + 0.5 (fixed-point residual, generous)
        radius = reach / (1.0 - gradient_bound) + 1.0
        half = int(math.ceil(radius))
        oy, ox = np.mgrid[-half : half + 1, -half : half + 1]
        inside = oy**2 + ox**2 <= radius**2
        disc_y, disc_x = oy[inside], ox[inside]
    ry = np.rint(py).astype(np.intp)
    rx = np.rint(px).astype(np.intp)
    keep = (ry >= -half) & (ry < rows + half) & (rx >= -half) & (rx < cols + half)
    order = np.argsort(ry[keep], kind="stable")
    ry, rx = ry[keep][order], rx[keep][order]
    cy, cx, amp = cy_all[keep][order], cx_all[keep][order], amp_all[keep][order]
    offs = np.arange(-half, half + 1)
    n_patch = offs.size**2 if disp is None else disc_y.size
    chunk = max(1, _CHUNK_ELEMENTS // n_patch)
    pad = 2 * half  # patch columns reach rx +- half with rx in [-half, cols + half)
    padded_cols = cols + 2 * pad
    for i0 in range(0, ry.size, chunk):
        sl = slice(i0, i0 + chunk)
        cry, crx = ry[sl], rx[sl]
        r_lo = int(cry[0]) - half  # rows sorted: band of this chunk
        r_hi = int(cry[-1]) + half
        if disp is None:
            prow = cry[:, None] + offs[None, :]  # (n, w) pixel rows
            pcol = crx[:, None] + offs[None, :]  # (n, w) pixel cols
            ey = _pixel_integral(prow - (cy[sl] + sy)[:, None], sigma)
            ex = _pixel_integral(pcol - (cx[sl] + sx)[:, None], sigma)
            w = (amp[sl][:, None, None] * ey[:, :, None]) * ex[:, None, :]
            idx = ((prow - r_lo)[:, :, None] * padded_cols) + (pcol + pad)[:, None, :]
        else:
            prow = cry[:, None] + disc_y[None, :]  # (n, m) pixel rows
            pcol = crx[:, None] + disc_x[None, :]
            flat = np.clip(prow, 0, rows - 1) * cols
            flat += np.clip(pcol, 0, cols - 1)
            # sample point minus dot centre, per pixel: p - d(p) - shift - c
            u = prow - (cy[sl] + sy)[:, None]
            u -= dyf[flat]
            w = table(u)
            u = pcol - (cx[sl] + sx)[:, None]
            u -= dxf[flat]
            w *= table(u)
            w *= amp[sl][:, None]
            del u, flat
            idx = (prow - r_lo) * padded_cols
            idx += pcol + pad
        band = np.bincount(idx.ravel(), weights=w.ravel(), minlength=(r_hi - r_lo + 1) * padded_cols)
        band2 = band.reshape(r_hi - r_lo + 1, padded_cols)
        # copy the part of the band that lies inside the image
        a0, a1 = max(r_lo, 0), min(r_hi + 1, rows)
        if a1 > a0:
            image[a0:a1] += band2[a0 - r_lo : a1 - r_lo, pad : pad + cols]


def render(
    background: DotBackground,
    *,
    shape: tuple[int, int] | None = None,
    displacement: Any = None,
    noise: bool = True,
    bit_depth: int = 12,
    blur_px: float = 0.0,
    camera_shift: tuple[float, float] = (0.0, 0.0),
    seed: int | None = None,
    full_well: float = 20000.0,
    read_noise: float = 5.0,
    quantize: bool = True,
    dtype: Any = np.float64,
) -> np.ndarray:
    """Render a camera image of the background seen through a displacement field.

    Pixel p integrates the background over its unit area centred on the
    sample position ``q = p - d(p) - camera_shift``; a feature at c in the
    background therefore appears at ``c + d + camera_shift``.  Each dot is
    evaluated analytically as the product of two erf differences (the exact
    area integral of a Gaussian), so no interpolation error enters.  Within a
    pixel the displacement is taken as constant (its value at the pixel
    centre), i.e. the footprint is translated, not stretched; the neglected
    stretch is of the order of the displacement gradient.

    Parameters
    ----------
    background : DotBackground
        From :func:`random_dots`.
    shape : (rows, cols), optional
        Output shape; default ``background.shape``.  Must not exceed it.
    displacement : None, (d_y, d_x) arrays of ``shape`` in px, or callable
        ``f(rows, cols) -> (d_y, d_x)`` on pixel coordinates.  The mapping
        must not fold: the neighbour-difference gradient bound must be < 0.5.
    noise : bool
        Add photon shot noise (Poisson in electrons, full scale =
        ``full_well`` electrons) and Gaussian read noise (``read_noise``
        electrons rms).
    bit_depth : int
        Output scale: full scale = ``2**bit_depth - 1`` counts (8..16).
    blur_px : float
        e^-2 diameter (pixels) of a Gaussian defocus/diffraction blur spot;
        folded analytically into the dot profile (sigma^2 adds; the dot
        integral is preserved).
    camera_shift : (dy, dx)
        Global image shift in pixels, added to the displacement.
    seed : int or None
        Seed of the noise generator.
    full_well : float
        Electrons at full scale (sets the shot noise: variance in counts =
        mean / gain with gain = full_well / (2**bit_depth - 1) e-/count).
    read_noise : float
        Read noise, electrons rms.
    quantize : bool
        Round to integer counts.  Values are clipped to [0, full scale]
        (saturation) whenever noise or quantisation is applied.
    dtype : numpy float dtype
        float64 (default) or float32 (halves the memory of large images;
        integer counts up to 16 bit are exact in float32).

    Returns
    -------
    ndarray of ``dtype``, shape ``shape``, in counts.

    Raises
    ------
    InputError
        Bad option, displacement of the wrong shape or non-finite, a folding
        mapping, or sample positions outside the dot field (enlarge
        ``margin_px`` of the background).
    """
    if not isinstance(background, DotBackground):
        raise InputError("background must be a DotBackground from random_dots()")
    rows, cols = background.shape if shape is None else _check_shape(shape)
    if rows > background.shape[0] or cols > background.shape[1]:
        raise InputError(f"render shape {(rows, cols)} exceeds the background shape {background.shape}")
    try:
        bits = int(bit_depth)
    except (TypeError, ValueError):
        raise InputError(f"bit_depth must be an integer, got {bit_depth!r}") from None
    if bits != bit_depth or not (8 <= bits <= 16):
        raise InputError(f"bit_depth must be an integer within 8..16, got {bit_depth!r}")
    blur = _check_finite_positive(blur_px, "blur_px", allow_zero=True)
    try:
        shift = (float(camera_shift[0]), float(camera_shift[1]))
    except (TypeError, ValueError, IndexError):
        raise InputError(f"camera_shift must be a pair (dy, dx) in px, got {camera_shift!r}") from None
    if not all(math.isfinite(s) for s in shift):
        raise InputError(f"camera_shift must be finite, got {camera_shift!r}")
    out_dtype = np.dtype(dtype)
    if out_dtype not in (np.dtype(np.float32), np.dtype(np.float64)):
        raise InputError(f"dtype must be float32 or float64, got {dtype!r}")
    fw = _check_finite_positive(full_well, "full_well")
    rn = _check_finite_positive(read_noise, "read_noise", allow_zero=True)

    disp = evaluate_displacement(displacement, shape=(rows, cols))
    gbound = 0.0
    max_d = math.hypot(*shift)
    if disp is not None:
        dy, dx = disp
        gbound = _lipschitz(dy, dx)
        if gbound >= 0.5:
            raise InputError(
                f"displacement gradient too large ({gbound:.3g} px/px >= 0.5): the mapping folds; use a smoother or weaker field"
            )
        max_d = max(float(np.hypot(dy[r0 : r0 + 256] + shift[0], dx[r0 : r0 + 256] + shift[1]).max()) for r0 in range(0, rows, 256))
        if float(np.ptp(dy)) == 0.0 and float(np.ptp(dx)) == 0.0:
            shift = (shift[0] + float(dy.flat[0]), shift[1] + float(dx.flat[0]))
            disp, gbound = None, 0.0
    sigma0 = background.sigma_px
    sigma_b = blur / 4.0
    sigma = math.sqrt(sigma0**2 + sigma_b**2)
    reach = math.sqrt(0.5) + TRUNC_SIGMAS * sigma
    # sample positions must stay inside the dot field by the dot reach
    if max_d + reach > background.margin_px + 1e-9:
        raise InputError(
            f"displacement up to {max_d:.3g} px leaves the background's dot field (margin {background.margin_px:g} px); "
            "make the background with a larger margin_px"
        )

    image = np.zeros((rows, cols), dtype=out_dtype)
    _splat(image, background, sigma, (sigma0 / sigma) ** 2, disp, shift, gbound)
    _camera(image, base=background.base, full=float(2**bits - 1), noise=noise, quantize=quantize, seed=seed, full_well=fw, read_noise=rn)
    return image


def _camera(image: np.ndarray, *, base: float, full: float, noise: bool, quantize: bool, seed: int | None, full_well: float, read_noise: float, strip_rows: int = 256) -> None:
    """In place: intensity (fraction of full scale) -> counts with noise, saturation, rounding (row strips)."""
    rng = np.random.default_rng(seed) if noise else None
    for r0 in range(0, image.shape[0], strip_rows):
        strip = image[r0 : r0 + strip_rows]
        strip += base
        if rng is not None:
            electrons = rng.poisson(np.clip(strip, 0.0, None) * full_well).astype(float)
            if read_noise > 0:
                electrons += rng.normal(0.0, read_noise, size=electrons.shape)
            strip[...] = electrons * (full / full_well)
        else:
            strip *= full
        if noise or quantize:
            if quantize:
                np.rint(strip, out=strip)
            np.clip(strip, 0.0, full, out=strip)


# ---------------------------------------------------------------------------
# Pairs
# ---------------------------------------------------------------------------


@dataclass
class SyntheticPair:
    """A rendered reference/measurement pair and its exact displacement.

    Attributes
    ----------
    reference, measurement : ndarray
        Images in counts (float64).
    displacement_y, displacement_x : ndarray
        True displacement per pixel (px), camera shift included.
    meta : dict
        Rendering parameters.
    """

    reference: np.ndarray
    measurement: np.ndarray
    displacement_y: np.ndarray
    displacement_x: np.ndarray
    meta: dict


def render_pair(
    *,
    shape: tuple[int, int],
    displacement: Any = None,
    dot_diameter_px: float = 2.5,
    density: float = 0.5,
    contrast: float = 1.0,
    seed: int = 0,
    margin_px: float | None = None,
    noise: bool = True,
    bit_depth: int = 12,
    blur_px: float = 0.0,
    camera_shift: tuple[float, float] = (0.0, 0.0),
    full_well: float = 20000.0,
    read_noise: float = 5.0,
    quantize: bool = True,
    dtype: Any = np.float64,
) -> SyntheticPair:
    """Render a reference image and a measurement image through ``displacement``.

    The background is ``random_dots(seed=seed, ...)``; the reference noise uses
    seed ``seed + 1`` and the measurement noise ``seed + 2``.  When
    ``margin_px`` is None it is enlarged automatically to cover the largest
    displacement.  Parameters as in :func:`random_dots` and :func:`render`.

    Returns
    -------
    SyntheticPair
    """
    rows, cols = _check_shape(shape)
    disp = evaluate_displacement(displacement, shape=(rows, cols))
    if disp is None:
        disp = (np.zeros((rows, cols)), np.zeros((rows, cols)))
    try:
        cs = (float(camera_shift[0]), float(camera_shift[1]))
    except (TypeError, ValueError, IndexError):
        raise InputError(f"camera_shift must be a pair (dy, dx) in px, got {camera_shift!r}") from None
    # the truth includes the camera shift (new arrays only when it is non-zero)
    dy = disp[0] + cs[0] if cs[0] else disp[0]
    dx = disp[1] + cs[1] if cs[1] else disp[1]
    del disp
    if margin_px is None:
        diameter = _check_finite_positive(dot_diameter_px, "dot_diameter_px")
        blur = _check_finite_positive(blur_px, "blur_px", allow_zero=True)
        reach = 0.5 + TRUNC_SIGMAS * math.hypot(diameter, blur) / 4.0
        dmax = max(float(np.hypot(dy[r0 : r0 + 256], dx[r0 : r0 + 256]).max()) for r0 in range(0, rows, 256))
        margin_px = max(16.0 + 2.0 * diameter, math.ceil(dmax + reach + 2.0))
    bg = random_dots(shape=(rows, cols), dot_diameter_px=dot_diameter_px, density=density, contrast=contrast, seed=seed, margin_px=margin_px)
    common = dict(noise=noise, bit_depth=bit_depth, blur_px=blur_px, full_well=full_well, read_noise=read_noise, quantize=quantize)
    ref = render(bg, seed=None if seed is None else seed + 1, dtype=dtype, **common)
    meas = render(bg, displacement=(dy, dx), seed=None if seed is None else seed + 2, dtype=dtype, **common)
    meta = dict(
        shape=[rows, cols],
        dot_diameter_px=float(dot_diameter_px),
        density=float(density),
        contrast=float(contrast),
        seed=seed,
        n_dots=bg.n_dots,
        margin_px=float(bg.margin_px),
        camera_shift=list(cs),
        **common,
    )
    return SyntheticPair(reference=ref, measurement=meas, displacement_y=dy, displacement_x=dx, meta=meta)
