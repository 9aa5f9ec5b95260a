"""`bos synth`: the experiment file beside the pair, gas density/temperature in the truth file,
the --dot-fill option (old --density spelling kept as a deprecated alias).

Outside sources of the checks:
* air density at the truth temperature from CoolProp (pseudo-pure air, Lemmon et al. 2000
  equation of state), a general-purpose reference library;
* the ideal-gas law at constant pressure (rho T = const) and the Gladstone-Dale relation
  n - 1 = K rho (K from bos.media, itself checked against ref_index in test_media.py);
* the analytic column T(r) = T0 + dT exp(-r^2/s^2) that the pair was rendered from, recovered
  by an independent `bos run` of the written experiment file.
"""

from __future__ import annotations

import json
import tomllib

import numpy as np
import pytest
from typer.testing import CliRunner

from bos import config
from cli.app import get_app

runner = CliRunner()


def synth(tmp_path, *args):
    res = runner.invoke(get_app(), ["synth", "--out", str(tmp_path), *[str(a) for a in args]])
    assert res.exit_code == 0, res.output
    return res


def test_hot_column_truth_and_experiment_file_round_trip(tmp_path):
    dt, s_mm, rows, cols = 40.0, 3.0, 128, 160
    res = synth(tmp_path, "--field", "hot-column", "--rows", rows, "--cols", cols, "--radius-mm", s_mm,
                "--delta-t-k", dt, "--name", "col", "--json")
    files = json.loads(res.stdout)["files"]
    exp_path = tmp_path / "col_experiment.toml"
    assert str(exp_path) in files

    with np.load(tmp_path / "col_truth.npz") as t:
        temp, rho, x_m = t["temperature_k"], t["density_kg_m3"], t["x_m"]
        t0, rho0 = float(t["ambient_temperature_k"]), float(t["ambient_density_kg_m3"])
    assert temp.shape == rho.shape == (rows, cols)
    # analytic column, constant along the vertical axis
    expected = t0 + dt * np.exp(-(x_m / (s_mm * 1e-3)) ** 2)
    np.testing.assert_allclose(temp, np.broadcast_to(expected, temp.shape), rtol=1e-12)
    # ideal gas at constant pressure: rho T = rho0 T0; the compressibility of air differs from 1
    # by a few 1e-4 at 1 atm and changes by ~3e-4 between 293 and 333 K (from memory), hence 5e-4
    np.testing.assert_allclose(rho * temp, rho0 * t0, rtol=5e-4)
    cp = pytest.importorskip("CoolProp.CoolProp")
    i = int(np.argmax(temp[0]))
    ref = cp.PropsSI("D", "T", float(temp[0, i]), "P", 101325.0, "Air")
    assert rho[0, i] == pytest.approx(ref, rel=2e-3)  # CO2 content / EOS differences < 0.1 %

    # the experiment file loads, describes the rig that rendered the pair, and processes it
    exp = config.load_experiment(exp_path)
    assert exp.camera.focal_length_m == pytest.approx(0.050) and exp.geometry.z_d_m == pytest.approx(0.5)
    assert exp.reconstruction.kind == "axisymmetric" and exp.reconstruction.axis_px == pytest.approx((cols - 1) / 2)
    assert exp.processing.camera_motion == "none" and exp.medium.temperature_k == pytest.approx(t0)
    assert exp.resolve(exp.images.reference) == tmp_path / "col_reference.png"
    run = runner.invoke(get_app(), ["run", str(exp_path), "--no-figures", "--json"])
    assert run.exit_code == 0, run.output
    rise = json.loads(run.stdout)["summary"]["peak_temperature_rise_k"]
    assert rise == pytest.approx(dt, rel=0.10)  # 128 x 160 px, 16 px windows: ~4 % measured


def test_planar_layer_and_uniform_fields(tmp_path):
    synth(tmp_path, "--field", "planar-layer", "--rows", 64, "--cols", 48, "--amplitude", -4e-6,
          "--radius-mm", 4, "--object-width-mm", 150, "--name", "layer")
    exp = tomllib.loads((tmp_path / "layer_experiment.toml").read_text())
    assert exp["reconstruction"] == {"kind": "planar", "reference_region": "top"}
    assert exp["geometry"]["object_width_mm"] == 150
    with np.load(tmp_path / "layer_truth.npz") as t:
        rho, temp, y_m = t["density_kg_m3"], t["temperature_k"], t["y_m"]
        rho0, t0 = float(t["ambient_density_kg_m3"]), float(t["ambient_temperature_k"])
    from bos.media import Medium

    k = Medium(gas="air").gladstone_dale
    n_minus_1 = k * rho  # Gladstone-Dale: the index excess is the rendered Gaussian
    expected = k * rho0 - 4e-6 * np.exp(-(y_m / 4e-3) ** 2)
    np.testing.assert_allclose(n_minus_1[:, 0], expected, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(rho * temp, rho0 * t0, rtol=5e-4)
    assert 3.0 < temp.max() - t0 < 6.0  # an index deficit of 4e-6 is ~ +4.4 K in air (n - 1 ~ 2.7e-4)

    synth(tmp_path, "--field", "uniform", "--rows", 32, "--cols", 32, "--name", "u", "--camera-shift-x-px", 0.3)
    exp = config.load_experiment(tmp_path / "u_experiment.toml")
    assert exp.reconstruction.kind == "none"
    assert "camera_motion" not in tomllib.loads((tmp_path / "u_experiment.toml").read_text()).get("processing", {})
    with np.load(tmp_path / "u_truth.npz") as t:
        assert "density_kg_m3" not in t.files  # a pure shift has no gas field


def test_dot_fill_and_deprecated_density_alias(tmp_path):
    import imageio.v3 as iio

    a = synth(tmp_path, "--dot-fill", 0.3, "--rows", 40, "--cols", 40, "--name", "a", "--no-noise")
    assert "deprecated" not in a.stderr
    b = synth(tmp_path, "--density", 0.3, "--rows", 40, "--cols", 40, "--name", "b", "--no-noise")
    assert "--density is deprecated" in b.stderr and "--dot-fill" in b.stderr
    np.testing.assert_array_equal(iio.imread(tmp_path / "a_reference.png"), iio.imread(tmp_path / "b_reference.png"))
    c = synth(tmp_path, "--dot-fill", 0.6, "--rows", 40, "--cols", 40, "--name", "c", "--no-noise")
    assert c.exit_code == 0
    assert not np.array_equal(iio.imread(tmp_path / "a_reference.png"), iio.imread(tmp_path / "c_reference.png"))
    help_text = runner.invoke(get_app(), ["synth", "-h"]).stdout
    assert "--dot-fill" in help_text and "--density" not in help_text


@pytest.mark.parametrize("args, words", [
    (["--focal-mm", "50000"], ["--focal-length-mm (camera.focal_length_mm)", "between 1 and 5000"]),
    (["--zd-m", "1e308"], ["--object-to-background-m (geometry.object_to_background_m)"]),
    (["--pixel-pitch-um", "0.005"], ["(camera.pixel_pitch_um)", "between 0.5 and 50"]),
    (["--field", "vortx"], ["--field", "vortx"]),
])
def test_absurd_rig_values_exit_2_naming_option_and_key(tmp_path, args, words):
    res = runner.invoke(get_app(), ["synth", "--out", str(tmp_path), "--rows", "16", "--cols", "16", *args])
    assert res.exit_code == 2
    err = res.stderr.strip()
    assert err.startswith("error:") and "\n" not in err
    for w in words:
        assert w in err
    assert not list(tmp_path.iterdir())
