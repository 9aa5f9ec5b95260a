"""Configuration translation: experiment settings -> options of the stage functions.

Pure functions of an :class:`bos.config.Experiment` (and array shapes); no I/O.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from .config import Experiment
from .errors import ConfigError

def window_schedule(window_px: int, final_window_px: int, passes: int) -> tuple[int, ...]:
    """Window sizes [px] of the correlation passes, large to small.

    ``passes`` sizes spaced geometrically from ``window_px`` down to
    ``final_window_px`` and rounded to even numbers (64, 16, 3 -> 64, 32, 16).
    One pass uses the final window only.
    """
    if final_window_px > window_px:
        raise ConfigError(f"processing.final_window_px ({final_window_px}) is larger than "
                          f"processing.window_px ({window_px})")
    if passes == 1:
        return (int(final_window_px),)
    sizes = np.geomspace(window_px, final_window_px, passes)
    out = [max(4, 2 * int(round(v / 2))) for v in sizes]
    out[0], out[-1] = int(window_px), int(final_window_px)
    return tuple(out)


def displacement_options(exp: Experiment) -> dict[str, Any]:
    """Keyword options passed to :func:`bos.displacement.estimate` for ``exp``
    (correlation options; other estimators get only the validation settings)."""
    p = exp.processing
    if p.method == "correlation":
        return {
            "windows": window_schedule(p.window_px, p.final_window_px, p.passes),
            "overlap": p.overlap,
            "threshold": p.outlier_threshold,
            "epsilon": p.outlier_eps_px,
        }
    return {}


def region_box(region: Any, shape: tuple[int, int]) -> np.ndarray:
    """Boolean image of a reference region ('left', 'edges', [r0, r1, c0, c1] ...)."""
    rows, cols = shape
    out = np.zeros(shape, dtype=bool)
    b = max(1, min(shape) // 8)
    if isinstance(region, str):
        if region in ("left", "edges"):
            out[:, :b] = True
        if region in ("right", "edges"):
            out[:, cols - b:] = True
        if region in ("top", "edges"):
            out[:b, :] = True
        if region in ("bottom", "edges"):
            out[rows - b:, :] = True
        return out
    r0, r1, c0, c1 = region
    out[r0:r1, c0:c1] = True
    return out


def camera_motion_region(exp: Experiment, shape: tuple[int, int]):
    """What to pass as ``camera_motion`` to :func:`bos.displacement.estimate`.

    ``"none"`` -> None; ``"border"`` -> a band around the image edge;
    ``"mask"`` -> the reconstruction's reference region (where the user says
    the gas is ambient, hence no flow); ``"auto"`` (default) -> the declared
    reference region for planar objects, the border band otherwise.  In every
    case the fit keeps only the vectors the data show to be flow-free
    (:func:`bos.displacement.fit_camera_motion_flow_aware`).
    """
    mode = exp.processing.camera_motion
    if mode == "none":
        return None
    if mode == "border" or (mode == "auto" and exp.reconstruction.kind != "planar"):
        return "border"
    return region_box(exp.reconstruction.reference_region, shape)


def camera_region_name(exp: Experiment) -> str | None:
    """Human name of the camera-motion region of ``exp`` (for reports), None if no removal."""
    mode = exp.processing.camera_motion
    if mode == "none":
        return None
    if mode == "border" or (mode == "auto" and exp.reconstruction.kind != "planar"):
        return "border band"
    region = exp.reconstruction.reference_region
    label = region if isinstance(region, str) else "[" + ", ".join(str(v) for v in region) + "]"
    return f"reference region {label}"


def _grid_index(position_px: float, grid_px: np.ndarray) -> float:
    """Fractional index on a vector grid of a pixel position (linear, extrapolated)."""
    g = np.asarray(grid_px, float)
    if g.size < 2:
        return 0.0
    return float((position_px - g[0]) / (g[1] - g[0]))


def reference_mask(region: Any, rows_px: np.ndarray, cols_px: np.ndarray) -> np.ndarray:
    """Vector-grid points of the reconstruction reference region (ambient gas).

    ``"left"``/``"right"``/``"top"``/``"bottom"``: the outermost grid column/row
    on that side; ``"edges"``: all four; ``(row0, row1, col0, col1)``: grid
    points whose pixel position lies in that box (end exclusive).

    Raises
    ------
    ConfigError
        The box contains no grid point.
    """
    shape = (len(rows_px), len(cols_px))
    out = np.zeros(shape, bool)
    if isinstance(region, str):
        if region in ("left", "edges"):
            out[:, 0] = True
        if region in ("right", "edges"):
            out[:, -1] = True
        if region in ("top", "edges"):
            out[0, :] = True
        if region in ("bottom", "edges"):
            out[-1, :] = True
        return out
    r0, r1, c0, c1 = region
    rr = (np.asarray(rows_px) >= r0) & (np.asarray(rows_px) < r1)
    cc = (np.asarray(cols_px) >= c0) & (np.asarray(cols_px) < c1)
    out[np.ix_(rr, cc)] = True
    if not out.any():
        raise ConfigError(f"reconstruction.reference_region {list(region)} contains no vector-grid point "
                          "(make the box larger than the vector spacing)")
    return out


def _dirichlet(boundary: str, region: Any, n_ref: float) -> dict | None:
    """Dirichlet edges for the planar integration: ambient index on the edges."""
    if boundary == "neumann":
        return None
    if boundary == "dirichlet":
        return {e: n_ref for e in ("top", "bottom", "left", "right")}
    if isinstance(region, str):
        return {e: n_ref for e in (("top", "bottom", "left", "right") if region == "edges" else (region,))}
    raise ConfigError("reconstruction.boundary = 'mixed' needs reference_region to be an edge name")

