"""Tests of the ``bos plan`` command and of bos.safety.

Run through typer's CliRunner on ``cli.app.get_app()``; outside sources are
named beside each check.
"""

from __future__ import annotations

import json
from pathlib import Path

import imageio.v3 as iio
import pytest
from typer.testing import CliRunner

from bos import config, safety
from bos.errors import InputError
from cli.app import get_app

ROOT = Path(__file__).resolve().parents[1]
EXAMPLE = ROOT / "datasets" / "plan_example.toml"
FIRST = ["--focal-length-mm", "50", "--pixel-um", "5", "--camera-to-object-m", "1",
         "--object-to-background-m", "0.5", "--object-width-mm", "20"]


def _run(args):
    return CliRunner().invoke(get_app(), ["plan", *args])


def _json(args):
    res = _run([*args, "--json"])
    assert res.exit_code == 0, res.output
    return json.loads(res.stdout)


def test_done_when_json_sensitivity():
    # issue 2 "Done when" / geometry check values (TABLE_3_1 row 1 in test_optics.py, computed from
    # Raffel 2015, Exp. Fluids 56:60 and Exp. Fluids 2019 Eq. 1): 17.24 mm/rad on the sensor, 3448 px/rad
    out = _json(FIRST)
    assert out["sensitivity_mm_per_rad"] == pytest.approx(17.24, rel=1e-3)
    assert out["sensitivity_px_per_rad"] == pytest.approx(3448, rel=1e-3)
    # same row: object-plane blur 2.08 mm (cone), d_i 21.6 px, d_d 2.2 px at N = 8 (the default)
    assert out["object_blur_geometric_m"] == pytest.approx(2.08e-3, abs=0.005e-3)
    assert out["geometric_blur_px"] == pytest.approx(21.6, abs=0.05)
    assert out["diffraction_blur_px"] == pytest.approx(2.2, abs=0.05)
    assert isinstance(out["warnings"], list) and isinstance(out["cautions"], list)
    assert out["cautions"][-1] == safety.DEFER


def test_table_output_and_example_file():
    res = _run([str(EXAMPLE)])
    assert res.exit_code == 0, res.output
    assert "17.24" in res.stdout and "mm/rad" in res.stdout and "caution:" in res.stdout
    out = _json([str(EXAMPLE)])
    # the file's Z_A = 1 m, Z_D = 0.5 m, f = 50 mm, 5 um: TABLE_3_1 row 1 (test_optics.py, computed)
    assert out["sensitivity_mm_per_rad"] == pytest.approx(17.24, rel=1e-3)
    assert out["field_of_view_m"] == pytest.approx([4000 * 0.09667e-3, 6000 * 0.09667e-3], rel=1e-3)


def test_options_override_file():
    # --object-to-background-m 1 replaces the file's Z_D, Z_A = 1 m kept: TABLE_3_1 row 3 (computed) 25.64 mm/rad
    out = _json([str(EXAMPLE), "--object-to-background-m", "1.0"])
    assert out["sensitivity_mm_per_rad"] == pytest.approx(25.64, rel=1e-3)
    assert out["z_a_m"] == pytest.approx(1.0)
    # a camera-to-background option drops the file's least specific distance first (Z_D)
    out = _json([str(EXAMPLE), "--camera-to-background-m", "3.0"])
    assert out["z_b_m"] == pytest.approx(3.0) and out["z_a_m"] == pytest.approx(1.0)
    # TABLE_3_1 row 4 (computed) entirely from options on top of the file: f = 100 mm, 2 m + 1 m, N = 11 -> 34.48 mm/rad
    out = _json([str(EXAMPLE), "--focal-length-mm", "100", "--camera-to-object-m", "2",
                 "--object-to-background-m", "1", "--f-number", "11"])
    assert out["sensitivity_mm_per_rad"] == pytest.approx(34.48, rel=1e-3)
    assert out["geometric_blur_px"] == pytest.approx(31.3, abs=0.05)


def test_solve_for_z_d_round_trip():
    out = _json([*FIRST, "--focal-length-mm", "200", "--target-dt-k", "5", "--solve-for", "z_d"])
    assert out["design"]["solve_for"] == "z_d"
    assert out["z_d_m"] == pytest.approx(out["design"]["value"])
    assert out["z_a_m"] == pytest.approx(1.0)  # Z_A held, the given Z_D was the starting point only
    assert out["min_temperature_difference_k"] == pytest.approx(5.0, rel=1e-6)


def test_solve_for_f_number_and_focal_length():
    # the file's target_dt_k = 30 K is replaced by the sound target given as an option
    out = _json([str(EXAMPLE), "--solve-for", "focal_length", "--target-spl-db", "150", "--frequency-hz", "40000",
                 "--source", "ultrasound"])
    assert out["min_spl_db"] == pytest.approx(150.0, abs=1e-6)
    assert out["focal_length_m"] == pytest.approx(out["design"]["value"])
    out = _json([str(EXAMPLE), "--solve-for", "f_number", "--max-blur-mm", "1.5"])
    assert out["object_blur_m"] == pytest.approx(1.5e-3, rel=1e-6) and 8 < out["f_number"] < 16


def test_chart_written(tmp_path):
    png = tmp_path / "chart.png"
    res = _run([*FIRST, "--chart", str(png)])
    assert res.exit_code == 0, res.output
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    img = iio.imread(png)
    assert img.ndim == 3 and img.shape[0] > 200 and img.shape[1] > 300
    assert not [p for p in tmp_path.iterdir() if p.name != "chart.png"]  # no temporary left behind
    res = _run([*FIRST, "--chart", str(tmp_path / "missing-dir" / "c.png")])
    assert res.exit_code == 2 and not (tmp_path / "missing-dir").exists()


@pytest.mark.parametrize("source,illum,freq,words", [
    ("ultrasound", "ambient", 40e3, ["Safety Code 24", "110 dB"]),
    ("plume", "strobe", 10.0, ["WCAG", "3-30 Hz"]),
    ("spark", "flash", None, ["lethal", "WCAG"]),
    ("gas-jet", "laser", None, ["IEC 60825-1", "oxygen"]),
    ("flame", "high-power-led", None, ["IEC 62471", "invisible flame"]),
])
def test_cautions_in_output(source, illum, freq, words):
    # WCAG 2.x SC 2.3.1, IEC 62471:2006, IEC 60825-1:2014, Health Canada Safety Code 24 (1991) /
    # Howard, Hansen & Zander (2004), J. Occup. Health Safety ANZ 21:253
    args = [*FIRST, "--source", source, "--illumination", illum]
    if freq is not None:
        args += ["--frequency-hz", str(freq)]
    text = " ".join(_json(args)["cautions"])
    for w in words:
        assert w in text, w
    assert "local codes" in text


def test_safety_module():
    # every kind the experiment-file schema accepts has cautions defined (the schema's
    # choices come from bos.safety, so a kind added there must be handled here)
    for kind in config.SCHEMA["source"]["kind"].choices:
        assert safety.cautions_for(kind, "ambient")[-1] == safety.DEFER
    for light in config.SCHEMA["source"]["illumination"].choices:
        assert safety.cautions_for("none", light)[-1] == safety.DEFER
    assert safety.cautions_for("none", "ambient") == [safety.DEFER]
    # flammable medium adds the fuel-gas caution even for a benign source
    assert any("H2 burns" in c for c in safety.cautions_for("plume", "led", gas="h2"))
    # Howard, Hansen & Zander (2004) consensus limit: 75 dB in the 20 kHz band
    assert any("75 dB (20 kHz band)" in c for c in safety.cautions_for("ultrasound", "led", frequency_hz=20e3))
    with pytest.raises(InputError, match="unknown source kind"):
        safety.cautions_for("volcano", "led")
    assert set(safety.all_cautions()) >= {"source: spark", "illumination: laser"}
    # docs/safety.md lists every caution text verbatim
    doc = (ROOT / "docs" / "safety.md").read_text()
    for texts in safety.all_cautions().values():
        for t in texts:
            assert t in doc


BAD = [
    (["--camera-to-background-m", "1", "--object-to-background-m", "1.5"], "Z_D"),  # Z_D >= Z_B
    (["--camera-to-object-m", "0"], "camera_to_object_m"),  # zero length
    (["--object-to-background-m", "-0.5"], "object_to_background_m"),  # negative
    (["--focal-length-mm", "0"], "focal_length_mm"),
    (["--f-number", "0.4"], "f_number"),
    (["--wavelength-nm", "250"], "wavelength_nm"),
    (["--wavelength-nm", "1800"], "wavelength_nm"),
    (["--gas", "unobtainium"], "unobtainium"),
    (["--source", "volcano"], "volcano"),
    (["--solve-for", "zoom"], "solve_for"),
    (["--sensor-px", "big"], "ROWSxCOLS"),
    (["--focal-length-mm", "2000"], "focal length"),  # object inside f
    (["--target-spl-db", "120", "--solve-for", "z_d"], "frequency"),
    (["--target-dt-k", "0.1", "--solve-for", "z_d"], "no Z_D"),
]


def _one_line_error(res, word):
    assert res.exit_code == 2, res.output
    err = res.stderr.strip()
    assert len(err.splitlines()) == 1 and err.startswith("error:"), err
    assert word in err, err
    assert "Traceback" not in res.output


@pytest.mark.parametrize("extra,word", BAD)
def test_bad_options(extra, word):
    # issue 2 "Bad input": one-line error naming the problem, exit 2, no traceback
    args = list(FIRST)
    if extra[0] in ("--camera-to-background-m",):
        args = args[:4] + args[8:]  # replace Z_A/Z_D by Z_B/Z_D
    _one_line_error(_run([*args, *extra]), word)


GEOMETRY_OPTS = FIRST[4:]  # Z_A, Z_D, width from options; camera from the file


@pytest.mark.parametrize("text,extra,word", [
    ("[camera\nfocal_length_mm = 50\n", FIRST, "not valid TOML"),
    ("[camera]\nfocal_length_mm = 50\nzoom = 3\n", FIRST, "zoom"),
    ("[lens]\nfocal_length_mm = 50\n", FIRST, "lens"),
    ("[camera]\nfocal_length_mm = 'fifty'\npixel_pitch_um = 5\n", GEOMETRY_OPTS, "focal_length_mm"),
    ("[camera]\nfocal_length_mm = 50\npixel_pitch_um = 5\n[geometry]\nobject_to_background_m = 2.0\n"
     "camera_to_background_m = 1.0\nobject_width_mm = 20\n", [], "Z_D"),
    ("[medium]\ngas = 'unobtainium'\n", FIRST, "unobtainium"),
])
def test_bad_files(tmp_path, text, extra, word):
    # malformed TOML, unknown keys / sections, wrong types, impossible geometry, unknown gas in a file
    f = tmp_path / "bad.toml"
    f.write_text(text)
    _one_line_error(_run([str(f), *extra]), word)


def test_missing_file_and_values(tmp_path):
    _one_line_error(_run([str(tmp_path / "nope.toml")]), "not found")
    _one_line_error(_run(FIRST[:-2]), "--object-width-mm")
    _one_line_error(_run(FIRST[2:]), "--focal-length-mm")


def test_defaults_are_marked_as_defaults():
    out = _json(FIRST)
    assert out["defaults_used"]["camera.f_number"] == 8.0        # the assumed f/8 is said, not silent
    assert out["defaults_used"]["plan.noise_px"] == pytest.approx(0.05)
    given = _json([*FIRST, "--f-number", "11", "--temperature-c", "25"])
    assert "camera.f_number" not in given["defaults_used"] and "medium.temperature_c" not in given["defaults_used"]
    text = _run(FIRST).stdout.replace("\n", " ")
    assert "defaults assumed" in text and "camera.f_number" in text


def test_blur_larger_than_the_smallest_feature_warns():
    out = _json([*FIRST, "--smallest-feature-mm", "0.01"])
    assert any("smallest feature" in w for w in out["warnings"])
    assert not any("smallest feature" in w for w in _json([*FIRST, "--smallest-feature-mm", "1000"])["warnings"])


def test_blur_against_the_acoustic_wavelength():
    # 40 kHz in air at 20 C: lambda = c/f = 343.2/40e3 = 8.58 mm (speed of sound of an ideal gas,
    # c = sqrt(gamma R T / M)); the warning states the amplitude a Gaussian blur keeps,
    # exp(-(2 pi sigma/lambda)^2/2) with sigma = FWHM/2.3548 (Goodman, Introduction to Fourier Optics)
    from bos.optics import gaussian_blur_transfer

    assert gaussian_blur_transfer(2.0, 8.0) == pytest.approx(
        __import__("math").exp(-0.5 * (2 * 3.141592653589793 * 2.0 / 2.354820045 / 8.0) ** 2), rel=1e-9)
    far = _json([*FIRST[:6], "--object-to-background-m", "3", "--object-width-mm", "20",
                 "--source", "ultrasound", "--frequency-hz", "40000"])
    blur = far["object_blur_m"]
    warn = [w for w in far["warnings"] if "acoustic wavelength" in w]
    lam = far["speed_of_sound_m_s"] / 40e3
    assert lam == pytest.approx(8.58e-3, rel=2e-3)
    assert blur > 0.25 * lam and warn          # 4.7 mm blur at Z_D = 3 m, f/8
    assert f"{100 * gaussian_blur_transfer(blur, lam):.0f} %" in warn[0]
    near = _json([*FIRST, "--f-number", "22", "--source", "ultrasound", "--frequency-hz", "40000"])
    assert near["object_blur_m"] < 0.25 * lam
    assert not any("acoustic wavelength" in w for w in near["warnings"])
