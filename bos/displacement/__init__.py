"""Displacement estimation: apparent background motion between two images.

One entry point, :func:`estimate`, selects an estimator from :data:`METHODS`
by name.  A feature at pixel ``p`` in the reference appears at ``p + d`` in
the measurement (docs/architecture.md); ``d = (dy, dx)`` in sensor pixels,
y down.
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError
from .correlation import correlate
from .field import DisplacementField
from .flow import optical_flow
from .motion import (CameraFitReport, RegionCheck, camera_region, check_ambient_region, coarse_camera_shift, fit_camera_motion,
                     fit_camera_motion_flow_aware, remove_camera_motion)
from .validation import normalized_median_test, replace_invalid

METHODS = {
    "correlation": correlate,
    "flow": optical_flow,
}

__all__ = [
    "METHODS",
    "DisplacementField",
    "estimate",
    "correlate",
    "optical_flow",
    "normalized_median_test",
    "replace_invalid",
    "camera_region",
    "coarse_camera_shift",
    "fit_camera_motion",
    "fit_camera_motion_flow_aware",
    "CameraFitReport",
    "RegionCheck",
    "check_ambient_region",
    "remove_camera_motion",
]


def estimate(reference, measurement, *, method: str = "correlation", mask=None, camera_motion=None,
             camera_model: str = "shift", border_px: int | None = None, camera_region_name: str | None = None,
             **options) -> DisplacementField:
    """Measure the apparent background displacement between two images.

    Parameters
    ----------
    reference, measurement : ndarray, 2-D
        Grey images of equal shape (reference: undisturbed background).
    method : str
        Name of an estimator in :data:`METHODS` (``"correlation"``: multi-pass
        window deformation; ``"flow"``: dense optical flow, one vector per
        pixel).
    mask : ndarray of bool, optional
        True where there is no data ("masked" in the result).
    camera_motion : None, "border" or ndarray of bool
        Remove a global camera motion estimated outside the flow: ``"border"``
        uses a band of ``border_px`` around the image edge, an array marks the
        flow-free region (True = no flow there).  None: no removal.  The
        motion is estimated twice: before the local estimate, an integer
        shift from a masked cross-correlation of that region
        (:func:`coarse_camera_shift`) seeds the estimator as its first
        predictor (unless ``initial`` is given), so shifts far beyond a
        window are followed; after it, a shift or affine motion is fitted to
        the vectors of the region that the data show carry no flow
        (:func:`fit_camera_motion_flow_aware`: flow crossing the region, a
        plume leaving through the border, is found and left out) and
        subtracted.  The fit report is in ``params["camera_motion_fit"]``
        and its warnings in ``params["warnings"]``.
    camera_model : {"shift", "affine"}
        Model of the camera motion fitted in that region.
    border_px : int, optional
        Width of the border band [px] (default: 1/8 of the smaller side).
    camera_region_name : str, optional
        How to name the camera-motion region in reports and warnings.
    **options
        Passed to the estimator (see :func:`correlate`, :func:`optical_flow`).

    Returns
    -------
    DisplacementField
        With ``camera_shift`` = the removed global shift (dy, dx) [px] and,
        for the affine model, ``params["camera_affine"]``.
    """
    if method not in METHODS:
        raise InputError(f"unknown displacement method {method!r}; choose one of {', '.join(sorted(METHODS))}")
    if camera_motion is None:
        return METHODS[method](reference, measurement, mask=mask, **options)
    region = camera_region(np.shape(reference), region=camera_motion, border_px=border_px)
    coarse = None
    if options.get("initial") is None:
        seen = region if mask is None or np.shape(mask) != region.shape else region & ~np.asarray(mask, dtype=bool)
        coarse = coarse_camera_shift(reference, measurement, seen)
        if coarse != (0.0, 0.0):
            options["initial"] = coarse
    result = METHODS[method](reference, measurement, mask=mask, **options)
    name = camera_region_name or ("border band" if isinstance(camera_motion, str) else "camera-motion region")
    motion, report = fit_camera_motion_flow_aware(result, region, model=camera_model, description=name)
    out = remove_camera_motion(result, motion)
    out.params["camera_coarse_shift"] = coarse
    out.params["camera_motion_fit"] = {
        "region": report.region, "candidate_vectors": report.candidate_vectors,
        "used_vectors": report.used_vectors, "excluded_fraction": report.excluded_fraction,
        "residual_rms_px": list(report.residual_rms_px), "side_shifts_px": report.side_shifts_px,
        "consistent": report.consistent}
    out.params["warnings"] = list(out.params.get("warnings", [])) + list(report.warnings)
    return out
