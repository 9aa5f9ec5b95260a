"""Two-dimensional fields: symmetry axis, left/right halves, asymmetry, uncertainty."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ...errors import InputError
from .operator import inversion_operator


def _interp_matrix(axis_pos, side, m, n):
    """Linear-interpolation matrix P (m, n) picking a row at axis_pos + side*j, j = 0..m-1.

    Positions outside the row get a zero row (ambient: zero deflection beyond the image edge).
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
    from scipy import optimize  # here: ~0.2 s to import, only the axis search needs it

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
