"""Figures of a processed experiment: fields on physical axes and profiles.

Every figure uses object-plane millimetres on both axes with y pointing
down (as in the image), a colour bar that names the quantity and its unit,
and is written atomically (temporary file + rename) with matplotlib's
non-interactive Agg canvas, so no display is needed.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np

from ._io import atomic_path


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
    cmap: str = "viridis"
    symmetric: bool = False


def _figure(ncols: int, nrows: int = 1, *, width_in: float = 4.2, height_in: float = 3.6):
    # Use the object-oriented API with an Agg canvas: no global pyplot state,
    # safe in threads and on machines without a display.
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width_in * ncols, height_in * nrows), layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _save(fig, path: Path, dpi: int) -> Path:
    path = Path(path)
    with atomic_path(path) as tmp:
        fig.savefig(tmp, dpi=dpi, format=path.suffix.lstrip(".") or "png")
    return path


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
    if hi <= lo:
        hi = lo + (abs(lo) * 1e-6 or 1e-12)
    return float(lo), float(hi)


def fields_figure(panels: Sequence[Panel], *, x_m: np.ndarray, y_m: np.ndarray, path: str | Path,
                  suptitle: str | None = None, profile_m: Sequence[Sequence[float]] | None = None,
                  dpi: int = 110) -> Path:
    """Draw one or more fields side by side on object-plane mm axes and save.

    Parameters
    ----------
    panels : sequence of Panel
        Fields on the grid ``(y_m, x_m)``.
    x_m, y_m : ndarray
        1-D object-plane coordinates [m] of the columns and rows (y down).
    path : path-like
        Output image (PNG, PDF or SVG by extension); written atomically.
    suptitle : str, optional
        Figure title.
    profile_m : [[x0, y0], [x1, y1]], optional
        A profile line [m] to overlay on each panel.
    dpi : int
        Resolution of raster output.

    Returns
    -------
    Path
        The written file.
    """
    fig = build_fields_figure(panels, x_m=x_m, y_m=y_m, suptitle=suptitle, profile_m=profile_m)
    return _save(fig, path, dpi)


def build_fields_figure(panels: Sequence[Panel], *, x_m: np.ndarray, y_m: np.ndarray,
                        suptitle: str | None = None, profile_m: Sequence[Sequence[float]] | None = None):
    """The :class:`matplotlib.figure.Figure` drawn by :func:`fields_figure` (not saved)."""
    fig = _figure(len(panels))
    axes = fig.subplots(1, len(panels), squeeze=False)[0]
    extent = _extent_mm(x_m, y_m)
    for ax, p in zip(axes, panels):
        vmin, vmax = _limits(p.data, p.symmetric)
        cmap = p.cmap
        im = ax.imshow(np.ma.masked_invalid(p.data), extent=extent, origin="upper", cmap=cmap,
                       vmin=vmin, vmax=vmax, interpolation="nearest", aspect="equal")
        cb = fig.colorbar(im, ax=ax, shrink=0.85)
        cb.set_label(f"{p.title} [{p.units}]")
        ax.set_title(p.title)
        ax.set_xlabel("x [mm]")
        ax.set_ylabel("y [mm] (down)")
        if profile_m is not None:
            (x0, y0), (x1, y1) = profile_m
            ax.plot([x0 * 1e3, x1 * 1e3], [y0 * 1e3, y1 * 1e3], "w-", lw=1.2)
            ax.plot([x0 * 1e3, x1 * 1e3], [y0 * 1e3, y1 * 1e3], "k--", lw=0.8)
            # keep the axes on the field even if the line reaches past it (y down)
            ax.set_xlim(extent[0], extent[1])
            ax.set_ylim(extent[2], extent[3])
    if suptitle:
        fig.suptitle(suptitle)
    return fig


def profile_figure(distance_m: np.ndarray, curves: Sequence[tuple[np.ndarray, str, str]], *,
                   path: str | Path, sigmas: Sequence[np.ndarray | None] | None = None,
                   title: str | None = None, dpi: int = 110) -> Path:
    """Plot quantities along a profile line, one stacked axis per quantity.

    Parameters
    ----------
    distance_m : ndarray
        Distance along the line [m] (plotted in mm).
    curves : sequence of (values, name, units)
        Quantities sampled at ``distance_m``.
    path : path-like
        Output image; written atomically.
    sigmas : sequence of ndarray or None, optional
        1-sigma uncertainty of each curve, drawn as a shaded band.
    title : str, optional
        Figure title.

    Returns
    -------
    Path
        The written file.
    """
    n = len(curves)
    fig = _figure(1, n, width_in=6.0, height_in=2.4)
    axes = fig.subplots(n, 1, squeeze=False, sharex=True)[:, 0]
    s_mm = np.asarray(distance_m, float) * 1e3
    for i, (ax, (values, name, units)) in enumerate(zip(axes, curves)):
        v = np.asarray(values, float)
        ax.plot(s_mm, v, "-", lw=1.4)
        sig = None if sigmas is None else sigmas[i]
        if sig is not None:
            sig = np.asarray(sig, float)
            ax.fill_between(s_mm, v - sig, v + sig, alpha=0.3, lw=0, label="±1σ")
            ax.legend(loc="best", fontsize="small")
        ax.set_ylabel(f"{name} [{units}]")
        ax.grid(True, alpha=0.3)
    axes[-1].set_xlabel("distance along profile [mm]")
    if title:
        fig.suptitle(title)
    return _save(fig, path, dpi)
