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
from .provenance import (_medium_dict, _rig_dict, _section_dict, _small_items, cautions, jsonable,
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


def measure_displacement(inputs: Inputs, exp: Experiment):
    """Estimate the background displacement field [px] between the two images."""
    from . import displacement

    if inputs.mask is not None and bool(np.all(inputs.mask)):
        raise InputError("the mask covers the whole image: there is nothing to measure")
    return displacement.estimate(inputs.reference, inputs.measurement, method=exp.processing.method,
                                 mask=inputs.mask,
                                 camera_motion=camera_motion_region(exp, inputs.reference.shape),
                                 camera_region_name=camera_region_name(exp),
                                 **displacement_options(exp))


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
# One frame, all stages
# ---------------------------------------------------------------------------


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
    ref = np.asarray(reference)
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
    _tick(progress, "displacement", 0.0)
    disp = measure_displacement(inputs, exp)
    _tick(progress, "displacement", 1.0)
    _tick(progress, "reconstruction", 0.0)
    eps_y, eps_x, y_m, x_m, dens = reconstruct(disp, exp, image_shape=inputs.reference.shape,
                                               rig=rig, medium=medium)
    _tick(progress, "reconstruction", 1.0)
    warnings = list(inputs.warnings) + list(exif_notes or [])
    warnings += [str(w) for w in (getattr(disp, "warnings", None) or [])]
    warnings += [str(w) for w in ((getattr(disp, "params", None) or {}).get("warnings") or [])]
    warnings += [str(w) for w in (getattr(dens, "warnings", None) or [])]
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
