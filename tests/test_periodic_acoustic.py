"""Phase-resolved sound fields end to end: rendered phase-stepped frames -> bos periodic.

Outside sources: the analytic complex pressure of a planar 40 kHz sound beam
(standing P = P0 cos(k x + theta) g(y) or travelling P = P0 exp(-i k x) g(y),
g(y) = exp(-(y/s)^2)), its exact deflection for a beam of depth W along the
line of sight, eps = (W K / n0) grad(rho'), rho' = p'/c^2 (linear acoustics,
Kinsler et al., Fundamentals of Acoustics, 2000; Gladstone-Dale), p_pk =
sqrt(2) 20 uPa 10^(L/20) (ISO 1683 reference pressure), and the nodes of
cos(k x + theta).  Frames are rendered with camera noise by bos.synthetic.
"""

from __future__ import annotations

import math
from pathlib import Path

import imageio.v3 as iio
import numpy as np
import pytest

from bos import config, synthetic
from bos import periodic_output as PO
from bos.media import Medium, spl_to_pressure_amplitude
from bos.optics import Rig

SHAPE = (128, 256)          # rows x cols: the beam runs along x
WIDTH_M = 0.05              # 50 mm deep beam along the line of sight
FREQ_HZ = 40e3
SIGMA_Y_M = 2.5e-3          # beam half-width (1/e) across the image
THETA = 0.6                 # spatial phase of the standing wave
RIG = Rig(focal_length_m=0.1, pixel_pitch_m=5e-6, f_number=11, z_a_m=2.0, z_d_m=4.0)
MEDIUM = Medium(temperature_k=293.15, pressure_pa=101325.0, wavelength_m=550e-9)
C = MEDIUM.speed_of_sound
K_WAVE = 2 * math.pi * FREQ_HZ / C
LAMBDA = C / FREQ_HZ


def pressure(kind, p0, y, x):
    g = np.exp(-(y / SIGMA_Y_M) ** 2)
    return p0 * np.cos(K_WAVE * x + THETA) * g if kind == "standing" else p0 * np.exp(-1j * K_WAVE * x) * g


def _gradient(kind, p0, y, x):
    g = np.exp(-(y / SIGMA_Y_M) ** 2)
    dg = -2 * y / SIGMA_Y_M**2 * g
    if kind == "standing":
        return p0 * np.cos(K_WAVE * x + THETA) * dg, -p0 * K_WAVE * np.sin(K_WAVE * x + THETA) * g
    e = np.exp(-1j * K_WAVE * x)
    return p0 * e * dg, -1j * K_WAVE * p0 * e * g


def render_frames(d: Path, *, shape, deflection_for_phase, phases_deg, seed: int, experiment: str,
                  noise_seed: int | None = None) -> None:
    """Reference + one frame per listed phase (16-bit PNG, camera noise), a phases CSV and an experiment file."""
    d.mkdir(parents=True, exist_ok=True)
    bg = synthetic.random_dots(shape=shape, dot_diameter_px=2.6, density=0.5, seed=seed, margin_px=20)

    def save(name, img):
        iio.imwrite(d / name, np.clip(np.round(img), 0, 65535).astype(np.uint16))

    noise_seed = seed if noise_seed is None else noise_seed
    save("ref.png", synthetic.render(bg, seed=noise_seed + 1000, bit_depth=16))
    rows = ["frame,phase_deg"]
    for j, ph in enumerate(phases_deg):
        disp = synthetic.displacement_from_field(deflection_for_phase(ph), rig=RIG, shape=shape)
        save(f"frame{j:03d}.png", synthetic.render(bg, displacement=disp, seed=noise_seed + 2000 + j, bit_depth=16))
        rows.append(f"frame{j:03d}.png,{ph:.6f}")
    (d / "phases.csv").write_text("\n".join(rows) + "\n")
    (d / "exp.toml").write_text(experiment)


def render_sequence(d: Path, *, kind: str, spl_db: float, phases_deg, seed: int = 5,
                    noise_seed: int | None = None) -> dict:
    """The planar beam (depth WIDTH_M along the line of sight) at the listed source phases."""
    p0 = float(spl_to_pressure_amplitude(spl_db))
    f = WIDTH_M * MEDIUM.gladstone_dale / MEDIUM.ambient_index / C**2

    def deflection_for_phase(ph):
        rot = np.exp(1j * np.deg2rad(ph))

        def deflection(y, x):
            gy, gx = _gradient(kind, p0, y, x)
            return f * (gy * rot).real, f * (gx * rot).real

        return deflection

    render_frames(d, shape=SHAPE, deflection_for_phase=deflection_for_phase, phases_deg=phases_deg, seed=seed,
                  experiment=EXPERIMENT, noise_seed=noise_seed)
    return {"dir": d, "p0": p0, "kind": kind}


EXPERIMENT = f"""
[camera]
focal_length_mm = 100
pixel_pitch_um = 5
f_number = 11
wavelength_nm = 550
[geometry]
camera_to_object_m = 2.0
object_to_background_m = 4.0
object_width_mm = {WIDTH_M * 1e3}
[medium]
temperature_c = 20.0
[source]
kind = "ultrasound"
frequency_hz = {FREQ_HZ}
illumination = "strobe"
[images]
reference = "ref.png"
[processing]
window_px = 32
final_window_px = 12
passes = 3
camera_motion = "none"
[reconstruction]
kind = "planar"
reference_region = "top"
[output]
directory = "out"
name = "beam"
figures = false
"""


def _run(seq):
    exp = config.load_experiment(seq["dir"] / "exp.toml")
    return PO.run_periodic(exp, PO.frames_from_table(seq["dir"] / "phases.csv"))


@pytest.fixture(scope="module")
def standing_140(tmp_path_factory):
    seq = render_sequence(tmp_path_factory.mktemp("s140"), kind="standing", spl_db=140.0,
                          phases_deg=np.arange(8) * 45.0)
    return seq, _run(seq)


@pytest.fixture(scope="module")
def standing_130(tmp_path_factory):
    # 16 phases, the first 8 of them taken twice (repeated frames are averaged by the fit)
    phases = list(np.arange(16) * 22.5) + list(np.arange(8) * 22.5)
    seq = render_sequence(tmp_path_factory.mktemp("s130"), kind="standing", spl_db=130.0, phases_deg=phases, seed=9)
    return seq, _run(seq)


def _true_nodes():
    # cos(k x + theta) = 0  ->  x = (pi/2 - theta + n pi) / k
    n = np.arange(-10, 11)
    return (math.pi / 2 - THETA + n * math.pi) / K_WAVE


def _check_standing(seq, res, *, spl_db):
    s = res.summary
    assert s["wave_kind"] == "standing" and s["standing_wave_ratio"] > 10
    # displacement amplitude in the intended range (~0.1-0.3 px)
    assert 0.05 < s["peak_displacement_amplitude_px"] < 0.4
    x_span = (res.x_m[0] + LAMBDA / 4, res.x_m[-1] - LAMBDA / 4)
    expected = [x for x in _true_nodes() if x_span[0] < x < x_span[1]]
    found = [n["x_m"] for n in s["nodes"]]
    assert len(expected) >= 4
    for x in expected:  # every node inside the field found within 0.05 wavelength
        assert min(abs(np.array(found) - x)) < 0.05 * LAMBDA, (x, found)
    for n in s["nodes"]:  # and nothing spurious
        assert min(abs(np.array(_true_nodes()) - n["x_m"])) < 0.05 * LAMBDA
    assert len(s["antinodes"]) >= 3
    for a in s["antinodes"]:
        true_spl = 20 * math.log10(abs(pressure("standing", seq["p0"], a["y_m"], a["x_m"])) / math.sqrt(2) / 20e-6)
        assert a["spl_db"] == pytest.approx(true_spl, abs=1.0)
        assert true_spl == pytest.approx(spl_db, abs=0.3)  # antinodes sit on the crests


def test_standing_140db_8_phases(standing_140):
    seq, res = standing_140
    _check_standing(seq, res, spl_db=140.0)
    # whole map: complex pressure within 4 % rms of the peak (measured ~2 %: 16 px windows flatten the crests)
    yy, xx = np.meshgrid(res.y_m, res.x_m, indexing="ij")
    err = res.pressure.pressure - pressure("standing", seq["p0"], yy, xx)
    ok = np.isfinite(err)
    assert ok.mean() > 0.95
    assert np.sqrt(np.mean(np.abs(err[ok]) ** 2)) < 0.04 * seq["p0"]
    # a standing wave: phase 0 or pi (sign of cos) in the beam
    beam = res.pressure.amplitude > 0.5 * seq["p0"]
    sign = np.sign(np.cos(K_WAVE * xx + THETA))
    assert np.mean(np.sign(res.pressure.pressure.real[beam]) == sign[beam]) > 0.98
    assert res.summary["uncertainty_from"] == "residuals"
    assert res.summary["wavelength_measured_m"] == pytest.approx(LAMBDA, rel=0.03)


def test_standing_130db_16_phases_repeated(standing_130):
    seq, res = standing_130
    assert res.summary["frames"] == 24 and res.summary["distinct_phases"] == 16
    _check_standing(seq, res, spl_db=130.0)
    # the stated SPL uncertainty is small against the 1 dB criterion but not zero
    assert 0 < res.summary["median_spl_uncertainty_db_in_beam"] < 0.5


def test_travelling_wave_is_travelling(tmp_path):
    seq = render_sequence(tmp_path / "t", kind="travelling", spl_db=140.0, phases_deg=np.arange(6) * 60.0, seed=21)
    res = _run(seq)
    s = res.summary
    assert s["wave_kind"] == "travelling" and s["standing_wave_ratio"] < 1.5
    assert s["nodes"] == [] and s["antinodes"] == []
    # P = exp(-i k x): p = Re(P e^{i phi}) runs toward +x
    assert s["travel_direction"][0] == pytest.approx(1.0, abs=0.05)
    beam = res.pressure.amplitude > 0.5 * seq["p0"]
    assert np.nanmedian(res.reflection[beam]) < 0.2
    # phase falls along x at k = 2 pi f / c: slope of the unwrapped centre-row phase within 3 %
    row = int(np.argmax(np.nansum(res.pressure.amplitude, axis=1)))
    ph = np.unwrap(res.pressure.phase[row])
    assert np.polyfit(res.x_m, ph, 1)[0] == pytest.approx(-K_WAVE, rel=0.03)
    # SPL of a travelling wave is flat along the beam: 140 dB on the centre row within 1 dB
    assert np.nanmedian(res.pressure.spl_db[row]) == pytest.approx(
        140.0 + 20 * math.log10(math.exp(-(res.y_m[row] / SIGMA_Y_M) ** 2)), abs=1.0)


def test_axisymmetric_standing_column(tmp_path):
    # a levitator-like column: P = P0 cos(k y + theta) exp(-(r/s)^2) about a vertical axis; its line-of-sight
    # integral is P0 cos(k y + theta) s sqrt(pi) exp(-(x/s)^2) (Gaussian Abel projection), so
    # eps = (K / (n0 c^2)) grad of that (exact); reconstructed by Abel inversion of each part
    shape, s_m, spl_db = (256, 192), 4e-3, 150.0
    p0 = float(spl_to_pressure_amplitude(spl_db))
    f = MEDIUM.gladstone_dale / MEDIUM.ambient_index / C**2 * s_m * math.sqrt(math.pi)

    def deflection_for_phase(ph):
        a = p0 * math.cos(math.radians(ph))  # standing wave: Re(P e^{i phi}) = P cos(phi)

        def deflection(y, x):
            g = np.exp(-(x / s_m) ** 2)
            return (f * a * -K_WAVE * np.sin(K_WAVE * y + THETA) * g,
                    f * a * np.cos(K_WAVE * y + THETA) * (-2 * x / s_m**2) * g)

        return deflection

    exp_text = EXPERIMENT.replace('kind = "planar"\nreference_region = "top"',
                                  'kind = "axisymmetric"\naxis = "vertical"\naxis_px = 95.5')
    render_frames(tmp_path, shape=shape, deflection_for_phase=deflection_for_phase, phases_deg=np.arange(8) * 45.0,
                  seed=41, experiment=exp_text)
    res = _run({"dir": tmp_path})
    s = res.summary
    assert s["wave_kind"] == "standing"
    # the beam axis is found (vertical profile through x = 0) and every node lies within 0.05 wavelength
    (x0, y0), (x1, y1) = s["profile_m"]
    assert abs(x1 - x0) < 0.02 * abs(y1 - y0) and abs(x0) < 0.3e-3
    nodes = [n["y_m"] for n in s["nodes"]]
    expected = [y for y in _true_nodes() if res.y_m[0] + LAMBDA / 4 < y < res.y_m[-1] - LAMBDA / 4]
    assert len(expected) >= 4
    for y in expected:
        assert min(abs(np.array(nodes) - y)) < 0.05 * LAMBDA
    for a in s["antinodes"]:  # on the axis the antinodes are at the full level
        true_spl = 20 * math.log10(abs(p0 * math.cos(K_WAVE * a["y_m"] + THETA)) / math.sqrt(2) / 20e-6)
        assert a["spl_db"] == pytest.approx(true_spl, abs=1.0)
    assert len(s["antinodes"]) >= 3


def test_stated_uncertainty_matches_the_scatter_between_noise_realisations(tmp_path):
    # same background and sound field, independent camera noise: the difference of the two complex
    # pressures holds only the random error, whose size the stated 1-sigma values claim
    runs = [_run(render_sequence(tmp_path / f"n{k}", kind="standing", spl_db=140.0, phases_deg=np.arange(6) * 60.0,
                                 seed=13, noise_seed=100 * k)) for k in (1, 2)]
    a, b = (r.pressure for r in runs)
    for part in ("real", "imag"):
        diff = getattr(a.pressure, part) - getattr(b.pressure, part)
        sig = np.hypot(getattr(a, f"sigma_{part}"), getattr(b, f"sigma_{part}"))
        z = (diff / sig)[np.isfinite(diff / sig)]
        # rms of the normalised difference ~1 if the stated sigma is right (bounds: factor 2 either way)
        assert 0.5 < np.sqrt(np.mean(z**2)) < 2.0, (part, np.sqrt(np.mean(z**2)))
