"""Abel inversion of BOS deflection data (derivative form), axisymmetric objects.

For an axisymmetric index field n(r) viewed side-on, the deflection normal to
the axis at distance y from it is eps(y) = F'(y)/n0 with F the projection of
n - n0, so the inverse Abel transform needs no numerical differentiation:

    n(r) - n0 = -(n0/pi) int_r^inf eps(y) dy / sqrt(y^2 - r^2)

(the BOS form of the inverse Abel transform, Dasch 1992, with eps = F'/n0;
checked numerically).  Each method is a linear operator D (one
``(m, m)`` matrix for ``m`` samples at y_j = j*dr, j = 0 at the axis) with
``(n - n0)/n0 = D @ eps``; the registry :data:`METHODS` maps names to the
functions that build D:

``"three_point"``
    eps is taken as linear on each interval [y_j - dr/2, y_j + dr/2] with the
    three-point (central) slope, and the kernel integrated exactly — the
    derivative-form counterpart of Dasch's three-point method (which fits a
    quadratic to F, i.e. a linear F' from three points).  The outer edge of
    the data has its own model, eps = A + B t + C sqrt(t) on the last two
    intervals, with the sqrt part removed from the whole line and inverted
    exactly: profiles that end at the edge give eps a jump or square-root
    cusp there (see :mod:`.three_point`).
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
"""

from .field import AbelResult, abel_invert_field, find_symmetry_axis, symmetry_residual
from .onion_peeling import onion_peeling_operator
from .operator import METHODS, abel_invert_deflection, inversion_operator
from .three_point import three_point_operator

__all__ = ["METHODS", "AbelResult", "abel_invert_deflection", "abel_invert_field", "find_symmetry_axis",
           "inversion_operator", "onion_peeling_operator", "symmetry_residual", "three_point_operator"]
