"""The per-frame stages: images -> displacement -> deflection -> density.

One path for every command: ``bos run`` reads one pair with
:func:`load_inputs`; batch and phase-resolved processing build
:class:`Inputs` from arrays with :func:`inputs_from_arrays`; all then call
:func:`process_inputs`, which runs :func:`measure_displacement` and
:func:`reconstruct` and returns a :class:`RunResult` (nothing is written;
see :mod:`bos.output`).
"""

from __future__ import annotations

import warnings as warnings_module
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import numpy as np

from .config import Experiment
from .errors import ConfigError, InputError
from .provenance import (_finite_stat, _medium_dict, _rig_dict, _section_dict, _small_items, cautions, jsonable,
                         summarize)
from .settings import (_dirichlet, _grid_index, camera_motion_region, camera_region_name, displacement_options,
                       reference_mask)

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
        # both files decoded side by side (two threads; same errors and warnings as two reads)
        ref, meas = images.read_pair(ref_path, meas_path, reference_frame=ref_frame, measurement_frame=meas_frame)
        if ref_path.resolve() == meas_path.resolve() and ref_frame == meas_frame and ref.n_frames > 1:
            raise ConfigError(f"reference and measurement are the same {ref.n_frames}-frame file {ref_path.name} "
                              "and no frames are chosen: set images.reference_frame and images.measurement_frame")
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


def _mask_name(inputs: Inputs) -> str:
    p = inputs.paths.get("mask") if inputs.paths else None
    return Path(p).name if p else "polygons"


def measure_displacement(inputs: Inputs, exp: Experiment):
    """Estimate the background displacement field [px] between the two images."""
    from . import displacement

    mask_name = _mask_name(inputs)
    if inputs.mask is not None and bool(np.all(inputs.mask)):
        raise InputError(f"the mask covers the whole image ({mask_name}): there is nothing to measure "
                         "(masks mark the no-data areas in white/non-zero)")
    region = camera_motion_region(exp, inputs.reference.shape)
    if inputs.mask is not None and region is not None:
        from .displacement import camera_region

        box = camera_region(inputs.reference.shape, region=region)
        if (box & ~inputs.mask).sum() < max(64, 0.02 * box.sum()):
            raise InputError(f"the mask covers the camera-motion region ({mask_name} over the {camera_region_name(exp)}): "
                             "choose another reconstruction.reference_region or set processing.camera_motion")
    disp = displacement.estimate(inputs.reference, inputs.measurement, method=exp.processing.method,
                                 mask=inputs.mask,
                                 camera_motion=region,
                                 camera_region_name=camera_region_name(exp),
                                 **displacement_options(exp))
    return reject_weak_peaks(disp)


def reject_weak_peaks(disp, *, min_peak: float | None = None):
    """Mark vectors whose normalised correlation peak is below ``min_peak`` as invalid.

    Such a peak means the two windows do not show the same background
    (occlusion, a reflection, a different picture), whatever the neighbours
    say: the normalised median test alone accepts coherent garbage.  Unrelated
    random-dot windows give 0.2-0.36 with 16 px windows (measured), matching ones
    > 0.9.  Estimators without a peak height are returned unchanged.
    """
    import dataclasses

    min_peak = MIN_MEDIAN_PEAK if min_peak is None else min_peak
    peak = (getattr(disp, "params", None) or {}).get("peak_height")
    if peak is None or np.shape(peak) != np.shape(disp.dy):
        return disp
    weak = (np.asarray(peak, float) < min_peak) & ~np.asarray(disp.masked, bool)
    if not weak.any():
        return disp
    invalid = np.asarray(disp.invalid, bool) | weak
    nan = np.where(invalid | disp.masked, np.nan, 1.0)
    params = dict(disp.params)
    params["weak_peak_vectors"] = int(weak.sum())
    return dataclasses.replace(disp, invalid=invalid, dy=disp.dy * nan, dx=disp.dx * nan,
                               sigma_dy=disp.sigma_dy * nan, sigma_dx=disp.sigma_dx * nan, params=params)


def reconstruct(disp, exp: Experiment, *, image_shape: tuple[int, int], rig=None, medium=None,
                progress: Callable[[float], None] | None = None):
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
                  y_m=y_m, x_m=x_m, progress=progress)
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
# One frame, all stages
# ---------------------------------------------------------------------------


#: Linear acoustics holds while the acoustic Mach number p'/(rho0 c^2) stays small; 0.01 is a
#: common-practice bound (about 157 dB re 20 uPa in room air).
LINEAR_ACOUSTICS_MAX_MACH = 0.01


def acoustic_mach_number(pressure_pa: float, *, medium) -> float:
    """Acoustic Mach number u/c = p'/(rho0 c^2) of a plane wave of amplitude ``pressure_pa`` [Pa].

    References
    ----------
    Kinsler, L. E., Frey, A. R., Coppens, A. B. and Sanders, J. V. (2000).
    Fundamentals of Acoustics, 4th ed., Wiley, section 5.2 (plane-wave
    impedance p = rho0 c u) -- from memory.
    """
    if not np.isfinite(pressure_pa):
        return 0.0
    c = float(medium.speed_of_sound)
    return abs(float(pressure_pa)) / (float(medium.ambient_density) * c * c)


def _line_meets_field(line_m, x_m: np.ndarray, y_m: np.ndarray) -> bool:
    """Does the straight line [[x0, y0], [x1, y1]] [m] pass through the field's rectangle?"""
    (x0, y0), (x1, y1) = line_m
    t = np.linspace(0.0, 1.0, 1001)
    x, y = x0 + t * (x1 - x0), y0 + t * (y1 - y0)
    xs, ys = sorted((float(x_m[0]), float(x_m[-1]))), sorted((float(y_m[0]), float(y_m[-1])))
    return bool(np.any((x >= xs[0]) & (x <= xs[1]) & (y >= ys[0]) & (y <= ys[1])))


#: Median normalised correlation peak below which the pair is refused (unrelated pictures give
#: 0.2-0.36 with 16 px windows, matching rendered pairs 0.9997) and below which a run warns.
MIN_MEDIAN_PEAK = 0.4
WEAK_MEDIAN_PEAK = 0.6

#: Above this fraction of rejected (invalid) vectors among the unmasked ones a run warns.
MAX_REJECTED_FRACTION = 0.2


def validation_warnings(disp) -> list[str]:
    """Fail when validation rejected every vector; warn when it rejected many.

    Raises
    ------
    InputError
        No valid vector is left outside the mask.
    """
    unmasked = ~np.asarray(disp.masked, bool)
    n = int(unmasked.sum())
    if n == 0:
        return []
    rejected = int((np.asarray(disp.invalid, bool) & unmasked).sum())
    peak = (getattr(disp, "params", None) or {}).get("peak_height")
    out: list[str] = []
    if peak is not None and np.shape(peak) == np.shape(unmasked):
        heights = np.asarray(peak, float)[unmasked]
        heights = heights[np.isfinite(heights)]
        median_peak = float(np.median(heights)) if heights.size else 0.0
        if median_peak < MIN_MEDIAN_PEAK:
            raise InputError(f"the two pictures do not show the same background: the median normalised correlation "
                             f"peak is {median_peak:.2f} (a matching pair gives > 0.8); check the file names, frames "
                             "and that the camera and background did not move by more than the first window")
        if median_peak < WEAK_MEDIAN_PEAK:
            out.append(f"weak correlation between the pictures (median normalised peak {median_peak:.2f}): "
                       "blur, noise, lossy compression or strong gradients; expect larger errors")
    if rejected == n:
        raise InputError(f"all {n} displacement vectors were rejected by validation (no correlation peak or "
                         "outliers everywhere): the pictures may not show the same background, be out of focus, "
                         "or the displacement exceeds the first window (raise processing.window_px)")
    if rejected > MAX_REJECTED_FRACTION * n:
        out.append(f"{100 * rejected / n:.0f} % of the displacement vectors were rejected by validation (more than "
                f"{100 * MAX_REJECTED_FRACTION:.0f} %): the fields there are interpolated or missing; check focus, "
                "texture, and the window size against the largest displacement")
    return out


def check_reference_region(disp, exp: Experiment) -> tuple[dict[str, Any], list[str]]:
    """Check the planar reconstruction's reference region for flow (see
    :func:`bos.displacement.check_ambient_region`); return a JSON-ready report
    and the warnings to show."""
    from .displacement import check_ambient_region

    region = exp.reconstruction.reference_region
    label = region if isinstance(region, str) else "[" + ", ".join(str(v) for v in region) + "]"
    grid = reference_mask(region, disp.rows, disp.cols)
    chk = check_ambient_region(disp, grid, name=f"reference region {label}")
    report = {"region": label, "vectors": chk.vectors, "signal_fraction": chk.signal_fraction,
              "gradient_sigma": chk.gradient_sigma, "sides_with_signal": chk.sides_with_signal,
              "ambient": chk.ambient}
    if chk.ambient:
        return jsonable(report), []
    where = f" ({', '.join(chk.sides_with_signal)})" if chk.sides_with_signal else ""
    msg = (f"reference region '{label}' is NOT ambient: {100 * chk.signal_fraction:.0f} % of its vectors{where} carry "
           f"a displacement signal beyond the noise (gradient {chk.gradient_sigma:.0f} sigma); the density and "
           "temperature are relative to gas that is not at ambient state: choose a flow-free "
           "reconstruction.reference_region (left, right, top, bottom or a [row0, row1, col0, col1] box)")
    return jsonable(report), [msg]


def inputs_from_arrays(reference: np.ndarray, measurement: np.ndarray, *, mask: np.ndarray | None = None,
                       paths: dict[str, Path] | None = None, sha256: dict[str, str] | None = None,
                       warnings: list[str] | None = None, info: dict[str, Any] | None = None) -> Inputs:
    """:class:`Inputs` from images already in memory (batch, periodic, notebooks).

    Parameters
    ----------
    reference, measurement : ndarray, 2-D
        Luminance images of equal shape (any float scale; both the same).
    mask : ndarray of bool, optional
        True = no data, image shape.
    paths, sha256, info : dict, optional
        Provenance of the arrays (file names and hashes) when they came from files.

    Raises
    ------
    InputError
        The images are not 2-D, differ in shape, or the mask has the wrong shape.
    """
    # a PreparedReference (bos.displacement.prepare_reference: per-reference work done once,
    # reused over a batch) is array-like and passed through unchanged
    ref = reference if hasattr(reference, "image") and hasattr(reference, "shape") else np.asarray(reference)
    meas = np.asarray(measurement)
    if ref.ndim != 2 or meas.ndim != 2:
        raise InputError(f"images must be 2-D grey images, got shapes {ref.shape} and {meas.shape}")
    if ref.shape != meas.shape:
        raise InputError(f"reference {ref.shape[1]}x{ref.shape[0]} px and measurement "
                         f"{meas.shape[1]}x{meas.shape[0]} px differ in size")
    if mask is not None:
        mask = np.asarray(mask, bool)
        if mask.shape != ref.shape:
            raise InputError(f"mask shape {mask.shape} does not match the image shape {ref.shape}")
    return Inputs(reference=ref, measurement=meas, mask=mask, paths=dict(paths or {}),
                  sha256=dict(sha256 or {}), warnings=list(warnings or []), info=dict(info or {}))


def process_inputs(inputs: Inputs, exp: Experiment, *, progress: ProgressFn | None = None,
                   exif_notes: list[str] | None = None) -> RunResult:
    """All stages after reading, for one image pair: the shared per-frame path.

    Parameters
    ----------
    inputs : Inputs
        The pair (from :func:`load_inputs` or :func:`inputs_from_arrays`).
    exp : Experiment
        Validated experiment (EXIF defaults already applied).
    progress : callable, optional
        ``progress(stage, fraction)``.
    exif_notes : list of str, optional
        Notes to carry into the warnings (values taken from EXIF).

    Returns
    -------
    RunResult
    """
    import bos

    rig = exp.rig()
    medium = exp.medium_model()
    early: list[str] = []
    if np.array_equal(np.asarray(inputs.reference), inputs.measurement):
        early.append("reference and measurement are pixel-identical (the same picture twice?): no displacement "
                     "is possible, every field is ambient by construction")
    _tick(progress, "displacement", 0.0)
    disp = measure_displacement(inputs, exp)
    early += validation_warnings(disp)
    _tick(progress, "displacement", 1.0)
    _tick(progress, "reconstruction", 0.0)
    eps_y, eps_x, y_m, x_m, dens = reconstruct(
        disp, exp, image_shape=inputs.reference.shape, rig=rig, medium=medium,
        progress=None if progress is None else (lambda f: progress("reconstruction", 0.99 * f)))
    _tick(progress, "reconstruction", 1.0)
    warnings = list(inputs.warnings) + list(exif_notes or []) + early
    warnings += [str(w) for w in (getattr(disp, "warnings", None) or [])]
    warnings += [str(w) for w in ((getattr(disp, "params", None) or {}).get("warnings") or [])]
    warnings += [str(w) for w in (getattr(dens, "warnings", None) or [])]
    if exp.output.profile is not None and not _line_meets_field(exp.output.profile, x_m, y_m):
        (x0, y0), (x1, y1) = exp.output.profile
        warnings.append(f"the profile line ({x0 * 1e3:.1f}, {y0 * 1e3:.1f}) -> ({x1 * 1e3:.1f}, {y1 * 1e3:.1f}) mm lies outside "
                     f"the measured field (x {x_m[0] * 1e3:.1f} .. {x_m[-1] * 1e3:.1f} mm, y {y_m[0] * 1e3:.1f} .. "
                     f"{y_m[-1] * 1e3:.1f} mm): the profile holds no data (output.profile / --profile)")
    region_report = None
    if dens is not None and exp.reconstruction.kind == "planar":
        region_report, region_warning = check_reference_region(disp, exp)
        warnings += region_warning
    warnings = _unique(warnings)
    summary = summarize(disp, dens, medium=medium, warnings=warnings)
    fit = (getattr(disp, "params", None) or {}).get("camera_motion_fit")
    if fit is not None:
        summary["camera_motion"] = jsonable(fit)
    if region_report is not None:
        summary["reference_region"] = region_report
    acoustic = None
    if dens is not None and exp.source.kind == "ultrasound":
        from .acoustics import acoustic_field

        acoustic = acoustic_field(dens.density, medium=medium, sigma_density=dens.sigma_density)
        summary["peak_acoustic_pressure_pa"] = acoustic.peak_pressure_pa
        summary["peak_sound_pressure_level_db"] = acoustic.peak_spl_db
        # one temperature model everywhere: the file, the figures and the summary all show the
        # isentropic (acoustic) temperature in sound mode
        tk = np.asarray(acoustic.temperature_k, float)
        tmax, tmin = _finite_stat(tk, np.max), _finite_stat(tk, np.min)
        summary.update({"min_temperature_k": tmin, "max_temperature_k": tmax,
                        "peak_temperature_rise_k": tmax - medium.temperature_k,
                        "median_temperature_uncertainty_k": _finite_stat(acoustic.sigma_temperature_k, np.median)})
        summary["temperature_model"] = "isentropic (acoustic): T'/T0 = (gamma - 1)/gamma * p'/p0"
        mach = acoustic_mach_number(acoustic.peak_pressure_pa, medium=medium)
        if mach > LINEAR_ACOUSTICS_MAX_MACH:
            warnings.append(f"peak acoustic pressure {acoustic.peak_pressure_pa:.0f} Pa is beyond the linear-acoustics "
                            f"range (acoustic Mach number p'/(rho0 c^2) = {mach:.3f} > {LINEAR_ACOUSTICS_MAX_MACH}): "
                            "p' = c^2 rho' and the isentropic temperature lose accuracy (shocks, streaming)")
            summary["warnings"] = list(warnings)
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
