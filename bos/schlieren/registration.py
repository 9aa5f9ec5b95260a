"""Registration of two views of one object: similarity transforms.

A :class:`Similarity` maps pixel positions of a *source* view (the BOS
picture) onto a *target* view (the knife-edge picture):

    [x_t, y_t] = s R(theta) [x_s, y_s] + [t_x, t_y],
    R(theta) = [[cos theta, -sin theta], [sin theta, cos theta]]

with x = column and y = row (y down, so a positive ``theta`` turns the
picture clockwise on the screen).  This is the convention of
``skimage.transform.SimilarityTransform`` (used as reference in the tests).

Two ways to find it:

* :func:`similarity_from_points`: least squares through >= 3 control points
  (closed form of Umeyama 1991);
* :func:`register_fields`: automatic, by correlating the deflection fields:
  a coarse search over roll and scale (masked normalised cross-correlation
  in the Fourier domain for the shift), refinement of all four parameters
  on the sampled fields, then local shifts of tiles fitted robustly
  (RANSAC, scikit-image) for the final transform and its residual.

References
----------
(bibliographic details from memory)
Umeyama, S. (1991). Least-squares estimation of transformation parameters
between two point patterns. *IEEE Trans. PAMI* 13(4), 376-380.
Padfield, D. (2012). Masked object registration in the Fourier domain.
*IEEE Trans. Image Processing* 21(5), 2706-2718.
Fischler, M. A. & Bolles, R. C. (1981). Random sample consensus. *Comm.
ACM* 24(6), 381-395.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..errors import InputError
from .calibration import ratio_noise

__all__ = ["Similarity", "similarity_from_points", "FieldRegistration", "register_fields", "masked_ncc"]


@dataclass(frozen=True)
class Similarity:
    """Similarity transform source px -> target px (see module docstring).

    Attributes
    ----------
    scale : float
        Target pixels per source pixel.
    rotation_rad : float
        Roll of the source picture relative to the target (clockwise on screen).
    shift_xy : (float, float)
        Translation (t_x, t_y) [target px].
    """

    scale: float
    rotation_rad: float
    shift_xy: tuple[float, float]

    @property
    def matrix(self) -> np.ndarray:
        """3x3 homogeneous matrix acting on (x, y, 1)."""
        c, s = math.cos(self.rotation_rad), math.sin(self.rotation_rad)
        k = self.scale
        return np.array([[k * c, -k * s, self.shift_xy[0]], [k * s, k * c, self.shift_xy[1]], [0.0, 0.0, 1.0]])

    def apply(self, rows, cols):
        """Map source (rows, cols) to target (rows, cols) [px]."""
        m = self.matrix
        r, c = np.asarray(rows, float), np.asarray(cols, float)
        return m[1, 0] * c + m[1, 1] * r + m[1, 2], m[0, 0] * c + m[0, 1] * r + m[0, 2]

    def inverse(self) -> "Similarity":
        m = np.linalg.inv(self.matrix)
        return Similarity(scale=1.0 / self.scale, rotation_rad=-self.rotation_rad, shift_xy=(m[0, 2], m[1, 2]))

    def as_dict(self) -> dict:
        return {"scale": self.scale, "rotation_deg": math.degrees(self.rotation_rad),
                "shift_x_px": float(self.shift_xy[0]), "shift_y_px": float(self.shift_xy[1]),
                "convention": "knife (x, y) = scale * R(rotation) * bos (x, y) + shift; x = column, y = row (down)"}


def _from_params(log_scale: float, theta: float, tx: float, ty: float) -> Similarity:
    return Similarity(scale=math.exp(log_scale), rotation_rad=theta, shift_xy=(tx, ty))


def similarity_from_points(src_px, dst_px) -> tuple[Similarity, np.ndarray]:
    """Least-squares similarity through control points.

    Parameters
    ----------
    src_px, dst_px : array_like, shape (n, 2)
        Matching points as (row, col) in the source and target pictures, n >= 3.

    Returns
    -------
    (Similarity, ndarray)
        The transform and the residual distance of each point [target px].

    Raises
    ------
    InputError
        Fewer than 3 points, shapes that differ, non-finite values, or
        points that do not fix a transform (all coincident).

    References
    ----------
    Umeyama (1991), IEEE Trans. PAMI 13(4), 376-380 (closed form with the reflection guard) [from memory].
    """
    src = np.asarray(src_px, float)
    dst = np.asarray(dst_px, float)
    if src.ndim != 2 or src.shape[1:] != (2,) or dst.shape != src.shape:
        raise InputError(f"control points must be two lists of (row, col) of equal length, got shapes "
                         f"{src.shape} and {dst.shape}")
    n = src.shape[0]
    if n < 3:
        raise InputError(f"need at least 3 control points, got {n}")
    if not (np.all(np.isfinite(src)) and np.all(np.isfinite(dst))):
        raise InputError("control points must be finite numbers")
    # work in (x, y) = (col, row)
    a = src[:, ::-1]
    b = dst[:, ::-1]
    ma, mb = a.mean(0), b.mean(0)
    da, db = a - ma, b - mb
    var_a = float(np.mean(np.sum(da ** 2, axis=1)))
    if var_a <= 1e-12 or float(np.mean(np.sum(db ** 2, axis=1))) <= 1e-12:
        raise InputError("control points coincide: they do not fix a transform")
    cov = db.T @ da / n
    u, d, vt = np.linalg.svd(cov)
    sgn = np.eye(2)
    if np.linalg.det(u) * np.linalg.det(vt) < 0:
        sgn[1, 1] = -1.0
    rot = u @ sgn @ vt
    scale = float(np.trace(np.diag(d) @ sgn) / var_a)
    t = mb - scale * rot @ ma
    sim = Similarity(scale=scale, rotation_rad=math.atan2(rot[1, 0], rot[0, 0]), shift_xy=(float(t[0]), float(t[1])))
    r, c = sim.apply(src[:, 0], src[:, 1])
    resid = np.hypot(r - dst[:, 0], c - dst[:, 1])
    return sim, resid


# --------------------------------------------------------------------------- masked NCC (Padfield 2012)


#: Automatic registration needs at least this correlation between the fields in the coarse search.
MIN_CORRELATION = 0.5


def masked_ncc(fixed, fixed_mask, moving, moving_mask, *, min_overlap: float = 0.25, cache: dict | None = None,
               return_overlap: bool = False):
    """Normalised cross-correlation of two masked pictures for every integer shift.

    Returns an array ``ncc`` of shape ``(H_f + H_m - 1, W_f + W_m - 1)``; the
    entry at index ``(i, j)`` compares ``fixed[y, x]`` with
    ``moving[y - dy, x - dx]`` for the shift ``(dy, dx) = (i - H_m + 1, j - W_m + 1)``.
    Shifts whose overlap has fewer than ``min_overlap`` of the smaller
    picture's valid pixels are set to -inf.  ``cache`` (a dict owned by the
    caller) keeps the fixed picture's spectra between calls with the same
    fixed picture and mask.  ``return_overlap=True`` also returns the number
    of overlapping valid pixels for every shift.

    References
    ----------
    Padfield (2012), IEEE Trans. Image Processing 21(5), 2706-2718.
    """
    from scipy import fft

    f = np.where(fixed_mask, fixed, 0.0)
    m = np.where(moving_mask, moving, 0.0)
    mf, mm = fixed_mask.astype(float), moving_mask.astype(float)
    shape = (f.shape[0] + m.shape[0] - 1, f.shape[1] + m.shape[1] - 1)
    fshape = [fft.next_fast_len(n, real=True) for n in shape]

    def F(a):
        return fft.rfft2(a, fshape)

    def corr(A, B_flipped):
        out = fft.irfft2(A * B_flipped, fshape)
        return out[:shape[0], :shape[1]]

    # correlation = convolution with the flipped moving picture
    Fm, Fmm, Fm2 = F(m[::-1, ::-1]), F(mm[::-1, ::-1]), F((m * m)[::-1, ::-1])
    key = tuple(fshape)
    if cache is None or key not in cache:
        spectra = (F(f), F(mf), F(f * f))
        if cache is not None:  # the caller searches with one fixed picture: reuse its transforms
            cache[key] = spectra
    Ff, Fmf, Ff2 = cache[key] if cache is not None else spectra
    n = corr(Fmf, Fmm)
    sf = corr(Ff, Fmm)
    sm = corr(Fmf, Fm)
    sfm = corr(Ff, Fm)
    sff = corr(Ff2, Fmm)
    smm = corr(Fmf, Fm2)
    n = np.round(n)
    with np.errstate(invalid="ignore", divide="ignore"):
        num = sfm - sf * sm / n
        den = (sff - sf ** 2 / n) * (smm - sm ** 2 / n)
        ncc = num / np.sqrt(den)
    need = min_overlap * min(mf.sum(), mm.sum())
    bad = (n < max(need, 4)) | ~np.isfinite(ncc)
    if (~bad).any():
        bad |= den <= 1e-12 * np.max(den[~bad])
    ncc[bad] = -np.inf
    return (ncc, n) if return_overlap else ncc


# --------------------------------------------------------------------------- automatic registration


@dataclass
class FieldRegistration:
    """Result of :func:`register_fields`.

    Attributes
    ----------
    transform : Similarity
        BOS px -> knife px.
    residual_px : float
        Rms distance between the transform and the robust local (tile)
        matches that agree with it [knife px]; NaN when too few tiles have
        structure.
    correlation : float
        Normalised correlation of the two fields after registration.
    n_tiles, n_inliers : int
        Tiles with structure and those consistent with the transform.
    method : str
    warnings : list of str
    """

    transform: Similarity
    residual_px: float
    correlation: float
    n_tiles: int = 0
    n_inliers: int = 0
    method: str = "field correlation"
    warnings: list[str] = field(default_factory=list)


class _BosField:
    """BOS deflection on its (uniform) vector grid, sampled at arbitrary BOS px positions."""

    def __init__(self, eps_y, eps_x, rows_px, cols_px, valid):
        self.ey = np.asarray(eps_y, float)
        self.ex = np.asarray(eps_x, float)
        self.rows = np.asarray(rows_px, float)
        self.cols = np.asarray(cols_px, float)
        self.valid = np.asarray(valid, bool) & np.isfinite(self.ey) & np.isfinite(self.ex)
        for name, ax in (("rows", self.rows), ("cols", self.cols)):
            if ax.size < 2 or not np.all(np.diff(ax) > 0):
                raise InputError(f"BOS grid {name} must increase, with at least 2 points")
        self.step = float(np.median(np.diff(self.rows))), float(np.median(np.diff(self.cols)))

    def index(self, rows, cols):
        return (np.interp(rows, self.rows, np.arange(self.rows.size), left=-1e9, right=1e9),
                np.interp(cols, self.cols, np.arange(self.cols.size), left=-1e9, right=1e9))

    def sample(self, rows, cols, normal):
        """Deflection projected on ``normal`` (ky, kx) at BOS px positions; NaN outside or invalid."""
        from scipy.ndimage import map_coordinates

        ir, ic = self.index(rows, cols)
        coords = np.array([np.ravel(ir), np.ravel(ic)])
        ky, kx = normal
        proj = np.where(self.valid, ky * np.nan_to_num(self.ey) + kx * np.nan_to_num(self.ex), 0.0)
        val = map_coordinates(proj, coords, order=1, mode="constant", cval=0.0)
        w = map_coordinates(self.valid.astype(float), coords, order=1, mode="constant", cval=0.0)
        out = np.where(w > 0.999, val, np.nan)
        return out.reshape(np.shape(rows))


def _rotated_normal(normal, theta):
    """Knife normal expressed in the BOS frame for a BOS->knife roll ``theta``: R(-theta) k."""
    ky, kx = normal
    c, s = math.cos(theta), math.sin(theta)
    # (x, y) components: R(-theta) (kx, ky)
    bx = c * kx + s * ky
    by = -s * kx + c * ky
    return by, bx


def _smooth_nan(a: np.ndarray, sigma: float) -> np.ndarray:
    """Gaussian smoothing that ignores NaN (normalised convolution)."""
    from scipy.ndimage import gaussian_filter

    ok = np.isfinite(a)
    if sigma <= 0:
        return a.copy()
    num = gaussian_filter(np.where(ok, a, 0.0), sigma)
    den = gaussian_filter(ok.astype(float), sigma)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = num / den
    out[den < 0.5] = np.nan
    return out


def _ncc(a, b) -> float:
    ok = np.isfinite(a) & np.isfinite(b)
    if ok.sum() < 10:
        return -1.0
    x, y = a[ok] - a[ok].mean(), b[ok] - b[ok].mean()
    # element-wise sums, not BLAS dot: no thread start-up cost on small, frequent calls
    d = math.sqrt(float(np.sum(x * x)) * float(np.sum(y * y)))
    return float(np.sum(x * y)) / d if d > 0 else -1.0


def register_fields(bos_eps_y, bos_eps_x, bos_rows_px, bos_cols_px, knife_field, *, knife_normal,
                    bos_valid=None, knife_valid=None, scale_guess: float | None = None,
                    scale_range: float = 1.3, angle_step_deg: float = 5.0,
                    max_rotation_deg: float = 180.0, work_px: int = 48, smooth_cells: float = 1.0,
                    seed: int = 0) -> FieldRegistration:
    """Find the similarity BOS px -> knife px by correlating the deflection fields.

    The knife picture senses ``eps . k``; for a candidate roll the BOS field
    is projected on the knife normal turned into the BOS frame, so both
    fields show the same quantity.

    Parameters
    ----------
    bos_eps_y, bos_eps_x : ndarray
        BOS deflection on its vector grid [rad].
    bos_rows_px, bos_cols_px : ndarray
        Pixel rows/cols of the BOS grid (increasing, uniform).
    knife_field : ndarray
        Knife-edge ``deflection_normal`` on the knife picture's pixel grid [rad].
    knife_normal : (ky, kx)
        Knife normal of the knife picture.
    bos_valid, knife_valid : ndarray of bool, optional
        Usable points (default: finite values).
    scale_guess : float, optional
        Expected knife px per BOS px (e.g. from the object-plane pixel sizes);
        the search covers ``[guess / scale_range, guess * scale_range]``.
        Without it the search covers 0.25 ... 4.
    angle_step_deg, max_rotation_deg : float
        Roll search grid.
    work_px : int
        Longest side of the knife working grid of the coarse search.
    smooth_cells : float
        Gaussian smoothing (sigma, in BOS grid cells; the same length on the
        knife picture) of both fields in the refinement and tile stages.

    Returns
    -------
    FieldRegistration

    Raises
    ------
    InputError
        No common structure (the overlap-weighted correlation never reaches :data:`MIN_CORRELATION`).
    """
    from skimage.measure import ransac
    from skimage.registration import phase_cross_correlation
    from skimage.transform import SimilarityTransform
    from scipy.optimize import least_squares

    bos = _BosField(bos_eps_y, bos_eps_x, bos_rows_px, bos_cols_px,
                    np.ones(np.shape(bos_eps_y), bool) if bos_valid is None else bos_valid)
    knife = np.asarray(knife_field, float)
    kvalid = np.isfinite(knife) if knife_valid is None else (np.asarray(knife_valid, bool) & np.isfinite(knife))
    if kvalid.sum() < 100 or bos.valid.sum() < 25:
        raise InputError("too few valid points in the fields to register them; give control points")
    H, W = knife.shape
    warnings: list[str] = []

    # ---- coarse search on a working grid (knife px step `step_k`)
    bos_extent = max(bos.rows[-1] - bos.rows[0], bos.cols[-1] - bos.cols[0])
    if scale_guess is None:
        scales = np.exp(np.arange(math.log(0.25), math.log(4.0) + 1e-9, math.log(1.12)))
    else:
        lo, hi = scale_guess / scale_range, scale_guess * scale_range
        n = max(3, int(math.ceil(math.log(hi / lo) / math.log(1.1))) + 1)
        scales = np.exp(np.linspace(math.log(lo), math.log(hi), n))
    step_k = max(1.0, max(H, W) / work_px)
    smooth = max(step_k, float(scales.max()) * max(bos.step)) / 2.0
    kw = _smooth_nan(np.where(kvalid, knife, np.nan), smooth)
    kr = np.arange(0, H, step_k)
    kc = np.arange(0, W, step_k)
    kwork = kw[np.ix_(np.round(kr).astype(int), np.round(kc).astype(int))]
    kmask = np.isfinite(kwork)
    n_knife = float(kmask.sum())
    kwork = np.where(kmask, kwork, 0.0)
    bos_c = ((bos.rows[0] + bos.rows[-1]) / 2, (bos.cols[0] + bos.cols[-1]) / 2)
    angles = np.radians(np.arange(-max_rotation_deg, max_rotation_deg, angle_step_deg))
    best = (-np.inf, None)
    spectra: dict = {}
    for k in scales:
        half = 0.5 * k * bos_extent * math.sqrt(2.0) + step_k
        n_c = int(math.ceil(2 * half / step_k)) + 1
        g = (np.arange(n_c) - (n_c - 1) / 2) * step_k  # canvas offsets around the BOS centre (knife px)
        gy, gx = np.meshgrid(g, g, indexing="ij")
        for th in angles:
            # canvas pixel (gy, gx) relative to the mapped BOS centre -> BOS px
            c, s = math.cos(th), math.sin(th)
            bx = (c * gx + s * gy) / k + bos_c[1]
            by = (-s * gx + c * gy) / k + bos_c[0]
            canvas = bos.sample(by, bx, _rotated_normal(knife_normal, th))
            cmask = np.isfinite(canvas)
            if cmask.sum() < 16:
                continue
            ncc, n_ov = masked_ncc(kwork, kmask, np.where(cmask, canvas, 0.0), cmask, min_overlap=0.3,
                                   cache=spectra, return_overlap=True)
            # a good match over a small overlap is weak evidence: weight by the covered fraction
            frac = np.clip(n_ov, 0.0, None) / min(n_knife, float(cmask.sum()))
            with np.errstate(invalid="ignore"):
                score = np.where(np.isfinite(ncc), ncc * np.sqrt(frac), -np.inf)
            i = int(np.argmax(score))
            val = float(score.flat[i])
            if val > best[0]:
                iy, ix = np.unravel_index(i, ncc.shape)
                # fixed[y, x] ~ moving[y - dy, x - dx]: canvas index 0 sits at knife work index (dy, dx)
                dy, dx = iy - (n_c - 1), ix - (n_c - 1)
                centre_r = kr[0] + (dy + (n_c - 1) / 2) * step_k
                centre_c = kc[0] + (dx + (n_c - 1) / 2) * step_k
                best = (val, (k, th, centre_r, centre_c))
    if best[1] is None or best[0] < MIN_CORRELATION:
        raise InputError("automatic registration found no common structure (best overlap-weighted correlation "
                         f"{best[0]:.2f}); give control points with --control-points")
    k, th, cr, cc = best[1]
    # knife(x, y) = k R(th) (bos - bos_c) + centre  ->  shift = centre - k R bos_c
    c, s = math.cos(th), math.sin(th)
    tx = cc - k * (c * bos_c[1] - s * bos_c[0])
    ty = cr - k * (s * bos_c[1] + c * bos_c[0])
    params = np.array([math.log(k), th, tx, ty])

    # ---- refinement of the four parameters on a finer grid
    step_f = max(1.0, min(step_k / 2.0, max(H, W) / 128.0))
    # both fields smoothed alike (one BOS grid cell) for the fine stages: noise matters less, and a symmetric
    # smoothing moves no feature
    sm_f = max(step_f, smooth_cells * k * max(bos.step))
    bos_f = _BosField(_smooth_nan(np.where(bos.valid, bos.ey, np.nan), smooth_cells),
                      _smooth_nan(np.where(bos.valid, bos.ex, np.nan), smooth_cells), bos.rows, bos.cols,
                      bos.valid) if smooth_cells > 0 else bos
    kf = _smooth_nan(np.where(kvalid, knife, np.nan), sm_f)
    fr = np.arange(0, H, step_f)
    fc = np.arange(0, W, step_f)
    FR, FC = np.meshgrid(fr, fc, indexing="ij")
    kfs = kf[np.ix_(np.round(fr).astype(int), np.round(fc).astype(int))]

    def warped(q, rows=FR, cols=FC):
        inv = _from_params(*q).inverse()
        br, bc = inv.apply(rows, cols)
        return bos_f.sample(br, bc, _rotated_normal(knife_normal, q[1]))

    def residuals(z):
        q = params + z[:4] * scl
        w = warped(q)
        ok = np.isfinite(w) & np.isfinite(kfs)
        return (np.where(ok, kfs - (z[4] * w + z[5] * kscale), 0.0) / kscale).ravel()

    kscale = float(np.nanstd(kfs)) or 1.0
    scl = np.array([0.02, math.radians(1.0), 2.0, 2.0])
    sol = least_squares(residuals, np.array([0.0, 0.0, 0.0, 0.0, 1.0, 0.0]), x_scale=1.0, diff_step=0.05,
                        method="trf", max_nfev=80, xtol=1e-4, ftol=1e-8)
    params = params + sol.x[:4] * scl
    best_ncc = _ncc(kfs, warped(params))

    # ---- local tile shifts + RANSAC (scikit-image) for the final transform and its residual
    sim = _from_params(*params)
    st = max(1, int(math.ceil(max(H, W) / 768.0)))  # tiles on a decimated grid for large pictures
    tr_, tc_ = np.arange(0, H, st, dtype=float), np.arange(0, W, st, dtype=float)
    full = warped(params, *np.meshgrid(tr_, tc_, indexing="ij"))
    kfull = _smooth_nan(np.where(kvalid, knife, np.nan), sm_f)[::st, ::st]
    Ht, Wt = full.shape
    tile = int(max(16, min(Ht, Wt) // 6))
    src, dst = [], []
    # noise left in the smoothed knife field: per-pixel noise / (2 sqrt(pi) sigma) for a 2-D Gaussian
    raw = ratio_noise(np.where(kvalid, knife, np.nan), kvalid)
    noise = (raw if math.isfinite(raw) else 0.0) / (2.0 * math.sqrt(math.pi) * max(sm_f, 0.5))
    for r0 in range(0, Ht - tile + 1, tile):
        for c0 in range(0, Wt - tile + 1, tile):
            a = kfull[r0:r0 + tile, c0:c0 + tile]
            b = full[r0:r0 + tile, c0:c0 + tile]
            ok = np.isfinite(a) & np.isfinite(b)
            if ok.mean() < 0.9:
                continue
            if np.nanstd(a) < 5.0 * max(noise, 1e-30) or np.nanstd(b) < 1e-30:
                continue
            a = np.where(ok, a - np.nanmean(a), 0.0)
            b = np.where(ok, b - np.nanmean(b), 0.0)
            shift, _, _ = phase_cross_correlation(a, b, upsample_factor=20, normalization=None)
            if np.hypot(*shift) > tile / 4:
                continue
            # the BOS point that should sit at the tile centre sits at centre - shift in the knife picture
            ctr = np.array([r0 + (tile - 1) / 2.0, c0 + (tile - 1) / 2.0]) * st
            br, bc = sim.inverse().apply(ctr[0] - shift[0] * st, ctr[1] - shift[1] * st)
            src.append((bc, br))
            dst.append((ctr[1], ctr[0]))
    n_tiles = len(src)
    resid_px = float("nan")
    n_in = 0
    if n_tiles >= 4:
        model, inliers = ransac((np.array(src), np.array(dst)), SimilarityTransform, min_samples=3,
                                residual_threshold=1.0, max_trials=500, rng=seed)
        if model is not None and inliers is not None and inliers.sum() >= 3:
            n_in = int(inliers.sum())
            pts = np.array([(r[1], r[0]) for r in np.array(src)[inliers]])  # (row, col)
            tgt = np.array([(r[1], r[0]) for r in np.array(dst)[inliers]])
            refined, _ = similarity_from_points(pts, tgt)
            q_ref = np.array([math.log(refined.scale), refined.rotation_rad, *refined.shift_xy])
            if _ncc(kfs, warped(q_ref)) >= best_ncc:
                sim = refined
            r_in, c_in = sim.apply(pts[:, 0], pts[:, 1])
            resid_px = float(np.sqrt(np.mean((r_in - tgt[:, 0]) ** 2 + (c_in - tgt[:, 1]) ** 2)))
    if not math.isfinite(resid_px):
        warnings.append(f"only {n_tiles} tile(s) with enough structure: registration residual not measured")
    q = np.array([math.log(sim.scale), sim.rotation_rad, *sim.shift_xy])
    corr = _ncc(kfs, warped(q))
    return FieldRegistration(transform=sim, residual_px=resid_px, correlation=corr, n_tiles=n_tiles,
                             n_inliers=n_in, warnings=warnings)
