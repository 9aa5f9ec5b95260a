"""Reconstruction: displacement -> deflection -> index gradient -> index -> density -> temperature.

Modules (one job each):

- :mod:`.poisson`   least-squares integration of gradient fields (registry ``SOLVERS``)
- :mod:`.abel`      Abel inversion of deflection data (registry ``METHODS``)
- :mod:`.analytic`  analytic test pairs (Abel pairs, manufactured Poisson solution)
"""

from .abel import METHODS as ABEL_METHODS
from .abel import AbelResult, abel_invert_deflection, abel_invert_field, find_symmetry_axis
from .poisson import SOLVERS, integrate_gradient, integrate_gradient_uncertainty

__all__ = [
    "ABEL_METHODS", "AbelResult", "SOLVERS", "abel_invert_deflection", "abel_invert_field",
    "find_symmetry_axis", "integrate_gradient", "integrate_gradient_uncertainty",
]
