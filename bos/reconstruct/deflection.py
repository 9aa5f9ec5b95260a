"""Displacement -> deflection -> index gradient: rig geometry and ray obliquity.

Paraxial model (docs/architecture.md; Exp. Fluids (2019)
doi:10.1007/s00348-019-2865-4, Eq. 1; Raffel (2015), Exp. Fluids 56:60):

    d_px = -(M Z_D / pixel_pitch) eps,   M = f / (Z_B - f)

and for a planar (spanwise uniform) object of width W:  grad n = n0 eps / W.

Ray obliquity (finite camera distance).  The chief ray of a pixel leaves the
lens centre with slopes t = (y_m, x_m) / Z_A, where (y_m, x_m) is the point
it crosses the object mid-plane (:func:`object_coordinates`, exact for the
pinhole/chief ray).  With c = sqrt(1 + |t|^2) = 1/cos(theta), a deflection
delta (perpendicular to the ray, its (y, x) components) moves the ray's hit
on the background plane by  dX = Z_D c (I + t t^T) delta  (linearised), and
the camera sees that shift as  d_px = -(M / pitch) dX.  A planar object of
width W along the axis, whose gradient is uniform along the short oblique
chord of length W c, deflects the ray by delta = (W c / n0)(grad n -
d (d . grad n)); the two combine to

    grad n = n0 dX / (W Z_D c^2) = cos^2(theta) * (paraxial value).

The paraxial model therefore overestimates planar gradients by
1/cos^2(theta) - 1 = |t|^2 at the edges of the field of view: 1 % at
theta = 5.7 deg, 4 % at 11 deg.  :func:`obliquity_error` reports it for a rig;
pass ``ray_slopes`` to correct it.  For axisymmetric objects the correction
is not applied (the Abel inversion assumes parallel rays); the same
:func:`obliquity_error` bounds the error across the object.
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError


def _arrays(*arrays):
    out = [np.asarray(a, dtype=float) for a in arrays]
    if any(a.shape != out[0].shape for a in out):
        raise InputError(f"component arrays differ in shape: {[a.shape for a in out]}")
    return out


def deflection_from_displacement(dy_px, dx_px, *, rig, ray_slopes=None, rows_px=None, cols_px=None,
                                 position_fraction: float = 1.0):
    """Deflection angles [rad] from sensor displacements [px].

    Parameters
    ----------
    dy_px, dx_px : ndarray
        Apparent background displacement (reference -> measurement) [px];
        NaN passes through.
    rig : bos.optics.Rig
        Uses ``sensitivity_px_per_rad`` = M Z_D / pitch.
    ray_slopes : (ndarray, ndarray), optional
        Chief-ray slopes (t_y, t_x) from :func:`ray_slopes`; when given, the
        oblique-ray geometry is inverted exactly (linearised in eps):
        delta = (I - t t^T / c^2) dX / (Z_D c).  Without it: paraxial.
    rows_px, cols_px : 1-D ndarray, optional
        Pixel positions of the vector grid.  When given, each vector is moved
        from the feature's reference position to the camera pixel of its ray
        (:func:`displacement_at_ray_pixels` with ``position_fraction``); this
        removes a bias of d . grad(d) / 2 per vector (2 % of the centreline
        temperature rise of a 100 K column with 1.8 px displacements).

    Returns
    -------
    (eps_y, eps_x) : ndarrays [rad], toward higher refractive index.

    References
    ----------
    Exp. Fluids (2019) doi:10.1007/s00348-019-2865-4, Eq. 1; Raffel (2015),
    Exp. Fluids 56:60; sign: docs/architecture.md.
    """
    dy, dx = _arrays(dy_px, dx_px)
    if (rows_px is None) != (cols_px is None):
        raise InputError("give both rows_px and cols_px (or neither)")
    if rows_px is not None:
        dy, dx = displacement_at_ray_pixels(dy, dx, rows_px=rows_px, cols_px=cols_px, fraction=position_fraction)
    s = float(rig.sensitivity_px_per_rad)
    if not (np.isfinite(s) and s > 0):
        raise InputError(f"rig sensitivity must be positive, got {s} px/rad")
    ey, ex = -dy / s, -dx / s  # = dX / Z_D on the background plane
    if ray_slopes is None:
        return ey, ex
    ty, tx = (np.broadcast_to(np.asarray(t, dtype=float), dy.shape) for t in ray_slopes)
    c2 = 1.0 + ty**2 + tx**2
    proj = (ty * ey + tx * ex) / c2
    c = np.sqrt(c2)
    return (ey - ty * proj) / c, (ex - tx * proj) / c


def object_coordinates(rows_px, cols_px, *, rig, shape):
    """Object-plane coordinates (y_m, x_m) of pixel positions (1-D vectors in, 1-D out).

    ``x = (col - (N_cols - 1)/2) * object_pixel_m``, likewise y (y down),
    ``object_pixel_m = pitch * Z_A / z_i`` (docs/architecture.md).
    """
    from ..optics import object_plane_coordinates

    return object_plane_coordinates(rows_px, cols_px, shape=shape, object_pixel_m=rig.object_pixel_m)


def ray_slopes(rows_px, cols_px, *, rig, shape):
    """Chief-ray slopes (t_y, t_x) = (y_m, x_m) / Z_A on the vector grid (2-D arrays)."""
    y, x = object_coordinates(rows_px, cols_px, rig=rig, shape=shape)
    z_a = float(rig.z_a)
    return np.broadcast_to(y[:, None] / z_a, (y.size, x.size)), np.broadcast_to(x[None, :] / z_a, (y.size, x.size))


def obliquity_error(*, rig, shape) -> float:
    """Largest relative error of the paraxial planar gradient in the frame, |t|^2 at a corner.

    The paraxial model overestimates grad n by the factor 1/cos^2(theta) =
    1 + |t|^2 (module docstring); returned for the frame corner.
    """
    y, x = object_coordinates([0], [0], rig=rig, shape=shape)
    return float((y[0] ** 2 + x[0] ** 2) / float(rig.z_a) ** 2)


def planar_index_gradient(eps_y, eps_x, *, width_m: float, n0: float, ray_slopes=None):
    """Refractive-index gradient (dn/dy, dn/dx) [1/m] of a planar object of width W.

    ``grad n = n0 eps / W`` (planar form of eps = (1/n0) int grad n dz, Exp.
    Fluids 2019 Eq. 1); with ``ray_slopes``
    the oblique chord is accounted for: grad n = (n0 / (W c)) (I + t t^T) eps.

    Parameters
    ----------
    eps_y, eps_x : ndarray
        Deflection [rad].
    width_m : float
        Extent W of the object along the line of sight [m].
    n0 : float
        Ambient refractive index.
    ray_slopes : (ndarray, ndarray), optional
        From :func:`ray_slopes`.
    """
    ey, ex = _arrays(eps_y, eps_x)
    if not (np.isfinite(width_m) and width_m > 0):
        raise InputError(f"object width must be positive, got {width_m} m")
    k = n0 / float(width_m)
    if ray_slopes is None:
        return k * ey, k * ex
    ty, tx = (np.broadcast_to(np.asarray(t, dtype=float), ey.shape) for t in ray_slopes)
    c = np.sqrt(1.0 + ty**2 + tx**2)
    dot = ty * ey + tx * ex
    return k * (ey + ty * dot) / c, k * (ex + tx * dot) / c


def displacement_at_ray_pixels(dy_px, dx_px, *, rows_px, cols_px, fraction: float = 1.0):
    """Move displacement vectors from feature positions to the camera pixels whose rays they belong to.

    The deflection belongs to the camera ray, i.e. to the pixel where a
    feature is seen in the *measurement* image.  A vector reported at the
    reference position p of a feature (the architecture convention) belongs
    to the ray at p + d; an estimator that reports the midpoint of the
    feature's motion (symmetric window deformation: reference sampled at
    p - d/2, measurement at p + d/2) belongs to p + d/2, so pass
    ``fraction=0.5`` for it.  The field is resampled back onto the grid by
    the first-order Taylor step d(g) = d(g + f d) - f d . grad d (error
    O(f^2 |d|^2 |d''|), sub-1e-3 px for displacements of a few px on
    windows of >= 8 px).

    Parameters
    ----------
    dy_px, dx_px : (ny, nx) ndarray
        Displacement [px] on the vector grid (NaN allowed; no correction
        next to NaN where the gradient is unknown).
    rows_px, cols_px : 1-D ndarray
        Pixel positions of the grid rows and columns.
    fraction : float
        Where along the motion the estimator places its vectors (1: at the
        reference position, 0.5: midpoint, 0: already at the ray pixel).

    Returns
    -------
    (dy, dx) on the same grid, now indexed by ray pixel.
    """
    dy, dx = _arrays(dy_px, dx_px)
    rows = np.asarray(rows_px, dtype=float)
    cols = np.asarray(cols_px, dtype=float)
    if dy.ndim != 2 or dy.shape != (rows.size, cols.size):
        raise InputError(f"displacement shape {dy.shape} does not match rows x cols ({rows.size}, {cols.size})")
    if rows.size < 2 or cols.size < 2 or fraction == 0:
        return dy, dx
    sy, sx = fraction * dy, fraction * dx
    out = []
    for d in (dy, dx):
        gr, gc = np.gradient(d, rows, cols)
        corr = sy * gr + sx * gc
        out.append(d - np.where(np.isfinite(corr), corr, 0.0))
    return out[0], out[1]
