"""``bos strobe`` through typer's CliRunner: JSON contract, table, cautions, bad input.

Outside sources as in tests/test_periodic.py: sinc(pi f tau) (Bracewell 2000),
aliasing (Shannon 1949), delay step 1/(N f).
"""

from __future__ import annotations

import json
import math

import pytest
from typer.testing import CliRunner

from bos import safety
from cli.app import get_app

RIG = ["--focal-length-mm", "50", "--pixel-pitch-um", "5", "--camera-to-object-m", "1",
       "--object-to-background-m", "0.5", "--object-width-mm", "100"]


def _run(args):
    return CliRunner().invoke(get_app(), ["strobe", *args])


def _json(args):
    res = _run([*args, "--json"])
    assert res.exit_code == 0, res.output
    return json.loads(res.stdout)


def test_json_holds_every_number():
    out = _json(["--frequency-hz", "40000", "--pulse-width-us", "5", "--frame-rate-hz", "999",
                 "--phase-steps", "16", *RIG, "--spl-db", "140", "--target-spl-db", "125",
                 "--spl-resolution-db", "0.1"])
    contrast = [k for k in out if "contrast" in k]
    assert "pulse_contrast" in contrast
    assert out["pulse_contrast"] == pytest.approx(0.93549, abs=5e-6)
    assert out["longest_pulse_s_for_contrast"]["95%"] * 1e6 == pytest.approx(4.39, abs=0.005)
    assert out["smear_fraction_of_wavelength"] == pytest.approx(0.2, abs=1e-12)
    assert out["smear_m"] == pytest.approx(out["speed_of_sound_m_s"] * 5e-6, rel=1e-12)
    assert out["aliasing"]["apparent_frequency_hz"] == pytest.approx(40.0, abs=1e-6)
    assert out["aliasing"]["phase_step_deg"] == pytest.approx(14.41441, abs=1e-5)
    assert out["phase_steps"]["delay_step_s"] == pytest.approx(1.5625e-6, abs=1e-12)
    assert len(out["phase_steps"]["delays_s"]) == 16
    sig = out["signal"]
    assert sig["displacement_amplitude_px"] > 0 and sig["frames_for_target"] >= 3
    assert sig["spl_uncertainty_db"] == pytest.approx(
        20 / math.log(10) * 0.05 * math.sqrt(2 / 16) / sig["displacement_amplitude_px"], rel=1e-9)
    # sigma_L = 20/ln10 * noise sqrt(2/N) / A <= 0.1 dB  ->  N = ceil(2 (8.686 * 0.05 / (A * 0.1))^2)
    a = sig["displacement_amplitude_px"]
    assert sig["frames_for_spl_resolution"] == math.ceil(2 * (20 / math.log(10) * 0.05 / (a * 0.1)) ** 2)
    # cautions: airborne ultrasound exposure and strobes, ending with the deferral to local rules
    text = " ".join(out["cautions"])
    assert "ultrasound" in text and "photosensitiv" in text.lower()
    assert out["cautions"][-1] == safety.DEFER


def test_locked_and_ambiguous_rates_are_flagged():
    frozen = _json(["--frequency-hz", "40000", "--pulse-width-us", "1", "--frame-rate-hz", "1000"])
    assert frozen["aliasing"]["frozen"] and any("locks" in w for w in frozen["warnings"])
    amb = _json(["--frequency-hz", "40500", "--pulse-width-us", "1", "--frame-rate-hz", "1000"])
    assert amb["aliasing"]["direction_ambiguous"] and any("ambiguous" in w for w in amb["warnings"])
    # a strobe flashing at 10 Hz: inside the 3-30 Hz photosensitive band (WCAG 2.x SC 2.3.1)
    slow = _json(["--frequency-hz", "40010", "--pulse-width-us", "1", "--frame-rate-hz", "10"])
    assert any("3-30 Hz" in c for c in slow["cautions"])


def test_table_output():
    res = _run(["--frequency-hz", "40000", "--pulse-width-us", "25", "--phase-steps", "4"])
    assert res.exit_code == 0, res.output
    assert "0.00000" in res.stdout and "6.25 µs" in res.stdout and "caution:" in res.stdout


@pytest.mark.parametrize("args", [
    ["--pulse-width-us", "1"],                                   # no frequency
    ["--frequency-hz", "40000"],                                 # no pulse width
    ["--frequency-hz", "-5", "--pulse-width-us", "1"],
    ["--frequency-hz", "40000", "--pulse-width-us", "1", "--phase-steps", "2"],
    ["--frequency-hz", "40000", "--pulse-width-us", "1", "--spl-db", "140"],   # no rig
])
def test_bad_input_one_line_exit_2(args):
    res = _run(args)
    assert res.exit_code == 2, res.output
    assert len(res.stderr.strip().splitlines()) == 1 and res.stderr.startswith("error:")


def test_experiment_file_supplies_source_rig_and_illumination(tmp_path):
    exp = tmp_path / "exp.toml"
    exp.write_text("""
[camera]
focal_length_mm = 50
pixel_pitch_um = 5
[geometry]
camera_to_object_m = 1.0
object_to_background_m = 0.5
object_width_mm = 100
[source]
kind = "ultrasound"
illumination = "laser"
frequency_hz = 40000
[plan]
target_spl_db = 130
""")
    out = _json([str(exp), "--pulse-width-us", "12.5", "--spl-db", "140"])
    assert out["frequency_hz"] == 40000 and out["pulse_contrast"] == pytest.approx(2 / math.pi, abs=1e-12)
    assert out["signal"]["target_spl_db"] == 130 and out["signal"]["frames_for_target"] >= 3
    # the file's laser gets its own caution next to the strobe and ultrasound ones (IEC 60825-1)
    assert any("IEC 60825-1" in c for c in out["cautions"]) and out["cautions"][-1] == safety.DEFER
    # an option overrides the file
    assert _json([str(exp), "--pulse-width-us", "1", "--frequency-hz", "20000"])["frequency_hz"] == 20000
