"""``bos compare`` through the command line: a BOS result against a calibrated knife-edge result.

Outside sources of the checks: the BOS result holds an analytic deflection
field (gradient of Gaussian index blobs) on its vector grid; the knife-edge
pictures show the same field seen through a known similarity transform
(scale, roll, shift), rotated into the knife frame and projected on the
knife normal, rendered through the knife-edge contrast law (Settles 2001,
ch. 3) with a weak calibration lens (paraxial eps = -r/f_L), vignetting and
noise, and calibrated with ``bos knife-edge``.  The expected overlap is the
fraction of knife pixels whose pre-image lies inside the BOS grid (plane
geometry of the known transform).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from typer.testing import CliRunner

from bos import store
from bos.schlieren.registration import Similarity
from cli.app import get_app
from test_cli_knife_edge import _png
from test_schlieren_calibration import A_M, F2_M, H_M
from test_schlieren_registration import blob_field

runner = CliRunner()
KNIFE_SHAPE = (220, 260)
KNIFE_PIX_M = 1e-4
BOS_PIX_M = 1.3e-4                       # -> 1.3 knife px per BOS px
TRUTH = Similarity(scale=1.3, rotation_rad=math.radians(8.0), shift_xy=(-6.0, 4.0))
BLOBS = [(60, 70, 18, 2.4e-4), (110, 120, 22, -3.0e-4), (50, 150, 15, 1.6e-4), (120, 40, 16, 2.0e-4)]
LENS_CENTER, LENS_RADIUS, LENS_F = (185.0, 225.0), 26.0, 4.0
PEAK = 3.5e-4


def invoke(*args):
    return runner.invoke(get_app(), [str(a) for a in args])


def bos_field(r, c):
    return blob_field(r, c, BLOBS)


BOS_ROWS = np.arange(4.0, 160.0, 4.0)
BOS_COLS = np.arange(4.0, 180.0, 4.0)


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("compare")
    # --- BOS result
    R, C = np.meshgrid(BOS_ROWS, BOS_COLS, indexing="ij")
    ey, ex = bos_field(R, C)
    def var(a, units="rad"):
        return ("y", "x"), a, {"units": units, "long_name": "field"}
    coords = {"y": ((BOS_ROWS - 80) * BOS_PIX_M, {"units": "m", "long_name": "y"}),
              "x": ((BOS_COLS - 90) * BOS_PIX_M, {"units": "m", "long_name": "x"}),
              "row_px": {"dims": ("y",), "data": BOS_ROWS, "attrs": {"units": "px", "long_name": "row"}},
              "col_px": {"dims": ("x",), "data": BOS_COLS, "attrs": {"units": "px", "long_name": "col"}}}
    flags = np.zeros(R.shape, bool)
    store.write_result(d / "bos.h5", coords=coords, variables={
        "deflection_y": var(ey), "deflection_x": var(ex), "masked": var(flags, "1"), "invalid": var(flags, "1")})
    # the same result in a file whose y (and deflection_y) points up
    coords_up = dict(coords, y=(-(BOS_ROWS - 80) * BOS_PIX_M, {"units": "m", "long_name": "y (up)"}))
    store.write_result(d / "bos_up.nc", coords=coords_up, variables={
        "deflection_y": var(-ey), "deflection_x": var(ex), "masked": var(flags, "1"), "invalid": var(flags, "1")})
    # --- knife-edge pictures of the same field (vertical knife, normal +x)
    kr, kc = np.mgrid[0:KNIFE_SHAPE[0], 0:KNIFE_SHAPE[1]].astype(float)
    br, bc = TRUTH.inverse().apply(kr, kc)
    fy, fx = bos_field(br, bc)
    th = TRUTH.rotation_rad
    eps_n = math.cos(th) * fx - math.sin(th) * fy            # x component of R(theta) eps (knife normal +x)
    in_lens = np.hypot(kr - LENS_CENTER[0], kc - LENS_CENTER[1]) <= LENS_RADIUS
    eps_n = np.where(in_lens, -(kc - LENS_CENTER[1]) * KNIFE_PIX_M / LENS_F, eps_n)
    ratio = np.clip(1 + F2_M * eps_n / A_M, 0, H_M / A_M) * np.where(in_lens, 0.97, 1.0)
    illum = 0.4 * (1 - 0.4 * ((kr / KNIFE_SHAPE[0] - 0.5) ** 2 + (kc / KNIFE_SHAPE[1] - 0.5) ** 2))
    rng = np.random.default_rng(21)
    _png(d / "flow.png", illum * ratio + rng.normal(0, 0.0015, KNIFE_SHAPE))
    _png(d / "noflow.png", illum + rng.normal(0, 0.0015, KNIFE_SHAPE))
    r = invoke("knife-edge", d / "flow.png", "--no-flow", d / "noflow.png", "--knife", "vertical",
               "--object-pixel-mm", KNIFE_PIX_M * 1e3, "--lens-center-px", "185,225", "--lens-radius-px", LENS_RADIUS,
               "--lens-focal-length-m", LENS_F, "--out", d / "knife.nc", "--json")
    assert r.exit_code == 0, r.output
    # --- control points (0.1 px of clicking noise)
    src = np.array([[20, 20], [20, 170], [150, 30], [140, 160], [80, 95]], float)
    dst = np.column_stack(TRUTH.apply(src[:, 0], src[:, 1])) + rng.normal(0, 0.1, src.shape)
    (d / "cp.json").write_text(json.dumps([{"bos_px": s.tolist(), "knife_px": t.tolist()} for s, t in zip(src, dst)]))
    (d / "cp2.json").write_text(json.dumps([{"bos_px": s.tolist(), "knife_px": t.tolist()}
                                            for s, t in zip(src[:2], dst[:2])]))
    inside = (br >= BOS_ROWS[0]) & (br <= BOS_ROWS[-1]) & (bc >= BOS_COLS[0]) & (bc <= BOS_COLS[-1])
    return {"dir": d, "overlap": float(inside.mean())}


def _check(stats, overlap):
    assert set(stats) == {"correlation", "rms_difference_rad", "bias_rad", "registration_residual_px",
                          "overlap_fraction"}
    assert stats["correlation"] > 0.97
    assert stats["rms_difference_rad"] < 0.1 * PEAK
    assert abs(stats["bias_rad"]) < 0.02 * PEAK
    assert stats["registration_residual_px"] < 0.5
    assert stats["overlap_fraction"] == pytest.approx(overlap, abs=0.03)


def test_compare_with_control_points(files, tmp_path):
    d = files["dir"]
    out = tmp_path / "cmp"
    r = invoke("compare", d / "bos.h5", d / "knife.nc", "--control-points", d / "cp.json", "--out", out,
               "--line", "110,10,110,250", "--json")
    assert r.exit_code == 0, r.output
    _check(json.loads(r.stdout), files["overlap"])
    names = sorted(p.name for p in out.iterdir())
    assert names == ["compare-difference.png", "compare-panels.png", "compare-profile-1.csv", "compare-profile-1.png",
                     "compare-run.json", "compare.json", "compare.nc"]   # -run.json: the output set's manifest
    details = json.loads((out / "compare.json").read_text())
    assert details["transform"]["scale"] == pytest.approx(1.3, rel=0.005)
    assert details["transform"]["rotation_deg"] == pytest.approx(8.0, abs=0.2)
    header = (out / "compare-profile-1.csv").read_text().splitlines()[0]
    assert header == ("s [m],row_px [px],col_px [px],bos_deflection_normal [rad],knife_deflection_normal [rad],"
                      "difference [rad]")
    prof = np.genfromtxt(out / "compare-profile-1.csv", delimiter=",", names=True)
    ok = np.isfinite(prof["difference_rad"])
    assert ok.sum() > 100
    assert np.nanmax(np.abs(prof["bos_deflection_normal_rad"])) > 0.25 * PEAK
    data = store.read_result(out / "compare.nc")
    assert data.variables["difference"].attrs["units"] == "rad"
    # the file's y points up (against the knife-picture rows), like the BOS and knife-edge result files
    y, rows = data.coords["y"].data, data.coords["row_px"].data
    assert np.all(np.diff(y) < 0) and np.all(np.diff(rows) > 0)
    assert data.attrs["comparison"]["registration"] == "control points"
    assert "Umeyama" in data.attrs["references"] and "bos compare" in data.attrs["history"]
    from test_cf_compliance import assert_cfchecks_clean

    assert_cfchecks_clean([out / "compare.nc", d / "knife.nc"], tmp_path)


def test_compare_reads_y_up_files(files):
    d = files["dir"]
    r = invoke("compare", d / "bos_up.nc", d / "knife.nc", "--control-points", d / "cp.json", "--json")
    assert r.exit_code == 0, r.output
    _check(json.loads(r.stdout), files["overlap"])


def test_compare_registers_automatically(files):
    d = files["dir"]
    r = invoke("compare", d / "bos.h5", d / "knife.nc", "--json")
    assert r.exit_code == 0, r.output
    _check(json.loads(r.stdout), files["overlap"])


def test_compare_bad_input(files, tmp_path):
    d = files["dir"]
    for args, words in [
        ((d / "bos.h5", d / "knife.nc", "--control-points", d / "cp2.json"), "at least 3 control points"),
        ((d / "knife.nc", d / "knife.nc"), "deflection_y"),
        ((d / "bos.h5", d / "bos.h5"), "deflection_normal"),
        ((d / "bos.h5", tmp_path / "none.nc"), "not found"),
        ((d / "bos.h5", d / "knife.nc", "--line", "1,2,3"), "--line"),
    ]:
        r = invoke("compare", *args)
        assert r.exit_code == 2, r.output
        lines = [ln for ln in r.output.splitlines() if ln.strip()]
        assert len(lines) == 1 and words in lines[0], r.output



def test_failed_rerun_keeps_the_earlier_comparison(files, tmp_path, monkeypatch):
    """The files of a comparison are one output set: a rerun that fails half-way changes nothing."""
    from bos._io import check_output_set
    from bos.schlieren import comparison

    d, out = files["dir"], tmp_path / "cmp"
    args = ("compare", d / "bos.h5", d / "knife.nc", "--control-points", d / "cp.json", "--out", out, "--json")
    assert invoke(*args).exit_code == 0
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    assert check_output_set(out / "compare.nc", json.loads((out / "compare-run.json").read_text())["run_id"]) == []

    def broken(*a, **k):
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(comparison, "_profile_figure", broken)
    r = invoke(*args)
    assert r.exit_code == 2 and "disk full" in r.stderr
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before
