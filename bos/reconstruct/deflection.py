"""Displacement -> deflection -> index gradient: rig geometry and ray obliquity.

Paraxial model (docs/architecture.md, references.md section 3):

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


def deflection_from_displacement(dy_px, dx_px, *, rig, ray_slopes=None):
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

    Returns
    -------
    (eps_y, eps_x) : ndarrays [rad], toward higher refractive index.

    References
    ----------
    references.md section 3 (Exp. Fluids 2019 doi:10.1007/s00348-019-2865-4,
    Eq. 1 [D]); sign: docs/architecture.md.
    """
    dy, dx = _arrays(dy_px, dx_px)
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
    try:
        n_rows, n_cols = (int(v) for v in shape)
    except (TypeError, ValueError):
        raise InputError(f"shape must be (rows, cols), got {shape!r}") from None
    if n_rows <= 0 or n_cols <= 0:
        raise InputError(f"shape must be positive, got {shape!r}")
    size = float(rig.object_pixel_m)
    y = (np.asarray(rows_px, dtype=float) - (n_rows - 1) / 2.0) * size
    x = (np.asarray(cols_px, dtype=float) - (n_cols - 1) / 2.0) * size
    return y, x


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

    ``grad n = n0 eps / W`` (references.md section 3); with ``ray_slopes``
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
