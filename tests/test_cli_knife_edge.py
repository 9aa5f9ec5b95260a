"""``bos knife-edge`` and ``bos virtual-knife-edge`` through the command line.

Outside sources of the checks: the pictures are rendered from the analytic
column + weak-lens field through the knife-edge contrast law (see
test_schlieren_calibration.py: Settles 2001, ch. 3; paraxial thin lens
eps = -r/f_L), saved as 16-bit PNG; the result file is opened with xarray +
h5netcdf (general-purpose netCDF4/HDF5 readers) and checked with the CF
conventions checker cfchecks (CF 1.8, UDUNITS-2); JSON is parsed with the
standard library.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from typer.testing import CliRunner

from cli.app import get_app
from test_schlieren_calibration import A_M, F2_M, H_M, LENS, PEAK_RAD, PIX_M, knife_scene

runner = CliRunner()


def invoke(*args):
    return runner.invoke(get_app(), [str(a) for a in args])


def _png(path, data):
    import imageio.v3 as iio

    iio.imwrite(path, np.round(np.clip(data, 0, 1) * 65535).astype(np.uint16))
    return path


@pytest.fixture(scope="module")
def pictures(tmp_path_factory):
    d = tmp_path_factory.mktemp("knife")
    pic, ref, eps_n, in_lens, ratio = knife_scene(seed=11)
    return {"dir": d, "pic": _png(d / "flow.png", pic), "ref": _png(d / "noflow.png", ref), "eps_n": eps_n,
            "ratio": ratio, "in_lens": in_lens}


LENS_ARGS = ("--lens-center-px", f"{LENS['center'][0]:g},{LENS['center'][1]:g}", "--lens-radius-px", LENS["radius"],
             "--lens-focal-length-m", LENS["focal_m"])


def test_knife_edge_with_lens_writes_a_calibrated_result(pictures, tmp_path):
    xr = pytest.importorskip("xarray")
    pytest.importorskip("h5netcdf")
    out = tmp_path / "ke.nc"
    plot = tmp_path / "response.png"
    r = invoke("knife-edge", pictures["pic"], "--no-flow", pictures["ref"], "--knife", "vertical",
               "--object-pixel-mm", PIX_M * 1e3, *LENS_ARGS, "--out", out, "--plot", plot, "--json")
    assert r.exit_code == 0, r.output
    info = json.loads(r.stdout)
    s = info["summary"]
    assert s["law"] == "clipped"
    assert s["sensitivity_per_rad"] == pytest.approx(F2_M / A_M, rel=0.03)
    assert any("IEC 62471" in c for c in info["cautions"]) and any("WCAG" in c for c in info["cautions"])
    assert info["cautions"][-1].startswith("These notes are reminders")
    assert plot.stat().st_size > 0
    with xr.open_dataset(out, engine="h5netcdf") as ds:
        dn = ds["deflection_normal"]
        assert dn.attrs["units"] == "rad" and ds["y"].attrs["units"] == "m" and ds["y"].attrs["axis"] == "Y"
        assert set(dn.coords) >= {"y", "x", "row_px", "col_px"}
        assert ds["x"].values[1] - ds["x"].values[0] == pytest.approx(PIX_M)
        assert np.allclose(np.diff(ds["y"].values), -PIX_M)      # y points UP in the file, like BOS result files
        assert "positive" not in ds["y"].attrs and ds["row_px"].attrs["units"] == "1"
        assert ds["row_px"].attrs["display_units"] == "px"
        assert ds.attrs["Conventions"] == "CF-1.8" and ds.attrs["history"].count("bos knife-edge") == 1
        assert "calibration lens" in ds.attrs["source"] and "Settles, G. S. (2001)" in ds.attrs["references"]
        assert ds["saturated"].dtype == np.int8 and list(ds["saturated"].attrs["flag_values"]) == [0, 1]
        assert np.array_equal(ds["row_px"].values, np.arange(dn.shape[0]))
        eps = dn.values
        flags = {k: ds[k].values.astype(bool) for k in ("saturated", "lens", "uncalibrated", "invalid")}
    from bos.store import read_result

    cal = read_result(out).attrs["calibration"]
    assert cal["method"] == "lens" and cal["lens"]["focal_length_m"] == pytest.approx(LENS["focal_m"])
    assert cal["knife_normal_yx"] == [0.0, 1.0]
    ok = np.isfinite(eps) & ~flags["lens"] & ~flags["uncalibrated"]
    err = eps[ok] - pictures["eps_n"][ok]
    assert float(np.sqrt(np.mean(err ** 2))) <= 0.05 * PEAK_RAD
    true_sat = ((pictures["ratio"] <= 0) | (pictures["ratio"] >= H_M / A_M)) & ~pictures["in_lens"]
    assert flags["saturated"][true_sat].mean() > 0.97
    assert np.array_equal(flags["lens"], pictures["in_lens"])
    from test_cf_compliance import assert_cfchecks_clean

    assert_cfchecks_clean([out], tmp_path)


def test_knife_edge_with_optical_parameters(pictures, tmp_path):
    out = tmp_path / "ke.nc"
    r = invoke("knife-edge", pictures["pic"], "--no-flow", pictures["ref"], "--knife", "90",
               "--object-pixel-mm", PIX_M * 1e3, "--schlieren-focal-length-m", F2_M,
               "--source-image-height-mm", H_M * 1e3, "--cutoff", 0.5, "--out", tmp_path / "ke")
    assert r.exit_code == 0, r.output
    assert "caution" in r.stdout and "calibrated range" in r.stdout
    from bos.store import read_result

    assert out.is_file() and not (tmp_path / "ke").exists()  # .nc added to a name without suffix
    data = read_result(out)
    assert "schlieren optics" in data.attrs["source"]
    eps = data.variables["deflection_normal"].data
    ok = np.isfinite(eps) & ~data.variables["uncalibrated"].data & ~pictures["in_lens"]
    err = eps[ok] - pictures["eps_n"][ok]
    assert float(np.sqrt(np.mean(err ** 2))) <= 0.05 * PEAK_RAD


def _one_line_error(r, *words):
    assert r.exit_code == 2, r.output
    lines = [ln for ln in r.output.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("error:"), r.output
    for w in words:
        assert w in lines[0], lines[0]
    assert "Traceback" not in r.output


def test_bad_input_exits_2_with_one_line(pictures, tmp_path):
    base = [pictures["pic"], "--no-flow", pictures["ref"], "--object-pixel-mm", 0.1, "--out", tmp_path / "o.nc"]
    _one_line_error(invoke("knife-edge", *base, *LENS_ARGS), "knife orientation missing")
    _one_line_error(invoke("knife-edge", *base, "--knife", "diagonal", *LENS_ARGS), "knife orientation")
    _one_line_error(invoke("knife-edge", *base, "--knife", "vertical", "--lens-center-px", "900,20",
                           "--lens-radius-px", 30, "--lens-focal-length-m", 4), "outside the picture")
    small = _png(tmp_path / "small.png", np.full((100, 120), 0.4))
    _one_line_error(invoke("knife-edge", pictures["pic"], "--no-flow", small, "--knife", "vertical",
                           "--object-pixel-mm", 0.1, "--out", tmp_path / "o.nc", *LENS_ARGS), "different sizes")
    flat = _png(tmp_path / "flat.png", np.full((160, 220), 1.0))
    _one_line_error(invoke("knife-edge", flat, "--no-flow", pictures["ref"], "--knife", "vertical",
                           "--object-pixel-mm", 0.1, "--out", tmp_path / "o.nc", *LENS_ARGS), "saturated")
    _one_line_error(invoke("knife-edge", *base, "--knife", "vertical", "--lens-radius-px", 30), "--lens-center-px")
    _one_line_error(invoke("knife-edge", *base, "--knife", "vertical"), "no calibration")
    _one_line_error(invoke("knife-edge", pictures["pic"], "--no-flow", pictures["ref"], "--knife", "vertical",
                           "--object-pixel-mm", 0.1, "--out", pictures["ref"], *LENS_ARGS), "input file")
    assert not (tmp_path / "o.nc").exists()


def test_virtual_knife_edge_command(tmp_path):
    iio = pytest.importorskip("imageio.v3")
    from bos import store

    rows = np.arange(2, 120, 4.0)
    cols = np.arange(2, 160, 4.0)
    r, c = np.meshgrid(rows, cols, indexing="ij")
    g = 2e-4 * np.exp(-((r - 60) ** 2 + (c - 80) ** 2) / 30.0 ** 2)
    ey, ex = -2 * (r - 60) / 30 * g, -2 * (c - 80) / 30 * g
    def var(a):
        return ("y", "x"), a, {"units": "rad", "long_name": "deflection"}

    coords = {"y": ((rows - 60) * 1e-4, {"units": "m", "long_name": "y"}),
              "x": ((cols - 80) * 1e-4, {"units": "m", "long_name": "x"}),
              "row_px": {"dims": ("y",), "data": rows, "attrs": {"units": "px", "long_name": "row"}},
              "col_px": {"dims": ("x",), "data": cols, "attrs": {"units": "px", "long_name": "col"}}}
    res = store.write_result(tmp_path / "bos.h5", coords=coords,
                             variables={"deflection_y": var(ey), "deflection_x": var(ex)})
    out = tmp_path / "views"
    rr = invoke("virtual-knife-edge", res, "--out", out, "--knife", "vertical", "--knife", "45",
                "--range-urad", 150, "--json")
    assert rr.exit_code == 0, rr.output
    info = json.loads(rr.stdout)
    assert info["cutoff_deflection_rad"] == pytest.approx(150e-6)
    assert [p.split("/")[-1] for p in info["files"]] == ["bos-knife-90deg.png", "bos-knife-45deg.png",
                                                         "bos-circular.png", "bos-colour.png", "bos-colour-key.png"]
    img = iio.imread(info["files"][0])
    assert img.shape == (rows[-1] - rows[0] + 1, cols[-1] - cols[0] + 1)
    # vertical knife (normal +x): left of the centre eps_x > 0 -> brighter than the right side (eps_x < 0)
    assert img[58, 40].astype(int) - img[58, 118].astype(int) > 50
    bad = invoke("virtual-knife-edge", tmp_path / "missing.h5")
    _one_line_error(bad, "not found")


def test_virtual_knife_edge_does_not_overwrite_a_runs_own_views(tmp_path):
    """A run made with --virtual-knife-edge lists <name>-knife-*.png in its manifest: rewriting them
    with other settings would leave the run's output set mixed, so it is refused."""
    from bos import store
    from bos._io import file_sha256

    rows, cols = np.arange(2, 60, 4.0), np.arange(2, 80, 4.0)
    r, c = np.meshgrid(rows, cols, indexing="ij")
    e = 1e-4 * np.exp(-((r - 30) ** 2 + (c - 40) ** 2) / 20.0 ** 2)
    var = (("y", "x"), e, {"units": "rad", "long_name": "deflection"})
    coords = {"y": ((rows - 30) * 1e-4, {"units": "m", "long_name": "y"}),
              "x": ((cols - 40) * 1e-4, {"units": "m", "long_name": "x"}),
              "row_px": {"dims": ("y",), "data": rows, "attrs": {"units": "px", "long_name": "row"}},
              "col_px": {"dims": ("x",), "data": cols, "attrs": {"units": "px", "long_name": "col"}}}
    res = store.write_result(tmp_path / "run.nc", coords=coords, variables={"deflection_y": var, "deflection_x": var})
    own = tmp_path / "run-knife-90deg.png"
    own.write_bytes(b"the run's own picture")
    (tmp_path / "run-run.json").write_text(json.dumps(
        {"run_id": "r1", "name": "run", "files": {"run.nc": file_sha256(res), own.name: file_sha256(own)}}))
    _one_line_error(invoke("virtual-knife-edge", res, "--knife", "vertical"), "output set")
    assert own.read_bytes() == b"the run's own picture"
    ok = invoke("virtual-knife-edge", res, "--knife", "vertical", "--name", "again", "--json")
    assert ok.exit_code == 0, ok.output
    assert (tmp_path / "again-knife-90deg.png").is_file() and own.read_bytes() == b"the run's own picture"
