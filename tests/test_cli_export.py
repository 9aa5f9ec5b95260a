"""``bos export`` / ``bos inspect`` on result files: units in CSV headers, standard output,
refusing to overwrite the input, and hostile or damaged files.

Outside oracles: numpy reads the CSV back; the expected values are the
analytic fields written into the file (a linear temperature field, whose
bilinear profile is exact); h5py builds the hostile files.
"""

from __future__ import annotations

import io
import os

import h5py
import numpy as np
import pytest
from typer.testing import CliRunner

from bos.store import write_result
from cli.app import get_app

runner = CliRunner()
Y = np.linspace(0.004, -0.004, 9)  # y up, as bos run writes it
X = np.linspace(-0.006, 0.006, 13)


def invoke(*args):
    return runner.invoke(get_app(), [str(a) for a in args])


def _temperature():
    yy, xx = np.meshgrid(Y, X, indexing="ij")
    return 300.0 + 1000.0 * xx + 2000.0 * yy


@pytest.fixture()
def result(tmp_path):
    t = _temperature()
    masked = np.zeros(t.shape, bool)
    masked[0, 0] = True
    path = tmp_path / "r.nc"
    write_result(
        path,
        coords={"y": (Y, {"units": "m", "long_name": "object-plane y (up)", "axis": "Y"}),
                "x": (X, {"units": "m", "long_name": "object-plane x (right)", "axis": "X"}),
                "row_px": {"dims": ("y",), "data": np.arange(9.0) * 8,
                           "attrs": {"units": "1", "display_units": "px", "long_name": "image row"}}},
        variables={"temperature": (("y", "x"), t, {"units": "K", "long_name": "gas temperature"}),
                   "displacement_x": (("y", "x"), 0.01 * t, {"units": "1", "display_units": "px",
                                                             "long_name": "displacement x"}),
                   "masked": (("y", "x"), masked, {"units": "1", "long_name": "user mask"})},
        attrs={"summary": {"peak_temperature_rise_k": 10.0, "warnings": []}, "rig": {"focal_length_m": 0.05},
               "software_version": "test"})
    return path


def test_fields_csv_has_units_in_its_header(tmp_path, result):
    out = tmp_path / "f.csv"
    res = invoke("export", result, "--csv", out)
    assert res.exit_code == 0, res.stderr
    assert res.stdout.strip() == f"wrote {out}"
    header = out.read_text().splitlines()[0]
    assert header == "y [m],x [m],temperature [K],displacement_x [px],masked [1]"
    table = np.genfromtxt(out, delimiter=",", names=True)
    np.testing.assert_allclose(table["temperature_K"], _temperature().ravel(), rtol=1e-9)
    np.testing.assert_allclose(table["displacement_x_px"], 0.01 * _temperature().ravel(), rtol=1e-9)
    import json

    res = invoke("export", result, "--csv", tmp_path / "p.csv", "--profile", "0,-1,0,1", "--variables", "temperature",
                 "--json")
    assert res.exit_code == 0, res.stderr
    assert json.loads(res.stdout)["columns"] == ["s [m]", "x [m]", "y [m]", "temperature [K]"]
    res = invoke("export", result, "--csv", tmp_path / "g.csv", "--json")
    assert json.loads(res.stdout)["columns"] == header.split(",")


def test_csv_dash_writes_to_standard_output(tmp_path, result):
    res = invoke("export", result, "--csv", "-", "--variables", "temperature")
    assert res.exit_code == 0, res.stderr
    lines = res.stdout.splitlines()
    assert lines[0] == "y [m],x [m],temperature [K]" and len(lines) == 1 + Y.size * X.size
    table = np.genfromtxt(io.StringIO(res.stdout), delimiter=",", names=True)
    np.testing.assert_allclose(table["temperature_K"], _temperature().ravel(), rtol=1e-9)
    assert not (tmp_path / "-").exists()
    # a profile along y at x = 1 mm, from 3 mm below to 3 mm above the centre (y up)
    prof = invoke("export", result, "--csv", "-", "--profile", "1,-3,1,3", "--variables", "temperature")
    assert prof.exit_code == 0, prof.stderr
    assert prof.stdout.splitlines()[0] == "s [m],x [m],y [m],temperature [K]"
    line = np.genfromtxt(io.StringIO(prof.stdout), delimiter=",", names=True)
    np.testing.assert_allclose(line["y_m"][[0, -1]], [-3e-3, 3e-3])
    # analytic: bilinear interpolation of a linear field is exact
    np.testing.assert_allclose(line["temperature_K"], 300 + 1000 * 1e-3 + 2000 * line["y_m"], rtol=1e-12)
    both = invoke("export", result, "--csv", "-", "--json")
    assert both.exit_code == 2 and "standard output" in both.stderr


def test_refuses_an_output_that_is_the_input(tmp_path, result):
    before = result.read_bytes()
    os.symlink(result, tmp_path / "link.nc")
    os.link(result, tmp_path / "hard.nc")
    for target in (result, tmp_path / "link.nc", tmp_path / "hard.nc", tmp_path / "." / "r.nc"):
        res = invoke("export", result, "--csv", target)
        assert res.exit_code == 2, (target, res.stdout, res.stderr)
        assert "is the input file" in res.stderr and len(res.stderr.strip().splitlines()) == 1
    via_link = invoke("export", tmp_path / "link.nc", "--csv", result)
    assert via_link.exit_code == 2
    assert result.read_bytes() == before


def test_malformed_json_attribute_exits_2_with_one_line(tmp_path, result):
    with h5py.File(result, "r+") as h5:
        h5.attrs["summary"] = '{"peak_temperature_rise_k": 10.0'
    for cmd in (("inspect", result, "--json"), ("export", result, "--csv", tmp_path / "f.csv")):
        res = invoke(*cmd)
        assert res.exit_code == 2, (cmd, res.stderr)
        assert "attribute 'summary' is not valid JSON" in res.stderr and "internal error" not in res.stderr
        assert len(res.stderr.strip().splitlines()) == 1
    assert not (tmp_path / "f.csv").exists()


def test_external_storage_is_refused_and_nothing_is_copied(tmp_path, result):
    secret = tmp_path / "secret.txt"
    secret.write_bytes(b"private key material".ljust(104, b"!"))
    with h5py.File(result, "r+") as h5:
        h5.create_dataset("leak", shape=(13,), dtype="f8", external=[(str(secret), 0, 104)])
        h5["leak"].attrs["units"] = "1"
        h5["leak"].attrs["long_name"] = "crafted"
    out = tmp_path / "f.csv"
    res = invoke("export", result, "--csv", out, "--variables", "temperature")
    assert res.exit_code == 2 and "external file" in res.stderr, res.stderr
    assert not out.exists()
    assert invoke("inspect", result).exit_code == 2


def test_declared_size_cap_is_a_clear_error(tmp_path, result):
    with h5py.File(result, "r+") as h5:
        h5.create_dataset("bomb", shape=(10**6, 10**6), dtype="f8", chunks=(1000, 1000), compression="gzip")
    res = invoke("export", result, "--csv", tmp_path / "f.csv")
    assert res.exit_code == 2 and "declares" in res.stderr and "GB" in res.stderr, res.stderr


def test_inspect_shows_display_units(result):
    import json

    res = invoke("inspect", result, "--json")
    assert res.exit_code == 0, res.stderr
    info = json.loads(res.stdout)
    assert info["variables"]["displacement_x"]["units"] == "px"
    assert info["variables"]["temperature"]["units"] == "K"
    assert info["summary"]["peak_temperature_rise_k"] == 10.0


def test_closed_pipe_on_standard_output_ends_quietly(tmp_path):
    import subprocess
    import sys

    y, x = np.linspace(0.01, -0.01, 300), np.linspace(-0.01, 0.01, 400)  # 120 000 rows: far more than a pipe holds
    path = write_result(tmp_path / "big.nc",
                        coords={"y": (y, {"units": "m", "long_name": "y (up)", "axis": "Y"}),
                                "x": (x, {"units": "m", "long_name": "x", "axis": "X"})},
                        variables={"temperature": (("y", "x"), np.full((300, 400), 300.0),
                                                   {"units": "K", "long_name": "gas temperature"})})
    proc = subprocess.Popen([sys.executable, "-c", "from cli.app import main; main()", "export", str(path),
                             "--csv", "-"], stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    first = proc.stdout.readline()
    proc.stdout.close()  # like `| head -1`
    err = proc.stderr.read().decode()
    assert proc.wait(timeout=120) == 0, err
    assert first.decode().strip() == "y [m],x [m],temperature [K]"
    assert err.strip() == ""
