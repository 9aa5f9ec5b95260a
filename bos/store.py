"""Result files: netCDF-4 / CF-1.8 files (written with h5netcdf), CSV export and line profiles.

The layout is described in ``docs/file-format.md``.  In short: every
coordinate is a netCDF dimension coordinate (HDF5 dimension scale), every
variable carries ``units`` (UDUNITS strings) and ``long_name`` (CF
``standard_name`` where one exists), boolean flags are stored as signed
bytes with ``flag_values``/``flag_meanings``, and global attributes whose
value is not a number, a string or a numeric 1-D array (nested provenance
dictionaries, lists of strings, booleans) are stored as JSON text; the
attribute ``bos_json_attributes`` names them so that the readers restore
them.  Files are written through :func:`bos._io.atomic_path` (temporary file
+ rename).  :func:`open_result` returns an :class:`xarray.Dataset`;
:func:`read_result` reads without xarray.

Both readers refuse files that would make them read other files (HDF5
external links, external raw storage, virtual datasets) and files whose
declared array sizes exceed a cap, before any data are read.
"""

from __future__ import annotations

import datetime
import json
import math
import os
import re
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO, Any, Callable, Mapping, Sequence

import numpy as np

from ._io import atomic_path
from .errors import DataFileError, InputError

__all__ = [
    "FORMAT_NAME",
    "SERIES_FORMAT_NAME",
    "CF_STANDARD_NAMES",
    "MAX_READ_BYTES",
    "Variable",
    "ResultData",
    "Profile",
    "write_result",
    "read_result",
    "open_result",
    "check_result_file",
    "file_sha256",
    "export_csv",
    "profile",
    "export_profile_csv",
    "csv_label",
    "csv_columns",
    "display_units",
    "write_table",
]

#: Value of the global ``bos_file_format`` attribute that marks a result file.
FORMAT_NAME = "bos-toolkit result 2"
#: ``bos_file_format`` of a series file (``bos batch``): same encoding, a ``frame`` dimension in front.
SERIES_FORMAT_NAME = "bos-toolkit series 2"
_FORMATS = (FORMAT_NAME, SERIES_FORMAT_NAME)
#: Earlier format (nested attributes flattened to dotted names, y down, .h5); still read.
_OLD_FORMATS = ("bos-toolkit result 1",)
_JSON_LIST_ATTR = "bos_json_attributes"
_OLD_SEP = "."
#: Default cap on what a reader allocates from a file's declared array shapes [bytes].
MAX_READ_BYTES = 2 * 1024**3
_NAME_RE = re.compile(r"[A-Za-z][A-Za-z0-9_]*\Z")
# attributes written by the netCDF/HDF5 layers, not part of the data model
_INTERNAL_ATTRS = ("CLASS", "NAME", "REFERENCE_LIST", "DIMENSION_LIST", "_Netcdf4Dimid", "_Netcdf4Coordinates",
                   "_NCProperties", "_nc3_strict")

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
        Data variables; flags (``flag_values`` 0/1) are returned as boolean
        arrays.
    attrs : dict
        Global attributes, JSON-encoded ones decoded back to dictionaries
        and lists.
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
    """Samples of one field along a straight line in the result's coordinates [m]."""

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
    if data is None and isinstance(spec, Mapping) and not coord and "shape" in spec and "dtype" in spec:
        # filled later through write_result(fill=...): a zero-strided view holds the shape and type, no memory
        data = np.broadcast_to(np.zeros((), np.dtype(spec["dtype"])), tuple(int(n) for n in spec["shape"]))
    if data is None:
        raise InputError(f"{name!r} has no data")
    if isinstance(dims, str) or dims is None:
        raise InputError(f"{name!r}: dims must be a tuple of dimension names, got {dims!r}")
    arr = np.asarray(data)
    dims = tuple(_check_name(str(d), "dimension") for d in dims)
    if arr.ndim != len(dims):
        raise InputError(f"{name!r} has {arr.ndim} dimension(s) but dims {dims}")
    if coord and arr.ndim != 1:
        raise InputError(f"coordinate {name!r} must be 1-D, got shape {arr.shape}")
    text = not coord and (arr.dtype.kind in "US" or (arr.dtype.kind == "O" and all(isinstance(v, str)
                                                                                    for v in arr.ravel())))
    if arr.dtype.kind not in "biuf" and not text:
        raise InputError(f"{name!r} must be numeric, boolean or text, got dtype {arr.dtype}")
    attrs = dict(attrs or {})
    for key in ("long_name",) if text else ("units", "long_name"):
        value = attrs.get(key)
        if not isinstance(value, str) or not value.strip():
            raise InputError(f"variable {name!r} has no {key!r} attribute (use '1' for dimensionless units)")
    attrs = {_check_name(k, f"attribute of {name!r}"): _plain_attr(name, k, v) for k, v in attrs.items() if v is not None}
    if text:
        # CF 1.8 section 2.2: text as a character array whose last dimension is the string length
        # (netCDF-C and the CF checker reject variable-length strings); UTF-8, named in _Encoding
        encoded = [str(v).encode("utf-8") for v in arr.ravel()]
        width = max([1, *map(len, encoded)])
        arr = np.frombuffer(np.array(encoded, dtype=f"S{width}").tobytes(), "S1").reshape(*arr.shape, width)
        dims += (f"{name}_strlen",)
        attrs.pop("units", None)
        attrs["_Encoding"] = "utf-8"
    elif arr.dtype == np.bool_:
        # CF 1.8 section 2.2 has no unsigned types: flags are signed bytes
        arr = _astype(arr, np.int8)
        attrs["flag_values"] = np.array([0, 1], np.int8)
        attrs.setdefault("flag_meanings", "false true")
    elif arr.dtype.kind == "u" and arr.dtype.itemsize < 8:
        arr = _astype(arr, np.dtype(f"i{2 * arr.dtype.itemsize}"))  # unsigned -> next wider signed type
    if "flag_values" in attrs:
        attrs["flag_values"] = np.asarray(attrs["flag_values"]).astype(arr.dtype)
    return Variable(dims=dims, data=arr, attrs=attrs)


def _is_placeholder(arr: np.ndarray) -> bool:
    """A zero-strided view standing for a variable that write_result(fill=...) fills later."""
    return arr.ndim > 0 and arr.size > 1 and not any(arr.strides)


def _astype(arr: np.ndarray, dtype) -> np.ndarray:
    if _is_placeholder(arr):
        return np.broadcast_to(np.zeros((), dtype), arr.shape)
    return arr.astype(dtype)


def _plain_attr(var: str, key: str, value: Any) -> Any:
    """Variable attributes must be strings, numbers or numeric 1-D arrays (netCDF attribute types)."""
    if isinstance(value, (bool, np.bool_)):
        return np.int8(value)
    if isinstance(value, (str, int, float, np.integer, np.floating)):
        return value
    arr = np.asarray(value) if isinstance(value, (list, tuple, np.ndarray)) else None
    if arr is not None and arr.ndim == 1 and arr.size and arr.dtype.kind in "iuf":
        return arr
    raise InputError(f"attribute {key!r} of {var!r} must be a string, number or list of numbers, got {value!r}")


def _check_name(name: Any, what: str) -> str:
    """CF 1.8 section 2.3: names start with a letter and hold letters, digits and underscores."""
    if not isinstance(name, str) or not _NAME_RE.match(name):
        raise InputError(f"{what} name {name!r} must start with a letter and hold only letters, digits "
                         "and underscores (CF 1.8 section 2.3)")
    return name


def _json_ready(obj: Any) -> Any:
    """Nested values -> strict JSON types (non-finite floats -> null, arrays -> lists, paths -> str)."""
    if isinstance(obj, Mapping):
        return {str(k): _json_ready(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple, set)):
        return [_json_ready(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _json_ready(obj.tolist())
    if isinstance(obj, np.generic):
        return _json_ready(obj.item())
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    if isinstance(obj, (Path, os.PathLike)):
        return os.fspath(obj)
    if obj is None or isinstance(obj, (str, bool, int, float)):
        return obj
    raise InputError(f"cannot store a {type(obj).__name__} in a result-file attribute")


def _encode_global(attrs: Mapping) -> tuple[dict[str, Any], list[str]]:
    """Global attributes -> netCDF attribute values; the names stored as JSON text are returned too."""
    out: dict[str, Any] = {}
    json_keys: list[str] = []
    for key, value in attrs.items():
        key = _check_name(key, "attribute")
        if isinstance(value, np.ndarray) and value.ndim == 0:
            value = value.item()
        if isinstance(value, (str, os.PathLike)):
            out[key] = os.fspath(value)
            continue
        if isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, (bool, np.bool_)):
            out[key] = value
            continue
        if isinstance(value, (list, tuple, np.ndarray)):
            try:
                arr = np.asarray(value)
            except ValueError:  # ragged nested lists
                arr = np.asarray([], dtype=object)
            if arr.ndim == 1 and arr.size and arr.dtype.kind in "iuf":
                out[key] = arr.astype(np.int64) if arr.dtype.kind == "u" else arr
                continue
        out[key] = json.dumps(_json_ready(value), ensure_ascii=False, allow_nan=False)
        json_keys.append(key)
    return out, json_keys


def _history_line(note: str) -> str:
    import bos

    stamp = datetime.datetime.now(datetime.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
    return f"{stamp} {note} (bos-toolkit {bos.__version__})"


def _attr_value(value: Any) -> Any:
    if isinstance(value, bytes):
        return value.decode("utf-8", "replace")
    if isinstance(value, np.ndarray) and value.ndim == 0:
        return _attr_value(value.item())
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
    history: str = "written by bos.store.write_result",
    fill: Callable[[Callable[[str, Any, Any], None]], None] | None = None,
) -> Path:
    """Write coordinates, variables and attributes to a netCDF-4 / CF-1.8 file.

    Parameters
    ----------
    path : path-like
        Destination (``.nc`` by convention); written atomically.
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
        signed-byte flags (``flag_values = [0, 1]``, ``flag_meanings``);
        unsigned integers as the next wider signed type (CF has no unsigned
        types); text arrays (str) as CF character arrays (UTF-8, an extra
        last dimension ``<name>_strlen``, attribute ``_Encoding``; no
        ``units`` needed).  A dict with ``shape`` and ``dtype`` instead of
        ``data`` creates the variable empty (chunked by the first
        dimension) for ``fill`` to write, so large series need not be held
        in memory.
    attrs : dict, optional
        Global attributes.  Numbers, strings and numeric 1-D arrays are
        stored as they are; anything else (nested dictionaries, lists of
        strings, booleans, None) as JSON text (non-finite numbers become
        ``null``), named in the attribute ``bos_json_attributes``.
        ``bos_file_format`` is :data:`FORMAT_NAME` unless ``attrs`` names
        :data:`SERIES_FORMAT_NAME`.
    history : str
        What made the file: added, with a UTC time stamp and the software
        version, as the first line of the CF ``history`` attribute (earlier
        lines from ``attrs["history"]`` follow).
    fill : callable, optional
        Called once, after all variables are created and before the file is
        renamed into place, as ``fill(write)``; ``write(name, index,
        values)`` stores ``values`` at ``index`` of a variable (booleans as
        flags).  An exception from ``fill`` leaves no file behind.

    Every coordinate and variable needs ``units`` and ``long_name``
    attributes; set ``standard_name`` where CF has one (see
    :data:`CF_STANDARD_NAMES`).  Variable attributes whose value is None are
    left out.  Names must start with a letter and hold only letters, digits
    and underscores.

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
    CF Conventions 1.8, sections 2.2 (data types), 2.3 (names), 2.6
    (global attributes), 3.1-3.3 (units, long_name, standard_name), 3.5
    (flags), 5 (coordinates).
    """
    import h5netcdf

    cvars = {_check_name(n, "coordinate"): _as_variable(n, s, coord=True) for n, s in coords.items()}
    dvars = {_check_name(n, "variable"): _as_variable(n, s, coord=False) for n, s in variables.items()}
    clash = sorted(set(cvars) & set(dvars))
    if clash:
        raise InputError(f"names used both as coordinate and variable: {clash}")
    dim_coords = {n: v for n, v in cvars.items() if v.dims == (n,)}
    aux_coords = {n: v for n, v in cvars.items() if v.dims != (n,)}
    sizes = {n: v.data.shape[0] for n, v in dim_coords.items()}
    for name, var in dvars.items():  # string-length dimensions of text variables have no coordinate
        if var.data.dtype == np.dtype("S1"):
            sizes[var.dims[-1]] = var.data.shape[-1]
    for name, var in {**aux_coords, **dvars}.items():
        for dim, size in zip(var.dims, var.data.shape):
            if dim not in sizes:
                raise InputError(f"variable {name!r} uses dimension {dim!r} that has no coordinate")
            if sizes[dim] != size:
                raise InputError(f"variable {name!r} has {size} points along {dim!r}, coordinate has {sizes[dim]}")
    given = dict(attrs or {})
    given.pop(_JSON_LIST_ATTR, None)
    old_history = given.pop("history", None)
    history = _history_line(history)
    if isinstance(old_history, str) and old_history.strip():
        history += "\n" + old_history
    given["history"] = history
    if given.get("bos_file_format") not in _FORMATS:
        given["bos_file_format"] = FORMAT_NAME
    given.setdefault("Conventions", "CF-1.8")
    flat, json_keys = _encode_global(given)
    if json_keys:
        flat[_JSON_LIST_ATTR] = " ".join(json_keys)

    def create(nc, name: str, var: Variable, attributes: Mapping[str, Any]) -> None:
        kw: dict[str, Any] = {}
        if var.data.ndim >= 1 and var.data.size >= 4096:
            kw = {"compression": "gzip", "compression_opts": 4, "shuffle": True, "chunks": True}
        if _is_placeholder(var.data):  # filled later, one index of the first dimension at a time
            kw = {"compression": "gzip", "compression_opts": 4, "shuffle": True,
                  "chunks": (1, *var.data.shape[1:]), "dtype": var.data.dtype}
            v = nc.create_variable(name, var.dims, **kw)
        else:
            v = nc.create_variable(name, var.dims, data=var.data, **kw)
        for key, value in attributes.items():
            v.attrs[key] = value

    try:
        with atomic_path(path) as tmp:
            with h5netcdf.File(tmp, "w") as nc:
                nc.dimensions = dict(sizes)
                for name, var in dim_coords.items():
                    create(nc, name, var, var.attrs)
                for name, var in {**aux_coords, **dvars}.items():
                    attributes = dict(var.attrs)
                    if name in dvars:
                        aux = [a for a, av in aux_coords.items() if set(av.dims) <= set(var.dims)]
                        if aux and "coordinates" not in attributes:
                            attributes["coordinates"] = " ".join(aux)
                    create(nc, name, var, attributes)
                for key, value in flat.items():
                    nc.attrs[key] = value
                if fill is not None:
                    def write(name: str, index: Any, values: Any) -> None:
                        if name not in dvars:
                            raise InputError(f"write_result fill: no variable {name!r}")
                        values = np.asarray(values)
                        nc.variables[name][index] = values.astype(np.int8) if values.dtype == np.bool_ else values

                    fill(write)
    except (InputError, DataFileError):
        raise
    except (OSError, TypeError, ValueError) as exc:
        raise DataFileError(f"cannot write result file {path}: {' '.join(str(exc).split())}") from None
    return Path(path)


# --------------------------------------------------------------------------- reading


def check_result_file(h5, path: str | os.PathLike, *, max_bytes: int = MAX_READ_BYTES) -> None:
    """Refuse an open HDF5 file that reaches outside itself or declares huge arrays.

    Walks every link before any data are read and raises when it finds an
    external or soft link, a dataset with external raw storage or a
    virtual dataset (all of which make a reader read other files), or when
    the declared size of one dataset or of all datasets together exceeds
    ``max_bytes`` (a compressed dataset can declare far more than the file
    holds).

    Raises
    ------
    DataFileError
        One-line reason naming the offending object.
    """
    import h5py

    total = 0

    def walk(group, prefix: str) -> None:
        nonlocal total
        for name in group:
            where = f"{prefix}{name}"
            link = group.get(name, getlink=True)
            if isinstance(link, h5py.ExternalLink):
                raise DataFileError(f"{path}: refusing a result file with an external link ({where} -> "
                                    f"{link.filename}:{link.path})")
            if isinstance(link, h5py.SoftLink):
                raise DataFileError(f"{path}: refusing a result file with a soft link ({where} -> {link.path})")
            obj = group.get(name)
            if isinstance(obj, h5py.Group):
                walk(obj, where + "/")
                continue
            if not isinstance(obj, h5py.Dataset):
                continue
            if obj.external:
                raise DataFileError(f"{path}: refusing dataset {where} stored in external file(s) "
                                    f"{', '.join(str(e[0]) for e in obj.external)}")
            if obj.is_virtual:
                raise DataFileError(f"{path}: refusing virtual dataset {where} (maps data from other files)")
            size = int(np.prod(obj.shape, dtype=object)) * max(int(obj.dtype.itemsize), 1) if obj.shape else 0
            total += size
            if size > max_bytes or total > max_bytes:
                raise DataFileError(f"{path}: dataset {where} declares {obj.shape} x {obj.dtype} "
                                    f"({size / 1e9:.3g} GB; all datasets {total / 1e9:.3g} GB), more than the "
                                    f"{max_bytes / 1e9:.3g} GB a reader allocates")

    walk(h5, "/")


def _open_h5(p: Path, max_bytes: int):
    """Open, identify and safety-check a result file; returns (h5py.File, format name)."""
    import h5py

    if not p.is_file():
        raise DataFileError(f"file not found: {p}")
    if not h5py.is_hdf5(p):
        raise DataFileError(f"cannot read result file {p}: not an HDF5/netCDF-4 file")
    h5 = h5py.File(p, "r")
    try:
        fmt = _attr_value(h5.attrs.get("bos_file_format"))
        if fmt not in _FORMATS and fmt not in _OLD_FORMATS:
            raise DataFileError(f"{p} is not a bos result file (no bos_file_format = {FORMAT_NAME!r})")
        check_result_file(h5, p, max_bytes=max_bytes)
    except BaseException:
        h5.close()
        raise
    return h5, fmt


def _decode_globals(p: Path, gattrs: dict[str, Any], fmt: str) -> dict[str, Any]:
    """Restore JSON-encoded (and, for the old format, dotted) global attributes."""
    gattrs = dict(gattrs)
    listed = gattrs.pop(_JSON_LIST_ATTR, "")
    gattrs.pop("bos_file_format", None)
    def loads(key: str, text: Any) -> Any:
        try:
            return json.loads(text)
        except (json.JSONDecodeError, TypeError) as exc:
            raise DataFileError(f"{p}: attribute {key!r} is not valid JSON "
                                f"({getattr(exc, 'msg', exc)}); the file is damaged or was edited") from None

    keys = loads(_JSON_LIST_ATTR, listed or "[]") if fmt in _OLD_FORMATS else str(listed).split()
    if not isinstance(keys, list):
        raise DataFileError(f"{p}: attribute {_JSON_LIST_ATTR!r} is not a list of names")
    for key in keys:
        if isinstance(gattrs.get(key), str):
            gattrs[key] = loads(key, gattrs[key])
    if fmt in _OLD_FORMATS:
        return _unflatten_old(gattrs)
    return gattrs


def _flatten(attrs: Mapping, prefix: str = "") -> tuple[dict[str, Any], list[str]]:
    """Format-1 encoding (kept for callers that still write it): nested dict ->
    ``{'a.b': scalar/str/1-D numeric array}`` plus the names stored as JSON.
    Dotted names draw CF 1.8 section 2.3 warnings; new files use :func:`write_result`."""
    flat: dict[str, Any] = {}
    json_keys: list[str] = []
    for key, value in attrs.items():
        if not isinstance(key, str) or not key or "/" in key or _OLD_SEP in key:
            raise InputError(f"attribute name {key!r} must be a non-empty string without '/' or '.'")
        full = prefix + key
        if isinstance(value, Mapping) and value:
            sub, sub_json = _flatten(value, full + _OLD_SEP)
            flat.update(sub)
            json_keys += sub_json
            continue
        encoded, as_json = _encode_global({"v": value})
        flat[full] = encoded["v"]
        json_keys += [full] if as_json else []
    return flat, json_keys


def _unflatten_old(flat: Mapping[str, Any]) -> dict:
    """Format 1 stored nested dictionaries as ``a.b`` attribute names."""
    out: dict = {}
    for key, value in flat.items():
        node = out
        parts = key.split(_OLD_SEP)
        for part in parts[:-1]:
            node = node.setdefault(part, {})
            if not isinstance(node, dict):  # a scalar and a group share a name: keep flat
                node, parts = out, [key]
                break
        node[parts[-1]] = value
    return out


def _bare_dimension(ds) -> bool:
    """netCDF-4 stores a dimension without a coordinate variable as an empty dimension scale."""
    return str(_attr_value(ds.attrs.get("NAME", ""))).startswith("This is a netCDF dimension but not")


def _is_flag(values: np.ndarray, attrs: Mapping[str, Any]) -> bool:
    fv = attrs.get("flag_values")
    return values.dtype.kind in "iu" and fv is not None and np.array_equal(np.ravel(fv), [0, 1])


def read_result(path: str | os.PathLike, *, max_bytes: int = MAX_READ_BYTES) -> ResultData:
    """Read a file written by :func:`write_result` (no xarray needed).

    Parameters
    ----------
    path : path-like
    max_bytes : int
        Refuse files whose declared arrays need more memory than this [bytes].

    Raises
    ------
    DataFileError
        Missing file, not an HDF5 file, not a result file, corrupt, a
        malformed JSON attribute, links or storage outside the file, or
        declared sizes above ``max_bytes``.
    """
    import h5py

    p = Path(path)
    try:
        h5, fmt = _open_h5(p, max_bytes)
        with h5:
            gattrs = {k: _attr_value(v) for k, v in h5.attrs.items() if k not in _INTERNAL_ATTRS}
            items = {}
            for name, ds in h5.items():
                if not isinstance(ds, h5py.Dataset) or _bare_dimension(ds):
                    continue
                attrs = {k: _attr_value(v) for k, v in ds.attrs.items() if k not in _INTERNAL_ATTRS}
                dims = tuple(
                    _attr_value(d[0].attrs["NAME"]) if len(d) else f"dim_{i}" for i, d in enumerate(ds.dims)
                ) if ds.ndim else ()
                if _attr_value(ds.attrs.get("CLASS", "")) == "DIMENSION_SCALE":
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
        if _is_flag(var.data, var.attrs):
            var.data = var.data.astype(bool)
        elif var.data.dtype == np.dtype("S1") and var.data.ndim >= 1:  # CF character array -> str
            width = var.data.shape[-1]
            joined = np.ascontiguousarray(var.data).view(f"S{width}").reshape(var.data.shape[:-1])
            var.data = np.char.decode(joined, str(var.attrs.pop("_Encoding", "utf-8")), "replace")
            var.dims = var.dims[:-1]
    return ResultData(coords=coords, variables=variables, attrs=_decode_globals(p, gattrs, fmt))


def open_result(path: str | os.PathLike, *, max_bytes: int = MAX_READ_BYTES):
    """Open a result file as an :class:`xarray.Dataset`, loaded into memory.

    The file is checked first (see :func:`check_result_file`), then read
    with xarray's h5netcdf engine.  Flags (``flag_values`` 0/1) are decoded
    to boolean arrays, and global attributes stored as JSON text (nested
    provenance such as ``rig``, ``medium``, ``summary``) are restored as
    dictionaries / lists in ``Dataset.attrs``.  The file is closed on
    return.

    Parameters
    ----------
    path : path-like
        A file written by ``bos run`` (or :func:`write_result`).
    max_bytes : int
        Refuse files whose declared arrays need more memory than this [bytes].

    Returns
    -------
    xarray.Dataset
        Coordinates ``y`` (object-plane metres, pointing UP in files of
        format 2), ``x`` (right), ``row_px``, ``col_px``; the fields.

    Raises
    ------
    DataFileError
        As :func:`read_result`.
    """
    import xarray as xr

    p = Path(path)
    try:
        h5, fmt = _open_h5(p, max_bytes)
        h5.close()
        with xr.open_dataset(p, engine="h5netcdf") as ds:
            ds = ds.load()
    except DataFileError:
        raise
    except Exception as exc:  # noqa: BLE001 - corrupt files raise many h5py/xarray error types
        raise DataFileError(f"cannot read result file {p}: {' '.join(str(exc).split())}") from None
    for name in list(ds.variables):
        var = ds[name]
        if _is_flag(var.values, var.attrs):
            ds[name] = var.astype(bool)
            ds[name].attrs.update(var.attrs)
    ds.attrs = _decode_globals(p, {k: _attr_value(v) for k, v in ds.attrs.items()}, fmt)
    return ds


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


def display_units(attrs: Mapping[str, Any]) -> str:
    """Unit to show people: ``display_units`` (e.g. "px" for pixel counts whose CF units are "1"), else ``units``."""
    return str(attrs.get("display_units") or attrs.get("units") or "")


def csv_label(name: str, units: str) -> str:
    """CSV column header ``name [units]``; a metre coordinate named ``x_m`` is written ``x [m]``."""
    base = name[:-2] if units == "m" and name.endswith("_m") else name
    return f"{base} [{units}]" if units else base


def write_table(dest: str | os.PathLike | IO[str], labels: Sequence[str], columns: Sequence[np.ndarray], *,
                fmt: str = "%.10g") -> str | Path:
    """Write equal-length columns as CSV with one header line of ``labels``.

    ``dest`` is a path (written atomically), ``"-"`` for standard output, or
    an open text stream.  NaN is written as ``nan``.

    Raises
    ------
    DataFileError
        The directory is missing or unwritable.
    """
    table = np.column_stack([np.asarray(c, dtype=np.float64).ravel() for c in columns])
    header = ",".join(str(lab).replace(",", ";") for lab in labels)
    kw = {"delimiter": ",", "header": header, "comments": "", "fmt": fmt}
    if not isinstance(dest, (str, os.PathLike)):
        np.savetxt(dest, table, **kw)
        return "<stream>"
    if os.fspath(dest) == "-":
        np.savetxt(sys.stdout, table, **kw)
        sys.stdout.flush()
        return "-"
    try:
        with atomic_path(dest) as tmp:
            np.savetxt(tmp, table, **kw)
    except DataFileError:
        raise
    except OSError as exc:
        raise DataFileError(f"cannot write {dest}: {exc.strerror or exc}") from None
    return Path(dest)


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


def export_csv(path: str | os.PathLike | IO[str], result: ResultData, *,
               variables: Sequence[str] | None = None) -> str | Path:
    """Write fields in long format: one row per grid point.

    Columns: the dimension coordinates (``y [m]``, ``x [m]``) followed by
    the variables, one header line ``name [units]`` (units as in the file;
    pixel counts as ``px``), comma-separated, NaN written as ``nan``, flags
    as 0/1.  By default all variables sharing the dimensions of the first
    2-D variable are exported.  ``path`` may be ``"-"`` (standard output) or
    a text stream.

    Raises
    ------
    InputError
        Unknown variable or variables on different grids.
    DataFileError
        Output directory missing or unwritable.
    """
    names, dims = _grid_variables(result, variables)
    axes = [np.asarray(result.coords[dim].data, dtype=np.float64) for dim in dims]
    grids = np.meshgrid(*axes, indexing="ij")
    columns = [g.ravel() for g in grids] + [np.asarray(result.variables[n].data, dtype=np.float64) for n in names]
    return write_table(path, csv_columns(result, variables), columns)


def csv_columns(result: ResultData, variables: Sequence[str] | None = None) -> list[str]:
    """Header labels :func:`export_csv` writes for ``variables`` (coordinates first)."""
    names, dims = _grid_variables(result, variables)
    missing = [d for d in dims if d not in result.coords]
    if missing:
        raise InputError(f"dimension {missing[0]!r} has no coordinate in the result")
    return ([csv_label(d, display_units(result.coords[d].attrs)) for d in dims]
            + [csv_label(n, display_units(result.variables[n].attrs)) for n in names])


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
        End points in the result's coordinates [m], given as (x, y) like
        polygon vertices (in result files y points UP).
    n : int, optional
        Number of samples; default about one per grid spacing, at least 2.
    y, x : str
        Names of the row and column coordinates (ascending or descending).

    Returns
    -------
    Profile
        Bilinear interpolation; a sample is NaN outside the grid or when any
        of the grid nodes that carry weight for it is NaN (NaN does not spread
        beyond its own grid cells).  ``units`` is the display unit.
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
    field = np.asarray(var.data, dtype=np.float64)
    if ys.size > 1 and ys[0] > ys[-1]:  # descending coordinate (y up with rows going down)
        ys, field = ys[::-1], field[::-1]
    if xs.size > 1 and xs[0] > xs[-1]:
        xs, field = xs[::-1], field[:, ::-1]
    length = math.hypot(x1 - x0, y1 - y0)
    if n is None:
        step = min(np.min(np.abs(np.diff(a))) if a.size > 1 else np.inf for a in (ys, xs))
        n = max(2, int(round(length / step)) + 1) if math.isfinite(step) and step > 0 else 2
    if int(n) < 2:
        raise InputError(f"profile needs n >= 2 samples, got {n}")
    t = np.linspace(0.0, 1.0, int(n))
    px, py = x0 + t * (x1 - x0), y0 + t * (y1 - y0)
    bad = ~np.isfinite(field)
    pts = np.column_stack([_snap(py, ys), _snap(px, xs)])
    kw = {"method": "linear", "bounds_error": False, "fill_value": np.nan}
    values = RegularGridInterpolator((ys, xs), np.where(bad, 0.0, field), **kw)(pts)
    if bad.any():
        touched = RegularGridInterpolator((ys, xs), bad.astype(np.float64), **kw)(pts)
        values = np.where(touched > 0.0, np.nan, values)
    return Profile(variable=variable, units=display_units(var.attrs), s_m=t * length, x_m=px, y_m=py,
                   values=values)


def _snap(v: np.ndarray, axis: np.ndarray) -> np.ndarray:
    """Move points that miss the grid edge by rounding only (1e-9 of the span) onto the edge."""
    lo, hi = float(np.min(axis)), float(np.max(axis))
    tol = 1e-9 * max(hi - lo, abs(hi), abs(lo), 1e-300)
    return np.where((v < lo) & (v > lo - tol), lo, np.where((v > hi) & (v < hi + tol), hi, v))


def export_profile_csv(path: str | os.PathLike | IO[str], prof: Profile) -> str | Path:
    """Write a :class:`Profile` as CSV with columns ``s [m], x [m], y [m], <variable> [<units>]``."""
    labels = [csv_label("s_m", "m"), csv_label("x_m", "m"), csv_label("y_m", "m"), csv_label(prof.variable, prof.units)]
    return write_table(path, labels, [prof.s_m, prof.x_m, prof.y_m, prof.values])
