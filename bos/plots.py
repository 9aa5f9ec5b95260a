"""Figures of a processed experiment, drawn from the result data alone.

Every figure is built from the content of a result file -- coordinates,
fields, flags and attributes -- so ``bos plot RESULT`` redraws exactly what
``bos run`` drew.  :func:`figure_data` accepts an in-memory result
(:func:`bos.output.as_result_data`), a file read with
:func:`bos.store.read_result`, an :class:`xarray.Dataset` or a path.

Conventions of every field figure: object-plane millimetres on both axes
with y pointing down (as in the image), a colour bar naming the quantity and
its unit (one spelling: ``px``, ``µrad``, ``kg/m³``, ``K``, ``Pa``), no
offset notation on the axes, masked areas (the user asked for no data) drawn
hatched grey and invalid vectors (rejected by the validation) in a distinct
solid colour, with a legend; the run name in the title; the profile line and,
for axisymmetric results, the fitted symmetry axis drawn on every panel.
Figures are rendered with matplotlib's non-interactive Agg canvas (no
display needed) at screen resolution and written atomically.
"""

from __future__ import annotations

import dataclasses
import io
import json
import math
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np

from ._io import atomic_path
from .errors import InputError

#: Resolution of raster figures [dots per inch]: screen resolution.  The
#: fields live on the vector grid (a 24 MP image gives at most ~1500 x 1000
#: vectors), so a higher resolution only costs time.
DPI = 100

#: Colour of invalid (rejected) vectors: a solid colour absent from the
#: colour maps used for the fields.
INVALID_COLOUR = "#00d23c"
#: Fill and hatch of masked areas.
MASKED_FILL = "0.80"
MASKED_HATCH = "////"
MASKED_HATCH_COLOUR = "0.35"

# Display unit of each quantity: (label, factor from the SI unit of the file)
_DEFLECTION_FACTORS = {"rad": 1e6, "radian": 1e6, "radians": 1e6, "1": 1e6,
                       "urad": 1.0, "µrad": 1.0, "microradian": 1.0, "microradians": 1.0}


# --------------------------------------------------------------------------- the data of a figure


@dataclass(frozen=True)
class SymmetryAxis:
    """The symmetry axis of an axisymmetric reconstruction.

    Attributes
    ----------
    orientation : {"vertical", "horizontal"}
        A vertical axis is a line of constant x, a horizontal one of constant y.
    index : float
        Fractional column (vertical) or row (horizontal) index of the vector
        grid, as stored in the file.
    px : float or None
        The same position as an image column (row) [sensor px].
    m : float
        The same position in object-plane metres (x, or y pointing down).
    """

    orientation: str
    index: float
    px: float | None
    m: float

    def describe(self) -> str:
        """One line: ``symmetry axis (vertical): x = 1.23 mm, image column 456.7 px``."""
        coord, what = ("x", "column") if self.orientation == "vertical" else ("y", "row")
        px = f", image {what} {self.px:.1f} px" if self.px is not None else ""
        return f"symmetry axis ({self.orientation}): {coord} = {self.m * 1e3:.3f} mm{px}"


@dataclass
class FigureData:
    """The content of a result needed for the figures (y pointing down, axes ascending).

    Attributes
    ----------
    x_m, y_m : ndarray
        Object-plane coordinates [m] of the columns and rows, ascending; y
        points down.
    col_px, row_px : ndarray or None
        Image column/row [px] of the vector-grid points.
    fields : dict[str, ndarray]
        2-D fields on ``(y_m, x_m)`` in the units of ``units``.
    units : dict[str, str]
        Unit string of each field as stored in the file.
    masked, invalid : ndarray of bool
        User mask and rejected vectors.
    attrs : dict
        Global attributes as nested dictionaries.
    name : str
        Run name (used in titles).
    axis : SymmetryAxis or None
        Fitted symmetry axis of an axisymmetric result.
    """

    x_m: np.ndarray
    y_m: np.ndarray
    col_px: np.ndarray | None
    row_px: np.ndarray | None
    fields: dict[str, np.ndarray]
    units: dict[str, str]
    masked: np.ndarray
    invalid: np.ndarray
    attrs: dict = field(default_factory=dict)
    name: str = "result"
    axis: SymmetryAxis | None = None
    file_y_up: bool = False

    def get(self, name: str) -> np.ndarray | None:
        return self.fields.get(name)


def _parse_json_text(value: Any) -> Any:
    if isinstance(value, str) and value[:1] in "{[" and value[-1:] in "}]":
        try:
            return json.loads(value)
        except ValueError:
            return value
    return value


def nested_attrs(attrs: Mapping[str, Any]) -> dict:
    """Global attributes as nested dictionaries.

    Accepts dotted names (``rig.focal_length_m``), JSON text values and
    already nested dictionaries, so files from any writer version read alike.
    """
    out: dict = {}
    for key, value in dict(attrs).items():
        if key == "bos_json_attributes":
            continue
        if isinstance(value, np.ndarray) and value.ndim == 0:
            value = value.item()
        if isinstance(value, np.generic):
            value = value.item()
        if isinstance(value, bytes):
            value = value.decode("utf-8", "replace")
        value = _parse_json_text(value)
        if isinstance(value, Mapping):
            value = nested_attrs(value)
        node = out
        parts = str(key).split(".")
        for part in parts[:-1]:
            nxt = node.get(part)
            if not isinstance(nxt, dict):
                nxt = node[part] = {}
            node = nxt
        last = parts[-1]
        if isinstance(node.get(last), dict) and isinstance(value, dict):
            node[last].update(value)
        else:
            node[last] = value
    return out


def _says_up(attrs: Mapping[str, Any]) -> bool | None:
    """True/False when the attributes say the y direction points up/down, else None."""
    pos = str(attrs.get("positive", "")).strip().lower()
    if pos in ("up", "down"):
        return pos == "up"
    text = " ".join(str(attrs.get(k, "")) for k in ("long_name", "description", "comment")).lower()
    up, down = bool(re.search(r"\bup(ward)?\b", text)), bool(re.search(r"\bdown(ward)?\b", text))
    return None if up == down else up


def _y_points_up(y: np.ndarray, row_px: np.ndarray | None, attrs: Mapping[str, Any]) -> bool:
    """Whether the file's y coordinate points up: from the data (y against the
    image row) when both are there, else from the attributes (default down)."""
    if row_px is not None and y.size > 1 and row_px.size == y.size:
        dy, dr = y[-1] - y[0], row_px[-1] - row_px[0]
        if dy != 0 and dr != 0:
            return (dy > 0) != (dr > 0)
    return bool(_says_up(attrs))


def _items(source: Any) -> tuple[dict[str, tuple[tuple[str, ...], np.ndarray, dict]], dict]:
    """name -> (dims, data, attrs) for every coordinate and variable, and the global attributes."""
    items: dict[str, tuple[tuple[str, ...], np.ndarray, dict]] = {}
    if hasattr(source, "data_vars") and hasattr(source, "coords"):      # xarray.Dataset
        for name in list(source.coords) + list(source.data_vars):
            da = source[name]
            items[str(name)] = (tuple(str(d) for d in da.dims), np.asarray(da.values), dict(da.attrs))
        return items, dict(source.attrs)
    if hasattr(source, "variables") and hasattr(source, "coords"):      # bos.store.ResultData
        for group in (source.coords, source.variables):
            for name, var in group.items():
                items[str(name)] = (tuple(var.dims), np.asarray(var.data), dict(var.attrs))
        return items, dict(source.attrs)
    raise InputError(f"cannot draw figures from a {type(source).__name__}: need a result file, "
                     "bos.store.ResultData or xarray.Dataset")


def _open(path: str | os.PathLike):
    """Read a result file: ``bos.store.read_result`` (no xarray needed; any format it knows)."""
    from . import store

    return store.read_result(path)


def _run_name(attrs: dict, default: str) -> str:
    for key in ("run_name", "name"):
        if isinstance(attrs.get(key), str) and attrs[key].strip():
            return attrs[key].strip()
    output = attrs.get("output")
    if isinstance(output, dict) and isinstance(output.get("name"), str):
        return output["name"]
    title = attrs.get("title")
    if isinstance(title, str) and title.startswith("BOS result "):
        return title[len("BOS result "):].strip() or default
    return default


def _axis_from_attrs(attrs: dict, *, x_orig: np.ndarray, y_orig: np.ndarray, col_px, row_px,
                     y_sign: float) -> SymmetryAxis | None:
    info = attrs.get("reconstruction_info")
    if not isinstance(info, dict):
        return None
    orientation, pos = info.get("axis"), info.get("axis_position")
    if orientation not in ("vertical", "horizontal") or pos is None:
        return None
    try:
        index = float(pos)
    except (TypeError, ValueError):
        return None
    if not math.isfinite(index):
        return None
    vertical = orientation == "vertical"
    coord = x_orig if vertical else y_orig
    pix = col_px if vertical else row_px
    grid = np.arange(coord.size, dtype=float)
    m = float(np.interp(index, grid, coord)) * (1.0 if vertical else y_sign)
    px = float(np.interp(index, grid, pix)) if pix is not None and len(pix) == coord.size else None
    return SymmetryAxis(orientation=orientation, index=index, px=px, m=m)


def figure_data(source: Any, *, name: str | None = None) -> FigureData:
    """Collect what the figures need from a result, whatever form it comes in.

    Parameters
    ----------
    source : FigureData, bos.store.ResultData, xarray.Dataset, RunResult or path
        The result (a path is read with :func:`bos.store.read_result`, a
        :class:`bos.stages.RunResult` through :func:`bos.output.as_result_data`).
    name : str, optional
        Run name for titles (default: from the attributes, or the file name).

    Returns
    -------
    FigureData
        Fields on ascending axes with y pointing down (a file whose y points
        up is turned round, and its y components change sign).

    Raises
    ------
    InputError
        The source has no 2-D field on an (y, x) grid.
    DataFileError
        A path that cannot be read as a result file.
    """
    if isinstance(source, FigureData):
        return dataclasses.replace(source, name=name) if name else source
    default_name = "result"
    if hasattr(source, "displacement") and hasattr(source, "eps_x"):     # a RunResult: its file content
        from .output import as_result_data

        source = as_result_data(source)
    if isinstance(source, (str, os.PathLike)):
        default_name = Path(source).stem
        source = _open(source)
    items, gattrs = _items(source)
    attrs = nested_attrs(gattrs)
    two_d = [(n, v) for n, v in items.items() if v[1].ndim == 2]
    if not two_d:
        raise InputError("the result holds no 2-D field to draw")
    ydim, xdim = two_d[0][1][0]
    if ydim not in items or xdim not in items:
        raise InputError(f"the result has no coordinate for the dimensions ({ydim}, {xdim})")
    y_orig = np.asarray(items[ydim][1], float)
    x_orig = np.asarray(items[xdim][1], float)

    def aux(candidates: Sequence[str], dim: str) -> np.ndarray | None:
        for c in candidates:
            if c in items and items[c][0] == (dim,):
                return np.asarray(items[c][1], float)
        return None

    row_px = aux(("row_px", "row", "image_row"), ydim)
    col_px = aux(("col_px", "col", "column_px", "image_column"), xdim)
    y_up = _y_points_up(y_orig, row_px, items[ydim][2])
    y_sign = -1.0 if y_up else 1.0
    axis = _axis_from_attrs(attrs, x_orig=x_orig, y_orig=y_orig, col_px=col_px, row_px=row_px, y_sign=y_sign)
    y = y_orig * y_sign
    flip_y = y.size > 1 and y[0] > y[-1]
    flip_x = x_orig.size > 1 and x_orig[0] > x_orig[-1]

    def orient(a: np.ndarray) -> np.ndarray:
        if flip_y:
            a = a[::-1]
        if flip_x:
            a = a[:, ::-1]
        return np.ascontiguousarray(a)

    fields, units = {}, {}
    masked = invalid = None
    for n, (dims, data, vattrs) in two_d:
        if dims != (ydim, xdim):
            continue
        arr = orient(np.asarray(data))
        if n in ("masked", "invalid"):
            flag = np.nan_to_num(np.asarray(arr, float)) != 0
            if n == "masked":
                masked = flag
            else:
                invalid = flag
            continue
        if arr.dtype.kind not in "biuf":
            continue
        arr = np.asarray(arr, float)
        if n.endswith("_y"):       # a y component: turn an upward one round (the figures use y down)
            said = _says_up(vattrs)
            if (y_up if said is None else said):
                arr = -arr
        fields[n] = arr
        units[n] = str(vattrs.get("units", ""))
    shape = (y.size, x_orig.size)
    nodata = np.zeros(shape, bool)
    return FigureData(
        x_m=x_orig[::-1].copy() if flip_x else x_orig.copy(),
        y_m=y[::-1].copy() if flip_y else y.copy(),
        col_px=None if col_px is None else (col_px[::-1].copy() if flip_x else col_px),
        row_px=None if row_px is None else (row_px[::-1].copy() if flip_y else row_px),
        fields=fields, units=units,
        masked=nodata.copy() if masked is None else masked,
        invalid=nodata.copy() if invalid is None else invalid,
        attrs=attrs, name=name or _run_name(attrs, default_name), axis=axis, file_y_up=y_up)


# --------------------------------------------------------------------------- quantities in display units


def _deflection_factor(units: str) -> float:
    return _DEFLECTION_FACTORS.get(units.strip().lower().replace(" ", ""), 1e6)


def _deflection_urad(fd: FigureData, component: str) -> np.ndarray | None:
    key = f"deflection_{component}"
    a = fd.get(key)
    return None if a is None else a * _deflection_factor(fd.units.get(key, "rad"))


def _displacement(fd: FigureData) -> tuple[np.ndarray | None, np.ndarray | None, np.ndarray | None]:
    dy, dx = fd.get("displacement_y"), fd.get("displacement_x")
    mag = fd.get("displacement_magnitude")
    if mag is None and dy is not None and dx is not None:
        mag = np.hypot(dy, dx)
    return dy, dx, mag


# --------------------------------------------------------------------------- default profile line


def _nan_smooth(a: np.ndarray, size: int) -> np.ndarray:
    """Mean over a size x size neighbourhood of the finite values (NaN where none)."""
    from scipy.ndimage import uniform_filter

    ok = np.isfinite(a)
    num = uniform_filter(np.where(ok, a, 0.0), size=size, mode="nearest")
    den = uniform_filter(ok.astype(float), size=size, mode="nearest")
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(den > 0.2, num / np.maximum(den, 1e-12), np.nan)


def _edge_trimmed(a: np.ndarray) -> np.ndarray:
    """``a`` with its outer 5 % along each axis (at least one line when there are 10 or more) set to NaN:
    the vectors at the border of the grid are the least reliable ones (windows cut by the image edge)."""
    a = np.array(a, float)
    for axis, n in enumerate(a.shape):
        if n >= 10:
            m = max(1, int(round(0.05 * n)))
            idx = [slice(None)] * a.ndim
            idx[axis] = np.r_[0:m, n - m:n]
            a[tuple(idx)] = np.nan
    return a


def _clip_line(p: np.ndarray, u: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> list[list[float]]:
    """The chord of the box [lo, hi] through p along the unit vector u."""
    t0, t1 = -np.inf, np.inf
    for k in range(2):
        if abs(u[k]) > 1e-12:
            a, b = sorted(((lo[k] - p[k]) / u[k], (hi[k] - p[k]) / u[k]))
            t0, t1 = max(t0, a), min(t1, b)
    a, b = p + t0 * u, p + t1 * u
    # read left to right (top to bottom for a vertical line)
    steep = abs(b[0] - a[0]) <= 1e-9 * max(abs(hi[0] - lo[0]), 1e-300)
    if (steep and b[1] < a[1]) or (not steep and b[0] < a[0]):
        a, b = b, a
    return [[float(a[0]), float(a[1])], [float(b[0]), float(b[1])]]


def default_profile_line(data: Any) -> list[list[float]]:
    """A profile line that crosses the object, in object-plane metres (y down).

    * Axisymmetric result (fitted axis in the attributes): the line normal to
      the axis, across the whole field, at the grid line where the radial
      deflection is strongest on average.
    * Otherwise: the line through the point of strongest (locally averaged)
      deflection, along the deflection there -- deflection points along the
      refractive-index gradient, so the line crosses the layer or plume.
    * No usable deflection: the horizontal line through the middle.

    The outer 5 % of the grid along each side is not searched (vectors whose
    windows reach past the image edge are the least reliable).

    Parameters
    ----------
    data : FigureData, bos.store.ResultData, xarray.Dataset or path
        The result (see :func:`figure_data`).

    Returns
    -------
    [[x0, y0], [x1, y1]]
        End points [m] on the edge of the field.
    """
    fd = figure_data(data)
    x, y = fd.x_m, fd.y_m
    middle = [[float(x[0]), float(y[y.size // 2])], [float(x[-1]), float(y[y.size // 2])]]
    ey, ex = _deflection_urad(fd, "y"), _deflection_urad(fd, "x")
    if ey is None or ex is None:            # displacement is proportional to the deflection (opposite sign)
        dy, dx, _ = _displacement(fd)
        ey, ex = dy, dx
    if ey is None or ex is None:
        return middle
    nodata = fd.masked | fd.invalid
    ey, ex = np.where(nodata, np.nan, ey), np.where(nodata, np.nan, ex)
    if fd.axis is not None:
        vertical = fd.axis.orientation == "vertical"
        radial = np.abs(ex if vertical else ey.T)
        finite = np.isfinite(radial)
        with np.errstate(invalid="ignore"):
            score = np.nansum(radial, axis=1) / radial.shape[1]       # mean with gaps counted as zero
        score = np.where(finite.any(axis=1), score, np.nan)
        if not np.isfinite(score).any():
            return middle
        score = _edge_trimmed(_nan_smooth(score[:, None], 3)[:, 0])
        if not np.isfinite(score).any():
            return middle
        k = int(np.nanargmax(score))
        if vertical:
            return [[float(x[0]), float(y[k])], [float(x[-1]), float(y[k])]]
        return [[float(x[k]), float(y[0])], [float(x[k]), float(y[-1])]]
    size = max(1, min(5, min(ey.shape)))
    sy, sx = _nan_smooth(ey, size), _nan_smooth(ex, size)
    mag = _edge_trimmed(np.hypot(sy, sx))
    if not np.isfinite(mag).any() or np.nanmax(mag) <= 0:
        return middle
    # the strongest point; on a plateau (within 5 % of the peak) the one nearest the centre
    top = np.isfinite(mag) & (mag >= 0.95 * np.nanmax(mag))
    ii, jj = np.nonzero(top)
    k = int(np.argmin(((ii - (mag.shape[0] - 1) / 2) / mag.shape[0]) ** 2
                      + ((jj - (mag.shape[1] - 1) / 2) / mag.shape[1]) ** 2))
    i, j = int(ii[k]), int(jj[k])
    u = np.array([sx[i, j], sy[i, j]]) / mag[i, j]
    return _clip_line(np.array([x[j], y[i]]), u, np.array([x[0], y[0]]), np.array([x[-1], y[-1]]))


def profile_line_of(data: Any) -> list[list[float]]:
    """The profile line [m, y down] stored in the result (attribute ``profile_line_m``
    ``[x0, y0, x1, y1]`` in the file's coordinates) or :func:`default_profile_line`."""
    fd = figure_data(data)
    line = fd.attrs.get("profile_line_m")
    if line is not None:
        try:
            arr = np.array(line, float).reshape(2, 2)       # a copy: the attributes stay as read
            if fd.file_y_up:            # stored in the file's coordinates
                arr[:, 1] = -arr[:, 1]
            if np.isfinite(arr).all() and not np.array_equal(arr[0], arr[1]):
                return arr.tolist()
        except (TypeError, ValueError):
            pass
    return default_profile_line(fd)


# --------------------------------------------------------------------------- sampling along the line


def _sample(fd: FigureData, a: np.ndarray, xs: np.ndarray, ys: np.ndarray) -> np.ndarray:
    """Bilinear samples of ``a`` at (xs, ys) [m]; NaN outside the grid or next to a NaN node."""
    from scipy.ndimage import map_coordinates

    def frac(v, axis):
        if axis.size == 1:
            return np.where(np.isclose(v, axis[0]), 0.0, np.nan)
        return np.interp(v, axis, np.arange(axis.size, dtype=float), left=np.nan, right=np.nan)

    fi, fj = frac(ys, fd.y_m), frac(xs, fd.x_m)
    inside = np.isfinite(fi) & np.isfinite(fj)
    coords = np.vstack([np.where(inside, fi, 0.0), np.where(inside, fj, 0.0)])
    bad = ~np.isfinite(a)
    values = map_coordinates(np.where(bad, 0.0, a), coords, order=1, mode="nearest")
    touched = map_coordinates(bad.astype(float), coords, order=1, mode="nearest")
    return np.where(inside & (touched <= 1e-9), values, np.nan)


@dataclass
class ProfileCurve:
    """One quantity along the profile line (display units)."""

    values: np.ndarray
    label: str
    units: str
    sigma: np.ndarray | None = None


def profile_curves(data: Any, line_m: Sequence[Sequence[float]]) -> tuple[np.ndarray, list[ProfileCurve]]:
    """Quantities along a straight line, in display units.

    The deflection is the component ALONG the line, ``eps . u`` with ``u``
    the unit vector from the start to the end point (y down), in µrad.

    Parameters
    ----------
    data : FigureData or any source of :func:`figure_data`
    line_m : [[x0, y0], [x1, y1]]
        End points [m].

    Returns
    -------
    (distance_m, curves)
        Distance from the start [m] and the curves: displacement magnitude
        [px], deflection along the line [µrad], density [kg/m³],
        temperature [K], acoustic pressure [Pa] (those present), with their
        1-sigma uncertainty where the result has one.
    """
    fd = figure_data(data)
    (x0, y0), (x1, y1) = (tuple(float(v) for v in p) for p in line_m)
    length = math.hypot(x1 - x0, y1 - y0)
    if not math.isfinite(length) or length == 0:
        raise InputError("the profile line needs two different finite end points")
    steps = [abs(float(np.median(np.diff(a)))) for a in (fd.x_m, fd.y_m) if a.size > 1]
    step = min(steps) if steps else length
    n = int(min(max(2, round(length / step) + 1), 20000))
    t = np.linspace(0.0, 1.0, n)
    xs, ys = x0 + t * (x1 - x0), y0 + t * (y1 - y0)
    ux, uy = (x1 - x0) / length, (y1 - y0) / length

    def sample(name: str) -> np.ndarray | None:
        a = fd.get(name)
        return None if a is None else _sample(fd, a, xs, ys)

    curves: list[ProfileCurve] = []
    _, _, mag = _displacement(fd)
    if mag is not None:
        curves.append(ProfileCurve(_sample(fd, mag, xs, ys), "|d|", "px"))
    ey, ex = _deflection_urad(fd, "y"), _deflection_urad(fd, "x")
    if ey is not None and ex is not None:
        along = _sample(fd, ex, xs, ys) * ux + _sample(fd, ey, xs, ys) * uy
        curves.append(ProfileCurve(along, "deflection along line", "µrad"))
    for key, label, unit in (("density", "density", "kg/m³"), ("temperature", "temperature", "K"),
                             ("acoustic_pressure", "acoustic pressure", "Pa")):
        v = sample(key)
        if v is not None:
            curves.append(ProfileCurve(v, label, unit, sample(f"{key}_uncertainty")))
    return t * length, curves


# --------------------------------------------------------------------------- drawing helpers


@dataclass(frozen=True)
class Panel:
    """One field to draw.

    Attributes
    ----------
    data : ndarray
        2-D field on the grid (y_m, x_m); NaN is drawn as blank.
    title : str
        Quantity name, e.g. ``"temperature"``.
    units : str
        Unit shown on the colour bar, e.g. ``"K"``.
    cmap : str
        Matplotlib colour map name.
    symmetric : bool
        Centre the colour scale on zero (for signed components).
    """

    data: np.ndarray
    title: str
    units: str
    cmap: str = "cividis"
    symmetric: bool = False


def _figure(width_in: float, height_in: float):
    # Object-oriented API on an Agg canvas: no global pyplot state, safe in
    # threads and on machines without a display.  No layout engine: the
    # axes are placed at fixed margins in inches (a layout engine redraws
    # every text several times and was a third of the drawing time).
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width_in, height_in))
    FigureCanvasAgg(fig)
    return fig


# fixed layout of a field panel [inches]: image box, colour bar, margins for labels
_PANEL_W, _PANEL_H = 4.3, 3.3
_LEFT, _RIGHT_CB_LABEL, _CB_PAD, _CB_W = 0.75, 0.95, 0.12, 0.14
_TOP_TITLE, _BOTTOM_LABEL, _LEGEND_H, _LINE_H = 0.62, 0.55, 0.32, 0.22


def _place_panel(fig, k: int, *, aspect: float, top_in: float, bottom_in: float):
    """Image axes and colour-bar axes of panel k, the image box fitted to the data aspect (height / width)."""
    W, H = fig.get_size_inches()
    box_w = _PANEL_W - _LEFT - _CB_PAD - _CB_W - _RIGHT_CB_LABEL
    box_h = H - top_in - bottom_in
    w, h = (box_w, box_w * aspect) if box_w * aspect <= box_h else (box_h / aspect, box_h)
    x0 = k * _PANEL_W + _LEFT + (box_w - w) / 2
    y0 = bottom_in + (box_h - h) / 2
    ax = fig.add_axes((x0 / W, y0 / H, w / W, h / H))
    cax = fig.add_axes(((x0 + w + _CB_PAD) / W, y0 / H, _CB_W / W, h / H))
    return ax, cax


def _save(fig, path: str | Path, dpi: int = DPI) -> Path:
    path = Path(path)
    fmt = path.suffix.lstrip(".").lower() or "png"
    kw = {"pil_kwargs": {"compress_level": 3}} if fmt == "png" else {}
    with atomic_path(path) as tmp:
        fig.savefig(tmp, dpi=dpi, format=fmt, **kw)
    return path


def png_bytes(fig, *, dpi: int = DPI) -> bytes:
    """The figure as PNG bytes (for embedding in a report)."""
    buf = io.BytesIO()
    fig.savefig(buf, dpi=dpi, format="png", pil_kwargs={"compress_level": 6})
    return buf.getvalue()


def _plain_numbers(axis) -> None:
    """Tick labels as plain numbers: no additive offset (``+1.2e3``) on the axis."""
    from matplotlib.ticker import ScalarFormatter

    fmt = ScalarFormatter(useOffset=False)
    fmt.set_powerlimits((-4, 5))
    axis.set_major_formatter(fmt)


def _extent_mm(x_m: np.ndarray, y_m: np.ndarray) -> tuple[float, float, float, float]:
    """imshow extent (left, right, bottom, top) in mm with y growing downward."""
    x = np.asarray(x_m, float) * 1e3
    y = np.asarray(y_m, float) * 1e3
    dx = (x[-1] - x[0]) / max(len(x) - 1, 1) if len(x) > 1 else 1.0
    dy = (y[-1] - y[0]) / max(len(y) - 1, 1) if len(y) > 1 else 1.0
    # 'bottom' is the last row (largest y) so that y increases downward.
    return (x[0] - dx / 2, x[-1] + dx / 2, y[-1] + dy / 2, y[0] - dy / 2)


def _limits(data: np.ndarray, symmetric: bool) -> tuple[float | None, float | None]:
    finite = np.asarray(data, float)[np.isfinite(data)]
    if finite.size == 0:
        return None, None
    lo, hi = np.percentile(finite, [0.5, 99.5])
    if symmetric:
        m = max(abs(lo), abs(hi)) or 1.0
        return -m, m
    if hi - lo <= 1e-9 * max(abs(lo), abs(hi)) or hi <= lo:   # a constant field: a readable +-1 % scale
        half = 0.01 * abs(lo) or 1.0
        lo, hi = lo - half, hi + half
    return float(lo), float(hi)


def _stair(x_mm: np.ndarray) -> np.ndarray:
    """Cell-edge coordinates, each cell twice (just inside its edges), so that a
    contour at 0.5 of a 0/1 flag follows the cell edges."""
    if x_mm.size == 1:
        return np.array([x_mm[0] - 0.5, x_mm[0] + 0.5])
    d = np.diff(x_mm)
    half = np.concatenate([[d[0]], d]) / 2, np.concatenate([d, [d[-1]]]) / 2
    eps = 1e-3 * np.abs(np.concatenate([[d[0]], d]))
    return np.column_stack([x_mm - half[0] + eps, x_mm + half[1] - eps]).ravel()


def _block_factor(shape: tuple[int, int], box_in: tuple[float, float]) -> int:
    """Vectors per screen pixel (rounded down, at least 1) of a field drawn in a box of box_in inches."""
    ky = int(shape[0] // max(box_in[1] * DPI, 1.0))
    kx = int(shape[1] // max(box_in[0] * DPI, 1.0))
    return max(1, min(kx, ky))


def _blocks(a: np.ndarray, k: int, how: str) -> np.ndarray:
    """k x k block mean of the finite values ('mean', NaN where none) or block any ('any'), padded at the end."""
    if k == 1:
        return a
    ny, nx = a.shape
    fill = np.nan if how == "mean" else False
    a = np.pad(a, ((0, (-ny) % k), (0, (-nx) % k)), constant_values=fill)
    b = a.reshape(a.shape[0] // k, k, a.shape[1] // k, k)
    if how == "any":
        return b.any(axis=(1, 3))
    ok = np.isfinite(b)
    n = ok.sum(axis=(1, 3))
    total = np.where(ok, b, 0.0).sum(axis=(1, 3))
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(n > 0, total / np.maximum(n, 1), np.nan)


def _block_axis(v_m: np.ndarray, k: int) -> np.ndarray:
    """Centres [m] of the k-blocks of an evenly spaced axis (extended past its end for the padding)."""
    if k == 1 or v_m.size < 2:
        return v_m
    step = (v_m[-1] - v_m[0]) / (v_m.size - 1)
    nb = -(-v_m.size // k)
    return v_m[0] + (np.arange(nb) * k + (k - 1) / 2) * step


def _draw_masked(ax, masked: np.ndarray, x_m: np.ndarray, y_m: np.ndarray) -> None:
    import matplotlib as mpl

    m = np.repeat(np.repeat(masked.astype(float), 2, axis=0), 2, axis=1)
    with mpl.rc_context({"hatch.color": MASKED_HATCH_COLOUR, "hatch.linewidth": 0.7}):
        ax.contourf(_stair(x_m * 1e3), _stair(y_m * 1e3), m, levels=[0.5, 1.5], colors=[MASKED_FILL],
                    hatches=[MASKED_HATCH], zorder=3, antialiased=False)


def _draw_invalid(ax, invalid: np.ndarray, extent) -> None:
    from matplotlib.colors import to_rgba

    rgba = np.zeros(invalid.shape + (4,), np.float32)
    rgba[invalid] = to_rgba(INVALID_COLOUR)
    ax.imshow(rgba, extent=extent, origin="upper", interpolation="nearest", aspect="equal", zorder=4)


def _legend_handles(*, masked: bool, invalid: bool, profile: bool, axis: SymmetryAxis | None) -> list:
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    handles = []
    if masked:
        handles.append(Patch(facecolor=MASKED_FILL, edgecolor=MASKED_HATCH_COLOUR, hatch=MASKED_HATCH,
                             label="masked (no data requested)"))
    if invalid:
        handles.append(Patch(facecolor=INVALID_COLOUR, edgecolor="none", label="invalid (vector rejected)"))
    if profile:
        handles.append(Line2D([], [], color="k", ls="--", lw=1.0, label="profile line"))
    if axis is not None:
        handles.append(Line2D([], [], color="k", ls="-.", lw=1.0, label="fitted symmetry axis"))
    return handles


def build_fields_figure(panels: Sequence[Panel], *, x_m: np.ndarray, y_m: np.ndarray,
                        suptitle: str | None = None, profile_m: Sequence[Sequence[float]] | None = None,
                        masked: np.ndarray | None = None, invalid: np.ndarray | None = None,
                        axis: SymmetryAxis | None = None):
    """The :class:`matplotlib.figure.Figure` of fields side by side (not saved).

    Parameters
    ----------
    panels : sequence of Panel
        Fields on the grid ``(y_m, x_m)``.
    x_m, y_m : ndarray
        1-D object-plane coordinates [m] of the columns and rows (ascending, y down).
    suptitle : str, optional
        Figure title.
    profile_m : [[x0, y0], [x1, y1]], optional
        A profile line [m] to overlay on each panel.
    masked, invalid : ndarray of bool, optional
        Drawn hatched grey and in :data:`INVALID_COLOUR`, with a legend.
    axis : SymmetryAxis, optional
        Drawn as a dash-dotted line on each panel.
    """
    extent = _extent_mm(x_m, y_m)
    x_m, y_m = np.asarray(x_m, float), np.asarray(y_m, float)
    has_masked = masked is not None and bool(np.any(masked))
    has_invalid = invalid is not None and bool(np.any(invalid))
    handles = _legend_handles(masked=has_masked, invalid=has_invalid, profile=profile_m is not None, axis=axis)
    legend = bool(handles) and (has_masked or has_invalid or axis is not None)
    title_lines = (suptitle or "").count("\n") + 1 if suptitle else 0
    top = _TOP_TITLE - 0.3 + _LINE_H * title_lines + 0.1
    bottom = _BOTTOM_LABEL + (_LEGEND_H if legend else 0.0)
    aspect = abs(extent[2] - extent[3]) / max(abs(extent[1] - extent[0]), 1e-300)
    box_w = _PANEL_W - _LEFT - _CB_PAD - _CB_W - _RIGHT_CB_LABEL
    box_h = min(_PANEL_H - _TOP_TITLE - _BOTTOM_LABEL, max(box_w * aspect, 1.2))   # no empty band for wide fields
    fig = _figure(_PANEL_W * len(panels), top + bottom + box_h)
    # a field with more vectors than screen pixels is drawn as k x k block means (the colour limits
    # still come from every vector; a block holding a masked or invalid vector is drawn as such)
    shape = np.shape(panels[0].data) if panels else (1, 1)
    blk = _block_factor(shape, (min(box_w, box_h / aspect), min(box_h, box_w * aspect)))
    xb, yb = _block_axis(x_m, blk), _block_axis(y_m, blk)
    shown = _extent_mm(xb, yb)
    if has_masked:
        masked_b = _blocks(np.asarray(masked, bool), blk, "any")
    if has_invalid:
        invalid_b = _blocks(np.asarray(invalid, bool), blk, "any")
    for k, p in enumerate(panels):
        ax, cax = _place_panel(fig, k, aspect=aspect, top_in=top, bottom_in=bottom)
        vmin, vmax = _limits(p.data, p.symmetric)
        im = ax.imshow(np.ma.masked_invalid(_blocks(np.asarray(p.data, float), blk, "mean")), extent=shown,
                       origin="upper", cmap=p.cmap, vmin=vmin, vmax=vmax, interpolation="nearest", aspect="auto")
        cb = fig.colorbar(im, cax=cax)
        _plain_numbers(cb.ax.yaxis)
        cb.set_label(f"{p.title} [{p.units}]")
        ax.set_title(p.title)
        ax.set_xlabel("x [mm]")
        ax.set_ylabel("y [mm] (down)")
        _plain_numbers(ax.xaxis)
        _plain_numbers(ax.yaxis)
        if has_masked:
            _draw_masked(ax, masked_b, xb, yb)
        if has_invalid:
            _draw_invalid(ax, invalid_b, shown)
        if axis is not None:
            pos = axis.m * 1e3
            draw = ax.axvline if axis.orientation == "vertical" else ax.axhline
            draw(pos, color="w", lw=1.6, zorder=5)
            draw(pos, color="k", ls="-.", lw=1.0, zorder=6)
        if profile_m is not None:
            (x0, y0), (x1, y1) = profile_m
            ax.plot([x0 * 1e3, x1 * 1e3], [y0 * 1e3, y1 * 1e3], "w-", lw=1.6, zorder=5)
            ax.plot([x0 * 1e3, x1 * 1e3], [y0 * 1e3, y1 * 1e3], "k--", lw=1.0, zorder=6)
        # keep the axes on the field even if a line reaches past it (y down)
        ax.set_xlim(extent[0], extent[1])
        ax.set_ylim(extent[2], extent[3])
    if legend:
        fig.legend(handles=handles, loc="lower center", ncols=len(handles), fontsize="small", frameon=False,
                   bbox_to_anchor=(0.5, 0.0))
    if suptitle:
        fig.suptitle(suptitle, y=1 - 0.08 / fig.get_size_inches()[1], va="top")
    return fig


def fields_figure(panels: Sequence[Panel], *, x_m: np.ndarray, y_m: np.ndarray, path: str | Path,
                  suptitle: str | None = None, profile_m: Sequence[Sequence[float]] | None = None,
                  dpi: int = DPI, **overlays) -> Path:
    """Draw fields side by side (:func:`build_fields_figure`) and save atomically.

    Parameters
    ----------
    path : path-like
        Output image (PNG, PDF or SVG by extension).
    dpi : int
        Resolution of raster output.
    **overlays
        ``masked``, ``invalid``, ``axis`` of :func:`build_fields_figure`.

    Returns
    -------
    Path
        The written file.
    """
    fig = build_fields_figure(panels, x_m=x_m, y_m=y_m, suptitle=suptitle, profile_m=profile_m, **overlays)
    return _save(fig, path, dpi)


def build_profile_figure(distance_m: np.ndarray, curves: Sequence[ProfileCurve | tuple], *,
                         sigmas: Sequence[np.ndarray | None] | None = None, title: str | None = None):
    """Quantities along a profile line, one stacked axis per quantity (not saved).

    ``curves`` holds :class:`ProfileCurve` or ``(values, label, units)`` tuples
    (then ``sigmas`` gives their 1-sigma bands).
    """
    items = []
    for i, c in enumerate(curves):
        if isinstance(c, ProfileCurve):
            items.append(c)
        else:
            sig = None if sigmas is None else sigmas[i]
            items.append(ProfileCurve(np.asarray(c[0], float), c[1], c[2], sig))
    n = max(len(items), 1)
    title_lines = title.count("\n") + 1 if title else 0
    top, bottom, left, right = 0.25 + 0.24 * title_lines, 0.55, 0.95, 0.2
    height = top + bottom + 1.75 * n
    fig = _figure(6.4, height)
    fig.subplots_adjust(left=left / 6.4, right=1 - right / 6.4, top=1 - top / height, bottom=bottom / height,
                        hspace=0.3 / 1.45)
    axes = fig.subplots(n, 1, squeeze=False, sharex=True)[:, 0]
    s_mm = np.asarray(distance_m, float) * 1e3
    for ax, c in zip(axes, items):
        v = np.asarray(c.values, float)
        ax.plot(s_mm, v, "-", lw=1.4)
        if c.sigma is not None and np.isfinite(c.sigma).any():
            sig = np.asarray(c.sigma, float)
            ax.fill_between(s_mm, v - sig, v + sig, alpha=0.3, lw=0, label="±1σ")
            ax.legend(loc="best", fontsize="small")
        ax.set_ylabel(f"{c.label} [{c.units}]")
        _plain_numbers(ax.yaxis)
        ax.grid(True, alpha=0.3)
    _plain_numbers(axes[-1].xaxis)
    axes[-1].set_xlabel("distance along profile [mm]")
    if title:
        fig.suptitle(title, y=1 - 0.08 / height, va="top")
    return fig


def profile_figure(distance_m: np.ndarray, curves: Sequence[ProfileCurve | tuple], *, path: str | Path,
                   sigmas: Sequence[np.ndarray | None] | None = None, title: str | None = None,
                   dpi: int = DPI) -> Path:
    """Plot quantities along a profile line (:func:`build_profile_figure`) and save atomically.

    Returns
    -------
    Path
        The written file.
    """
    return _save(build_profile_figure(distance_m, curves, sigmas=sigmas, title=title), path, dpi)


# --------------------------------------------------------------------------- the figures of a run

#: Figure keys of a run, in drawing order, and their file-name suffixes.
FIGURES = {"fig_displacement": "displacement", "fig_deflection": "deflection", "fig_density": "density",
           "fig_acoustic": "acoustic", "fig_profile": "profile"}


def _line_text(line) -> str:
    (x0, y0), (x1, y1) = line
    return f"({x0 * 1e3:.2f}, {y0 * 1e3:.2f}) → ({x1 * 1e3:.2f}, {y1 * 1e3:.2f}) mm"


def _field_specs(fd: FigureData) -> dict[str, tuple[str, list[Panel]]]:
    """Figure key -> (title, panels) for the fields the result holds."""
    specs: dict[str, tuple[str, list[Panel]]] = {}
    dy, dx, mag = _displacement(fd)
    if dx is not None and dy is not None:
        specs["fig_displacement"] = ("apparent background displacement", [
            Panel(dx, "displacement x", "px", "RdBu_r", True), Panel(dy, "displacement y", "px", "RdBu_r", True),
            Panel(mag, "displacement magnitude", "px", "magma")])
    ey, ex = _deflection_urad(fd, "y"), _deflection_urad(fd, "x")
    if ex is not None and ey is not None:
        specs["fig_deflection"] = ("light-ray deflection", [
            Panel(ex, "deflection x", "µrad", "RdBu_r", True), Panel(ey, "deflection y", "µrad", "RdBu_r", True)])
    dens, temp = fd.get("density"), fd.get("temperature")
    if dens is not None or temp is not None:
        panels = []
        if dens is not None:
            panels.append(Panel(dens, "density", "kg/m³", "cividis"))
        if temp is not None:
            model = "isentropic" if "isentropic" in str(fd.attrs.get("summary", {}).get("temperature_model", "")) \
                else None
            panels.append(Panel(temp, "temperature" + (f" ({model})" if model else ""), "K", "inferno"))
        specs["fig_density"] = ("density and temperature", panels)
    p = fd.get("acoustic_pressure")
    if p is not None:
        panels = [Panel(p, "acoustic pressure p′", "Pa", "RdBu_r", True)]
        sig = fd.get("acoustic_pressure_uncertainty")
        if sig is not None:
            panels.append(Panel(sig, "1σ of p′", "Pa", "magma"))
        specs["fig_acoustic"] = ("acoustic pressure p′ = c²ρ′", panels)
    return specs


def build_run_figures(data: Any, *, line: Sequence[Sequence[float]] | None = None,
                      name: str | None = None) -> dict[str, Any]:
    """All figures of a result as :class:`matplotlib.figure.Figure` objects (not saved).

    Parameters
    ----------
    data : FigureData or any source of :func:`figure_data`
    line : [[x0, y0], [x1, y1]], optional
        Profile line [m]; default the line stored in the result, else
        :func:`default_profile_line`.
    name : str, optional
        Run name for the titles.

    Returns
    -------
    dict
        Keys of :data:`FIGURES` (those the result has data for) -> figure.
    """
    return {key: build() for key, build in _figure_builders(data, line=line, name=name).items()}


def _figure_builders(data: Any, *, line=None, name=None) -> dict[str, Any]:
    fd = figure_data(data, name=name)
    line = profile_line_of(fd) if line is None else [list(map(float, p)) for p in line]
    axis_note = f"\n{fd.axis.describe()}" if fd.axis is not None else ""
    overlays = dict(masked=fd.masked, invalid=fd.invalid, axis=fd.axis)
    out: dict[str, Any] = {}
    for key, (title, panels) in _field_specs(fd).items():
        def build(title=title, panels=panels):
            return build_fields_figure(panels, x_m=fd.x_m, y_m=fd.y_m, profile_m=line,
                                       suptitle=f"{fd.name}: {title}{axis_note}", **overlays)
        out[key] = build

    def profile():
        s, curves = profile_curves(fd, line)
        return build_profile_figure(s, curves, title=_profile_title(fd, line))
    out["fig_profile"] = profile
    return out


def _profile_title(fd: FigureData, line) -> str:
    axis_note = f"\n{fd.axis.describe()}" if fd.axis is not None else ""
    return f"{fd.name}: profile {_line_text(line)}{axis_note}"


def _figure_path(paths: Mapping[str, Path], key: str) -> Path | None:
    return Path(paths[key]) if key in paths and paths[key] is not None else None


def write_run_figures(data: Any, paths: Mapping[str, str | Path], *, line: Sequence[Sequence[float]] | None = None,
                      name: str | None = None, dpi: int = DPI, processes: int | None = None,
                      meanwhile=None) -> list[Path]:
    """Draw and write every figure of a result, each atomically, at the given paths.

    Parameters
    ----------
    data : FigureData or any source of :func:`figure_data`
        The result content (e.g. :func:`bos.output.as_result_data` or a file).
    paths : mapping
        Figure key (:data:`FIGURES`) -> output path; figures without a path
        or without data are skipped.
    line : [[x0, y0], [x1, y1]], optional
        Profile line [m] (default: stored in the result, else
        :func:`default_profile_line`).
    name : str, optional
        Run name for the titles.
    dpi : int
        Raster resolution (default :data:`DPI`).
    processes : int, optional
        1: draw every figure in this process.  Default: with two or more
        cores, half of them in a forked child at the same time
        (:func:`_draw_jobs`).
    meanwhile : callable, optional
        Other work of the caller, run in this process while the child draws
        (before any figure when drawing sequentially).

    Returns
    -------
    list of Path
        The written files.
    """
    fd = figure_data(data, name=name)
    line = profile_line_of(fd) if line is None else [list(map(float, p)) for p in line]
    builders = _figure_builders(fd, line=line)
    jobs = [(key, path) for key in builders if (path := _figure_path(paths, key)) is not None]

    def draw(key: str, path: Path) -> Path:
        if key == "fig_profile":
            s, curves = profile_curves(fd, line)       # through profile_figure (one entry point for the profile)
            return profile_figure(s, curves, path=path, dpi=dpi, title=_profile_title(fd, line))
        return _save(builders[key](), path, dpi)

    return _draw_jobs(jobs, draw, processes=processes, meanwhile=meanwhile)


PRELOAD_THREAD = "bos-preload-matplotlib"


def preload_matplotlib() -> None:
    """Import matplotlib in a background thread (its import costs ~0.5-3 s; a run starts it while
    the estimator, which leaves the interpreter lock free most of the time, is busy).
    :func:`_draw_jobs` waits for it before forking."""
    import threading

    def work():
        try:
            import matplotlib.backends.backend_agg  # noqa: F401
            import matplotlib.figure  # noqa: F401
        except Exception:  # noqa: BLE001 - the figure stage reports real problems itself
            pass

    threading.Thread(target=work, name=PRELOAD_THREAD, daemon=True).start()


_CHILD_GRACE_S = 10.0
"""Least time [s] the figure child is given after this process finished its share."""


def _settle_before_fork() -> None:
    """Leave no import half-done and no buffered output before ``os.fork``.

    A module lock held by another thread at the fork stays locked in the
    child for ever (seen: the background matplotlib import of ``bos run``
    still running when the figures started, the child hung on its first
    import).  So the background import is waited for, the modules drawing
    needs are imported here, and the standard streams are flushed.
    """
    import sys
    import threading

    for t in threading.enumerate():  # this module's preload and the direct solver's (bos-preload-*)
        if t.name.startswith("bos-preload") and t is not threading.current_thread():
            t.join()
    import matplotlib.backends.backend_agg  # noqa: F401
    import matplotlib.colors  # noqa: F401
    import matplotlib.figure  # noqa: F401
    import PIL.PngImagePlugin  # noqa: F401

    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError, AttributeError):
            pass


def _draw_jobs(jobs: list[tuple[str, Path]], draw, *, processes: int | None = None, meanwhile=None) -> list[Path]:
    """Run ``draw(key, path)`` for every job; with a second core, half of them in a forked process.

    Drawing is Python-bound (matplotlib holds the interpreter lock; threads
    gained ~15 % and matplotlib is not thread-safe), so the first half of the
    figures is drawn by a child made with ``fork`` (it shares the data, no
    copy, and starts in milliseconds) while this process draws the rest.
    Each figure is written atomically by whoever draws it; a figure the
    child did not deliver (it failed, was killed, or was still not done
    well after this process finished its share) is drawn here afterwards,
    so the result is the same as drawing all of them here.  4 MP planar run,
    four figures: 0.84-1.0 s -> 0.35-0.52 s (quiet 2-core machine).  Other
    systems than Linux, one core or ``processes=1``: sequential.
    ``meanwhile`` (the caller's other work, e.g. writing the result file)
    runs here while the child draws; the child then takes one figure more
    than half.
    """
    import sys
    import time

    n = len(jobs)
    # Linux only: on macOS a forked child of a process that loaded system frameworks may abort
    # (the reason Python's default start method there is spawn)
    parallel = (processes is None or processes > 1) and n >= 2 and (os.cpu_count() or 1) >= 2 \
        and hasattr(os, "fork") and sys.platform.startswith("linux")
    if not parallel:
        if meanwhile is not None:
            meanwhile()
        return [draw(k, p) for k, p in jobs]
    split = min(n - 1, n // 2 + (1 if meanwhile is not None else 0))
    child_jobs, own_jobs = jobs[:split], jobs[split:]
    _settle_before_fork()
    t0 = time.monotonic()
    try:
        pid = os.fork()
    except OSError:
        return _draw_jobs(jobs, draw, processes=1, meanwhile=meanwhile)
    if pid == 0:  # the child: draw, then leave at once (no clean-up of the parent's state)
        code = 1
        try:
            for k, p in child_jobs:
                draw(k, p)
            code = 0
        except BaseException:  # noqa: BLE001 - no traceback from the child: the parent redraws
            pass
        finally:
            os._exit(code)
    exitcode = None
    try:
        if meanwhile is not None:
            meanwhile()
        for k, p in own_jobs:
            draw(k, p)
        # the child has the same amount of work; a child that is far slower is stuck (a lock
        # taken at the fork): it is killed and its figures are drawn here
        deadline = time.monotonic() + max(_CHILD_GRACE_S, 5.0 * (time.monotonic() - t0))
        while exitcode is None:
            done, status = os.waitpid(pid, os.WNOHANG)
            if done:
                exitcode = os.waitstatus_to_exitcode(status)
            elif time.monotonic() > deadline:
                break
            else:
                time.sleep(0.005)
    finally:
        if exitcode is None:  # interrupted, failed here, or stuck: the child stops too
            try:
                os.kill(pid, 9)
                os.waitpid(pid, 0)
            except OSError:
                pass
    for k, p in child_jobs:
        if exitcode != 0 or not Path(p).is_file():
            draw(k, p)
    return [Path(p) for _, p in jobs]


def figure_paths(directory: str | Path, name: str, *, suffix: str = ".png") -> dict[str, Path]:
    """Figure key -> ``<directory>/<name>-<kind><suffix>`` (the names ``bos run`` uses)."""
    d = Path(directory)
    return {key: d / f"{name}-{kind}{suffix}" for key, kind in FIGURES.items()}
