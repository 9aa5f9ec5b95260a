"""Deflection field -> refractive index -> density -> temperature, with 1-sigma uncertainty.

Planar objects (known width W): grad n = n0 eps / W, integrated by least
squares (:mod:`.poisson`), level set from a reference region at ambient.
Axisymmetric objects: derivative-form Abel inversion (:mod:`.abel`), n -> n0
at the outer edge of the data.  Then Gladstone-Dale (rho = (n - 1)/K with the
medium's gas, mixture and wavelength) and the gas law at the medium's
pressure (``Medium.temperature_from_density``).

Uncertainty: the per-vector deflection uncertainty propagates linearly,
exactly through the Abel operator (a matrix) and by Monte Carlo with a fixed
seed through the Poisson solvers; then sigma_rho = sigma_n / K and
sigma_T = T sigma_rho / rho (first order; T ~ 1/rho at fixed pressure).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from ..errors import InputError
from .abel import abel_invert_field
from .deflection import planar_index_gradient
from .poisson import integrate_gradient, integrate_gradient_with_uncertainty


@dataclass
class DensityField:
    """Reconstructed index, density and temperature on the vector grid.

    Attributes
    ----------
    index, density, temperature : ndarray
        Refractive index n, density rho [kg/m^3], temperature T [K]; NaN
        where ``masked`` or ``invalid``.
    sigma_index, sigma_density, sigma_temperature : ndarray
        1-sigma uncertainties propagated from the deflection uncertainty
        (zeros when none was given).
    masked, invalid : ndarray of bool
        User mask ("no data") and rejected/unreconstructable points, kept
        separate.
    y_m, x_m : ndarray or None
        Object-plane coordinates of rows and columns [m] (y down).
    kind : str
        ``"planar"`` or ``"axisymmetric"``.
    info : dict
        Method details: solver, reference, axis position, asymmetry...
    """

    index: np.ndarray
    density: np.ndarray
    temperature: np.ndarray
    sigma_index: np.ndarray
    sigma_density: np.ndarray
    sigma_temperature: np.ndarray
    masked: np.ndarray
    invalid: np.ndarray
    y_m: np.ndarray | None = None
    x_m: np.ndarray | None = None
    kind: str = "planar"
    info: dict = field(default_factory=dict)


def _inputs(eps_y, eps_x, masked, invalid, sigma_y, sigma_x):
    ey = np.asarray(eps_y, dtype=float)
    ex = np.asarray(eps_x, dtype=float)
    if ey.ndim != 2 or ey.shape != ex.shape:
        raise InputError(f"eps_y and eps_x must be 2-D arrays of one shape, got {ey.shape} and {ex.shape}")
    flags = []
    for name, f in (("masked", masked), ("invalid", invalid)):
        f = np.zeros(ey.shape, bool) if f is None else np.asarray(f, dtype=bool)
        if f.shape != ey.shape:
            raise InputError(f"{name} shape {f.shape} does not match the field {ey.shape}")
        flags.append(f.copy())
    masked, invalid = flags
    if (masked | invalid).all():
        raise InputError("no valid vectors: the whole field is masked or invalid")
    bad = ~(masked | invalid) & ~(np.isfinite(ey) & np.isfinite(ex))
    if bad.any():
        raise InputError(f"deflection field has {int(bad.sum())} NaN/inf vectors not flagged masked or invalid")
    sig = []
    for s in (sigma_y, sigma_x):
        s = np.zeros(ey.shape) if s is None else np.broadcast_to(np.asarray(s, dtype=float), ey.shape)
        sig.append(np.where(np.isfinite(s), s, 0.0))
    return ey, ex, masked, invalid, sig[0], sig[1]


def _reference_index(medium, reference_temperature_k):
    if reference_temperature_k is None:
        return float(medium.ambient_index)
    t = float(reference_temperature_k)
    if not (np.isfinite(t) and t > 0):
        raise InputError(f"reference temperature must be positive, got {reference_temperature_k!r} K")
    return float(medium.index_from_density(medium.density_from_temperature(t)))


def _finish(n, sigma_n, medium, masked, invalid, y_m, x_m, kind, info):
    """Density and temperature from the index, flags and uncertainties."""
    lost = ~np.isfinite(n) & ~masked
    invalid = invalid | lost
    n = np.where(masked | invalid, np.nan, n)
    k = float(medium.gladstone_dale)
    rho = np.asarray(medium.density_from_index(n), dtype=float)
    t = np.asarray(medium.temperature_from_density(rho), dtype=float)
    sigma_n = np.where(np.isfinite(n), sigma_n, np.nan)
    sigma_rho = sigma_n / k
    with np.errstate(invalid="ignore", divide="ignore"):
        sigma_t = np.abs(t / rho) * sigma_rho
    return DensityField(index=n, density=rho, temperature=t, sigma_index=sigma_n, sigma_density=sigma_rho,
                        sigma_temperature=sigma_t, masked=masked, invalid=invalid,
                        y_m=None if y_m is None else np.asarray(y_m, dtype=float),
                        x_m=None if x_m is None else np.asarray(x_m, dtype=float), kind=kind, info=info)


def planar_density(eps_y, eps_x, *, spacing_m, width_m: float, medium, reference_region=None,
                   reference_temperature_k: float | None = None, masked=None, invalid=None,
                   sigma_y=None, sigma_x=None, weighted: bool = True, dirichlet: dict | None = None,
                   method: str = "auto", ray_slopes=None, y_m=None, x_m=None,
                   n_samples: int = 32, seed: int = 0,
                   progress: Callable[[float], None] | None = None) -> DensityField:
    """Density and temperature of a planar (spanwise uniform) object of known width.

    Parameters
    ----------
    eps_y, eps_x : (ny, nx) ndarray
        Deflection [rad] on the vector grid (NaN only where flagged).
    spacing_m : float or (float, float)
        Object-plane grid step [m] (dy, dx).
    width_m : float
        Extent W of the object along the line of sight [m].
    medium : bos.media.Medium
        Gas (or mixture), wavelength, pressure; its ``temperature_k`` is the
        ambient temperature of the reference region.
    reference_region : bool ndarray or {"top", "bottom", "left", "right"}
        Where the gas is at ambient conditions (required unless ``dirichlet``
        fixes the level).
    reference_temperature_k : float, optional
        Temperature in the reference region if not the medium's.
    masked, invalid : bool ndarray, optional
        Flags carried to the result; their vectors are left out.
    sigma_y, sigma_x : ndarray, optional
        1-sigma deflection uncertainty [rad]; used as least-squares weights
        (1/sigma^2) when ``weighted`` and propagated by Monte Carlo
        (``n_samples``, ``seed``).
    dirichlet : dict, optional
        Known index values on rectangle edges (see
        :func:`~bos.reconstruct.poisson.integrate_gradient`).
    method : str
        Poisson solver (see :data:`~bos.reconstruct.poisson.SOLVERS`).
    ray_slopes : (ndarray, ndarray), optional
        Chief-ray slopes from :func:`~bos.reconstruct.deflection.ray_slopes`
        to correct the oblique chords (finite camera distance).
    y_m, x_m : 1-D ndarray, optional
        Coordinates stored with the result.
    n_samples, seed : int
        Monte Carlo samples of the uncertainty and their random seed (see
        :func:`~bos.reconstruct.poisson.integrate_gradient_uncertainty`).
    progress : callable, optional
        ``progress(fraction)`` with the fraction of the work done (0..1),
        called after the main solve and after each Monte Carlo sample.

    Returns
    -------
    DensityField

    References
    ----------
    grad rho = n0 eps / (K W) from eps = (1/n0) int grad n dz (Exp. Fluids
    (2019) doi:10.1007/s00348-019-2865-4, Eq. 1) and n - 1 = K rho; Poisson
    integration: Simchony, Chellappa & Shao (1990), IEEE TPAMI 12:435 and
    Southwell (1980), JOSA 70:998 (both from memory).
    """
    ey, ex, masked, invalid, sy, sx = _inputs(eps_y, eps_x, masked, invalid, sigma_y, sigma_x)
    if reference_region is None and not dirichlet:
        raise InputError("no reference region: give reference_region (bool mask or edge name) where the gas is ambient")
    n0 = float(medium.ambient_index)
    n_ref = _reference_index(medium, reference_temperature_k)
    gy, gx = planar_index_gradient(np.nan_to_num(ey), np.nan_to_num(ex), width_m=width_m, n0=n0,
                                   ray_slopes=ray_slopes)
    sgy, sgx = planar_index_gradient(sy, sx, width_m=width_m, n0=n0, ray_slopes=ray_slopes)
    sgy, sgx = np.abs(sgy), np.abs(sgx)
    has_sigma = bool(np.any(sgy > 0) or np.any(sgx > 0))
    weights = None
    if weighted and has_sigma:
        floor = 1e-3 * np.median(np.concatenate([sgy[sgy > 0], sgx[sgx > 0]]))
        weights = (1.0 / np.maximum(sgy, floor) ** 2, 1.0 / np.maximum(sgx, floor) ** 2)
    options = dict(spacing_m=spacing_m, mask=masked, invalid=invalid, weights=weights,
                   dirichlet=dirichlet, reference_region=reference_region, method=method)
    if has_sigma:
        n, sigma_n, solver = integrate_gradient_with_uncertainty(
            gy, gx, sigma_y=sgy, sigma_x=sgx, reference_value=n_ref, n_samples=n_samples, seed=seed,
            progress=progress, **options)
    else:
        n = integrate_gradient(gy, gx, reference_value=n_ref, **options)
        sigma_n, solver = np.zeros(ey.shape), method
    if progress is not None:
        progress(1.0)
    info = {"method": method, "solver": solver, "width_m": float(width_m), "reference_index": n_ref, "weighted": weights is not None,
            "obliquity_corrected": ray_slopes is not None, "n_samples": n_samples if has_sigma else 0}
    return _finish(n, sigma_n, medium, masked, invalid, y_m, x_m, "planar", info)


def axisymmetric_density(eps_y, eps_x, *, spacing_m: float, medium, axis: str = "vertical",
                         axis_position: float | None = None, method: str = "three_point",
                         regularization: float = 0.0, reference_temperature_k: float | None = None,
                         masked=None, invalid=None, sigma_y=None, sigma_x=None,
                         y_m=None, x_m=None, progress: Callable[[float], None] | None = None) -> DensityField:
    """Density and temperature of an axisymmetric object by Abel inversion of the deflection.

    Each line normal to the axis is inverted on its own, left and right
    halves separately (``info["asymmetry"]`` = rms difference / peak |n - n0|);
    the field shows each half's own inversion.  The index is taken to be
    ambient (``n0`` at ``reference_temperature_k``, default the medium's
    temperature) beyond the edge of the data.

    Parameters
    ----------
    eps_y, eps_x : (ny, nx) ndarray
        Deflection [rad] (NaN only where flagged).
    spacing_m : float
        Grid step normal to the axis [m].
    medium : bos.media.Medium
    axis : {"vertical", "horizontal"}
        A vertical axis is a column position (radial component eps_x); a
        horizontal axis a row position (radial component eps_y).
    axis_position : float, optional
        Axis as a fractional column (row) index of the grid; found by a
        symmetry fit when omitted.
    method : {"three_point", "onion_peeling"}
    regularization : float
        Tikhonov parameter for noisy data (0 = none).
    sigma_y, sigma_x : ndarray, optional
        1-sigma deflection uncertainty [rad], propagated exactly.
    progress : callable, optional
        ``progress(fraction)`` with the fraction of the work done (0..1).

    Returns
    -------
    DensityField

    References
    ----------
    Dasch (1992), "One-dimensional tomography: a comparison of Abel,
    onion-peeling, and filtered backprojection methods", Appl. Opt. 31:1146.
    """
    ey, ex, masked, invalid, sy, sx = _inputs(eps_y, eps_x, masked, invalid, sigma_y, sigma_x)
    if axis not in ("vertical", "horizontal"):
        raise InputError(f"axis must be 'vertical' or 'horizontal', got {axis!r}")
    vertical = axis == "vertical"
    radial, sig = (ex, sx) if vertical else (ey.T, sy.T)
    flags = (masked | invalid) if vertical else (masked | invalid).T
    radial = np.where(flags, np.nan, radial)
    n_ref = _reference_index(medium, reference_temperature_k)
    if progress is not None:
        progress(0.0)
    res = abel_invert_field(radial, spacing_m=spacing_m, axis_position=axis_position, method=method,
                            regularization=regularization, n0=n_ref, sigma=sig)
    if progress is not None:
        progress(1.0)
    n = n_ref + (res.field if vertical else res.field.T)
    sigma_n = res.sigma_field if vertical else res.sigma_field.T
    info = {"method": method, "regularization": regularization, "axis": axis,
            "axis_position": res.axis_position, "asymmetry": res.asymmetry, "reference_index": n_ref,
            "abel": res}
    return _finish(n, sigma_n, medium, masked, invalid, y_m, x_m, "axisymmetric", info)
