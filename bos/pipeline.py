"""One experiment end to end: images -> displacement -> deflection -> density -> files.

:func:`run_experiment` is pure apart from reading the two images (and the
mask): it returns a :class:`RunResult` and writes nothing.
:func:`save_run` writes the HDF5 result, the figures and a profile CSV, each
atomically.  The command line (``bos run``, ``bos demo``) is a thin layer
over these two functions; notebooks can call the stages one by one
(:func:`load_inputs`, :func:`measure_displacement`, :func:`reconstruct`,
:func:`summarize`).
"""

from __future__ import annotations

import contextlib
import math
import os
import warnings as warnings_module
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import numpy as np

from .config import Experiment
from .errors import ConfigError, DataFileError, InputError

#: progress(stage, fraction) with fraction in [0, 1]; called at stage boundaries.
ProgressFn = Callable[[str, float], None]

STAGES = ("read images", "displacement", "reconstruction")


@dataclass
class Inputs:
    """The loaded images and mask of one experiment.

    Attributes
    ----------
    reference, measurement : ndarray
        Luminance images (float, same shape).
    mask : ndarray of bool or None
        True = no data (user mask), same shape as the images.
    paths : dict
        ``{"reference": Path, "measurement": Path, "mask": Path}`` of the files read.
    sha256 : dict
        SHA-256 of each file read.
    warnings : list of str
        Warnings raised while reading (lossy compression, bit-depth mix ...).
    info : dict
        Per-image metadata (bit depth, format, EXIF) for provenance.
    exif : dict
        EXIF of the reference image (``focal_length_m``, ``f_number`` ...).
    """

    reference: np.ndarray
    measurement: np.ndarray
    mask: np.ndarray | None
    paths: dict[str, Path]
    sha256: dict[str, str]
    warnings: list[str] = field(default_factory=list)
    info: dict[str, Any] = field(default_factory=dict)
    exif: dict[str, Any] = field(default_factory=dict)


@dataclass
class RunResult:
    """Everything computed for one experiment.

    Attributes
    ----------
    displacement : bos.displacement.DisplacementField
        Apparent background displacement [sensor px] on the vector grid.
    eps_y, eps_x : ndarray
        Deflection angle [rad] on the vector grid (NaN at masked/invalid).
    density : bos.reconstruct.DensityField or None
        Density, temperature, index and their 1-sigma uncertainties
        (``None`` when reconstruction is ``"none"``).
    y_m, x_m : ndarray
        Object-plane coordinates [m] of the grid rows and columns; y points down.
    summary : dict
        Peak |d| [px], valid fraction, median uncertainty, density and
        temperature range, camera shift, warnings (JSON-ready).
    warnings : list of str
        Everything the user should know about this run.
    attrs : dict
        Provenance (rig, medium, processing, reconstruction, input hashes,
        software version, cautions), JSON-ready.
    inputs : Inputs
        The images and mask that were processed.
    acoustic : bos.acoustics.AcousticField or None
        For ``source.kind = "ultrasound"``: acoustic pressure p' = c^2 rho'
        and the isentropic temperature (which then replaces the isobaric one
        in the outputs).
    """

    displacement: Any
    eps_y: np.ndarray
    eps_x: np.ndarray
    density: Any
    y_m: np.ndarray
    x_m: np.ndarray
    summary: dict[str, Any]
    warnings: list[str]
    attrs: dict[str, Any]
    inputs: Inputs
    acoustic: Any = None


def _tick(progress: ProgressFn | None, stage: str, fraction: float) -> None:
    if progress is not None:
        progress(stage, fraction)


# ---------------------------------------------------------------------------
# Stage 1: inputs
# ---------------------------------------------------------------------------


def _image_path(exp: Experiment, key: str) -> Path:
    path = exp.resolve(getattr(exp.images, key))
    if path is None:
        raise ConfigError(f"missing value: images.{key} (give it in the experiment file or with --{key})")
    return path


def load_inputs(exp: Experiment) -> Inputs:
    """Read the reference and measurement images and the mask of ``exp``.

    Raises
    ------
    ConfigError
        An image path is not given.
    DataFileError
        A file is missing, unreadable or corrupt.
    InputError
        The pair does not match (size, bit depth) or the mask has the wrong size.
    """
    from . import images, store

    ref_path, meas_path = _image_path(exp, "reference"), _image_path(exp, "measurement")
    frame = exp.images.frame
    ref_frame = exp.images.reference_frame if exp.images.reference_frame is not None else frame
    meas_frame = exp.images.measurement_frame if exp.images.measurement_frame is not None else frame
    with warnings_module.catch_warnings(record=True) as caught:
        warnings_module.simplefilter("always")
        ref = images.read_image(ref_path, frame=ref_frame)
        meas = images.read_image(meas_path, frame=meas_frame)
        images.check_pair(ref, meas)
        shape = ref.data.shape
        paths = {"reference": ref_path, "measurement": meas_path}
        mask = None
        if exp.images.mask is not None:
            paths["mask"] = exp.resolve(exp.images.mask)
            mask = images.read_mask(paths["mask"], shape=shape)
        if exp.images.mask_polygons:
            mask = images.combine_masks(mask, images.polygon_mask(exp.images.mask_polygons, shape=shape))
    warnings = [" ".join(str(w.message).split()) for w in caught]
    info = {label: _image_info(img) for label, img in (("reference", ref), ("measurement", meas))}
    sha = {k: store.file_sha256(p) for k, p in paths.items()}
    return Inputs(reference=ref.data, measurement=meas.data, mask=mask, paths=paths, sha256=sha,
                  warnings=_unique(warnings), info=info, exif=dict(ref.exif or {}))


def _image_info(img: Any) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for key in ("bit_depth", "lossy", "shape", "n_frames", "exif"):
        value = getattr(img, key, None)
        if value is not None and value != {}:
            out[key] = list(value) if isinstance(value, tuple) else value
    return out


def _unique(items: list[str]) -> list[str]:
    return list(dict.fromkeys(items))


def with_exif_defaults(exp: Experiment, exif: dict[str, Any]) -> tuple[Experiment, list[str]]:
    """Fill the focal length from the image EXIF when the experiment file has none.

    Explicit settings always win; returns the (possibly updated) experiment
    and a note for the summary when a value was taken from EXIF.
    """
    import dataclasses

    f = exif.get("focal_length_m") if exif else None
    if exp.camera.focal_length_m is not None or not f:
        return exp, []
    cam = dataclasses.replace(exp.camera, focal_length_m=float(f))
    note = f"camera.focal_length_mm not given: {float(f) * 1e3:g} mm taken from the image EXIF"
    return dataclasses.replace(exp, camera=cam), [note]


# ---------------------------------------------------------------------------
# Stage 2: displacement
# ---------------------------------------------------------------------------


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


def _region_box(region: Any, shape: tuple[int, int]) -> np.ndarray:
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
    the gas is ambient, hence no flow).
    """
    mode = exp.processing.camera_motion
    if mode == "none":
        return None
    if mode == "border":
        return "border"
    return _region_box(exp.reconstruction.reference_region, shape)


def measure_displacement(inputs: Inputs, exp: Experiment):
    """Estimate the background displacement field [px] between the two images."""
    from . import displacement

    if inputs.mask is not None and bool(np.all(inputs.mask)):
        raise InputError("the mask covers the whole image: there is nothing to measure")
    return displacement.estimate(inputs.reference, inputs.measurement, method=exp.processing.method,
                                 mask=inputs.mask,
                                 camera_motion=camera_motion_region(exp, inputs.reference.shape),
                                 **displacement_options(exp))


# ---------------------------------------------------------------------------
# Stage 3: deflection and reconstruction
# ---------------------------------------------------------------------------


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


def reconstruct(disp, exp: Experiment, *, image_shape: tuple[int, int], rig=None, medium=None):
    """Deflection, coordinates and density/temperature from a displacement field.

    Planar objects use the oblique-ray (finite camera distance) correction of
    :mod:`bos.reconstruct.deflection`; axisymmetric ones the paraxial model.

    Returns
    -------
    (eps_y, eps_x, y_m, x_m, density_field_or_None)
    """
    from . import reconstruct as rec

    rig = rig or exp.rig()
    medium = medium or exp.medium_model()
    r = exp.reconstruction
    kind = r.kind
    slopes = rec.ray_slopes(disp.rows, disp.cols, rig=rig, shape=image_shape) if kind == "planar" else None
    # rows_px/cols_px move each vector from the feature's reference position to
    # the pixel of its camera ray (removes a d.grad(d)/2 bias; see deflection.py)
    eps_y, eps_x = rec.deflection_from_displacement(disp.dy, disp.dx, rig=rig, ray_slopes=slopes,
                                                    rows_px=disp.rows, cols_px=disp.cols)
    y_m, x_m = rec.object_coordinates(disp.rows, disp.cols, rig=rig, shape=image_shape)
    if kind == "none":
        return eps_y, eps_x, y_m, x_m, None
    sig_y, sig_x = (np.abs(v) for v in rec.deflection_from_displacement(disp.sigma_dy, disp.sigma_dx, rig=rig))
    step_y = float(np.median(np.diff(disp.rows))) if len(disp.rows) > 1 else 1.0
    step_x = float(np.median(np.diff(disp.cols))) if len(disp.cols) > 1 else 1.0
    pix = rig.object_pixel_m
    common = dict(medium=medium, masked=disp.masked, invalid=disp.invalid, sigma_y=sig_y, sigma_x=sig_x,
                  y_m=y_m, x_m=x_m)
    if kind == "planar":
        width = exp.geometry.object_width_m
        if width is None:
            raise ConfigError("missing value: geometry.object_width_mm (needed for a planar reconstruction)")
        region = reference_mask(r.reference_region, disp.rows, disp.cols)
        dirichlet = _dirichlet(r.boundary, r.reference_region, float(medium.ambient_index))
        dens = rec.planar_density(eps_y, eps_x, spacing_m=(step_y * pix, step_x * pix), width_m=width,
                                  reference_region=region, weighted=r.weighted, dirichlet=dirichlet,
                                  method=r.solver, ray_slopes=slopes, **common)
    else:
        vertical = r.axis == "vertical"
        axis_pos = None
        if r.axis_px is not None:
            extent = image_shape[1] if vertical else image_shape[0]
            if not 0 <= r.axis_px <= extent - 1:
                raise InputError(f"reconstruction.axis_px = {r.axis_px:g} is outside the image "
                                 f"(0..{extent - 1} px {'columns' if vertical else 'rows'})")
            axis_pos = _grid_index(r.axis_px, disp.cols if vertical else disp.rows)
        dens = rec.axisymmetric_density(eps_y, eps_x, spacing_m=(step_x if vertical else step_y) * pix,
                                        axis=r.axis, axis_position=axis_pos, method=r.abel_method, **common)
    return eps_y, eps_x, y_m, x_m, dens


# ---------------------------------------------------------------------------
# Summary and provenance
# ---------------------------------------------------------------------------


def _finite_stat(a, fn, default=float("nan")) -> float:
    if a is None:
        return default
    a = np.asarray(a, float)
    a = a[np.isfinite(a)]
    return float(fn(a)) if a.size else default


def invalid_flags(disp, dens) -> np.ndarray:
    """Rejected vectors: by the displacement validation or lost in the reconstruction."""
    inv = np.asarray(disp.invalid, bool)
    if dens is not None and getattr(dens, "invalid", None) is not None:
        inv = inv | (np.asarray(dens.invalid, bool) & ~np.asarray(disp.masked, bool))
    return inv


def summarize(disp, dens, *, medium, warnings: list[str]) -> dict[str, Any]:
    """The short numbers a user wants first (JSON-ready)."""
    mag = np.hypot(disp.dy, disp.dx)
    sig = np.hypot(disp.sigma_dy, disp.sigma_dx)
    n = mag.size
    invalid = invalid_flags(disp, dens)
    valid = ~(disp.masked | invalid) & np.isfinite(mag)
    unmasked = int((~disp.masked).sum())
    out: dict[str, Any] = {
        "vectors": int(n),
        "grid_shape": [int(s) for s in mag.shape],
        "peak_displacement_px": _finite_stat(mag, np.max),
        "valid_fraction": float(valid.sum() / unmasked) if unmasked else 0.0,
        "masked_fraction": float(disp.masked.sum() / n) if n else 0.0,
        "invalid_fraction": float(invalid.sum() / n) if n else 0.0,
        "median_uncertainty_px": _finite_stat(np.where(valid, sig, np.nan), np.median),
        "camera_shift_px": [float(v) for v in (disp.camera_shift if disp.camera_shift is not None else (0.0, 0.0))],
        "method": disp.method,
    }
    if dens is not None:
        t0 = medium.temperature_k
        rho0 = medium.ambient_density
        tmax = _finite_stat(dens.temperature, np.max)
        tmin = _finite_stat(dens.temperature, np.min)
        out.update({
            "ambient_temperature_k": float(t0),
            "ambient_density_kg_m3": float(rho0),
            "min_density_kg_m3": _finite_stat(dens.density, np.min),
            "max_density_kg_m3": _finite_stat(dens.density, np.max),
            "min_temperature_k": tmin,
            "max_temperature_k": tmax,
            "peak_temperature_rise_k": tmax - t0 if math.isfinite(tmax) else float("nan"),
            "median_temperature_uncertainty_k": _finite_stat(getattr(dens, "sigma_temperature", None), np.median),
            "median_density_uncertainty_kg_m3": _finite_stat(getattr(dens, "sigma_density", None), np.median),
        })
        extra = getattr(dens, "info", None) or {}
        if extra.get("asymmetry") is not None:
            out["asymmetry"] = jsonable(extra["asymmetry"])
    out["warnings"] = list(warnings)
    return out


def jsonable(obj: Any) -> Any:
    if isinstance(obj, dict):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [jsonable(v) for v in obj]
    if isinstance(obj, Path):
        return str(obj)
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    return obj


def _small_items(params: dict[str, Any], *, max_size: int = 32) -> dict[str, Any]:
    """Scalars, strings and short numeric lists of a parameter dict (JSON-ready).

    Per-vector diagnostics (2-D arrays) and objects are left out of the
    attributes; the fields themselves are stored as variables.
    """
    out: dict[str, Any] = {}
    for key, value in params.items():
        if isinstance(value, (str, bool, int, float, np.generic)) or value is None:
            out[key] = jsonable(value)
        elif isinstance(value, (list, tuple, np.ndarray)):
            arr = np.asarray(value, dtype=object)
            if arr.size <= max_size and arr.ndim <= 2:
                out[key] = jsonable(value)
    return out


def _section_dict(section: Any) -> dict[str, Any]:
    import dataclasses

    return jsonable(dataclasses.asdict(section))


def _rig_dict(rig) -> dict[str, Any]:
    keys = ("focal_length_m", "pixel_pitch_m", "f_number", "z_a", "z_b", "z_d", "magnification",
            "image_distance_m", "object_pixel_m", "sensitivity_m_per_rad", "sensitivity_px_per_rad",
            "wavelength_m")
    out = {}
    for k in keys:
        try:
            v = getattr(rig, k)
        except Exception:  # noqa: BLE001 - a derived property may not apply
            continue
        if v is not None:
            out[k] = jsonable(v)
    return out


def _medium_dict(medium) -> dict[str, Any]:
    import dataclasses

    out = jsonable(dataclasses.asdict(medium))
    for k in ("gladstone_dale", "ambient_density", "ambient_index", "molar_mass"):
        try:
            out[k] = float(getattr(medium, k))
        except Exception:  # noqa: BLE001
            pass
    return out


def cautions(exp: Experiment) -> list[str]:
    """Safety cautions for the experiment's source and illumination (bos.safety)."""
    from .safety import cautions_for

    gas = list(exp.medium.composition) if exp.medium.composition else exp.medium.gas
    return [str(c) for c in cautions_for(exp.source.kind, exp.source.illumination,
                                         frequency_hz=exp.source.frequency_hz, gas=gas)]


# ---------------------------------------------------------------------------
# The whole chain
# ---------------------------------------------------------------------------


def run_experiment(exp: Experiment, *, progress: ProgressFn | None = None) -> RunResult:
    """Run every stage of one experiment and return the result (writes nothing).

    Parameters
    ----------
    exp : Experiment
        Validated experiment (see :func:`bos.config.load_experiment`).
    progress : callable, optional
        ``progress(stage, fraction)``, called as stages start and finish.

    Returns
    -------
    RunResult

    Raises
    ------
    BOSError subclasses
        Bad input at any stage (one-line messages).
    """
    import bos

    _tick(progress, "read images", 0.0)
    inputs = load_inputs(exp)
    _tick(progress, "read images", 1.0)
    exp, exif_notes = with_exif_defaults(exp, inputs.exif)
    rig = exp.rig()
    medium = exp.medium_model()
    _tick(progress, "displacement", 0.0)
    disp = measure_displacement(inputs, exp)
    _tick(progress, "displacement", 1.0)
    _tick(progress, "reconstruction", 0.0)
    eps_y, eps_x, y_m, x_m, dens = reconstruct(disp, exp, image_shape=inputs.reference.shape,
                                               rig=rig, medium=medium)
    _tick(progress, "reconstruction", 1.0)
    warnings = list(inputs.warnings) + exif_notes
    warnings += [str(w) for w in (getattr(disp, "warnings", None) or [])]
    warnings += [str(w) for w in (getattr(dens, "warnings", None) or [])]
    warnings = _unique(warnings)
    summary = summarize(disp, dens, medium=medium, warnings=warnings)
    acoustic = None
    if dens is not None and exp.source.kind == "ultrasound":
        from .acoustics import acoustic_field

        acoustic = acoustic_field(dens.density, medium=medium, sigma_density=dens.sigma_density)
        summary["peak_acoustic_pressure_pa"] = acoustic.peak_pressure_pa
        summary["peak_sound_pressure_level_db"] = acoustic.peak_spl_db
        summary["temperature_model"] = "isentropic (acoustic)"
    attrs = {
        "software": "bos-toolkit",
        "software_version": bos.__version__,
        "experiment_file": str(exp.source_file) if exp.source_file else None,
        "rig": _rig_dict(rig),
        "medium": _medium_dict(medium),
        "camera": _section_dict(exp.camera),
        "geometry": _section_dict(exp.geometry),
        "processing": _section_dict(exp.processing),
        "displacement_params": _small_items(getattr(disp, "params", {}) or {}),
        "reconstruction_info": _small_items(getattr(dens, "info", {}) or {}),
        "reconstruction": _section_dict(exp.reconstruction),
        "source": _section_dict(exp.source),
        "inputs": {k: str(v) for k, v in inputs.paths.items()},
        "input_sha256": dict(inputs.sha256),
        "input_info": jsonable(inputs.info),
        "cautions": cautions(exp),
        "summary": jsonable(summary),
    }
    return RunResult(displacement=disp, eps_y=eps_y, eps_x=eps_x, density=dens, y_m=y_m, x_m=x_m,
                     summary=summary, warnings=warnings, attrs=attrs, inputs=inputs, acoustic=acoustic)


# ---------------------------------------------------------------------------
# Output
# ---------------------------------------------------------------------------


def prepare_output_dir(directory: str | Path) -> Path:
    """Create the output directory if needed and check it is writable.

    Raises
    ------
    DataFileError
        The directory cannot be created or written.
    """
    d = Path(directory)
    try:
        d.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise DataFileError(f"cannot create output directory {d}: {exc.strerror or exc}") from None
    if not d.is_dir():
        raise DataFileError(f"output path is not a directory: {d}")
    if not os.access(d, os.W_OK | os.X_OK):
        raise DataFileError(f"output directory is not writable: {d}")
    return d


def output_paths(exp: Experiment) -> dict[str, Path]:
    """Where :func:`save_run` writes each file for ``exp`` (relative directories
    are taken relative to the experiment file, like the image paths)."""
    d = exp.resolve(exp.output.directory)
    name = exp.output.name
    return {
        "result": d / f"{name}.h5",
        "profile_csv": d / f"{name}-profile.csv",
        "fig_displacement": d / f"{name}-displacement.png",
        "fig_deflection": d / f"{name}-deflection.png",
        "fig_density": d / f"{name}-density.png",
        "fig_profile": d / f"{name}-profile.png",
    }


Y_DOWN_NOTE = "object-plane coordinate; y points DOWN (grows with image row), origin at the image centre"


def _var(data, units: str, long_name: str, **extra) -> dict[str, Any]:
    attrs = {"units": units, "long_name": long_name, **extra}
    return {"dims": ("y", "x"), "data": np.asarray(data), "attrs": attrs}


def result_variables(result: RunResult, *, gas: str = "air") -> tuple[dict[str, Any], dict[str, Any]]:
    """Coordinates and data variables of the HDF5 result (name -> dims, data, attrs).

    Every variable carries ``units`` and ``long_name``; CF standard names are
    used where one exists (air_density, air_temperature for air).
    """
    disp = result.displacement
    coords = {
        "y": {"dims": ("y",), "data": np.asarray(result.y_m, float),
              "attrs": {"units": "m", "long_name": "object-plane y (down)", "positive": "down",
                        "description": Y_DOWN_NOTE}},
        "x": {"dims": ("x",), "data": np.asarray(result.x_m, float),
              "attrs": {"units": "m", "long_name": "object-plane x (right)",
                        "description": "object-plane coordinate; x points right (grows with image column), "
                                       "origin at the image centre"}},
        "row_px": {"dims": ("y",), "data": np.asarray(disp.rows, float),
                   "attrs": {"units": "px", "long_name": "image row of the vector-grid point"}},
        "col_px": {"dims": ("x",), "data": np.asarray(disp.cols, float),
                   "attrs": {"units": "px", "long_name": "image column of the vector-grid point"}},
    }
    flag = {"flag_values": np.array([0, 1], np.uint8)}
    v = {
        "displacement_y": _var(disp.dy, "px", "apparent background displacement, y component (sensor pixels)"),
        "displacement_x": _var(disp.dx, "px", "apparent background displacement, x component (sensor pixels)"),
        "displacement_magnitude": _var(np.hypot(disp.dy, disp.dx), "px", "apparent background displacement magnitude"),
        "displacement_y_uncertainty": _var(disp.sigma_dy, "px", "1-sigma uncertainty of displacement_y"),
        "displacement_x_uncertainty": _var(disp.sigma_dx, "px", "1-sigma uncertainty of displacement_x"),
        "deflection_y": _var(result.eps_y, "rad", "light-ray deflection angle, y component (toward higher index)"),
        "deflection_x": _var(result.eps_x, "rad", "light-ray deflection angle, x component (toward higher index)"),
        "masked": _var(np.asarray(disp.masked, np.uint8), "1", "user mask: 1 = no data requested here",
                       flag_meanings="measured masked", **flag),
        "invalid": _var(np.asarray(invalid_flags(disp, result.density), np.uint8), "1",
                        "validation: 1 = vector rejected (outlier, no correlation peak, not reconstructable)",
                        flag_meanings="valid rejected", **flag),
    }
    dens = result.density
    if dens is not None:
        is_air = gas == "air"
        v["refractive_index"] = _var(dens.index, "1", "refractive index")
        # store fills CF air_density / air_temperature unless standard_name is None
        v["density"] = _var(dens.density, "kg m-3", "gas density",
                            standard_name="air_density" if is_air else None)
        v["temperature"] = _var(dens.temperature, "K", "gas temperature",
                                standard_name="air_temperature" if is_air else None)
        for name, attr, units in (("refractive_index", "sigma_index", "1"), ("density", "sigma_density", "kg m-3"),
                                  ("temperature", "sigma_temperature", "K")):
            sig = getattr(dens, attr, None)
            if sig is not None:
                v[f"{name}_uncertainty"] = _var(sig, units, f"1-sigma uncertainty of {name}")
    ac = getattr(result, "acoustic", None)
    if ac is not None:
        v["acoustic_pressure"] = _var(ac.pressure_pa, "Pa", "acoustic pressure p' = c^2 (rho - rho0)")
        v["acoustic_pressure_uncertainty"] = _var(ac.sigma_pressure_pa, "Pa", "1-sigma uncertainty of acoustic_pressure")
        v["temperature"] = _var(ac.temperature_k, "K", "gas temperature (isentropic acoustic fluctuation)",
                                standard_name="air_temperature" if gas == "air" else None)
        v["temperature_uncertainty"] = _var(ac.sigma_temperature_k, "K", "1-sigma uncertainty of temperature")
    return coords, v


def _default_profile(result: RunResult) -> list[list[float]]:
    """Horizontal line through the middle of the field [m]."""
    y_mid = float(result.y_m[len(result.y_m) // 2])
    return [[float(result.x_m[0]), y_mid], [float(result.x_m[-1]), y_mid]]


def as_result_data(result: RunResult, *, gas: str = "air"):
    """The run as an in-memory :class:`bos.store.ResultData` (same content as the file)."""
    from .store import ResultData, Variable

    coords, variables = result_variables(result, gas=gas)
    conv = {k: Variable(dims=tuple(v["dims"]), data=v["data"], attrs=dict(v["attrs"])) for k, v in coords.items()}
    data = {k: Variable(dims=tuple(v["dims"]), data=v["data"], attrs=dict(v["attrs"])) for k, v in variables.items()}
    return ResultData(coords=conv, variables=data, attrs=dict(result.attrs))


PROFILE_FIELDS = ("displacement_magnitude", "deflection_x", "density", "temperature")


def sample_profile(data, line_m, *, names: tuple[str, ...] = PROFILE_FIELDS) -> dict[str, tuple[np.ndarray, str]]:
    """Sample fields of a result along a straight line (bilinear, :func:`bos.store.profile`).

    Parameters
    ----------
    data : bos.store.ResultData
        A result (from :func:`as_result_data` or :func:`bos.store.read_result`).
    line_m : [[x0, y0], [x1, y1]]
        End points in object-plane metres (y down).
    names : tuple of str
        Fields to sample; their ``*_uncertainty`` companions are added where present.

    Returns
    -------
    dict
        ``name -> (values, units)`` starting with ``s_m``, ``x_m``, ``y_m``; NaN outside the grid.
    """
    from . import store

    (x0, y0), (x1, y1) = line_m
    out: dict[str, tuple[np.ndarray, str]] = {}
    for name in names:
        for key in (name, f"{name}_uncertainty"):
            if key not in data.variables:
                continue
            prof = store.profile(data, key, start=(x0, y0), end=(x1, y1))
            if not out:
                out = {"s_m": (prof.s_m, "m"), "x_m": (prof.x_m, "m"), "y_m": (prof.y_m, "m")}
            out[key] = (prof.values, prof.units)
    return out


def write_profile_csv(path: str | Path, samples: dict[str, tuple[np.ndarray, str]]) -> Path:
    """Write profile samples (from :func:`sample_profile`) as CSV, atomically.

    One header line of column names (units as in the result file: ``s_m``,
    ``x_m``, ``y_m`` in metres, then the fields); NaN written as ``nan``.
    """
    from ._io import atomic_path

    header = ",".join(samples)
    table = np.column_stack([v for v, _ in samples.values()])
    with atomic_path(path) as tmp:
        np.savetxt(tmp, table, delimiter=",", header=header, comments="", fmt="%.9g")
    return Path(path)


def save_run(result: RunResult, exp: Experiment) -> list[Path]:
    """Write the HDF5 result, the figures and the profile CSV of a run.

    Each file is written atomically (temporary file + rename).  The result
    file is written first; figures follow (skipped when
    ``output.figures = false``).  If any file fails, the files already
    written by this call are removed again, so no partial result is left.

    Returns
    -------
    list of Path
        The written files, result file first.

    Raises
    ------
    DataFileError
        The output directory cannot be created or written.
    """
    from . import store

    paths = output_paths(exp)
    prepare_output_dir(paths["result"].parent)
    gas = exp.medium.gas if not exp.medium.composition else "mixture"
    coords, variables = result_variables(result, gas=gas)
    attrs = dict(result.attrs)
    attrs["coordinate_note"] = Y_DOWN_NOTE
    attrs["title"] = f"BOS result {exp.output.name}"
    attrs["Conventions"] = "CF-1.8"
    written: list[Path] = []
    try:
        written.append(Path(store.write_result(paths["result"], coords=coords, variables=variables, attrs=attrs)))
        line = exp.output.profile or _default_profile(result)
        samples = sample_profile(as_result_data(result, gas=gas), line)
        written.append(write_profile_csv(paths["profile_csv"], samples))
        if exp.output.figures:
            written += _figures(result, paths, line, samples)
    except BaseException:
        # all or nothing: a run that fails half-way leaves no result behind
        for p in written:
            with contextlib.suppress(OSError):
                Path(p).unlink()
        raise
    return [Path(p) for p in written]


def _figures(result: RunResult, paths: dict[str, Path], line, samples) -> list[Path]:
    from . import plots
    from .plots import Panel

    disp = result.displacement
    kw = {"x_m": result.x_m, "y_m": result.y_m, "profile_m": line}
    out = [
        plots.fields_figure([Panel(disp.dx, "displacement x", "px", "RdBu_r", True),
                             Panel(disp.dy, "displacement y", "px", "RdBu_r", True),
                             Panel(np.hypot(disp.dy, disp.dx), "displacement magnitude", "px", "magma")],
                            path=paths["fig_displacement"], suptitle="apparent background displacement", **kw),
        plots.fields_figure([Panel(result.eps_x * 1e6, "deflection x", "µrad", "RdBu_r", True),
                             Panel(result.eps_y * 1e6, "deflection y", "µrad", "RdBu_r", True)],
                            path=paths["fig_deflection"], suptitle="light-ray deflection", **kw),
    ]
    dens = result.density
    if dens is not None:
        out.append(plots.fields_figure([Panel(dens.density, "density", "kg/m³", "cividis"),
                                        Panel(dens.temperature, "temperature", "K", "inferno")],
                                       path=paths["fig_density"], suptitle="density and temperature", **kw))
    curves, sigmas = [], []
    for key, label in (("displacement_magnitude", "|d|"), ("deflection_x", "deflection x"),
                       ("density", "density"), ("temperature", "temperature")):
        if key in samples:
            values, units = samples[key]
            curves.append((values, label, units))
            sigmas.append(samples[f"{key}_uncertainty"][0] if f"{key}_uncertainty" in samples else None)
    out.append(plots.profile_figure(samples["s_m"][0], curves, sigmas=sigmas, path=paths["fig_profile"],
                                    title="profile along the line shown in the field figures"))
    return out
