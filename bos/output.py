"""Writing a run: the HDF5 result, the profile CSV and the figures."""

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

    The files of one run form a transaction (:class:`bos._io.OutputSet`):
    they are written into a hidden staging folder beside the destination
    and swapped in only when all of them are complete, with a manifest
    ``<name>-run.json`` (run id + SHA-256 of each file; the result file
    carries the same ``run_id`` attribute).  A failure or interruption
    leaves the earlier set of that name untouched; a crash during the swap
    is completed by the next run.  Figures are skipped when
    ``output.figures = false``.

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
    attrs = dict(result.attrs)
    attrs["coordinate_note"] = Y_DOWN_NOTE
    attrs["title"] = f"BOS result {exp.output.name}"
    attrs["Conventions"] = "CF-1.8"
    from ._io import OutputSet

    run_id = attrs.get("run_id")
    with OutputSet(paths["result"].parent, exp.output.name, run_id=run_id) as out:
        attrs["run_id"] = out.run_id
        store.write_result(out.path(paths["result"]), coords=coords, variables=variables, attrs=attrs)
        line = exp.output.profile or _default_profile(result)
        samples = sample_profile(as_result_data(result, gas=gas), line)
        write_profile_csv(out.path(paths["profile_csv"]), samples)
        if exp.output.figures:
            staged = {k: (out.path(v) if k.startswith("fig_") else v) for k, v in paths.items()}
            _figures(result, staged, line, samples)
        return out.commit()


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

