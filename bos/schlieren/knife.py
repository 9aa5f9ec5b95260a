"""Knife-edge orientation and the contrast law of knife-edge schlieren.

Orientation convention (ours, see docs/knife-edge.md)
-----------------------------------------------------
The knife edge is given by the angle ``theta`` of the edge line in the
picture, measured from the picture's horizontal axis, counter-clockwise as
seen on the screen: ``"horizontal"`` = 0 deg, ``"vertical"`` = 90 deg.
The *knife normal* is the unit vector

    k = (k_y, k_x) = (cos theta, sin theta)        (object plane, y down)

i.e. the edge direction turned 90 deg clockwise on the screen: a vertical
knife senses ``+x``, a horizontal knife senses ``+y`` (down).  The sensed
quantity is ``eps_n = eps . k``; by our convention a deflection along ``+k``
moves the light-source image away from the blade and brightens the picture.
If the blade of a rig sits on the other side, add 180 deg (``k -> -k``).

Contrast law
------------
A source image of height ``h`` (normal to the edge) of which ``a`` passes
the edge is shifted by ``f2 * eps_n`` by a deflection; the transmitted
light follows the passed height, clipped to [0, h]:

    I / I0 = clip(1 + f2 eps_n / a, 0, h / a),     a = (1 - c) h

with ``c`` the cutoff fraction (fraction of the source image blocked by the
knife when there is no flow).  The response is linear between the dark
limit ``eps_n = -a / f2`` and the bright limit ``eps_n = (h - a) / f2``.

References
----------
Settles, G. S. (2001). *Schlieren and Shadowgraph Techniques*. Springer,
ch. 3 (contrast C = f2 eps / a, sensitivity dC/deps = f2 / a, measuring
range) [from memory].
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..errors import InputError

__all__ = ["KnifeOrientation", "knife_orientation", "contrast_ratio", "check_cutoff"]

_NAMED = {"horizontal": 0.0, "vertical": 90.0}


@dataclass(frozen=True)
class KnifeOrientation:
    """A knife-edge orientation.

    Attributes
    ----------
    angle_deg : float
        Angle of the edge line from the picture's horizontal, counter-clockwise
        on the screen, in [0, 360).
    normal : (float, float)
        Unit knife normal (k_y, k_x) in the object plane (y down).
    """

    angle_deg: float
    normal: tuple[float, float]

    @property
    def label(self) -> str:
        for name, value in _NAMED.items():
            if math.isclose(self.angle_deg, value, abs_tol=1e-9):
                return name
        return f"{self.angle_deg:g} deg"

    def project(self, eps_y, eps_x):
        """Component eps . k of a deflection field [rad]."""
        ky, kx = self.normal
        return ky * np.asarray(eps_y, float) + kx * np.asarray(eps_x, float)


def knife_orientation(knife) -> KnifeOrientation:
    """Parse a knife orientation: ``"vertical"``, ``"horizontal"`` or an angle in degrees.

    Raises
    ------
    InputError
        Missing (None or empty) or unparseable orientation, non-finite angle.
    """
    if knife is None or (isinstance(knife, str) and not knife.strip()):
        raise InputError("knife orientation missing: give --knife vertical, horizontal or an angle in degrees")
    if isinstance(knife, KnifeOrientation):
        return knife
    if isinstance(knife, str):
        key = knife.strip().lower()
        if key in _NAMED:
            angle = _NAMED[key]
        else:
            try:
                angle = float(key.removesuffix("deg").strip())
            except ValueError:
                raise InputError(f"knife orientation {knife!r} is not 'vertical', 'horizontal' "
                                 "or an angle in degrees") from None
    else:
        try:
            angle = float(knife)
        except (TypeError, ValueError):
            raise InputError(f"knife orientation {knife!r} is not 'vertical', 'horizontal' "
                             "or an angle in degrees") from None
    if not math.isfinite(angle):
        raise InputError(f"knife angle must be finite, got {knife!r}")
    angle = angle % 360.0
    t = math.radians(angle)
    ky, kx = math.cos(t), math.sin(t)
    # exact zeros for the named orientations (no 6e-17 components in the files)
    ky, kx = (0.0 if abs(v) < 1e-15 else v for v in (ky, kx))
    return KnifeOrientation(angle_deg=angle, normal=(ky, kx))


def check_cutoff(cutoff: float) -> float:
    """Validate a cutoff fraction (blocked part of the source image), 0 <= c < 1."""
    try:
        c = float(cutoff)
    except (TypeError, ValueError):
        raise InputError(f"cutoff fraction must be a number in [0, 1), got {cutoff!r}") from None
    if not (0.0 <= c < 1.0):
        raise InputError(f"cutoff fraction must be in [0, 1) (fraction of the source image blocked), got {c!r}")
    return c


def contrast_ratio(eps_n, *, cutoff_deflection_rad: float, cutoff: float = 0.5) -> np.ndarray:
    """Knife-edge intensity ratio I/I0 for the deflection component ``eps_n`` [rad].

    Parameters
    ----------
    eps_n : array_like
        Deflection component along the knife normal [rad].
    cutoff_deflection_rad : float
        ``a / f2``: the deflection that darkens the picture completely
        (inverse sensitivity) [rad].
    cutoff : float
        Fraction of the source image blocked with no flow (0.5 = half).

    Returns
    -------
    ndarray
        ``clip(1 + eps_n / (a/f2), 0, 1/(1 - cutoff))``.

    References
    ----------
    Settles (2001), *Schlieren and Shadowgraph Techniques*, ch. 3 [from memory].
    """
    ec = float(cutoff_deflection_rad)
    if not (math.isfinite(ec) and ec > 0):
        raise InputError(f"cutoff deflection must be positive, got {cutoff_deflection_rad!r}")
    c = check_cutoff(cutoff)
    return np.clip(1.0 + np.asarray(eps_n, float) / ec, 0.0, 1.0 / (1.0 - c))
