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
from .comparison import Comparison, compare_results, read_control_points, write_comparison
from .knife import KnifeOrientation, contrast_ratio, knife_orientation
from .registration import FieldRegistration, Similarity, register_fields, similarity_from_points
from .virtual import render_circular_cutoff, render_colour, render_knife_edge, write_virtual_views

__all__ = [
    "CalibrationLens", "SchlierenOptics", "ResponseFit", "KnifeEdgeResult", "calibrate_knife_edge",
    "knife_edge_variables", "KnifeOrientation", "knife_orientation", "contrast_ratio",
    "Comparison", "compare_results", "read_control_points", "write_comparison",
    "Similarity", "similarity_from_points", "FieldRegistration", "register_fields",
    "render_knife_edge", "render_circular_cutoff", "render_colour", "write_virtual_views",
]
