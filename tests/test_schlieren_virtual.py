"""Virtual knife-edge pictures from a BOS deflection field (bos.schlieren.virtual).

Outside sources of the checks:
* the knife-edge rendering is compared with a direct geometric model of a
  knife-edge rig: a uniformly bright rectangular source image of height h,
  shifted by f2 * eps in the knife plane, partly covered by a straight
  blade; the transmitted light is counted by quadrature over the source
  image (the contrast law of Settles 2001, *Schlieren and Shadowgraph
  Techniques*, ch. 3, follows from this geometry);
* the colour wheel is compared with the standard library's
  ``colorsys.hsv_to_rgb``;
* PNG files are read back with imageio.
"""

from __future__ import annotations

import colorsys
import math

import numpy as np
import pytest

from bos.errors import InputError
from bos.schlieren.virtual import (render_circular_cutoff, render_colour, render_knife_edge, write_virtual_views)
from bos.store import ResultData, Variable


def blob_field(shape=(40, 50), amp=1e-3):
    r, c = np.mgrid[0:shape[0], 0:shape[1]].astype(float)
    s = 9.0
    g = amp * np.exp(-((r - 20) ** 2 + (c - 24) ** 2) / s ** 2)
    return -2 * (r - 20) / s * g, -2 * (c - 24) / s * g


def geometric_knife_edge(eps_y, eps_x, *, angle_deg, cutoff, f2_m, h_m, n=4000):
    """Fraction of a shifted source image passing a straight blade (quadrature over the image height)."""
    t = math.radians(angle_deg)
    ky, kx = math.cos(t), math.sin(t)                 # passed side of the blade
    u = (np.arange(n) + 0.5) / n * h_m - h_m / 2      # source points across the image, along the normal
    u_blade = -h_m / 2 + cutoff * h_m                 # blade position: blocks the fraction `cutoff`
    shift = f2_m * (ky * eps_y + kx * eps_x)          # image displacement along the normal
    out = np.empty(np.shape(eps_y))
    for idx in np.ndindex(out.shape):
        out[idx] = np.mean(u + shift[idx] >= u_blade)
    return out


@pytest.mark.parametrize("angle, cutoff", [(90.0, 0.5), (30.0, 0.3), (0.0, 0.7), (215.0, 0.5)])
def test_knife_edge_rendering_matches_the_rig_geometry(angle, cutoff):
    ey, ex = blob_field()
    f2, h = 1.0, 1e-3
    ec = (1.0 - cutoff) * h / f2                      # a / f2
    got = render_knife_edge(ey, ex, knife_angle_deg=angle, cutoff=cutoff, cutoff_deflection_rad=ec)
    want = geometric_knife_edge(ey, ex, angle_deg=angle, cutoff=cutoff, f2_m=f2, h_m=h)
    assert np.max(np.abs(got - want)) < 1e-3
    assert got[0, 0] == pytest.approx(1.0 - cutoff, abs=1e-4)    # ~no deflection: the undisturbed level
    assert got.min() == 0.0 and got.max() == 1.0                   # this field saturates both ways


def test_circular_cutoff_is_direction_free_and_graded():
    ey, ex = blob_field()
    ec = 2e-4
    img = render_circular_cutoff(ey, ex, cutoff=0.6, cutoff_deflection_rad=ec)
    for phi in (0.4, 2.0):                                         # turn every deflection vector
        ry = math.cos(phi) * ey + math.sin(phi) * ex
        rx = -math.sin(phi) * ey + math.cos(phi) * ex
        assert np.allclose(render_circular_cutoff(ry, rx, cutoff=0.6, cutoff_deflection_rad=ec), img)
    mag = np.hypot(ey, ex)
    lin = mag < ec
    assert np.allclose(img[lin], 0.4 + 0.6 * mag[lin] / ec)
    assert np.all(img[~lin] == 1.0)


def test_colour_wheel_against_colorsys():
    for deg in (0, 45, 90, 150, 225, 300):
        phi = math.radians(deg)
        m = 0.7e-4
        ey, ex = np.array([[-m * math.sin(phi)]]), np.array([[m * math.cos(phi)]])  # counter-clockwise on screen
        rgb = render_colour(ey, ex, cutoff_deflection_rad=1e-4)[0, 0]
        assert np.allclose(rgb, colorsys.hsv_to_rgb(deg / 360.0, 1.0, 0.7), atol=1e-9)
    nan = render_colour(np.array([[np.nan]]), np.array([[0.0]]), cutoff_deflection_rad=1e-4)
    assert np.allclose(nan, 0.5)


def _result(ey, ex, step=4.0):
    rows = np.arange(ey.shape[0]) * step + 2
    cols = np.arange(ey.shape[1]) * step + 2
    v = lambda a, u: Variable(dims=("y", "x"), data=a, attrs={"units": u, "long_name": "x"})  # noqa: E731
    coords = {"y": Variable(("y",), rows * 1e-4, {"units": "m", "long_name": "y"}),
              "x": Variable(("x",), cols * 1e-4, {"units": "m", "long_name": "x"}),
              "row_px": Variable(("y",), rows, {"units": "px", "long_name": "row"}),
              "col_px": Variable(("x",), cols, {"units": "px", "long_name": "col"})}
    return ResultData(coords=coords, variables={"deflection_y": v(ey, "rad"), "deflection_x": v(ex, "rad")}, attrs={})


def test_write_virtual_views(tmp_path):
    iio = pytest.importorskip("imageio.v3")
    ey, ex = blob_field()
    ey[0, 0] = np.nan
    files = write_virtual_views(_result(ey, ex), tmp_path / "views", "plume", knife_angle_deg=["vertical", 30],
                                cutoff=0.5, cutoff_deflection_rad=2e-4)
    names = [f.name for f in files]
    assert names == ["plume-knife-90deg.png", "plume-knife-30deg.png", "plume-circular.png", "plume-colour.png",
                     "plume-colour-key.png"]
    knife = iio.imread(files[0])
    assert knife.shape == ((40 - 1) * 4 + 1, (50 - 1) * 4 + 1)             # back at picture resolution
    assert knife[-1, -1] in (127, 128)                                      # ~no deflection: mid-grey
    assert knife[0, 0] == 0                                                 # NaN drawn black
    # the picture follows the rendering of the field at the vector positions
    direct = render_knife_edge(ey, ex, knife_angle_deg=90, cutoff=0.5, cutoff_deflection_rad=2e-4)
    assert np.max(np.abs(knife[4::4, 4::4] / 255.0 - direct[1:, 1:])) < 1.0 / 255 + 1e-9
    assert iio.imread(files[3]).shape[-1] == 3
    assert not list((tmp_path / "views").glob(".*part*"))                   # no temporary files left
    with pytest.raises(InputError, match="deflection"):
        write_virtual_views(ResultData(coords={}, variables={}, attrs={}), tmp_path, "x")
    with pytest.raises(InputError, match="cutoff"):
        write_virtual_views(_result(ey, ex), tmp_path, "x", cutoff=1.5)


def test_virtual_views_of_a_processed_run(tmp_path):
    """From an in-memory run (bos.output.as_result_data): a hot region bends rays away from its axis,
    so behind a vertical knife (normal +x) its right side is brighter than its left side."""
    iio = pytest.importorskip("imageio.v3")
    from bos import config, synthetic
    from bos.output import as_result_data
    from bos.stages import inputs_from_arrays, process_inputs

    shape = (96, 128)
    rows, cols = np.mgrid[0:shape[0], 0:shape[1]].astype(float)
    cy, cx = (shape[0] - 1) / 2, (shape[1] - 1) / 2
    g = np.exp(-((rows - cy) ** 2 + (cols - cx) ** 2) / (2 * 14.0 ** 2))
    dy, dx = -0.03 * (rows - cy) * g, -0.03 * (cols - cx) * g          # features move toward the hot axis
    pair = synthetic.render_pair(shape=shape, displacement=(dy, dx), dot_diameter_px=2.8, density=0.55, seed=3,
                                 bit_depth=16, noise=True)
    exp_file = tmp_path / "e.toml"
    exp_file.write_text("[camera]\nfocal_length_mm = 50\npixel_pitch_um = 5\nf_number = 11\n"
                        "[geometry]\ncamera_to_object_m = 0.6\nobject_to_background_m = 0.4\n"
                        "[processing]\nwindow_px = 32\nfinal_window_px = 16\npasses = 2\ncamera_motion = \"none\"\n"
                        "[reconstruction]\nkind = \"none\"\n[output]\ndirectory = \"out\"\nname = \"v\"\nfigures = false\n")
    exp = config.load_experiment(exp_file)
    data = as_result_data(process_inputs(inputs_from_arrays(pair.reference, pair.measurement), exp))
    files = write_virtual_views(data, tmp_path / "views", "run", knife_angle_deg=90.0)
    assert [f.name for f in files] == ["run-knife-90deg.png", "run-circular.png", "run-colour.png",
                                       "run-colour-key.png"]
    img = iio.imread(files[0]).astype(float)
    r0 = float(np.asarray(data.coords["row_px"].data)[0])
    c0 = float(np.asarray(data.coords["col_px"].data)[0])
    row = int(round(cy - r0))
    left = img[row, int(round(cx - 14 - c0))]
    right = img[row, int(round(cx + 14 - c0))]
    assert right - left > 40
    circ = iio.imread(files[1]).astype(float)
    assert circ[row, int(round(cx - 14 - c0))] == pytest.approx(circ[row, int(round(cx + 14 - c0))], abs=25)
