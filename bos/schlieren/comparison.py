"""BOS result vs calibrated knife-edge result: registration, projection, statistics, outputs.

The BOS deflection vector field is mapped into the knife-edge picture with
a similarity transform (control points or automatic field correlation,
:mod:`bos.schlieren.registration`), projected on the knife normal (turned
by the roll between the views) and compared with the knife-edge
``deflection_normal`` on a common grid whose spacing is the BOS vector
spacing seen in the knife picture (the knife field is smoothed to that
resolution first, so both fields carry the same detail).

Statistics (on points valid in both fields; the difference is knife - BOS):
``correlation`` (Pearson), ``rms_difference_rad``, ``bias_rad`` (mean
difference), ``registration_residual_px`` (rms control-point or tile
residual in knife pixels) and ``overlap_fraction`` (fraction of the knife
picture's lit area that the BOS field covers).
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from .._io import atomic_path
from ..errors import DataFileError, InputError
from ._result import deflection_image_frame, file_coords
from .knife import KnifeOrientation, knife_orientation
from .registration import Similarity, _BosField, _rotated_normal, _smooth_nan, register_fields, similarity_from_points

__all__ = ["Comparison", "compare_results", "read_control_points", "write_comparison", "STAT_KEYS"]

STAT_KEYS = ("correlation", "rms_difference_rad", "bias_rad", "registration_residual_px", "overlap_fraction")


@dataclass
class Comparison:
    """Result of :func:`compare_results`.

    Attributes
    ----------
    transform : Similarity
        BOS px -> knife px.
    registration : str
        ``"control points"`` or ``"field correlation"``.
    registration_residual_px : float
    correlation, rms_difference_rad, bias_rad, overlap_fraction : float
    rows_px, cols_px : ndarray
        Knife-picture rows/cols of the common grid.
    y_m, x_m : ndarray
        Knife object-plane coordinates of the common grid [m] (y down).
    bos_normal, knife_normal : ndarray
        BOS deflection projected on the knife normal, and the knife-edge
        deflection, on the common grid [rad]; NaN where not usable.
    orientation : KnifeOrientation
    n_points : int
        Grid points used by the statistics.
    warnings : list of str
    """

    transform: Similarity
    registration: str
    registration_residual_px: float
    correlation: float
    rms_difference_rad: float
    bias_rad: float
    overlap_fraction: float
    rows_px: np.ndarray
    cols_px: np.ndarray
    y_m: np.ndarray
    x_m: np.ndarray
    bos_normal: np.ndarray
    knife_normal: np.ndarray
    orientation: KnifeOrientation
    n_points: int
    knife_object_pixel_m: float
    warnings: list[str] = field(default_factory=list)

    @property
    def difference(self) -> np.ndarray:
        """knife - BOS [rad]."""
        return self.knife_normal - self.bos_normal

    def stats(self) -> dict[str, float]:
        """The five headline statistics (JSON keys of ``bos compare --json``)."""
        return {k: float(getattr(self, k)) for k in STAT_KEYS}

    def details(self) -> dict[str, Any]:
        return {**self.stats(), "registration": self.registration, "transform": self.transform.as_dict(),
                "knife_angle_deg": self.orientation.angle_deg, "knife_normal_yx": list(self.orientation.normal),
                "n_points": int(self.n_points), "difference": "knife - bos", "warnings": list(self.warnings)}


def read_control_points(path) -> tuple[np.ndarray, np.ndarray]:
    """Read a control-point file: JSON list of ``{"bos_px": [row, col], "knife_px": [row, col]}``.

    Raises
    ------
    DataFileError
        Missing or unreadable file, not JSON.
    InputError
        Wrong structure or fewer than 3 points.
    """
    p = Path(path)
    if not p.is_file():
        raise DataFileError(f"file not found: {p}")
    try:
        items = json.loads(p.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError) as exc:
        raise DataFileError(f"cannot read control points {p}: {exc}") from None
    except json.JSONDecodeError as exc:
        raise InputError(f"control-point file {p} is not valid JSON: {exc.msg} (line {exc.lineno})") from None
    if not isinstance(items, list):
        raise InputError(f"control-point file {p} must hold a JSON list of "
                         '{"bos_px": [row, col], "knife_px": [row, col]} objects')
    bos, knife = [], []
    for i, it in enumerate(items):
        try:
            b = [float(v) for v in it["bos_px"]]
            k = [float(v) for v in it["knife_px"]]
        except (TypeError, KeyError, ValueError):
            raise InputError(f"control point {i} in {p} must be "
                             '{"bos_px": [row, col], "knife_px": [row, col]}') from None
        if len(b) != 2 or len(k) != 2:
            raise InputError(f"control point {i} in {p}: bos_px and knife_px need two numbers [row, col]")
        bos.append(b)
        knife.append(k)
    if len(bos) < 3:
        raise InputError(f"need at least 3 control points, {p} has {len(bos)}")
    return np.array(bos), np.array(knife)


def _axis_step(values: np.ndarray, name: str) -> float:
    d = np.diff(np.asarray(values, float))
    if d.size == 0 or not np.all(d > 0):
        raise InputError(f"coordinate {name!r} must increase")
    return float(np.median(d))


def _bos_parts(data):
    for key in ("deflection_y", "deflection_x"):
        if key not in data.variables:
            raise InputError(f"the BOS result has no {key!r} (is it a BOS result file?)")
    for key in ("row_px", "col_px", "x"):
        if key not in data.coords:
            raise InputError(f"the BOS result has no {key!r} coordinate")
    ey, ex = deflection_image_frame(data)
    valid = np.isfinite(ey) & np.isfinite(ex)
    for flag in ("masked", "invalid"):
        if flag in data.variables:
            valid &= ~np.asarray(data.variables[flag].data, bool)
    rows = np.asarray(data.coords["row_px"].data, float)
    cols = np.asarray(data.coords["col_px"].data, float)
    pix_m = _axis_step(data.coords["x"].data, "x") / _axis_step(cols, "col_px")
    return ey, ex, rows, cols, valid, pix_m


def _knife_parts(data):
    if "deflection_normal" not in data.variables:
        raise InputError("the knife-edge result has no 'deflection_normal' (write it with bos knife-edge)")
    var = data.variables["deflection_normal"]
    angle = var.attrs.get("knife_angle_deg")
    if angle is None:
        angle = (data.attrs.get("calibration") or {}).get("knife_angle_deg")
    if angle is None:
        raise InputError("the knife-edge result does not say the knife orientation (knife_angle_deg)")
    orient = knife_orientation(float(np.ravel(angle)[0]))
    eps = np.asarray(var.data, float)
    usable = np.isfinite(eps)
    for flag in ("saturated", "lens", "invalid", "uncalibrated"):
        if flag in data.variables:
            usable &= ~np.asarray(data.variables[flag].data, bool)
    lit = ~np.asarray(data.variables["invalid"].data, bool) if "invalid" in data.variables else np.ones(eps.shape, bool)
    pix_m = _axis_step(data.coords["x"].data, "x") if "x" in data.coords else float("nan")
    if "col_px" in data.coords:
        pix_m /= _axis_step(data.coords["col_px"].data, "col_px")
    return eps, usable, lit, orient, pix_m


def compare_results(bos_data, knife_data, *, control_points: tuple[np.ndarray, np.ndarray] | None = None,
                    **registration_options) -> Comparison:
    """Register a BOS result onto a knife-edge result and compare the deflection normal to the knife.

    Parameters
    ----------
    bos_data : bos.store.ResultData
        BOS result with ``deflection_y``/``deflection_x`` and ``row_px``/``col_px``.
    knife_data : bos.store.ResultData
        Knife-edge result written by ``bos knife-edge``.
    control_points : (bos_px, knife_px), optional
        Matching (row, col) points, >= 3; without them the views are
        registered automatically by correlating the fields.
    **registration_options
        Passed to :func:`bos.schlieren.registration.register_fields`.

    Returns
    -------
    Comparison

    Raises
    ------
    InputError
        Not a BOS / knife-edge result, < 3 control points, no common
        structure for automatic registration, no overlap.
    """
    from scipy.ndimage import map_coordinates

    ey, ex, b_rows, b_cols, b_valid, b_pix = _bos_parts(bos_data)
    kn, k_usable, k_lit, orient, k_pix = _knife_parts(knife_data)
    warnings: list[str] = []
    if control_points is not None:
        src, dst = control_points
        sim, resid = similarity_from_points(src, dst)
        residual = float(np.sqrt(np.mean(resid ** 2)))
        method = "control points"
        if resid.size == 3:
            warnings.append("3 control points: the residual has one degree of freedom; 4 or more are better")
    else:
        guess = b_pix / k_pix if (math.isfinite(k_pix) and k_pix > 0 and b_pix > 0) else None
        reg = register_fields(ey, ex, b_rows, b_cols, np.where(k_usable, kn, np.nan), knife_normal=orient.normal,
                              bos_valid=b_valid, knife_valid=k_usable, scale_guess=guess, **registration_options)
        sim, residual, method = reg.transform, reg.residual_px, reg.method
        warnings += reg.warnings
    bos = _BosField(ey, ex, b_rows, b_cols, b_valid)

    H, W = kn.shape
    step = max(1.0, sim.scale * min(bos.step))
    rows = np.arange((step - 1) / 2.0, H - 0.5, step)
    cols = np.arange((step - 1) / 2.0, W - 0.5, step)
    R, C = np.meshgrid(rows, cols, indexing="ij")
    ir, ic = np.clip(np.round(R).astype(int), 0, H - 1), np.clip(np.round(C).astype(int), 0, W - 1)
    k_s = _smooth_nan(np.where(k_usable, kn, np.nan), step / 2.0 if step > 1 else 0.0)
    k_bad = ~np.isfinite(k_s)
    k_grid = map_coordinates(np.where(k_bad, 0.0, k_s), [R, C], order=1, mode="nearest")
    k_grid[(map_coordinates(k_bad.astype(float), [R, C], order=1, mode="nearest") > 0) | ~k_usable[ir, ic]] = np.nan
    lit = k_lit[ir, ic]
    inv = sim.inverse()
    br, bc = inv.apply(R, C)
    inside = (br >= b_rows[0]) & (br <= b_rows[-1]) & (bc >= b_cols[0]) & (bc <= b_cols[-1])
    b_grid = bos.sample(br, bc, _rotated_normal(orient.normal, sim.rotation_rad))
    both = np.isfinite(k_grid) & np.isfinite(b_grid)
    n_lit = int(lit.sum())
    overlap = float((inside & lit).sum() / n_lit) if n_lit else 0.0
    if both.sum() < 10:
        raise InputError(f"the registered views share only {int(both.sum())} usable points; check the "
                         "registration (control points) and the flags of both results")
    kv, bv = k_grid[both], b_grid[both]
    diff = kv - bv
    dk, db = kv - kv.mean(), bv - bv.mean()
    den = math.sqrt(float(np.sum(dk * dk)) * float(np.sum(db * db)))
    corr = float(np.sum(dk * db)) / den if den > 0 else float("nan")
    y_m = (rows - (H - 1) / 2.0) * k_pix
    x_m = (cols - (W - 1) / 2.0) * k_pix
    if overlap < 0.3:
        warnings.append(f"the BOS field covers only {100 * overlap:.0f} % of the knife-edge picture")
    return Comparison(
        transform=sim, registration=method, registration_residual_px=residual, correlation=corr,
        rms_difference_rad=float(np.sqrt(np.mean(diff ** 2))), bias_rad=float(np.mean(diff)),
        overlap_fraction=overlap, rows_px=rows, cols_px=cols, y_m=y_m, x_m=x_m,
        bos_normal=np.where(both, b_grid, np.nan), knife_normal=np.where(both, k_grid, np.nan),
        orientation=orient, n_points=int(both.sum()), knife_object_pixel_m=k_pix, warnings=warnings)


# --------------------------------------------------------------------------- outputs


def _line_samples(comp: Comparison, line_px: Sequence[float]) -> dict[str, np.ndarray]:
    """Sample both fields along a line given in knife px (r0, c0, r1, c1)."""
    from scipy.ndimage import map_coordinates

    try:
        r0, c0, r1, c1 = (float(v) for v in line_px)
    except (TypeError, ValueError):
        raise InputError(f"a profile line is ROW0,COL0,ROW1,COL1 in knife-picture pixels, got {line_px!r}") from None
    if not all(math.isfinite(v) for v in (r0, c0, r1, c1)):
        raise InputError("profile line end points must be finite")
    length = math.hypot(r1 - r0, c1 - c0)
    n = max(2, int(round(length)) + 1)
    t = np.linspace(0.0, 1.0, n)
    rr, cc = r0 + t * (r1 - r0), c0 + t * (c1 - c0)
    ir = np.interp(rr, comp.rows_px, np.arange(comp.rows_px.size), left=-1e9, right=1e9)
    ic = np.interp(cc, comp.cols_px, np.arange(comp.cols_px.size), left=-1e9, right=1e9)
    out = {"s_m": t * length * comp.knife_object_pixel_m, "row_px": rr, "col_px": cc}
    for key, f in (("bos_deflection_normal", comp.bos_normal), ("knife_deflection_normal", comp.knife_normal)):
        bad = ~np.isfinite(f)
        v = map_coordinates(np.where(bad, 0.0, f), [ir, ic], order=1, mode="constant", cval=np.nan)
        w = map_coordinates(bad.astype(float), [ir, ic], order=1, mode="constant", cval=1.0)
        out[key] = np.where(w > 0, np.nan, v)
    out["difference"] = out["knife_deflection_normal"] - out["bos_deflection_normal"]
    return out


def _save_figure(fig, path: Path) -> Path:
    try:
        with atomic_path(path) as tmp:
            fig.savefig(tmp, dpi=110, format="png")
    except DataFileError:
        raise
    except OSError as exc:
        raise DataFileError(f"cannot write {path}: {exc.strerror or exc}") from None
    return path


def _profile_figure(samples: dict[str, np.ndarray], path: Path, title: str) -> Path:
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(6.4, 4.2), layout="constrained")
    FigureCanvasAgg(fig)
    ax1, ax2 = fig.subplots(2, 1, sharex=True)
    s = samples["s_m"] * 1e3
    ax1.plot(s, samples["bos_deflection_normal"] * 1e6, "-", label="BOS (projected on knife normal)")
    ax1.plot(s, samples["knife_deflection_normal"] * 1e6, "--", label="knife edge (calibrated)")
    ax1.set_ylabel("deflection normal to knife [µrad]")
    ax1.legend(loc="best", fontsize="small")
    ax1.grid(True, alpha=0.3)
    ax2.plot(s, samples["difference"] * 1e6, "k-")
    ax2.set_ylabel("knife - BOS [µrad]")
    ax2.set_xlabel("distance along the line [mm]")
    ax2.grid(True, alpha=0.3)
    fig.suptitle(title)
    return _save_figure(fig, path)


#: Units of the profile CSV columns (the deflection columns are in rad); pixel positions count knife pixels.
_PROFILE_UNITS = {"s_m": "m", "row_px": "px", "col_px": "px"}


def comparison_attributes(comp: Comparison) -> dict[str, Any]:
    """Global attributes of the comparison file: CF ``title``/``source``/``references`` and the details."""
    from .. import __version__
    from .calibration import KNIFE_EDGE_REFERENCES

    registration = ("Umeyama, S. (1991). Least-squares estimation of transformation parameters between two point "
                    "patterns. IEEE Trans. Pattern Anal. Mach. Intell. 13, 376-380."
                    if comp.registration == "control points" else
                    "Padfield, D. (2012). Masked object registration in the Fourier domain. IEEE Trans. Image "
                    "Process. 21, 2706-2718.")
    return {"title": "BOS vs knife-edge comparison",
            "source": f"BOS deflection field registered onto a calibrated knife-edge picture with bos-toolkit "
                      f"{__version__} (bos compare; registration: {comp.registration})",
            "references": "\n".join([*KNIFE_EDGE_REFERENCES, registration]),
            "comparison": comp.details()}


def write_comparison(comp: Comparison, directory, *, name: str = "compare",
                     lines_px: Sequence[Sequence[float]] | None = None) -> list[Path]:
    """Write the comparison: netCDF-4 fields (``<name>.nc``), panels, difference map, profiles (CSV + PNG), JSON summary.

    Parameters
    ----------
    comp : Comparison
    directory : path-like
        Output directory (created if missing).
    name : str
        Base name of the files.
    lines_px : list of (row0, col0, row1, col1), optional
        Profile lines in knife-picture pixels; default one horizontal and
        one vertical line through the middle of the common region.

    Returns
    -------
    list of Path
        The written files, swapped in together (:class:`bos._io.OutputSet`,
        manifest ``<name>-run.json``); a failure leaves an earlier set untouched.
    """
    from .. import store
    from ..plots import Panel, fields_figure

    d = Path(directory)
    try:
        d.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise DataFileError(f"cannot create output directory {d}: {exc.strerror or exc}") from None
    both = np.isfinite(comp.bos_normal)
    if lines_px is None:
        rr, cc = np.nonzero(both)
        rm = float(comp.rows_px[int(np.median(rr))]) if rr.size else float(comp.rows_px.mean())
        cm = float(comp.cols_px[int(np.median(cc))]) if cc.size else float(comp.cols_px.mean())
        lines_px = [(rm, comp.cols_px[0], rm, comp.cols_px[-1]), (comp.rows_px[0], cm, comp.rows_px[-1], cm)]
    samples = [_line_samples(comp, ln) for ln in lines_px]
    from .._io import OutputSet

    # one transaction: a failed or interrupted rerun leaves the earlier comparison untouched
    with OutputSet(d, name) as out:
        coords = file_coords(comp.y_m, comp.x_m, comp.rows_px, comp.cols_px, what="knife-edge picture")
        variables = {
            "bos_deflection_normal": {"dims": ("y", "x"), "data": comp.bos_normal,
                                      "attrs": {"units": "rad", "long_name": "BOS deflection projected on the knife normal"}},
            "knife_deflection_normal": {"dims": ("y", "x"), "data": comp.knife_normal,
                                        "attrs": {"units": "rad", "long_name": "knife-edge deflection normal to the knife (smoothed to the BOS spacing)"}},
            "difference": {"dims": ("y", "x"), "data": comp.difference,
                           "attrs": {"units": "rad", "long_name": "knife-edge minus BOS deflection normal to the knife"}},
        }
        (store.write_result(out.path(d / f"{name}.nc"), coords=coords, variables=variables,
                                          attrs={**comparison_attributes(comp), "coordinate_note": coords["y"]["attrs"]["description"]},
                                          history="bos compare"))
        line0, kp = samples[0], comp.knife_object_pixel_m
        prof_m = [[float(comp.x_m[0] + (line0["col_px"][i] - comp.cols_px[0]) * kp),
                   float(comp.y_m[0] + (line0["row_px"][i] - comp.rows_px[0]) * kp)] for i in (0, -1)]
        panels = [Panel(comp.bos_normal * 1e6, "BOS, projected", "µrad", "RdBu_r", True),
                  Panel(comp.knife_normal * 1e6, "knife edge", "µrad", "RdBu_r", True),
                  Panel(comp.difference * 1e6, "knife - BOS", "µrad", "RdBu_r", True)]
        (fields_figure(panels, x_m=comp.x_m, y_m=comp.y_m, path=out.path(d / f"{name}-panels.png"),
                                     suptitle=f"deflection normal to the knife ({comp.orientation.label})",
                                     profile_m=prof_m))
        (fields_figure([panels[2]], x_m=comp.x_m, y_m=comp.y_m, path=out.path(d / f"{name}-difference.png"),
                                     suptitle="difference map: knife edge - BOS"))
        for i, smp in enumerate(samples, start=1):
            path = out.path(d / f"{name}-profile-{i}.csv")
            labels = [store.csv_label(k, _PROFILE_UNITS.get(k, "rad")) for k in smp]
            (store.write_table(path, labels, list(smp.values()), fmt="%.9g"))
            r0, c0, r1, c1 = smp["row_px"][0], smp["col_px"][0], smp["row_px"][-1], smp["col_px"][-1]
            (_profile_figure(smp, out.path(d / f"{name}-profile-{i}.png"),
                                           f"profile {i}: ({r0:.0f}, {c0:.0f}) -> ({r1:.0f}, {c1:.0f}) knife px"))
        path = out.path(d / f"{name}.json")
        with atomic_path(path) as tmp:
            tmp.write_text(json.dumps(comp.details(), indent=2, allow_nan=True) + "\n", encoding="utf-8")
        return out.commit()
