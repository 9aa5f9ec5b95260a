"""bos.plots and bos plot: figures drawn from the result data alone.

Outside sources of the checks:
* the component of a vector along a unit vector is their dot product, and
  bilinear interpolation reproduces a linear field exactly (analytic);
* a refractive-index layer n(s) across a direction u deflects light along
  grad n, i.e. along u (Merzkirch, Flow Visualization, 1987: the ray bends
  toward higher index), so a line across the layer is parallel to u;
* the symmetry-axis position is a linear interpolation of the stored grid
  coordinates (arithmetic);
* pixel colours are read back from matplotlib's Agg canvas and compared with
  the colours set (matplotlib.colors.to_rgba, a general-purpose library).
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest

from bos import output, plots
from bos.store import ResultData, Variable

from test_pipeline import _crafted


# ----------------------------------------------------------------------------- small results built by hand


def _result(*, y_up: bool, ny=21, nx=31, fields=None, attrs=None, masked=None, invalid=None):
    """A ResultData on a grid 0.5 mm apart, y down (old files) or y up (CF files)."""
    x = (np.arange(nx) - (nx - 1) / 2) * 0.5e-3
    y = (np.arange(ny) - (ny - 1) / 2) * 0.5e-3                # down
    rows, cols = 8.0 + 16.0 * np.arange(ny), 8.0 + 16.0 * np.arange(nx)
    sign = -1.0 if y_up else 1.0
    coords = {
        "y": Variable(("y",), sign * y, {"units": "m", "long_name": f"object-plane y ({'up' if y_up else 'down'})"}),
        "x": Variable(("x",), x, {"units": "m", "long_name": "object-plane x (right)"}),
        "row_px": Variable(("y",), rows, {"units": "1", "long_name": "image row"}),
        "col_px": Variable(("x",), cols, {"units": "1", "long_name": "image column"}),
    }
    variables = {}
    yy, xx = np.meshgrid(y, x, indexing="ij")
    for name, (func, units) in (fields or {}).items():
        data = np.asarray(func(yy, xx), float)
        if y_up and name.endswith("_y"):
            data = -data
        variables[name] = Variable(("y", "x"), data, {"units": units, "long_name": name})
    for name, flag in (("masked", masked), ("invalid", invalid)):
        variables[name] = Variable(("y", "x"), np.zeros(yy.shape, bool) if flag is None else flag,
                                   {"units": "1", "long_name": name})
    return ResultData(coords=coords, variables=variables, attrs=dict(attrs or {})), y, x


def test_figure_data_reads_y_up_and_y_down_files_alike():
    fields = {"deflection_y": (lambda y, x: 3e-5 + 1e-3 * y, "rad"),
              "deflection_x": (lambda y, x: -2e-5 + 2e-3 * x, "rad"),
              "temperature": (lambda y, x: 300 + 1e3 * x + 5e3 * y, "K")}
    down, y, x = _result(y_up=False, fields=fields)
    up, _, _ = _result(y_up=True, fields=fields)
    a, b = plots.figure_data(down), plots.figure_data(up)
    assert not a.file_y_up and b.file_y_up
    np.testing.assert_allclose(b.y_m, y)                          # ascending, pointing down
    for name in fields:
        np.testing.assert_allclose(b.fields[name], a.fields[name], rtol=0, atol=1e-15)
    # an xarray.Dataset of the same content gives the same figure data
    xr = pytest.importorskip("xarray")
    ds = xr.Dataset({n: (v.dims, v.data, v.attrs) for n, v in up.variables.items()},
                    coords={n: (v.dims, v.data, v.attrs) for n, v in up.coords.items()})
    c = plots.figure_data(ds)
    np.testing.assert_allclose(c.fields["deflection_y"], a.fields["deflection_y"])
    np.testing.assert_allclose(c.y_m, y)


@pytest.mark.parametrize("y_up", [False, True])
def test_profile_deflection_is_the_component_along_the_line(y_up):
    # uniform deflection (ey, ex) = (30, -40) µrad, y down: along a unit vector u the value is ex ux + ey uy
    ey, ex = 30e-6, -40e-6
    data, y, x = _result(y_up=y_up, fields={"deflection_y": (lambda yy, xx: ey + 0 * yy, "rad"),
                                           "deflection_x": (lambda yy, xx: ex + 0 * xx, "rad")})
    for (x0, y0), (x1, y1) in ([[-4e-3, 1e-3], [4e-3, 1e-3]], [[1e-3, -4e-3], [1e-3, 4e-3]],
                               [[-3e-3, -4e-3], [3e-3, 4e-3]], [[3e-3, 4e-3], [-3e-3, -4e-3]]):
        length = math.hypot(x1 - x0, y1 - y0)
        ux, uy = (x1 - x0) / length, (y1 - y0) / length
        s, curves = plots.profile_curves(data, [[x0, y0], [x1, y1]])
        along = next(c for c in curves if c.label == "deflection along line")
        assert along.units == "µrad"
        np.testing.assert_allclose(along.values, (ex * ux + ey * uy) * 1e6, rtol=1e-12, atol=1e-9)
        assert s[-1] == pytest.approx(length)


def test_profile_is_exact_for_a_linear_field_and_nan_outside():
    data, y, x = _result(y_up=True, fields={"temperature": (lambda yy, xx: 300 + 2e3 * xx - 7e3 * yy, "K")})
    line = [[-6e-3, -4.2e-3], [9e-3, 3.1e-3]]                    # runs past the right edge (x max 7.5 mm)
    s, curves = plots.profile_curves(data, line)
    t = s / s[-1]
    xs, ys = -6e-3 + t * 15e-3, -4.2e-3 + t * 7.3e-3
    temp = next(c for c in curves if c.label == "temperature")
    inside = xs <= x[-1] + 1e-12
    np.testing.assert_allclose(temp.values[inside], 300 + 2e3 * xs[inside] - 7e3 * ys[inside], rtol=1e-12)
    assert np.isnan(temp.values[~inside]).all() and (~inside).sum() >= 2


def test_default_line_is_normal_to_a_vertical_axis_at_the_strongest_row():
    # radial deflection of a column: eps_x = A(y) * x exp(-x^2/w^2), strongest at row 14
    amp = lambda yy: np.exp(-((yy - 3.5e-3) / 2e-3) ** 2)            # noqa: E731 - peak at y = 3.5 mm
    fields = {"deflection_x": (lambda yy, xx: 1e-4 * amp(yy) * (xx - 1e-3) * np.exp(-((xx - 1e-3) / 2e-3) ** 2) / 1e-3,
                               "rad"),
              "deflection_y": (lambda yy, xx: 0 * yy, "rad")}
    attrs = {"reconstruction_info": {"axis": "vertical", "axis_position": 17.0}}
    for y_up in (False, True):
        data, y, x = _result(y_up=y_up, fields=fields, attrs=attrs)
        (x0, y0), (x1, y1) = plots.default_profile_line(data)
        assert y0 == y1 == pytest.approx(3.5e-3)                      # row 17 of 21 (y = 3.5 mm down)
        assert (x0, x1) == (pytest.approx(x[0]), pytest.approx(x[-1]))


def test_default_line_for_a_horizontal_axis_is_vertical():
    fields = {"deflection_y": (lambda yy, xx: 1e-4 * yy * np.exp(-(yy / 2e-3) ** 2) * np.exp(-((xx + 4e-3) / 1e-3) ** 2),
                               "rad"),
              "deflection_x": (lambda yy, xx: 0 * yy, "rad")}
    data, y, x = _result(y_up=True, fields=fields,
                         attrs={"reconstruction_info": {"axis": "horizontal", "axis_position": 10.0}})
    (x0, y0), (x1, y1) = plots.default_profile_line(data)
    assert x0 == x1 == pytest.approx(-4e-3)
    assert (y0, y1) == (pytest.approx(y[0]), pytest.approx(y[-1]))


@pytest.mark.parametrize("angle_deg", [0.0, 30.0, 90.0, 125.0])
def test_default_line_crosses_a_planar_layer_along_its_gradient(angle_deg):
    # n(s) = tanh((s - s0) / L) across the direction u: the deflection points along u (toward higher n)
    u = np.array([math.cos(math.radians(angle_deg)), math.sin(math.radians(angle_deg))])   # (x, y down)
    p0 = np.array([1.0e-3, -0.5e-3])
    grad = lambda yy, xx: 1.0 / np.cosh(((xx - p0[0]) * u[0] + (yy - p0[1]) * u[1]) / 1.5e-3) ** 2   # noqa: E731
    data, y, x = _result(y_up=True, fields={"deflection_x": (lambda yy, xx: 1e-4 * u[0] * grad(yy, xx), "rad"),
                                           "deflection_y": (lambda yy, xx: 1e-4 * u[1] * grad(yy, xx), "rad")})
    (x0, y0), (x1, y1) = plots.default_profile_line(data)
    d = np.array([x1 - x0, y1 - y0])
    d /= np.hypot(*d)
    assert abs(abs(d @ u) - 1) < 1e-6                                 # parallel to the gradient
    # it crosses the layer: the deflection along it reaches the peak of the field (within the grid sampling)
    s, curves = plots.profile_curves(data, [[x0, y0], [x1, y1]])
    along = next(c for c in curves if c.label == "deflection along line").values
    assert np.nanmax(np.abs(along)) >= 0.9 * 100.0                   # peak |eps| = 1e-4 rad = 100 µrad
    # end points on the edge of the field
    for px_, py_ in ((x0, y0), (x1, y1)):
        on_edge = min(abs(px_ - x[0]), abs(px_ - x[-1]), abs(py_ - y[0]), abs(py_ - y[-1]))
        assert on_edge < 1e-12


def test_symmetry_axis_in_px_and_mm():
    attrs = {"reconstruction_info": {"axis": "vertical", "axis_position": 7.25}}
    data, y, x = _result(y_up=True, attrs=attrs, fields={"temperature": (lambda yy, xx: 300 + 0 * xx, "K")})
    ax = plots.figure_data(data).axis
    # col_px = 8 + 16 j and x = (j - 15) * 0.5 mm at the fractional index j = 7.25
    assert ax.px == pytest.approx(8 + 16 * 7.25) and ax.m == pytest.approx((7.25 - 15) * 0.5e-3)
    assert ax.describe() == "symmetry axis (vertical): x = -3.875 mm, image column 124.0 px"
    attrs = {"reconstruction_info": {"axis": "horizontal", "axis_position": 2.5}}
    data, y, x = _result(y_up=True, attrs=attrs, fields={"temperature": (lambda yy, xx: 300 + 0 * xx, "K")})
    ax = plots.figure_data(data).axis
    assert ax.px == pytest.approx(8 + 16 * 2.5) and ax.m == pytest.approx((2.5 - 10) * 0.5e-3)   # y down


# ----------------------------------------------------------------------------- what the figures show


def _pixel(fig, ax, x_mm, y_mm):
    """RGBA (0..1) of the canvas pixel at data point (x_mm, y_mm) of ``ax``."""
    fig.canvas.draw()
    img = np.asarray(fig.canvas.buffer_rgba())
    px, py = ax.transData.transform((x_mm, y_mm))
    return img[img.shape[0] - int(round(py)), int(round(px))] / 255.0


def test_masked_hatched_grey_and_invalid_in_its_own_colour():
    from matplotlib.colors import to_rgba

    masked = np.zeros((21, 31), bool)
    masked[:6, :8] = True
    invalid = np.zeros((21, 31), bool)
    invalid[12:15, 20:23] = True
    data, y, x = _result(y_up=True, fields={"temperature": (lambda yy, xx: 300 + 1e4 * xx, "K")},
                         masked=masked, invalid=invalid)
    figs = plots.build_run_figures(data, name="flags")
    fig = figs["fig_density"]
    ax = fig.axes[0]
    inv = _pixel(fig, ax, x[21] * 1e3, y[13] * 1e3)
    np.testing.assert_allclose(inv[:3], to_rgba(plots.INVALID_COLOUR)[:3], atol=0.02)
    # the masked block: mostly the grey fill, with darker hatch lines; never the invalid colour
    fig.canvas.draw()
    img = np.asarray(fig.canvas.buffer_rgba())[..., :3] / 255.0
    (cx0, cy0), (cx1, cy1) = ax.transData.transform([(x[1] * 1e3, y[1] * 1e3), (x[6] * 1e3, y[4] * 1e3)])
    h = img.shape[0]
    block = img[int(h - cy0):int(h - cy1), int(cx0):int(cx1)].reshape(-1, 3)
    grey = np.abs(block - float(plots.MASKED_FILL)).max(axis=1) < 0.03
    hatch = block.max(axis=1) < float(plots.MASKED_FILL) - 0.15
    assert grey.mean() > 0.4 and hatch.mean() > 0.05
    assert np.allclose(block.std(axis=1), 0, atol=0.02)            # grey levels only: no colour map, no green
    labels = [t.get_text() for t in fig.legends[0].get_texts()]
    assert "masked (no data requested)" in labels and "invalid (vector rejected)" in labels


def test_units_titles_and_no_offsets(tmp_path):
    fields = {"deflection_y": (lambda yy, xx: 1e-6 * (1 + yy), "rad"), "deflection_x": (lambda yy, xx: 2e-6 + 0 * xx, "rad"),
              "density": (lambda yy, xx: 1.2041 + 1e-3 * xx, "kg m-3"),
              "temperature": (lambda yy, xx: 1000.0 + 1e-1 * xx, "K"),
              "density_uncertainty": (lambda yy, xx: 1e-5 + 0 * xx, "kg m-3")}
    data, y, x = _result(y_up=True, fields=fields, attrs={"run_name": "jet-7"})
    figs = plots.build_run_figures(data)
    for key, fig in figs.items():
        fig.canvas.draw()
        texts = [t.get_text() for t in fig.findobj(lambda a: hasattr(a, "get_text"))]
        assert fig._suptitle.get_text().startswith("jet-7: "), key
        assert not any("kg m-3" in t or "rad]" in t and "µrad]" not in t for t in texts), key
        for ax in fig.axes:
            for axis in (ax.xaxis, ax.yaxis):
                assert axis.get_offset_text().get_text() == "", (key, ax.get_label())
    labels = [a.get_ylabel() for a in figs["fig_density"].axes]
    assert "density [kg/m³]" in labels and "temperature [K]" in labels
    assert "deflection x [µrad]" in [a.get_ylabel() for a in figs["fig_deflection"].axes]
    assert "deflection along line [µrad]" in [a.get_ylabel() for a in figs["fig_profile"].axes]


def test_axis_drawn_and_printed_on_axisymmetric_figures():
    attrs = {"reconstruction_info": {"axis": "vertical", "axis_position": 12.5}, "run_name": "plume"}
    data, y, x = _result(y_up=True, attrs=attrs, fields={"temperature": (lambda yy, xx: 300 + 0 * xx, "K")})
    fig = plots.build_run_figures(data)["fig_density"]
    pos = (12.5 - 15) * 0.5                                         # mm
    ax = fig.axes[0]
    assert any(ln.get_linestyle() == "-." and np.allclose(ln.get_xdata(), pos) for ln in ax.get_lines())
    assert "symmetry axis (vertical): x = -1.250 mm, image column 208.0 px" in fig._suptitle.get_text()


def test_acoustic_pressure_figure(tmp_path):
    from bos.acoustics import acoustic_field

    exp, result, _ = _crafted(tmp_path)
    med = exp.medium_model()
    result.acoustic = acoustic_field(result.density.density, medium=med, sigma_density=result.density.sigma_density)
    data = output.as_result_data(result)
    files = output.save_run(result, exp)                  # bos run writes the acoustic figure for sound sources
    acoustic = tmp_path / "out" / "crafted-acoustic.png"
    assert acoustic in files and acoustic.stat().st_size > 1000
    figs = plots.build_run_figures(data, name="snd")
    fig = figs["fig_acoustic"]
    shown = fig.axes[0].images[0].get_array()
    # the panel shows the file's acoustic pressure p' = c^2 (rho - rho0) (y down; rows as in the run)
    expected = med.speed_of_sound ** 2 * (result.density.density - med.ambient_density)
    np.testing.assert_allclose(np.ma.filled(shown, np.nan), expected, rtol=1e-9, equal_nan=True)
    assert fig.axes[1].get_ylabel() == "acoustic pressure p′ [Pa]"
    assert "acoustic pressure [Pa]" in [a.get_ylabel() for a in figs["fig_profile"].axes]


# ----------------------------------------------------------------------------- bos plot


def test_bos_plot_rebuilds_the_run_figures_from_the_file(tmp_path):
    from typer.testing import CliRunner

    from cli.app import get_app

    app = get_app()

    import dataclasses

    exp, result, _ = _crafted(tmp_path)
    exp = dataclasses.replace(exp, output=dataclasses.replace(exp.output, figures=False))
    files = output.save_run(result, exp)
    line = [[-1.0e-3, 0.5e-3], [1.5e-3, 0.5e-3]]                 # the experiment's profile line (mm -> m)
    memory = tmp_path / "memory"
    memory.mkdir()
    drawn = plots.write_run_figures(output.as_result_data(result), plots.figure_paths(memory, "crafted"),
                                    line=line, name="crafted")
    assert len(drawn) == 4
    res = CliRunner().invoke(app, ["plot", str(files[0]), "--out", str(tmp_path / "again"),
                                   "--profile", "-1.0,0.5,1.5,0.5"])
    assert res.exit_code == 0, res.output
    for p in drawn:               # same pixels, same bytes: the file holds everything the figures need
        assert (tmp_path / "again" / p.name).read_bytes() == p.read_bytes(), p.name
    bad = CliRunner().invoke(app, ["plot", str(files[0]), "--name", "../x"])
    assert bad.exit_code == 2 and "--name" in bad.output
    missing = CliRunner().invoke(app, ["plot", str(tmp_path / "none.nc")])
    assert missing.exit_code == 2 and "error:" in missing.output and "Traceback" not in missing.output


def test_plan_chart_is_readable():
    from cli.cmd_plan import build_chart
    from bos.media import Medium
    from bos.optics import Rig, plan

    rig = Rig(focal_length_m=0.05, pixel_pitch_m=4e-6, f_number=8, z_a_m=1.0, z_d_m=0.5)
    result = plan(rig, medium=Medium(), object_width_m=0.03)
    fig = build_chart(rig, result)
    axes = [a for a in fig.axes]
    assert len(axes) == 3
    boxes = [a.get_position() for a in axes]
    for a, b in zip(boxes, boxes[1:]):                      # stacked, not on top of each other
        assert a.y0 >= b.y1 - 1e-9
    assert all(a.get_yscale() == "log" for a in axes) and axes[-1].get_xscale() == "log"
    # the chosen design is a marker in every panel, at the plan's values, and in the legend
    expected = (result.sensitivity_mm_per_rad, result.min_deflection_rad * 1e6, result.object_blur_m * 1e3)
    for ax, value in zip(axes, expected):
        marks = [ln for ln in ax.get_lines() if ln.get_marker() not in ("None", None, "")]
        assert len(marks) == 1
        assert marks[0].get_xdata()[0] == pytest.approx(0.5) and marks[0].get_ydata()[0] == pytest.approx(value)
    handle = fig.legends[0].legend_handles[0]
    assert handle.get_marker() == "o" and "chosen design" in fig.legends[0].get_texts()[0].get_text()


def test_large_fields_drawn_as_block_means_with_flags_kept():
    measure = pytest.importorskip("skimage.measure")
    rng = np.random.default_rng(3)
    a = rng.normal(size=(601, 905))
    a[rng.random(a.shape) < 0.01] = np.nan
    # general-purpose reference: scikit-image's block_reduce with a NaN-ignoring mean, NaN padding
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)            # all-NaN blocks
        ref = measure.block_reduce(a, (4, 4), func=np.nanmean, cval=np.nan)
    np.testing.assert_allclose(plots._blocks(a, 4, "mean"), ref, rtol=1e-12, equal_nan=True)
    # a single rejected vector in a 24 MP-sized grid stays visible on screen
    y = np.arange(500) * 1e-4
    x = np.arange(750) * 1e-4
    invalid = np.zeros((500, 750), bool)
    invalid[321, 456] = True
    fig = plots.build_fields_figure([plots.Panel(np.outer(y, x), "temperature", "K")], x_m=x, y_m=y,
                                    invalid=invalid)
    ax = fig.axes[0]
    field, overlay = ax.images[0].get_array(), ax.images[1].get_array()
    assert field.shape[0] < 500 and overlay[..., 3].sum() == 1      # drawn at screen size, one block flagged
    from matplotlib.colors import to_rgba

    np.testing.assert_allclose(_pixel(fig, ax, x[456] * 1e3, y[321] * 1e3)[:3], to_rgba(plots.INVALID_COLOUR)[:3],
                               atol=0.02)



# --- figures drawn in a forked child (bos.plots._draw_jobs) ------------------------------------

def _fork_available():
    import multiprocessing as mp
    import os

    return "fork" in mp.get_all_start_methods() and (os.cpu_count() or 1) >= 2


def test_figures_drawn_in_a_child_are_the_same_bytes(tmp_path):
    if not _fork_available():
        pytest.skip("needs fork and two cores")
    from bos.plots import _draw_jobs

    import numpy as np
    from matplotlib.figure import Figure

    def draw(key, path):
        fig = Figure(figsize=(3, 2))
        ax = fig.add_subplot()
        ax.imshow(np.outer(np.arange(20), np.arange(int(key) + 5)))
        fig.savefig(path, dpi=50)
        return path

    seq = [(str(k), tmp_path / f"s{k}.png") for k in range(4)]
    par = [(str(k), tmp_path / f"p{k}.png") for k in range(4)]
    assert _draw_jobs(seq, draw, processes=1) == [p for _, p in seq]
    got = _draw_jobs(par, draw, meanwhile=lambda: None)
    assert got == [p for _, p in par]
    for (_, a), (_, b) in zip(seq, par):
        assert a.read_bytes() == b.read_bytes()


def test_a_figure_the_child_fails_to_draw_is_drawn_here_without_a_traceback(tmp_path, capfd):
    if not _fork_available():
        pytest.skip("needs fork and two cores")
    import os

    from bos.plots import _draw_jobs

    parent = os.getpid()
    drawn_here = []

    def draw(key, path):
        if os.getpid() != parent:
            raise RuntimeError("child cannot draw")
        path.write_text(key)
        drawn_here.append(key)
        return path

    jobs = [(str(k), tmp_path / f"f{k}.txt") for k in range(3)]
    assert _draw_jobs(jobs, draw) == [p for _, p in jobs]
    assert sorted(drawn_here) == ["0", "1", "2"]
    assert [p.read_text() for _, p in jobs] == ["0", "1", "2"]
    assert "Traceback" not in capfd.readouterr().err


def test_a_stuck_figure_child_is_killed_and_its_figures_drawn_here(tmp_path, monkeypatch):
    if not _fork_available():
        pytest.skip("needs fork and two cores")
    import os
    import time

    from bos import plots

    monkeypatch.setattr(plots, "_CHILD_GRACE_S", 0.5)
    parent = os.getpid()

    def draw(key, path):
        if os.getpid() != parent:
            time.sleep(120)  # a child that never finishes
        path.write_text(key)
        return path

    jobs = [(str(k), tmp_path / f"f{k}.txt") for k in range(4)]
    t0 = time.monotonic()
    assert plots._draw_jobs(jobs, draw) == [p for _, p in jobs]
    assert time.monotonic() - t0 < 30
    assert [p.read_text() for _, p in jobs] == ["0", "1", "2", "3"]
