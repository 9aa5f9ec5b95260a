"""Writing a run: the netCDF-4 result file, the profile CSV and the figures."""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import numpy as np

from .config import Experiment
from .errors import DataFileError
from .provenance import invalid_flags
from .stages import RunResult

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
    are taken relative to the experiment file, like the image paths).  The
    result file is netCDF-4 (``<name>.nc``)."""
    d = exp.resolve(exp.output.directory)
    name = exp.output.name
    return {
        "result": d / f"{name}.nc",
        "profile_csv": d / f"{name}-profile.csv",
        "fig_displacement": d / f"{name}-displacement.png",
        "fig_deflection": d / f"{name}-deflection.png",
        "fig_density": d / f"{name}-density.png",
        "fig_profile": d / f"{name}-profile.png",
        "fig_acoustic": d / f"{name}-acoustic.png",  # written only for sound sources (acoustic pressure)
    }


#: How result files orient their coordinates (global attribute ``coordinate_note``).
COORDINATE_NOTE = ("object-plane coordinates in metres, origin at the image centre; x points right (grows with "
                   "the image column), y points UP (the image row index row_px grows the other way), so a plain "
                   "plot of a field shows the picture upright")
#: Old name of :data:`COORDINATE_NOTE` (kept for callers that import it).
Y_DOWN_NOTE = COORDINATE_NOTE
_PIXEL_COMMENT = ("count of sensor pixels (dimensionless, CF units '1'; display unit px); one pixel is the "
                  "camera's pixel pitch on the sensor (global attribute rig, key pixel_pitch_m)")


def _var(data, units: str, long_name: str, **extra) -> dict[str, Any]:
    attrs = {"units": units, "long_name": long_name, **extra}
    return {"dims": ("y", "x"), "data": np.asarray(data), "attrs": attrs}


def _px(data, long_name: str) -> dict[str, Any]:
    """A field counted in sensor pixels: CF units "1" (UDUNITS and pint read "px" as something else)."""
    return _var(data, "1", long_name, display_units="px", comment=_PIXEL_COMMENT)


def file_y(y_down_m) -> np.ndarray:
    """Object-plane y of the library (down, grows with the image row) -> y of result files (up) [m]."""
    return -np.asarray(y_down_m, dtype=float)


def result_variables(result: RunResult, *, gas: str = "air") -> tuple[dict[str, Any], dict[str, Any]]:
    """Coordinates and data variables of the result file (name -> dims, data, attrs).

    Every variable carries ``units`` (UDUNITS; pixel counts are "1" with
    ``display_units = "px"``) and ``long_name``; CF standard names are used
    where one exists (air_density, air_temperature for air).  The file's
    ``y`` points UP (``y = -y_m`` of the run, :func:`file_y`), so the
    ``*_y`` components are stored in that direction too: ``displacement_y``
    and ``deflection_y`` are positive upward.  Array rows keep the image row
    order (``row_px``).
    """
    disp = result.displacement
    coords = {
        "y": {"dims": ("y",), "data": file_y(result.y_m),
              "attrs": {"units": "m", "long_name": "object-plane y (up)", "axis": "Y",
                        "description": "object-plane coordinate; y points up (the image row index row_px grows "
                                       "the other way), origin at the image centre"}},
        "x": {"dims": ("x",), "data": np.asarray(result.x_m, float),
              "attrs": {"units": "m", "long_name": "object-plane x (right)", "axis": "X",
                        "description": "object-plane coordinate; x points right (grows with image column), "
                                       "origin at the image centre"}},
        "row_px": {"dims": ("y",), "data": np.asarray(disp.rows, float),
                   "attrs": {"units": "1", "display_units": "px",
                             "long_name": "image row of the vector-grid point (pixel index, 0 = top row)"}},
        "col_px": {"dims": ("x",), "data": np.asarray(disp.cols, float),
                   "attrs": {"units": "1", "display_units": "px",
                             "long_name": "image column of the vector-grid point (pixel index, 0 = left column)"}},
    }
    v = {
        "displacement_y": _px(-np.asarray(disp.dy), "apparent background displacement, y component (up)"),
        "displacement_x": _px(disp.dx, "apparent background displacement, x component (right)"),
        "displacement_magnitude": _px(np.hypot(disp.dy, disp.dx), "apparent background displacement magnitude"),
        "displacement_y_uncertainty": _px(disp.sigma_dy, "1-sigma uncertainty of displacement_y"),
        "displacement_x_uncertainty": _px(disp.sigma_dx, "1-sigma uncertainty of displacement_x"),
        "deflection_y": _var(-np.asarray(result.eps_y), "rad",
                             "light-ray deflection angle, y component (up; toward higher index)"),
        "deflection_x": _var(result.eps_x, "rad", "light-ray deflection angle, x component (toward higher index)"),
        # flags as CF wants them (signed bytes, flag_values of the same type) for every writer of these variables
        "masked": _var(np.asarray(disp.masked, np.int8), "1", "user mask: 1 = no data requested here",
                       flag_values=np.array([0, 1], np.int8), flag_meanings="measured masked"),
        "invalid": _var(np.asarray(invalid_flags(disp, result.density), np.int8), "1",
                        "validation: 1 = vector rejected (outlier, no correlation peak, not reconstructable)",
                        flag_values=np.array([0, 1], np.int8), flag_meanings="valid rejected"),
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


def as_result_data(result: RunResult, *, gas: str = "air"):
    """The run as an in-memory :class:`bos.store.ResultData` (same content and orientation as the file)."""
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
        End points in the result's coordinates [m] (result files: y up).
    names : tuple of str
        Fields to sample; their ``*_uncertainty`` companions are added where present.

    Returns
    -------
    dict
        ``name -> (values, display units)`` starting with ``s_m``, ``x_m``, ``y_m``; NaN outside the grid.
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


def write_profile_csv(path, samples: dict[str, tuple[np.ndarray, str]]):
    """Write profile samples (from :func:`sample_profile`) as CSV, atomically.

    One header line ``name [units]``: ``s [m]`` (distance from the start),
    ``x [m]``, ``y [m]``, then the fields; NaN written as ``nan``.  ``path``
    may be ``"-"`` for standard output or an open text stream.
    """
    from .store import csv_label, write_table

    labels = [csv_label(k, units) for k, (_, units) in samples.items()]
    return write_table(path, labels, [v for v, _ in samples.values()], fmt="%.9g")


def _experiment_text(exp: Experiment) -> str:
    """Full text of the experiment file (or a note when the run came from options only)."""
    src = getattr(exp, "source_file", None)
    if not src:
        return "(none: run from command-line options; the settings are in the camera, geometry, medium, " \
               "processing, reconstruction and flow_source attributes)"
    try:
        return Path(src).read_text(encoding="utf-8", errors="replace")
    except OSError as exc:
        return f"(experiment file {src} could not be read again when saving: {exc.strerror or exc})"


def _references(attrs: dict[str, Any]) -> str:
    """The published methods this run used, one per line (CF global attribute ``references``)."""
    proc = attrs.get("processing") or {}
    rec = attrs.get("reconstruction") or {}
    refs = ["Richard, H. and Raffel, M. (2001). Principle and applications of the background oriented schlieren "
            "(BOS) method. Meas. Sci. Technol. 12, 1576-1585.",
            "Raffel, M. (2015). Background-oriented schlieren (BOS) techniques. Exp. Fluids 56, 60."]
    if proc.get("method", "correlation") == "flow":
        refs += ["Lucas, B. D. and Kanade, T. (1981). An iterative image registration technique with an "
                 "application to stereo vision. Proc. IJCAI, 674-679."]
    else:
        refs += ["Scarano, F. (2002). Iterative image deformation methods in PIV. Meas. Sci. Technol. 13, R1-R19.",
                 "Westerweel, J. and Scarano, F. (2005). Universal outlier detection for PIV data. "
                 "Exp. Fluids 39, 1096-1100.",
                 "Wieneke, B. (2015). PIV uncertainty quantification from correlation statistics. "
                 "Meas. Sci. Technol. 26, 074002."]
    kind = rec.get("kind")
    if kind == "axisymmetric":
        refs += ["Dasch, C. J. (1992). One-dimensional tomography: a comparison of Abel, onion-peeling, and "
                 "filtered backprojection methods. Appl. Opt. 31, 1146-1152."]
    elif kind == "planar":
        refs += ["Simchony, T., Chellappa, R. and Shao, M. (1990). Direct analytical methods for solving Poisson "
                 "equations in computer vision problems. IEEE Trans. Pattern Anal. Mach. Intell. 12, 435-446."]
    if kind in ("axisymmetric", "planar"):
        refs += ["Merzkirch, W. (1987). Flow Visualization, 2nd ed. Academic Press (Gladstone-Dale relation).",
                 "Ciddor, P. E. (1996). Refractive index of air: new equations for the visible and near infrared. "
                 "Appl. Opt. 35, 1566-1573."]
    return "\n".join(refs)


def file_attributes(result: RunResult, exp: Experiment, *, line_file_m) -> dict[str, Any]:
    """Global attributes of a run's result file: CF ``title``/``history``/``source``/``references``,
    the experiment-file text, the profile line and the run's provenance (nested, stored as JSON)."""
    import bos

    attrs = dict(result.attrs)
    if "source" in attrs:  # the experiment's [source] section; CF reserves "source" for a text
        attrs["flow_source"] = attrs.pop("source")
    proc = attrs.get("processing") or {}
    rec = attrs.get("reconstruction") or {}
    attrs.update({
        "title": f"BOS result {exp.output.name}",
        "Conventions": "CF-1.8",
        "source": (f"background-oriented schlieren measurement processed with bos-toolkit {bos.__version__} "
                   f"(displacement: {proc.get('method', 'correlation')}; reconstruction: {rec.get('kind', 'none')}"
                   + (f", {rec.get('abel_method')}" if rec.get("kind") == "axisymmetric" and rec.get("abel_method")
                      else "") + ")"),
        "references": _references(attrs),
        "coordinate_note": COORDINATE_NOTE,
        "run_name": exp.output.name,
        "experiment_file_text": _experiment_text(exp),
        "profile_line_m": np.asarray(line_file_m, float).ravel(),
    })
    return attrs


def save_run(result: RunResult, exp: Experiment, *, report: bool = False, virtual_views: bool = False) -> list[Path]:
    """Write the result file (netCDF-4, ``<name>.nc``), the figures and the profile CSV of a run.

    The files of one run form a transaction (:class:`bos._io.OutputSet`):
    they are written into a hidden staging folder beside the destination
    and swapped in only when all of them are complete, with a manifest
    ``<name>-run.json`` (run id + SHA-256 of each file; the result file
    carries the same ``run_id`` attribute).  A failure or interruption
    leaves the earlier set of that name untouched; a crash during the swap
    is completed by the next run.  Figures are skipped when
    ``output.figures = false``.  The profile line of the experiment (run
    coordinates, y down) is stored in the file's coordinates (y up) as the
    attribute ``profile_line_m`` = [x0, y0, x1, y1].

    Parameters
    ----------
    result : RunResult
    exp : Experiment
    report : bool
        Also write the one-page HTML report ``<name>-report.html``
        (:func:`bos.report.write_report`) into the same set.
    virtual_views : bool
        Also write virtual knife-edge pictures of the deflection field
        (:func:`bos.schlieren.write_virtual_views`) into the same set.

    Returns
    -------
    list of Path
        The written files, result file first (the manifest not included).

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
    data = as_result_data(result, gas=gas)
    line = exp.output.profile
    if line is None:
        from .plots import default_profile_line

        line = default_profile_line(data)
    line_file = [[float(x), float(file_y(y))] for x, y in line]
    attrs = file_attributes(result, exp, line_file_m=line_file)
    from ._io import OutputSet

    run_id = attrs.get("run_id")
    with OutputSet(paths["result"].parent, exp.output.name, run_id=run_id) as out:
        attrs["run_id"] = out.run_id
        result_file, csv_file = out.path(paths["result"]), out.path(paths["profile_csv"])  # listed first

        def write_files() -> None:
            store.write_result(result_file, coords=coords, variables=variables, attrs=attrs,
                               history=f"bos run from {exp.source_file or 'command-line options'}")
            write_profile_csv(csv_file, sample_profile(data, line_file))

        if exp.output.figures:
            staged = {k: (out.path(v) if k.startswith("fig_") else v) for k, v in paths.items()}
            # the result file and the CSV are written while a forked child draws figures
            _figures(result, staged, line, meanwhile=write_files)
        else:
            write_files()
        if virtual_views:
            from .schlieren import write_virtual_views

            for p in write_virtual_views(data, out.staging, exp.output.name):
                out.path(paths["result"].parent / Path(p).name)
        if report:
            from .report import write_report

            write_report(result, out.path(paths["result"].parent / f"{exp.output.name}-report.html"),
                         name=exp.output.name, line=line)
        return out.commit()


def _figures(result: RunResult, paths: dict[str, Path], line=None, *, meanwhile=None) -> list[Path]:
    """Draw the figures of a run from its result data (the content of the result file).

    Everything is drawn by :func:`bos.plots.write_run_figures` from
    :func:`as_result_data`, exactly as ``bos plot`` draws it from the file;
    ``paths`` maps figure keys (``fig_*``) to where to write them (staged
    paths); ``line`` is the profile line [m] (default: the one stored in the
    attributes, else :func:`bos.plots.default_profile_line`).
    ``meanwhile``: work of this process done while figures are drawn in a
    forked child (see :func:`bos.plots.write_run_figures`).
    """
    from . import plots

    result_path = paths.get("result")
    name = Path(result_path).stem if result_path is not None else None
    return plots.write_run_figures(as_result_data(result), paths, line=line, name=name, meanwhile=meanwhile)
