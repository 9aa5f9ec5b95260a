"""Knife-edge schlieren: calibration, registration with BOS, comparison, virtual rendering.

Modules
-------
knife         knife orientation and the contrast law
calibration   knife-edge picture + no-flow picture -> deflection normal to the knife
registration  similarity transform between two views (control points, field correlation)
comparison    BOS result vs calibrated knife-edge result
virtual       knife-edge-like pictures rendered from a BOS deflection field
"""

from .calibration import (CalibrationLens, KnifeEdgeResult, ResponseFit, SchlierenOptics, calibrate_knife_edge,
                          knife_edge_variables)
from .knife import KnifeOrientation, contrast_ratio, knife_orientation

__all__ = [
    "CalibrationLens", "SchlierenOptics", "ResponseFit", "KnifeEdgeResult", "calibrate_knife_edge",
    "knife_edge_variables", "KnifeOrientation", "knife_orientation", "contrast_ratio",
]
