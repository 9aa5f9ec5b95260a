"""Virtual knife-edge pictures rendered from a BOS deflection field.

Three renderings of a measured deflection field ``eps = (eps_y, eps_x)``:

* **knife edge** at any orientation (knife normal ``k``, see
  :mod:`bos.schlieren.knife`) and cutoff fraction ``c``: the contrast law
  ``I/I0 = clip(1 + eps.k / eps_c, 0, 1/(1-c))`` with ``eps_c = a/f2`` the
  deflection that darkens the picture completely; the picture is scaled so
  that the bright limit is white, i.e. grey level ``(1 - c) I/I0`` (for
  ``c = 0.5``: ``clip(1 + eps.k/eps_c, 0, 2) / 2``, mid-grey = no deflection);
* **graded circular cutoff** (direction-free): a filter centred on the
  undeflected source image whose transmission grows linearly with the
  distance from its centre, from ``1 - c`` to 1 at the deflection ``eps_c``:
  ``I = clip((1 - c) + c |eps| / eps_c, 0, 1)``;
* **colour by direction** (our own colour wheel): hue = direction of
  ``eps`` measured counter-clockwise on the screen from ``+x`` (0 deg red,
  120 deg green, 240 deg blue, HSV hue circle), full saturation, value
  ``clip(|eps| / eps_c, 0, 1)`` (black = no deflection).

NaN (masked or invalid BOS vectors) is drawn black in the grey renderings
and mid-grey in the colour rendering.

References
----------
Settles, G. S. (2001). *Schlieren and Shadowgraph Techniques*. Springer,
ch. 3 (contrast law of the knife edge; graded and circular cutoffs; colour
schlieren) [from memory].
"""

from __future__ import annotations

import math
import re
from pathlib import Path

import numpy as np

from .._io import atomic_path
from ..errors import DataFileError, InputError
from ._result import deflection_image_frame
from .knife import check_cutoff, knife_orientation

__all__ = ["render_knife_edge", "render_circular_cutoff", "render_colour", "auto_cutoff_deflection",
           "write_virtual_views", "colour_key"]

#: Largest rendered side (px) when a result is brought back to picture resolution.
MAX_SIDE_PX = 4096


def _check_ec(cutoff_deflection_rad) -> float:
    try:
        ec = float(cutoff_deflection_rad)
    except (TypeError, ValueError):
        raise InputError(f"cutoff deflection must be a number in rad, got {cutoff_deflection_rad!r}") from None
    if not (math.isfinite(ec) and ec > 0):
        raise InputError(f"cutoff deflection must be positive, got {cutoff_deflection_rad!r}")
    return ec


def _pair(eps_y, eps_x):
    ey, ex = np.asarray(eps_y, float), np.asarray(eps_x, float)
    if ey.shape != ex.shape or ey.ndim != 2:
        raise InputError(f"deflection components must be 2-D arrays of one shape, got {ey.shape} and {ex.shape}")
    return ey, ex


def auto_cutoff_deflection(eps_y, eps_x, *, percentile: float = 99.0) -> float:
    """A cutoff deflection that keeps ``percentile`` % of the |eps| values unsaturated [rad]."""
    ey, ex = _pair(eps_y, eps_x)
    mag = np.hypot(ey, ex)
    mag = mag[np.isfinite(mag)]
    if mag.size == 0:
        raise InputError("the deflection field has no finite values to render")
    ec = float(np.percentile(mag, percentile))
    return ec if ec > 0 else 1e-9


def render_knife_edge(eps_y, eps_x, *, knife_angle_deg=90.0, cutoff: float = 0.5,
                      cutoff_deflection_rad: float) -> np.ndarray:
    """Grey picture in [0, 1] of a virtual knife edge (white = source fully passed).

    Parameters
    ----------
    eps_y, eps_x : ndarray
        Deflection components [rad] (y down).
    knife_angle_deg : float or str
        Edge angle (``"vertical"`` = 90, ``"horizontal"`` = 0); see
        :mod:`bos.schlieren.knife`.
    cutoff : float
        Fraction of the source image blocked with no flow.
    cutoff_deflection_rad : float
        ``eps_c = a / f2`` [rad].

    References
    ----------
    Settles (2001), *Schlieren and Shadowgraph Techniques*, ch. 3 [from memory].
    """
    ey, ex = _pair(eps_y, eps_x)
    ec = _check_ec(cutoff_deflection_rad)
    c = check_cutoff(cutoff)
    en = knife_orientation(knife_angle_deg).project(ey, ex)
    out = (1.0 - c) * np.clip(1.0 + en / ec, 0.0, 1.0 / (1.0 - c))
    return np.where(np.isfinite(out), out, 0.0)


def render_circular_cutoff(eps_y, eps_x, *, cutoff: float = 0.5, cutoff_deflection_rad: float) -> np.ndarray:
    """Grey picture in [0, 1] of a graded circular cutoff (direction-free)."""
    ey, ex = _pair(eps_y, eps_x)
    ec = _check_ec(cutoff_deflection_rad)
    c = check_cutoff(cutoff)
    out = np.clip((1.0 - c) + c * np.hypot(ey, ex) / ec, 0.0, 1.0)
    return np.where(np.isfinite(out), out, 0.0)


def render_colour(eps_y, eps_x, *, cutoff_deflection_rad: float) -> np.ndarray:
    """RGB picture (rows, cols, 3) in [0, 1]: hue = direction, brightness = |eps| / eps_c."""
    from matplotlib.colors import hsv_to_rgb

    ey, ex = _pair(eps_y, eps_x)
    ec = _check_ec(cutoff_deflection_rad)
    ok = np.isfinite(ey) & np.isfinite(ex)
    ey0, ex0 = np.where(ok, ey, 0.0), np.where(ok, ex, 0.0)
    hue = (np.arctan2(-ey0, ex0) / (2.0 * math.pi)) % 1.0  # counter-clockwise on the screen (y down)
    val = np.clip(np.hypot(ey0, ex0) / ec, 0.0, 1.0)
    rgb = hsv_to_rgb(np.stack([hue, np.ones_like(hue), val], axis=-1))
    rgb[~ok] = 0.5
    return rgb


def colour_key(size_px: int = 129) -> np.ndarray:
    """The colour wheel of :func:`render_colour`: deflection (eps_x, eps_y) = (x, y) / radius."""
    g = np.linspace(-1.0, 1.0, int(size_px))
    y, x = np.meshgrid(g, g, indexing="ij")
    rgb = render_colour(y, x, cutoff_deflection_rad=1.0)
    rgb[np.hypot(x, y) > 1.0] = 1.0
    return rgb


def _to_picture_grid(data, field_y: np.ndarray, field_x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Bring a field on a (coarser) vector grid to the picture's pixel grid (bilinear, NaN kept local)."""
    from scipy.ndimage import map_coordinates

    rows = np.asarray(data.coords["row_px"].data, float) if "row_px" in data.coords else None
    cols = np.asarray(data.coords["col_px"].data, float) if "col_px" in data.coords else None
    if rows is None or cols is None or rows.size < 2 or cols.size < 2:
        return field_y, field_x
    step = min(float(np.median(np.diff(rows))), float(np.median(np.diff(cols))))
    if not step > 1.0:
        return field_y, field_x
    n_r = int(round(rows[-1] - rows[0])) + 1
    n_c = int(round(cols[-1] - cols[0])) + 1
    factor = max(n_r, n_c) / MAX_SIDE_PX
    stride = max(1.0, factor)
    pr = np.arange(rows[0], rows[-1] + 1e-9, stride)
    pc = np.arange(cols[0], cols[-1] + 1e-9, stride)
    ir = np.interp(pr, rows, np.arange(rows.size))
    ic = np.interp(pc, cols, np.arange(cols.size))
    R, C = np.meshgrid(ir, ic, indexing="ij")
    out = []
    for f in (field_y, field_x):
        bad = ~np.isfinite(f)
        v = map_coordinates(np.where(bad, 0.0, f), [R, C], order=1, mode="nearest")
        if bad.any():
            w = map_coordinates(bad.astype(float), [R, C], order=1, mode="nearest")
            v[w > 0] = np.nan
        out.append(v)
    return out[0], out[1]


def _write_png(path: Path, picture: np.ndarray) -> Path:
    import imageio.v3 as iio

    arr = np.clip(np.round(np.asarray(picture) * 255.0), 0, 255).astype(np.uint8)
    try:
        with atomic_path(path) as tmp:
            iio.imwrite(tmp, arr, extension=".png")
    except DataFileError:
        raise
    except OSError as exc:
        raise DataFileError(f"cannot write {path}: {exc.strerror or exc}") from None
    return path


def _angle_tag(angle: float) -> str:
    return re.sub(r"[^0-9a-z.-]", "", f"{angle:g}deg".replace(".", "p"))


def write_virtual_views(data, directory, name: str, *, knife_angle_deg=(90.0, 0.0), cutoff: float = 0.5,
                        cutoff_deflection_rad: float | None = None, percentile: float = 99.0,
                        picture_resolution: bool = True) -> list[Path]:
    """Write virtual knife-edge PNGs of a BOS result.

    Parameters
    ----------
    data : bos.store.ResultData
        A BOS result (from :func:`bos.store.read_result` or
        :func:`bos.output.as_result_data`) with ``deflection_y`` and
        ``deflection_x`` [rad] on ``(y, x)``; whether its ``y`` points up or
        down is read from the file (``y`` against ``row_px``).
    directory : path-like
        Output directory (created if missing).
    name : str
        Base name of the files.
    knife_angle_deg : float, str or sequence
        One or more knife-edge angles (``"vertical"`` = 90, ``"horizontal"`` = 0).
    cutoff : float
        Cutoff fraction (0.5 = half the source image blocked).
    cutoff_deflection_rad : float, optional
        ``eps_c = a / f2`` [rad]; default: the ``percentile`` of |eps|
        (one value for all views, so they share one scale).
    picture_resolution : bool
        Interpolate the vector grid back to the picture's pixel grid
        (``row_px``/``col_px``), bilinearly, for a picture-like result.

    Returns
    -------
    list of Path
        ``<name>-knife-<angle>.png`` for each angle, ``<name>-circular.png``,
        ``<name>-colour.png`` and ``<name>-colour-key.png``; each written
        atomically.

    Raises
    ------
    InputError
        No deflection in the result, bad cutoff or angle.
    DataFileError
        The directory cannot be created or written.
    """
    ey, ex = deflection_image_frame(data)          # image orientation (y down), whatever the file uses
    check_cutoff(cutoff)
    angles = [knife_angle_deg] if isinstance(knife_angle_deg, (str, int, float)) else list(knife_angle_deg)
    if not angles:
        raise InputError("give at least one knife angle")
    orients = [knife_orientation(a) for a in angles]
    ec = auto_cutoff_deflection(ey, ex, percentile=percentile) if cutoff_deflection_rad is None \
        else _check_ec(cutoff_deflection_rad)
    if picture_resolution:
        ey, ex = _to_picture_grid(data, ey, ex)
    d = Path(directory)
    try:
        d.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise DataFileError(f"cannot create output directory {d}: {exc.strerror or exc}") from None
    written: list[Path] = []
    try:
        for o in orients:
            pic = render_knife_edge(ey, ex, knife_angle_deg=o.angle_deg, cutoff=cutoff, cutoff_deflection_rad=ec)
            written.append(_write_png(d / f"{name}-knife-{_angle_tag(o.angle_deg)}.png", pic))
        written.append(_write_png(d / f"{name}-circular.png",
                                  render_circular_cutoff(ey, ex, cutoff=cutoff, cutoff_deflection_rad=ec)))
        written.append(_write_png(d / f"{name}-colour.png", render_colour(ey, ex, cutoff_deflection_rad=ec)))
        written.append(_write_png(d / f"{name}-colour-key.png", colour_key()))
    except BaseException:
        for p in written:
            try:
                p.unlink()
            except OSError:
                pass
        raise
    return written
