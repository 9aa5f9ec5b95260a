"""Reconstruction: displacement -> deflection -> index gradient -> index -> density -> temperature.

Modules (one job each):

- :mod:`.deflection` rig geometry: displacement -> deflection, coordinates, ray obliquity
- :mod:`.poisson`    least-squares integration of gradient fields (registry ``SOLVERS``)
- :mod:`.abel`       Abel inversion of deflection data (registry ``METHODS``)
- :mod:`.density`    planar / axisymmetric density and temperature with uncertainty
- :mod:`.analytic`   analytic test pairs (Abel pairs, manufactured Poisson solution)
"""

from .abel import METHODS as ABEL_METHODS
from .abel import AbelResult, abel_invert_deflection, abel_invert_field, find_symmetry_axis
from .deflection import (deflection_from_displacement, displacement_at_ray_pixels, object_coordinates,
                         obliquity_error,
                         planar_index_gradient, ray_slopes)
from .density import DensityField, axisymmetric_density, planar_density
from .poisson import SOLVERS, integrate_gradient, integrate_gradient_uncertainty

__all__ = [
    "ABEL_METHODS", "AbelResult", "DensityField", "SOLVERS", "abel_invert_deflection", "abel_invert_field",
    "axisymmetric_density", "deflection_from_displacement", "displacement_at_ray_pixels", "find_symmetry_axis", "integrate_gradient",
    "integrate_gradient_uncertainty", "object_coordinates", "obliquity_error", "planar_density",
    "planar_index_gradient", "ray_slopes",
]
