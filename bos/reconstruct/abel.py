"""Abel inversion of BOS deflection data (derivative form), axisymmetric objects.

For an axisymmetric index field n(r) viewed side-on, the deflection normal to
the axis at distance y from it is eps(y) = F'(y)/n0 with F the projection of
n - n0, so the inverse Abel transform needs no numerical differentiation:

    n(r) - n0 = -(n0/pi) int_r^inf eps(y) dy / sqrt(y^2 - r^2)

(references.md section 5).  Each method is a linear operator D (one
``(m, m)`` matrix for ``m`` samples at y_j = j*dr, j = 0 at the axis) with
``(n - n0)/n0 = D @ eps``; the registry :data:`METHODS` maps names to the
functions that build D:

``"three_point"``
    eps is taken as linear on each interval [y_j - dr/2, y_j + dr/2] with the
    three-point (central) slope, and the kernel integrated exactly — the
    derivative-form counterpart of Dasch's three-point method (which fits a
    quadratic to F, i.e. a linear F' from three points).
``"onion_peeling"``
    rings of constant radial index gradient dn/dr: the deflection of the ray
    through the middle of annulus i is a triangular sum over the rings
    outside it (exact chord integrals); the triangular system is solved and
    dn/dr integrated inwards — onion peeling in derivative form.

Optional Tikhonov regularisation (second-difference penalty on n) smooths
noisy data; it stays linear, so uncertainties propagate exactly.

References
----------
Dasch (1992), "One-dimensional tomography: a comparison of Abel,
onion-peeling, and filtered backprojection methods", Appl. Opt. 31:1146.
references.md section 5.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import lru_cache
from typing import Callable

import numpy as np
from scipy import optimize

from ..errors import InputError

METHODS: dict[str, Callable[[int], np.ndarray]] = {}


def _register(name):
    def deco(fn):
        METHODS[name] = fn
        return fn

    return deco


def _kernel_integrals(r, a, b):
    """Exact integrals of 1/sqrt(y^2-r^2) and y/sqrt(y^2-r^2) over [a, b], a >= r >= 0."""
    sa = np.sqrt(np.maximum(a * a - r * r, 0.0))
    sb = np.sqrt(np.maximum(b * b - r * r, 0.0))
    with np.errstate(divide="ignore", invalid="ignore"):
        i0 = np.log((b + sb) / (a + sa))
    return i0, sb - sa


@_register("three_point")
@lru_cache(maxsize=16)
def three_point_operator(m: int) -> np.ndarray:
    """Derivative-form three-point operator (unit spacing), ``(n-n0)/n0 = D @ eps``.

    eps on interval j is eps_j + s_j (y - j) with s_j = (eps_{j+1} - eps_{j-1})/2;
    eps_{-1} = -eps_1 (odd symmetry about the axis) and eps_m = 0 (ambient
    beyond the last sample).  Row i integrates from y = i (r_i) outward.
    """
    if m < 3:
        raise InputError(f"three_point Abel inversion needs at least 3 samples, got {m}")
    D = np.zeros((m, m))
    j = np.arange(m, dtype=float)
    for i in range(m):
        lo = np.maximum(j[i:] - 0.5, i)
        hi = np.minimum(j[i:] + 0.5, m - 1)  # the data end at the last sample
        i0, i1 = _kernel_integrals(float(i), lo, hi)
        # integral of (eps_j + s_j (y - j)) over the interval = eps_j*i0 + s_j*(i1 - j*i0)
        if i == 0:
            i0[0] = 0.0  # eps_0 = 0 on the axis by symmetry; the log-singular term drops (y - 0 = y)
        c_eps = i0
        c_slope = i1 - j[i:] * i0
        row = np.zeros(m + 1)
        idx = np.arange(i, m)
        row[idx] += c_eps
        row[np.minimum(idx + 1, m)] += 0.5 * c_slope
        lower = idx - 1
        neg = lower < 0
        np.add.at(row, np.where(neg, 1, lower), np.where(neg, 0.5, -0.5) * c_slope)
        D[i] = -row[:m] / np.pi
    return D


@_register("onion_peeling")
@lru_cache(maxsize=16)
def onion_peeling_operator(m: int) -> np.ndarray:
    """Derivative-form onion-peeling operator (unit spacing), ``(n-n0)/n0 = D @ eps``.

    Ring k is the annulus [k - 1/2, k + 1/2] (ring 0: [0, 1/2]) with constant
    dn/dr = q_k.  The deflection of the ray at y_i = i is
    eps_i = (2 y_i / n0) sum_k q_k int_ring dr / sqrt(r^2 - y_i^2)
    (lower triangular, exact); on the axis eps_0 = 0 carries no information,
    so q_0 = q_1 is assumed.  n at the sample radii follows by integrating
    q inwards from n0 at the outer edge m - 1/2.
    """
    if m < 3:
        raise InputError(f"onion_peeling Abel inversion needs at least 3 samples, got {m}")
    G = np.zeros((m, m))
    for i in range(1, m):
        k = np.arange(i, m, dtype=float)
        lo = np.maximum(k - 0.5, i)
        i0, _ = _kernel_integrals(float(i), lo, k + 0.5)
        G[i, i:] = 2 * i * i0
    G[0, 0], G[0, 1] = 1.0, -1.0  # closes the system: q_0 = q_1
    Q = np.linalg.solve(G, np.eye(m))  # q = Q @ eps (column 0 carries the closure, eps_0 -> 0)
    Q[:, 0] = 0.0
    # n_i - n0 = -int_{r_i}^{m-1/2} q dr = -(q_i * 1/2 + sum_{k>i} q_k) for i >= 1; -(q_0/2 + ...) at 0
    L = np.triu(np.ones((m, m)), k=1) + 0.5 * np.eye(m)
    return -L @ Q


def _second_difference(m):
    P = np.zeros((m - 2, m))
    idx = np.arange(m - 2)
    P[idx, idx], P[idx, idx + 1], P[idx, idx + 2] = 1.0, -2.0, 1.0
    return P


def inversion_operator(m: int, *, method: str = "three_point", regularization: float = 0.0) -> np.ndarray:
    """Linear operator ``D`` with ``(n - n0)/n0 = D @ eps`` for m samples from the axis.

    With ``regularization = alpha > 0`` the result minimises
    ``|D^-1 f - eps|^2 + alpha * |P f|^2`` (P: second difference of f), i.e.
    Tikhonov smoothing of the inverted profile; ``alpha`` is dimensionless
    (the operators are scale-free in dr).
    """
    if method not in METHODS:
        raise InputError(f"unknown Abel method {method!r}; choose from {', '.join(METHODS)}")
    if regularization < 0 or not np.isfinite(regularization):
        raise InputError(f"regularization must be >= 0, got {regularization}")
    D = METHODS[method](m)
    if regularization == 0:
        return D
    G = np.linalg.pinv(D)  # forward operator consistent with the chosen method
    P = _second_difference(m)
    return np.linalg.solve(G.T @ G + regularization * P.T @ P, G.T)


def abel_invert_deflection(eps, *, dr_m: float, method: str = "three_point",
                           regularization: float = 0.0, n0: float = 1.0) -> np.ndarray:
    """Index change n(r) - n0 from one-sided deflection samples.

    Parameters
    ----------
    eps : (..., m) ndarray
        Deflection [rad] away from the axis (positive toward larger y),
        sampled at y_j = j * dr_m, j = 0 on the axis; last axis is y.
    dr_m : float
        Sample spacing [m] (the result does not depend on it: the kernel is
        scale-free; it is checked and kept for the radii).
    method : {"three_point", "onion_peeling"}
    regularization : float
        Tikhonov parameter (0 = none).
    n0 : float
        Ambient index (the result scales with it).

    Returns
    -------
    (..., m) ndarray
        n(r_j) - n0 at r_j = j * dr_m.

    References
    ----------
    Dasch (1992), Appl. Opt. 31:1146; references.md section 5.
    """
    eps = np.asarray(eps, dtype=float)
    if not (np.isfinite(dr_m) and dr_m > 0):
        raise InputError(f"dr_m must be positive, got {dr_m}")
    if eps.ndim == 0:
        raise InputError("eps must be at least 1-D")
    D = inversion_operator(eps.shape[-1], method=method, regularization=regularization)
    return n0 * eps @ D.T


# ---------------------------------------------------------------- symmetry axis and halves


def _interp_matrix(axis_pos, side, m, n):
    """Linear-interpolation matrix P (m, n) picking a row at axis_pos + side*j, j = 0..m-1.

    Positions outside the row get a zero row (ambient: zero deflection); ``inside`` flags the others.
    """
    pos = axis_pos + side * np.arange(m)
    inside = (pos >= 0) & (pos <= n - 1)
    i0 = np.clip(np.floor(pos).astype(int), 0, n - 1)
    i1 = np.clip(i0 + 1, 0, n - 1)
    t = pos - np.floor(pos)
    P = np.zeros((m, n))
    rows = np.arange(m)
    np.add.at(P, (rows, i0), np.where(inside, 1 - t, 0.0))
    np.add.at(P, (rows, i1), np.where(inside, t, 0.0))
    return P


def _pairs(eps, axis_pos, m):
    """eps interpolated at axis_pos + j and axis_pos - j (j = 0..m-1) for every row (vectorised)."""
    n = eps.shape[1]
    out = []
    for side in (1, -1):
        pos = axis_pos + side * np.arange(m)
        i0 = np.clip(np.floor(pos).astype(int), 0, n - 2)
        t = pos - i0
        out.append(eps[:, i0] * (1 - t) + eps[:, i0 + 1] * t)
    return out


def symmetry_residual(eps, axis_pos: float) -> float:
    """Relative antisymmetry misfit of eps (rows x cols, radial along columns) about ``axis_pos``.

    For an axisymmetric object the radial deflection is odd about the axis:
    eps(c + y) = -eps(c - y).  Returns sum (eps(c+y) + eps(c-y))^2 /
    sum (eps(c+y)^2 + eps(c-y)^2) over the overlap.
    """
    eps = np.asarray(eps, dtype=float)
    ncol = eps.shape[1]
    m = int(min(axis_pos, ncol - 1 - axis_pos)) + 1
    if m < 3:
        return np.inf
    right, left = _pairs(eps, axis_pos, m)
    ok = np.isfinite(right) & np.isfinite(left)
    den = np.sum(right[ok] ** 2 + left[ok] ** 2)
    return float(np.sum((right[ok] + left[ok]) ** 2) / den) if den > 0 else np.inf


def find_symmetry_axis(eps, *, search=None) -> float:
    """Axis position (fractional column index) minimising :func:`symmetry_residual`.

    Parameters
    ----------
    eps : (rows, cols) ndarray
        Radial deflection component (eps_x for a vertical axis).
    search : (float, float), optional
        Column range to search (default: the middle 80 % of the width).
        At most 64 evenly spaced lines are used.
    """
    eps = np.asarray(eps, dtype=float)
    if eps.shape[0] > 64:  # 64 evenly spaced lines fix the axis; keeps large fields fast
        eps = eps[np.linspace(0, eps.shape[0] - 1, 64).round().astype(int)]
    ncol = eps.shape[1]
    lo, hi = search if search is not None else (0.1 * (ncol - 1), 0.9 * (ncol - 1))
    grid = np.linspace(lo, hi, max(int(hi - lo) + 1, 3))
    costs = [symmetry_residual(eps, c) for c in grid]
    k = int(np.argmin(costs))
    a, b = grid[max(k - 1, 0)], grid[min(k + 1, grid.size - 1)]
    res = optimize.minimize_scalar(lambda c: symmetry_residual(eps, c), bounds=(a, b), method="bounded",
                                   options={"xatol": 1e-3})
    return float(res.x)


@dataclass
class AbelResult:
    """Abel inversion of a 2-D deflection field, both halves.

    All profile arrays are (rows, m) on radii ``r_m``; the field arrays are
    on the input grid (rows, cols).
    """

    r_m: np.ndarray
    axis_position: float
    left: np.ndarray  # n - n0 from the left half (NaN where unusable)
    right: np.ndarray
    combined: np.ndarray  # mean of the available halves
    sigma_left: np.ndarray
    sigma_right: np.ndarray
    sigma_combined: np.ndarray
    field: np.ndarray  # n - n0 mapped back to the grid: each half from its own inversion
    sigma_field: np.ndarray
    asymmetry: float  # rms(left - right) / max |combined|
    info: dict = field(default_factory=dict)


def abel_invert_field(eps_radial, *, spacing_m: float, axis_position=None, method="three_point",
                      regularization: float = 0.0, n0: float = 1.0, sigma=None) -> AbelResult:
    """Invert each row of a radial deflection field; left and right halves separately.

    Parameters
    ----------
    eps_radial : (rows, cols) ndarray
        Deflection component normal to the axis [rad], the axis running
        along the rows (vertical; transpose the inputs for a horizontal one).
        Positive toward larger column index.
    spacing_m : float
        Column spacing [m].
    axis_position : float, optional
        Axis as a fractional column index; found by :func:`find_symmetry_axis`
        when omitted.  Outside the image -> InputError.
    sigma : (rows, cols) ndarray, optional
        1-sigma uncertainty of eps; propagated exactly through the linear
        operator (independent errors).

    Returns
    -------
    AbelResult
    """
    eps = np.asarray(eps_radial, dtype=float)
    if eps.ndim != 2:
        raise InputError(f"deflection field must be 2-D, got shape {eps.shape}")
    nrow, ncol = eps.shape
    if axis_position is None:
        axis_position = find_symmetry_axis(eps)
    axis_position = float(axis_position)
    if not (0 <= axis_position <= ncol - 1):
        raise InputError(f"symmetry axis at column {axis_position:g} is outside the image (0..{ncol - 1})")
    m = int(np.floor(max(axis_position, ncol - 1 - axis_position))) + 1
    if m < 3:
        raise InputError("fewer than 3 samples between the symmetry axis and the image edge")
    D = inversion_operator(m, method=method, regularization=regularization)
    sig = None if sigma is None else np.nan_to_num(np.asarray(sigma, dtype=float), nan=0.0)
    halves, sigmas = {}, {}
    for name, side in (("left", -1), ("right", 1)):
        # one linear map for all rows (same axis): radial deflection = side * eps_column
        P = _interp_matrix(axis_position, side, m, ncol)
        L = n0 * side * (D @ P)
        used = P.any(axis=0)
        # rows with NaN inside the used range are skipped (that half of the row becomes NaN)
        ok_rows = np.isfinite(eps[:, used]).all(axis=1)
        out = np.full((nrow, m), np.nan)
        sout = np.full((nrow, m), np.nan)
        out[ok_rows] = np.nan_to_num(eps[ok_rows]) @ L.T
        if sig is not None:
            sout[ok_rows] = np.sqrt((sig[ok_rows] ** 2) @ (L**2).T)
        halves[name], sigmas[name] = out, sout
    left, right = halves["left"], halves["right"]
    both = np.isfinite(left) & np.isfinite(right)
    cnt = np.isfinite(left).astype(int) + np.isfinite(right)
    combined = np.where(cnt > 0, (np.nan_to_num(left) + np.nan_to_num(right)) / np.maximum(cnt, 1), np.nan)
    s_comb = np.sqrt(np.nansum(np.stack([sigmas["left"] ** 2, sigmas["right"] ** 2]), axis=0)) / np.maximum(cnt, 1)
    s_comb[cnt == 0] = np.nan
    scale = np.nanmax(np.abs(combined)) if np.isfinite(combined).any() else np.nan
    asym = float(np.sqrt(np.mean((left[both] - right[both]) ** 2)) / scale) if both.any() and scale > 0 else np.nan
    r = np.arange(m) * spacing_m
    # map back to the grid: column c lies at radius |c - axis| on its own side
    cols = np.arange(ncol)
    dist = np.abs(cols - axis_position)
    fld = np.full(eps.shape, np.nan)
    sfld = np.full(eps.shape, np.nan)
    grid = np.arange(m)
    for name, sel in (("left", cols < axis_position), ("right", cols >= axis_position)):
        for i in range(nrow):
            fld[i, sel] = np.interp(dist[sel], grid, halves[name][i])
            sfld[i, sel] = np.interp(dist[sel], grid, sigmas[name][i])
    return AbelResult(r_m=r, axis_position=axis_position, left=left, right=right, combined=combined,
                      sigma_left=sigmas["left"], sigma_right=sigmas["right"], sigma_combined=s_comb,
                      field=fld, sigma_field=sfld, asymmetry=asym,
                      info={"method": method, "regularization": regularization})
