"""Strobe planning, phase assignment and the lock-in fit (bos.periodic).

Outside sources: the sinc factor of a rectangular average (Bracewell, The
Fourier Transform and Its Applications, 2000) evaluated independently with
scipy quadrature and against the published values below; aliasing
f_app = f_s - round(f_s/f_r) f_r (Shannon 1949); least-squares sine fitting
with known frequency (IEEE Std 1057-2017) checked against numpy.linalg.lstsq
and against the analytic noise law sigma sqrt(2/N).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from bos import periodic as P
from bos.errors import InputError
from bos.media import Medium
from bos.optics import Rig

# sinc(pi f tau) for a rectangular pulse; values computed from the closed form
# sin(x)/x (e.g. 40 kHz, 12.5 us -> 2/pi)
SINC = {
    (20e3, 0.5e-6): 0.99984, (20e3, 1e-6): 0.99934, (20e3, 2e-6): 0.99737, (20e3, 5e-6): 0.98363,
    (20e3, 10e-6): 0.93549, (20e3, 12.5e-6): 0.90032, (20e3, 25e-6): 0.63662,
    (40e3, 0.5e-6): 0.99934, (40e3, 1e-6): 0.99737, (40e3, 2e-6): 0.98951, (40e3, 5e-6): 0.93549,
    (40e3, 10e-6): 0.75683, (40e3, 12.5e-6): 2 / math.pi, (40e3, 25e-6): 0.0,
}


@pytest.mark.parametrize(("f", "tau"), list(SINC))
def test_pulse_contrast_table(f, tau):
    # tabulated to 5 decimals: agreement to 5e-6 (= half the last digit), exact cases to 1e-12
    tol = 1e-12 if SINC[(f, tau)] in (0.0, 2 / math.pi) else 5e-6
    assert P.pulse_contrast(f, tau) == pytest.approx(SINC[(f, tau)], abs=tol)


def test_pulse_contrast_equals_the_average_of_a_sine_over_the_pulse():
    from scipy.integrate import quad

    f, tau = 40e3, 7.3e-6
    # average of cos(2 pi f (t0 + t)) over the pulse, as the amplitude of a sine seen through it
    re = quad(lambda t: math.cos(2 * math.pi * f * t), -tau / 2, tau / 2)[0] / tau
    assert P.pulse_contrast(f, tau) == pytest.approx(re, abs=1e-12)


def test_longest_pulse_for_contrast():
    # 40 kHz: 1.95 / 4.39 / 6.26 / 15.08 us for 99 / 95 / 90 / 50 % (f tau = 0.078 / 0.176 / 0.250 / 0.603)
    taus = [P.longest_pulse_for_contrast(40e3, c) for c in (0.99, 0.95, 0.90, 0.50)]
    assert [t * 1e6 for t in taus] == pytest.approx([1.95, 4.39, 6.26, 15.08], abs=0.005)
    assert [t * 40e3 for t in taus] == pytest.approx([0.078, 0.176, 0.250, 0.603], abs=0.0005)
    # self-consistency to 1e-9: the sinc at the returned pulse is the asked contrast
    for c, t in zip((0.99, 0.95, 0.90, 0.50), taus):
        assert P.pulse_contrast(40e3, t) == pytest.approx(c, abs=1e-9)
    with pytest.raises(InputError):
        P.longest_pulse_for_contrast(40e3, 1.0)


@pytest.mark.parametrize(("fs", "fr", "f_app", "step", "per_cycle"), [
    (40e3, 1000.0, 0.0, 0.0, math.inf),         # frozen
    (40e3, 999.0, 40.0, 14.41441, 24.975),     # +40 Hz, 14.41 deg, 24.98 frames per cycle
    (40e3, 1001.0, -40.0, -14.38561, 25.025),  # -40 Hz: appears to run backwards
    (40.010e3, 1000.0, 10.0, 3.6, 100.0),      # +10 Hz, 3.6 deg per frame
])
def test_aliasing_examples(fs, fr, f_app, step, per_cycle):
    a = P.aliasing(fs, fr)
    assert a.apparent_frequency_hz == pytest.approx(f_app, abs=1e-5)
    assert a.phase_step_deg == pytest.approx(step, abs=1e-5)
    assert a.frames_per_apparent_cycle == pytest.approx(per_cycle, rel=1e-5)
    assert a.frozen == (f_app == 0.0)
    assert not a.direction_ambiguous


def test_aliasing_half_rate_is_ambiguous():
    # f_s/f_r = 40.5: the apparent frequency sits at +-f_r/2
    a = P.aliasing(40.5e3, 1000.0)
    assert a.direction_ambiguous and a.near_half_rate
    assert abs(a.apparent_frequency_hz) == pytest.approx(500.0, abs=1e-9)
    assert abs(a.phase_step_deg) == pytest.approx(180.0, abs=1e-9)
    assert not P.aliasing(40.3e3, 1000.0).near_half_rate


@pytest.mark.parametrize(("n", "dt_us"), [(4, 6.25), (8, 3.125), (16, 1.5625), (36, 0.694444)])
def test_delay_schedule(n, dt_us):
    # delta t = 1 / (N f_s) at 40 kHz
    s = P.delay_schedule(40e3, n)
    assert s["delay_step_s"] * 1e6 == pytest.approx(dt_us, abs=1e-5)
    assert len(s["delays_s"]) == n and s["delays_s"][-1] == pytest.approx((n - 1) / (n * 40e3), rel=1e-12)
    assert s["phases_deg"][1] == pytest.approx(360.0 / n)
    with pytest.raises(InputError):
        P.delay_schedule(40e3, 2)


def test_phases_from_frame_rate_follow_time_stamps():
    # frame j at t = j / f_r: phase 2 pi frac(f_s t) computed independently in exact rationals
    from fractions import Fraction

    ph = P.phases_from_frame_rate(30, frequency_hz=40e3, frame_rate_hz=999.0)
    exact = [float(2 * math.pi * (Fraction(40000 * j, 999) % 1)) for j in range(30)]
    assert ph == pytest.approx(exact, abs=1e-12)
    assert np.rad2deg(ph[1]) == pytest.approx(14.41441, abs=1e-5)
    assert P.phases_from_timestamps(np.arange(30) / 999.0, frequency_hz=40e3) == pytest.approx(exact, abs=1e-9)
    with pytest.raises(InputError, match="locks to the source"):
        P.phases_from_frame_rate(10, frequency_hz=40e3, frame_rate_hz=1000.0)


def test_check_phases_needs_three_distinct():
    with pytest.raises(InputError, match="2 distinct phase"):
        P.check_phases(np.deg2rad([0, 180, 0, 180]))
    assert P.check_phases(np.deg2rad([0, 120, 240, 360, 120])) == 3  # 360 wraps onto 0
    with pytest.raises(InputError):
        P.check_phases(np.deg2rad([0, 72, 144, 216]), harmonics=2)


def test_lockin_matches_lstsq_and_noise_law():
    rng = np.random.default_rng(3)
    n, npx = 16, 4000
    phi = np.repeat(np.arange(8) * 2 * np.pi / 8, 2)  # 8 phases, each twice
    a, b, m = rng.normal(size=npx), rng.normal(size=npx), rng.normal(size=npx)
    sigma = 0.05
    x = m + a * np.cos(phi)[:, None] - b * np.sin(phi)[:, None] + rng.normal(scale=sigma, size=(n, npx))
    fit = P.lockin_fit(x, phi)
    # the same least-squares problem solved by numpy.linalg.lstsq
    design = np.column_stack([np.ones(n), np.cos(phi), -np.sin(phi)])
    ref = np.linalg.lstsq(design, x, rcond=None)[0]
    assert fit.mean == pytest.approx(ref[0], abs=1e-12)
    assert fit.first.real == pytest.approx(ref[1], abs=1e-12)
    assert fit.first.imag == pytest.approx(ref[2], abs=1e-12)
    # each quadrature component has sigma sqrt(2/N): mean of the estimates within 3 %
    assert np.mean(fit.sigma_real) == pytest.approx(sigma * math.sqrt(2 / n), rel=0.03)
    assert np.std(fit.first.real - a) == pytest.approx(sigma * math.sqrt(2 / n), rel=0.05)
    assert fit.uncertainty_source == "residuals"


def test_lockin_missing_values_and_harmonics():
    phi = np.arange(10) * 2 * np.pi / 10
    x = (1.0 + 0.3 * np.cos(phi - 0.4) + 0.1 * np.cos(2 * phi + 1.0))[:, None] * np.ones((1, 3))
    x[2, 1] = np.nan      # one missing frame: fitted on the other 9
    x[:8, 2] = np.nan     # only 2 frames left: no fit
    fit = P.lockin_fit(x, phi, harmonics=2)
    assert fit.first[:2] == pytest.approx(0.3 * np.exp(-0.4j) * np.ones(2), abs=1e-12)
    assert fit.amplitude[1, :2] == pytest.approx(0.1 * np.exp(1.0j) * np.ones(2), abs=1e-12)
    assert np.isnan(fit.first[2]) and fit.n_frames.tolist() == [10, 9, 2]
    with pytest.raises(InputError, match="counts must match"):
        P.lockin_fit(x[:5], phi)


def test_amplitude_phase_uncertainty_by_monte_carlo():
    rng = np.random.default_rng(0)
    z, sr, si = 0.8 * np.exp(0.7j), 0.02, 0.03
    draws = z + rng.normal(scale=sr, size=200000) + 1j * rng.normal(scale=si, size=200000)
    _, s_mag, _, s_ph = P.amplitude_phase(z, sr, si)
    assert float(s_mag) == pytest.approx(np.std(np.abs(draws)), rel=0.02)
    assert float(s_ph) == pytest.approx(np.std(np.angle(draws)), rel=0.02)


def test_signal_and_frames_for_a_sound_level():
    # 140 dB at 40 kHz across 0.1 m on the rig f = 50 mm, Z_A = 1 m, Z_D = 0.5 m, 5 um pixels
    # (S = M Z_D = 17.2 mm/rad, thin-lens geometry): linear acoustics (Kinsler et al., Fundamentals of
    # Acoustics, 2000) p_pk = sqrt(2) 20 uPa 10^(L/20), n' = K p'/c^2, eps = L k n'/n0 -> about 0.14 px
    rig = Rig(focal_length_m=0.05, pixel_pitch_m=5e-6, f_number=8, z_a_m=1.0, z_d_m=0.5)
    medium = Medium(wavelength_m=632.8e-9)
    amp = P.displacement_amplitude_px(140.0, rig=rig, medium=medium, frequency_hz=40e3, path_m=0.1)
    c, p_pk = medium.speed_of_sound, math.sqrt(2) * 20e-6 * 10 ** 7
    eps = 0.1 * (2 * math.pi * 40e3 / c) * medium.gladstone_dale * p_pk / c**2 / medium.ambient_index
    s_px = 0.05 / (1.5 - 0.05) * 0.5 / 5e-6
    assert amp == pytest.approx(eps * s_px, rel=1e-9)
    assert amp == pytest.approx(0.14, abs=0.01)
    # N >= 2 (sigma / A)^2
    assert P.frames_for_spl(0.01, noise_px=0.05) == 50
    assert P.frames_for_spl(1.0, noise_px=0.05) == 3
    plan = P.plan_strobe(frequency_hz=40e3, pulse_width_s=12.5e-6, medium=medium, rig=rig, path_m=0.1,
                         spl_db=140.0, target_spl_db=120.0, phase_steps=16)
    assert plan.signal["displacement_amplitude_px"] == pytest.approx(amp * 2 / math.pi, rel=1e-12)
    assert plan.signal["spl_uncertainty_db"] == pytest.approx(
        20 / math.log(10) * 0.05 * math.sqrt(2 / 16) / (amp * 2 / math.pi), rel=1e-12)
    assert plan.signal["frames_for_target"] == math.ceil(2 * (0.05 / (amp * 2 / math.pi / 10)) ** 2)
