"""A sound beam end to end: rendered pair -> bos run pipeline -> acoustic pressure.

Outside source: the analytic density field of a planar (spanwise-uniform)
sound beam rho' = A sin(k x) exp(-(x^2 + y^2)/s^2), its exact deflection
eps = (W K / n0) grad rho' (planar form of eps = (1/n0) int grad n dz,
Exp. Fluids (2019) doi:10.1007/s00348-019-2865-4, Eq. 1, with n - 1 = K rho),
and linear acoustics p' = c^2 rho' (textbook relation, from memory).  The pair is
rendered analytically by bos.synthetic.
"""

from __future__ import annotations

import imageio.v3 as iio
import numpy as np
import pytest

from bos import config, pipeline, synthetic
from bos.media import Medium, spl_to_pressure_amplitude
from bos.optics import Rig

SHAPE = (256, 384)
WIDTH_M = 0.10           # beam width along the line of sight
FREQ_HZ = 40e3
SPL_DB = 155.0           # peak of the beam
# long Z_D for sensitivity (sound fields are weak: ~0.14 px at 140 dB, 40 kHz on a 17 mm/rad rig,
# computed from linear acoustics)
RIG = Rig(focal_length_m=0.1, pixel_pitch_m=5e-6, f_number=11, z_a_m=1.0, z_d_m=2.0)
MEDIUM = Medium(temperature_k=293.15, pressure_pa=101325.0, wavelength_m=550e-9)


def _field():
    c = MEDIUM.speed_of_sound
    k = 2 * np.pi * FREQ_HZ / c
    p_pk = float(spl_to_pressure_amplitude(SPL_DB))
    rho_pk = p_pk / c**2
    s = 9e-3
    K, n0 = MEDIUM.gladstone_dale, MEDIUM.ambient_index

    def rho_prime(y, x):
        return rho_pk * np.sin(k * x) * np.exp(-(x**2 + y**2) / s**2)

    def deflection(y, x):
        env = np.exp(-(x**2 + y**2) / s**2)
        drho_dx = rho_pk * env * (k * np.cos(k * x) - 2 * x / s**2 * np.sin(k * x))
        drho_dy = rho_pk * np.sin(k * x) * env * (-2 * y / s**2)
        f = WIDTH_M * K / n0
        return f * drho_dy, f * drho_dx

    return rho_prime, deflection, p_pk


@pytest.fixture(scope="module")
def acoustic_run(tmp_path_factory):
    d = tmp_path_factory.mktemp("sound")
    rho_prime, deflection, p_pk = _field()
    disp = synthetic.displacement_from_field(deflection, rig=RIG, shape=SHAPE)
    pair = synthetic.render_pair(shape=SHAPE, displacement=disp, seed=11, bit_depth=16, dot_diameter_px=2.6)
    for name, img in (("ref.png", pair.reference), ("meas.png", pair.measurement)):
        iio.imwrite(d / name, np.clip(np.round(img), 0, 65535).astype(np.uint16))
    exp = config.experiment_from_dict({
        "camera": {"focal_length_mm": 100, "pixel_pitch_um": 5, "f_number": 11, "wavelength_nm": 550},
        "geometry": {"camera_to_object_m": 1.0, "object_to_background_m": 2.0, "object_width_mm": WIDTH_M * 1e3},
        "medium": {"temperature_c": 20.0},
        "source": {"kind": "ultrasound", "frequency_hz": FREQ_HZ, "illumination": "led"},
        "images": {"reference": "ref.png", "measurement": "meas.png"},
        "processing": {"window_px": 32, "final_window_px": 12, "passes": 2, "camera_motion": "none"},
        "reconstruction": {"kind": "planar", "reference_region": "edges", "weighted": False},
        "output": {"directory": "out", "figures": False},
    }, base_dir=d)
    return pipeline.run_experiment(exp), rho_prime, p_pk


def test_acoustic_pressure_matches_the_analytic_beam(acoustic_run):
    result, rho_prime, p_pk = acoustic_run
    ac = result.acoustic
    assert ac is not None
    yy, xx = np.meshgrid(result.y_m, result.x_m, indexing="ij")
    p_true = MEDIUM.speed_of_sound**2 * rho_prime(yy, xx)
    err = ac.pressure_pa - p_true
    ok = np.isfinite(err)
    # measured: rms 0.3 % of the peak, peak 6 % low (12 px windows average over ~1/7 of the
    # 8.6 mm wavelength, flattening the crests); bounds: rms 2 %, peak 8 %, SPL 0.7 dB
    assert np.sqrt(np.mean(err[ok] ** 2)) < 0.02 * p_pk
    assert ac.peak_pressure_pa == pytest.approx(p_pk, rel=0.08)
    assert result.summary["peak_sound_pressure_level_db"] == pytest.approx(SPL_DB, abs=0.7)
    # isentropic temperature follows pressure: T' = ((gamma-1)/gamma) T p'/p0 (linear acoustics, from memory)
    t_prime = ac.temperature_k - MEDIUM.temperature_k
    expected = (MEDIUM.gamma - 1) / MEDIUM.gamma * MEDIUM.temperature_k * ac.pressure_pa / MEDIUM.pressure_pa
    assert np.allclose(t_prime[ok], expected[ok], rtol=1e-9, atol=1e-12)


def test_acoustic_variables_are_written(acoustic_run):
    result, _, _ = acoustic_run
    _, variables = pipeline.result_variables(result)
    assert variables["acoustic_pressure"]["attrs"]["units"] == "Pa"
    assert "isentropic" in variables["temperature"]["attrs"]["long_name"]
