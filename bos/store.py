"""Result files: netCDF4/CF-compatible HDF5 (h5py), CSV export and line profiles.

The layout is described in ``docs/file-format.md``.  In short: every
coordinate is an HDF5 dimension scale, every variable is attached to the
scales of its dimensions and carries ``units`` and ``long_name`` (CF
``standard_name`` where one exists), boolean flags are stored as uint8 with
``flag_values``/``flag_meanings``, and nested attribute dictionaries are
flattened to ``prefix.key`` scalar attributes (values that are not numbers,
strings or numeric 1-D arrays become JSON strings).  Files are written
through :func:`bos._io.atomic_path` (temporary file + rename) and open with
``xarray.open_dataset(path, engine="h5netcdf")``.
"""

from __future__ import annotations

import json
import math
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np

from ._io import atomic_path
from .errors import DataFileError, InputError

__all__ = [
    "FORMAT_NAME",
    "CF_STANDARD_NAMES",
    "Variable",
    "ResultData",
    "Profile",
    "write_result",
    "read_result",
    "file_sha256",
    "export_csv",
    "profile",
    "export_profile_csv",
]

#: Value of the global ``bos_file_format`` attribute that marks a result file.
FORMAT_NAME = "bos-toolkit result 1"
_JSON_LIST_ATTR = "bos_json_attributes"
_SEP = "."

#: CF standard names (CF standard-name table) for the quantities that have
#: one.  The writer does not add them by itself: ``air_density`` and
#: ``air_temperature`` are only correct for air, so the caller, who knows the
#: medium, sets ``standard_name`` in the variable's attributes.
CF_STANDARD_NAMES = {
    "density": "air_density",
    "temperature": "air_temperature",
    "pressure": "air_pressure",
}


@dataclass
class Variable:
    """One array with its dimension names and attributes."""

    dims: tuple[str, ...]
    data: np.ndarray
    attrs: dict = field(default_factory=dict)


@dataclass
class ResultData:
    """Contents of a result file.

    Attributes
    ----------
    coords : dict[str, Variable]
        Dimension coordinates (name == dimension) and auxiliary coordinates.
    variables : dict[str, Variable]
        Data variables; flags (uint8 with ``flag_values`` 0/1) are returned
        as boolean arrays.
    attrs : dict
        Global attributes, un-flattened back to nested dictionaries.
    """

    coords: dict[str, Variable]
    variables: dict[str, Variable]
    attrs: dict

    def __getitem__(self, name: str) -> Variable:
        if name in self.variables:
            return self.variables[name]
        if name in self.coords:
            return self.coords[name]
        raise InputError(f"no variable {name!r} in result; have {sorted(self.variables)}")


@dataclass
class Profile:
    """Samples of one field along a straight line in object-plane metres."""

    variable: str
    units: str
    s_m: np.ndarray  # distance from the start point [m]
    x_m: np.ndarray
    y_m: np.ndarray
    values: np.ndarray


# --------------------------------------------------------------------------- normalising input


def _as_variable(name: str, spec: Any, *, coord: bool) -> Variable:
    """Accept Variable, dict(dims=, data=, attrs=) or tuples (array, attrs) / (dims, array, attrs)."""
    if isinstance(spec, Variable):
        dims, data, attrs = spec.dims, spec.data, spec.attrs
    elif isinstance(spec, Mapping):
        data, attrs = spec.get("data"), spec.get("attrs", {})
        dims = spec.get("dims", (name,) if coord else None)
    elif isinstance(spec, tuple) and coord and len(spec) == 2:
        (data, attrs), dims = spec, (name,)
    elif isinstance(spec, tuple) and len(spec) == 3:
        dims, data, attrs = spec
    else:
        form = "(array, attrs)" if coord else "(dims, array, attrs)"
        raise InputError(f"{name!r} must be {form} or a dict with dims/data/attrs, got {type(spec).__name__}")
    if data is None:
        raise InputError(f"{name!r} has no data")
    if isinstance(dims, str) or dims is None:
        raise InputError(f"{name!r}: dims must be a tuple of dimension names, got {dims!r}")
    arr = np.asarray(data)
    dims = tuple(str(d) for d in dims)
    if arr.ndim != len(dims):
        raise InputError(f"{name!r} has {arr.ndim} dimension(s) but dims {dims}")
    if coord and arr.ndim != 1:
        raise InputError(f"coordinate {name!r} must be 1-D, got shape {arr.shape}")
    if arr.dtype.kind not in "biuf":
        raise InputError(f"{name!r} must be numeric or boolean, got dtype {arr.dtype}")
    attrs = dict(attrs or {})
    for key in ("units", "long_name"):
        value = attrs.get(key)
        if not isinstance(value, str) or not value.strip():
            raise InputError(f"variable {name!r} has no {key!r} attribute (use '1' for dimensionless units)")
    attrs = {_check_name(k, f"attribute of {name!r}"): _plain_attr(name, k, v) for k, v in attrs.items() if v is not None}
    if arr.dtype == np.bool_:
        arr = arr.astype(np.uint8)
        attrs.setdefault("flag_values", np.array([0, 1], np.uint8))
        attrs.setdefault("flag_meanings", "false true")
    return Variable(dims=dims, data=arr, attrs=attrs)


def _plain_attr(var: str, key: str, value: Any) -> Any:
    """Variable attributes must be strings, numbers or numeric 1-D arrays (netCDF attribute types)."""
    if isinstance(value, (bool, np.bool_)):
        return np.uint8(value)
    if isinstance(value, (str, int, float, np.integer, np.floating)):
        return value
    arr = np.asarray(value) if isinstance(value, (list, tuple, np.ndarray)) else None
    if arr is not None and arr.ndim == 1 and arr.size and arr.dtype.kind in "iuf":
        return arr
    raise InputError(f"attribute {key!r} of {var!r} must be a string, number or list of numbers, got {value!r}")


def _check_name(name: Any, what: str) -> str:
    if not isinstance(name, str) or not name or "/" in name or _SEP in name:
        raise InputError(f"{what} name {name!r} must be a non-empty string without '/' or '{_SEP}'")
    return name


def _json_default(obj: Any) -> Any:
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, (Path, os.PathLike)):
        return os.fspath(obj)
    raise TypeError(f"cannot store {type(obj).__name__}")


def _flatten(attrs: Mapping, prefix: str = "") -> tuple[dict[str, Any], list[str]]:
    """Nested dict -> flat {'a.b': scalar/str/1-D numeric array}; returns also the JSON-encoded keys."""
    flat: dict[str, Any] = {}
    json_keys: list[str] = []
    for key, value in attrs.items():
        full = prefix + _check_name(key, "attribute")
        if isinstance(value, Mapping) and value:
            sub, sub_json = _flatten(value, full + _SEP)
            flat.update(sub)
            json_keys += sub_json
            continue
        if isinstance(value, (str, os.PathLike)):
            flat[full] = os.fspath(value)
            continue
        if isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, (bool, np.bool_)):
            flat[full] = value
            continue
        if isinstance(value, (list, tuple, np.ndarray)):
            arr = np.asarray(value) if len(value) else None
            if arr is not None and arr.ndim == 1 and arr.dtype.kind in "iuf":
                flat[full] = arr
                continue
        try:
            flat[full] = json.dumps(value, default=_json_default, allow_nan=True, ensure_ascii=False)
        except (TypeError, ValueError) as exc:
            raise InputError(f"attribute {full!r} cannot be stored: {exc}") from None
        json_keys.append(full)
    return flat, json_keys


def _unflatten(flat: Mapping[str, Any], json_keys: set[str]) -> dict:
    out: dict = {}
    for key, value in flat.items():
        if key in json_keys and isinstance(value, str):
            value = json.loads(value)
        node = out
        parts = key.split(_SEP)
        for part in parts[:-1]:
            node = node.setdefault(part, {})
            if not isinstance(node, dict):  # a scalar and a group share a name: keep flat
                node = out
                parts = [key]
                break
        node[parts[-1]] = value
    return out


def _attr_value(value: Any) -> Any:
    if isinstance(value, bytes):
        return value.decode("utf-8", "replace")
    if isinstance(value, np.ndarray) and value.ndim == 0:
        return value.item()
    if isinstance(value, np.generic):
        return value.item()
    return value


# --------------------------------------------------------------------------- writing


def write_result(
    path: str | os.PathLike,
    *,
    coords: Mapping[str, Any],
    variables: Mapping[str, Any],
    attrs: Mapping[str, Any] | None = None,
) -> Path:
    """Write coordinates, variables and attributes to a netCDF4/CF-style HDF5 file.

    Parameters
    ----------
    path : path-like
        Destination (``.h5`` or ``.nc``); written atomically.
    coords : dict
        ``name -> (1-D array, attrs)`` for a dimension coordinate (the
        dimension takes the coordinate's name), or a dict / :class:`Variable`
        with ``dims`` (one name), ``data`` and ``attrs``; a coordinate whose
        dimension has another name is an auxiliary coordinate (e.g. pixel
        rows along ``y``) and is listed in the CF ``coordinates`` attribute of
        the variables that share its dimension.
    variables : dict
        ``name -> (dims tuple, array, attrs)`` or a dict / :class:`Variable`
        with ``dims``, ``data``, ``attrs``.  Boolean arrays are stored as
        uint8 flags.
    attrs : dict, optional
        Global attributes; nested dicts are flattened to ``a.b`` names.

    Every coordinate and variable needs ``units`` and ``long_name``
    attributes; set ``standard_name`` where CF has one (see
    :data:`CF_STANDARD_NAMES`).  Attributes whose value is None are left out.

    Returns
    -------
    Path
        ``path``.

    Raises
    ------
    InputError
        Missing units/long_name, unknown dimension, shape mismatch, bad names.
    DataFileError
        The directory is missing or unwritable, or the write fails.

    References
    ----------
    CF Conventions 1.8, sections 3.1-3.3 (units, long_name, standard_name),
    3.5 (flags), 5 (coordinates).
    """
    import h5py

    cvars = {_check_name(n, "coordinate"): _as_variable(n, s, coord=True) for n, s in coords.items()}
    dvars = {_check_name(n, "variable"): _as_variable(n, s, coord=False) for n, s in variables.items()}
    clash = sorted(set(cvars) & set(dvars))
    if clash:
        raise InputError(f"names used both as coordinate and variable: {clash}")
    dim_coords = {n: v for n, v in cvars.items() if v.dims == (n,)}
    aux_coords = {n: v for n, v in cvars.items() if v.dims != (n,)}
    sizes = {n: v.data.shape[0] for n, v in dim_coords.items()}
    for name, var in {**aux_coords, **dvars}.items():
        for dim, size in zip(var.dims, var.data.shape):
            if dim not in sizes:
                raise InputError(f"variable {name!r} uses dimension {dim!r} that has no coordinate")
            if sizes[dim] != size:
                raise InputError(f"variable {name!r} has {size} points along {dim!r}, coordinate has {sizes[dim]}")
    flat, json_keys = _flatten(dict(attrs or {}))
    flat["bos_file_format"] = FORMAT_NAME
    flat.setdefault("Conventions", "CF-1.8")
    if json_keys:
        flat[_JSON_LIST_ATTR] = json.dumps(json_keys)

    def put_attrs(obj, attributes: Mapping[str, Any]) -> None:
        for key, value in attributes.items():
            obj.attrs[key] = value

    def create(h5, name: str, var: Variable):
        kw: dict[str, Any] = {}
        if var.data.ndim >= 1 and var.data.size >= 4096:
            kw = {"compression": "gzip", "compression_opts": 4, "shuffle": True, "chunks": True}
        return h5.create_dataset(name, data=var.data, **kw)

    try:
        with atomic_path(path) as tmp:
            with h5py.File(tmp, "w") as h5:
                scales = {}
                for name, var in dim_coords.items():
                    ds = create(h5, name, var)
                    ds.make_scale(name)
                    put_attrs(ds, var.attrs)
                    scales[name] = ds
                for name, var in {**aux_coords, **dvars}.items():
                    ds = create(h5, name, var)
                    for i, dim in enumerate(var.dims):
                        ds.dims[i].attach_scale(scales[dim])
                    attributes = dict(var.attrs)
                    if name in dvars:
                        aux = [a for a, av in aux_coords.items() if set(av.dims) <= set(var.dims)]
                        if aux and "coordinates" not in attributes:
                            attributes["coordinates"] = " ".join(aux)
                    put_attrs(ds, attributes)
                put_attrs(h5, flat)
    except (InputError, DataFileError):
        raise
    except (OSError, TypeError, ValueError) as exc:
        raise DataFileError(f"cannot write result file {path}: {' '.join(str(exc).split())}") from None
    return Path(path)


# --------------------------------------------------------------------------- reading


def read_result(path: str | os.PathLike) -> ResultData:
    """Read a file written by :func:`write_result`.

    Raises
    ------
    DataFileError
        Missing file, not an HDF5 file, not a result file, or corrupt.
    """
    import h5py

    p = Path(path)
    if not p.is_file():
        raise DataFileError(f"file not found: {p}")
    try:
        if not h5py.is_hdf5(p):
            raise DataFileError(f"cannot read result file {p}: not an HDF5 file")
        with h5py.File(p, "r") as h5:
            gattrs = {k: _attr_value(v) for k, v in h5.attrs.items()}
            if gattrs.get("bos_file_format") != FORMAT_NAME:
                raise DataFileError(f"{p} is not a bos result file (no bos_file_format = {FORMAT_NAME!r})")
            items = {}
            for name, ds in h5.items():
                if not isinstance(ds, h5py.Dataset):
                    continue
                attrs = {k: _attr_value(v) for k, v in ds.attrs.items() if k not in ("CLASS", "NAME", "REFERENCE_LIST", "DIMENSION_LIST")}
                dims = tuple(
                    _attr_value(d[0].attrs["NAME"]) if len(d) else f"dim_{i}" for i, d in enumerate(ds.dims)
                ) if ds.ndim else ()
                if ds.attrs.get("CLASS") == b"DIMENSION_SCALE" or _attr_value(ds.attrs.get("CLASS", "")) == "DIMENSION_SCALE":
                    dims = (name,)
                items[name] = Variable(dims=dims, data=ds[()], attrs=attrs)
    except DataFileError:
        raise
    except Exception as exc:  # noqa: BLE001 - corrupt files raise many h5py error types
        raise DataFileError(f"cannot read result file {p}: {' '.join(str(exc).split())}") from None
    aux_names: set[str] = set()
    for var in items.values():
        aux_names.update(str(var.attrs.get("coordinates", "")).split())
    coords = {n: v for n, v in items.items() if v.dims == (n,) or n in aux_names}
    variables = {n: v for n, v in items.items() if n not in coords}
    for var in variables.values():
        fv = var.attrs.get("flag_values")
        if var.data.dtype == np.uint8 and fv is not None and np.array_equal(np.ravel(fv), [0, 1]):
            var.data = var.data.astype(bool)
    json_keys = set(json.loads(gattrs.pop(_JSON_LIST_ATTR, "[]")))
    gattrs.pop("bos_file_format", None)
    return ResultData(coords=coords, variables=variables, attrs=_unflatten(gattrs, json_keys))


def file_sha256(path: str | os.PathLike) -> str:
    """SHA-256 hex digest of a file (read in 1 MiB blocks).

    Raises
    ------
    DataFileError
        Missing or unreadable file.
    """
    from ._io import file_sha256 as _sha256

    p = Path(path)
    try:
        return _sha256(p)
    except FileNotFoundError:
        raise DataFileError(f"file not found: {p}") from None
    except OSError as exc:
        raise DataFileError(f"cannot read {p}: {exc.strerror or exc}") from None


# --------------------------------------------------------------------------- CSV export and profiles


def _column_name(name: str, units: str) -> str:
    """Coordinate column header: the name plus '_m' for metre coordinates ('y' -> 'y_m')."""
    return f"{name}_m" if units == "m" and not name.endswith("_m") else name


def _grid_variables(result: ResultData, variables: Sequence[str] | None) -> tuple[list[str], tuple[str, ...]]:
    if variables is None:
        two_d = [n for n, v in result.variables.items() if v.data.ndim == 2]
        if not two_d:
            raise InputError("result has no 2-D field to export")
        dims = result.variables[two_d[0]].dims
        return [n for n in two_d if result.variables[n].dims == dims], dims
    names = list(variables)
    if not names:
        raise InputError("no variables selected for export")
    for n in names:
        if n not in result.variables:
            raise InputError(f"no variable {n!r} in result; have {sorted(result.variables)}")
    dims = result.variables[names[0]].dims
    other = [n for n in names if result.variables[n].dims != dims]
    if other:
        raise InputError(f"variables {other} do not share the dimensions {dims} of {names[0]!r}")
    return names, dims


def export_csv(path: str | os.PathLike, result: ResultData, *, variables: Sequence[str] | None = None) -> Path:
    """Write fields in long format: one row per grid point.

    Columns: the dimension coordinates (``y_m``, ``x_m`` for metre
    coordinates named y and x) followed by the variables, one header line,
    comma-separated, NaN written as ``nan``, flags as 0/1.  By default all
    variables sharing the dimensions of the first 2-D variable are exported.

    Raises
    ------
    InputError
        Unknown variable or variables on different grids.
    DataFileError
        Output directory missing or unwritable.
    """
    names, dims = _grid_variables(result, variables)
    axes = []
    header = []
    for dim in dims:
        if dim not in result.coords:
            raise InputError(f"dimension {dim!r} has no coordinate in the result")
        c = result.coords[dim]
        axes.append(np.asarray(c.data, dtype=np.float64))
        header.append(_column_name(dim, str(c.attrs.get("units", ""))))
    grids = np.meshgrid(*axes, indexing="ij")
    columns = [g.ravel() for g in grids]
    columns += [np.asarray(result.variables[n].data, dtype=np.float64).ravel() for n in names]
    table = np.column_stack(columns)
    try:
        with atomic_path(path) as tmp:
            np.savetxt(tmp, table, delimiter=",", header=",".join(header + names), comments="", fmt="%.10g")
    except DataFileError:
        raise
    except OSError as exc:
        raise DataFileError(f"cannot write {path}: {exc.strerror or exc}") from None
    return Path(path)


def profile(
    result: ResultData,
    variable: str,
    *,
    start: tuple[float, float],
    end: tuple[float, float],
    n: int | None = None,
    y: str = "y",
    x: str = "x",
) -> Profile:
    """Sample a 2-D field along the straight line from ``start`` to ``end``.

    Parameters
    ----------
    result : ResultData
    variable : str
        Name of a variable with dimensions ``(y, x)``.
    start, end : (x, y)
        End points in object-plane metres, given as (x, y) like polygon
        vertices (y points down).
    n : int, optional
        Number of samples; default about one per grid spacing, at least 2.
    y, x : str
        Names of the row and column coordinates.

    Returns
    -------
    Profile
        Bilinear interpolation; a sample is NaN outside the grid or when any
        of the grid nodes that carry weight for it is NaN (NaN does not spread
        beyond its own grid cells).
    """
    from scipy.interpolate import RegularGridInterpolator

    var = result[variable]
    if var.dims != (y, x):
        raise InputError(f"variable {variable!r} has dims {var.dims}, need ({y!r}, {x!r})")
    try:
        (x0, y0), (x1, y1) = (tuple(float(v) for v in pt) for pt in (start, end))
    except (TypeError, ValueError):
        raise InputError(f"profile end points must be (x, y) pairs in metres, got {start!r}, {end!r}") from None
    if not all(math.isfinite(v) for v in (x0, y0, x1, y1)):
        raise InputError("profile end points must be finite")
    ys = np.asarray(result.coords[y].data, dtype=np.float64)
    xs = np.asarray(result.coords[x].data, dtype=np.float64)
    length = math.hypot(x1 - x0, y1 - y0)
    if n is None:
        step = min(np.min(np.abs(np.diff(a))) if a.size > 1 else np.inf for a in (ys, xs))
        n = max(2, int(round(length / step)) + 1) if math.isfinite(step) and step > 0 else 2
    if int(n) < 2:
        raise InputError(f"profile needs n >= 2 samples, got {n}")
    t = np.linspace(0.0, 1.0, int(n))
    px, py = x0 + t * (x1 - x0), y0 + t * (y1 - y0)
    field = np.asarray(var.data, dtype=np.float64)
    bad = ~np.isfinite(field)
    pts = np.column_stack([_snap(py, ys), _snap(px, xs)])
    kw = {"method": "linear", "bounds_error": False, "fill_value": np.nan}
    values = RegularGridInterpolator((ys, xs), np.where(bad, 0.0, field), **kw)(pts)
    if bad.any():
        touched = RegularGridInterpolator((ys, xs), bad.astype(np.float64), **kw)(pts)
        values = np.where(touched > 0.0, np.nan, values)
    return Profile(variable=variable, units=str(var.attrs.get("units", "")), s_m=t * length, x_m=px, y_m=py,
                   values=values)


def _snap(v: np.ndarray, axis: np.ndarray) -> np.ndarray:
    """Move points that miss the grid edge by rounding only (1e-9 of the span) onto the edge."""
    lo, hi = float(np.min(axis)), float(np.max(axis))
    tol = 1e-9 * max(hi - lo, abs(hi), abs(lo), 1e-300)
    return np.where((v < lo) & (v > lo - tol), lo, np.where((v > hi) & (v < hi + tol), hi, v))


def export_profile_csv(path: str | os.PathLike, prof: Profile) -> Path:
    """Write a :class:`Profile` as CSV with columns ``s_m, x_m, y_m, <variable>``."""
    table = np.column_stack([prof.s_m, prof.x_m, prof.y_m, prof.values])
    try:
        with atomic_path(path) as tmp:
            np.savetxt(tmp, table, delimiter=",", header=f"s_m,x_m,y_m,{prof.variable}", comments="", fmt="%.10g")
    except DataFileError:
        raise
    except OSError as exc:
        raise DataFileError(f"cannot write {path}: {exc.strerror or exc}") from None
    return Path(path)
