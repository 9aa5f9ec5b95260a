"""Tests of bos.optics: rig geometry, planning figures and inverse design.

Outside sources are named beside each check (a published paper or book, an
analytic result, values computed outside the project with numpy/CoolProp, or
common practice; "from memory" marks citations not checked against the
original).
"""

from __future__ import annotations

import math
import types

import numpy as np
import pytest

from bos.errors import GeometryError, InputError
from bos.media import Medium
from bos.optics import (
    Rig,
    deflection_from_sound_level,
    deflection_from_temperature_difference,
    design_for_target,
    plan,
    sound_level_from_deflection,
    temperature_difference_from_deflection,
    target_deflection,
    z_d_sweep,
)

# BOS geometry check values (lambda = 550 nm), computed outside the project with numpy from the
# thin-lens relations of Raffel (2015), Exp. Fluids 56:60 and Exp. Fluids (2019)
# doi:10.1007/s00348-019-2865-4, Eq. 1 (blur: aperture-cone geometry; diffraction spot
# 2.44 N (1 + M) lambda, Raffel et al. 2018, PIV -- A Practical Guide, from memory).
# Values exactly as printed there:
# f [mm], Z_A [m], Z_D [m], N, pixel [um] | M, S [mm/rad], delta_obj [mm], d_i [px], d_d [px],
# eps_min at 0.1 px [urad], eps_min at 0.02 px [urad]
TABLE_3_1 = [
    ((50, 1.0, 0.5, 8, 5.0), ("0.03448", "17.24", "2.08", "21.6", "2.2", "29.0", "5.8")),
    ((50, 1.0, 0.5, 16, 5.0), ("0.03448", "17.24", "1.04", "10.8", "4.4", "29.0", "5.8")),
    ((50, 1.0, 1.0, 8, 5.0), ("0.02564", "25.64", "3.13", "32.1", "2.2", "19.5", "3.9")),
    ((100, 2.0, 1.0, 11, 5.0), ("0.03448", "34.48", "3.03", "31.3", "3.1", "14.5", "2.9")),
    ((200, 3.0, 3.0, 16, 6.5), ("0.03448", "103.4", "6.25", "66.3", "3.4", "6.3", "1.26")),
]


def _rig(f_mm=50, za=1.0, zd=0.5, n=8, pix_um=5.0, **kw):
    return Rig(focal_length_m=f_mm * 1e-3, pixel_pitch_m=pix_um * 1e-6, f_number=n, z_a_m=za, z_d_m=zd, **kw)


def _printed_tol(text: str) -> float:
    """Half a unit in the last printed digit (the table's own precision)."""
    decimals = len(text.split(".")[1]) if "." in text else 0
    return 0.5 * 10.0 ** (-decimals)


@pytest.mark.parametrize("inputs,expected", TABLE_3_1)
def test_table_3_1(inputs, expected):
    # TABLE_3_1 (computed geometry check values, see above): every column, every row.  Tolerance: 0.1 %
    # or, where the table prints fewer digits, half a unit in its last digit.
    f_mm, za, zd, n, pix = inputs
    r = _rig(f_mm, za, zd, n, pix)
    got = (
        r.magnification,
        r.sensitivity_m_per_rad * 1e3,
        r.object_blur_m * 1e3,
        r.geometric_blur_px,
        r.diffraction_blur_px,
        0.1 / r.sensitivity_px_per_rad * 1e6,
        0.02 / r.sensitivity_px_per_rad * 1e6,
    )
    for value, text in zip(got, expected):
        ref = float(text)
        assert abs(value - ref) <= max(1e-3 * ref, _printed_tol(text)), (text, value)


def test_done_when_sensitivity():
    # issue 2 "Done when" and TABLE_3_1 row 1 (computed check values): 17.24 mm/rad, 3448 px/rad
    r = _rig()
    assert r.sensitivity_m_per_rad == pytest.approx(17.24e-3, rel=1e-3)
    assert r.sensitivity_px_per_rad == pytest.approx(3448, rel=1e-3)


def test_thin_lens_imaging():
    # analytic thin-lens equation 1/f = 1/Z_B + 1/z_i; M = z_i/Z_B (Raffel 2015, Exp. Fluids 56:60)
    r = _rig(85, 1.3, 0.7, 5.6, 4.3, sensor_px=(3000, 4000))
    assert 1 / r.focal_length_m == pytest.approx(1 / r.z_b + 1 / r.image_distance_m, rel=1e-12)
    assert r.magnification == pytest.approx(r.image_distance_m / r.z_b, rel=1e-12)
    # object-plane pixel = pitch Z_A / z_i (docs/architecture.md); a pixel on the background is pitch / M
    assert r.object_pixel_m == pytest.approx(4.3e-6 * 1.3 / r.image_distance_m, rel=1e-12)
    assert r.background_pixel_m == pytest.approx(4.3e-6 * 2.0 / r.image_distance_m, rel=1e-12)
    assert r.field_of_view_m == pytest.approx((3000 * r.object_pixel_m, 4000 * r.object_pixel_m))
    # geometric blur on the sensor = object-plane cone x object magnification (aperture-cone geometry, derived by hand)
    assert r.geometric_blur_px * r.object_pixel_m == pytest.approx(r.object_blur_m, rel=1e-12)


def test_two_distances_define_the_third():
    # Z_B = Z_A + Z_D (symbols of Raffel 2015, Exp. Fluids 56:60)
    a = _rig(za=1.2, zd=0.8)
    b = Rig(focal_length_m=0.05, pixel_pitch_m=5e-6, f_number=8, z_b_m=2.0, z_d_m=0.8)
    c = Rig(focal_length_m=0.05, pixel_pitch_m=5e-6, f_number=8, z_b_m=2.0, z_a_m=1.2)
    for r in (a, b, c):
        assert (r.z_a, r.z_b, r.z_d) == pytest.approx((1.2, 2.0, 0.8), rel=1e-12)
        assert r.sensitivity_m_per_rad == pytest.approx(a.sensitivity_m_per_rad, rel=1e-12)


BAD_RIGS = [
    (dict(z_b_m=1.0, z_d_m=1.0), "Z_D"),  # Z_D >= Z_B
    (dict(z_b_m=1.0, z_d_m=1.5), "Z_D"),
    (dict(z_a_m=0.0, z_d_m=0.5), "Z_A"),  # zero length
    (dict(z_a_m=1.0, z_d_m=-0.5), "Z_D"),  # negative length
    (dict(z_a_m=1.0, z_d_m=0.5, focal_length_m=0.0), "focal length"),
    (dict(z_a_m=1.0, z_d_m=0.5, pixel_pitch_m=-5e-6), "pixel pitch"),
    (dict(z_a_m=1.0, z_d_m=0.5, pixel_pitch_m=5.0), "pixel pitch"),  # unit slip (metres)
    (dict(z_a_m=0.04, z_d_m=0.5), "focal length"),  # object inside f
    (dict(z_a_m=1.0, z_d_m=0.5, f_number=0.4), "f-number"),
    (dict(z_a_m=1.0, z_d_m=0.5, wavelength_m=250e-9), "wavelength"),
    (dict(z_a_m=1.0, z_d_m=0.5, wavelength_m=1800e-9), "wavelength"),
    (dict(z_a_m=1.0), "exactly two"),
    (dict(z_a_m=1.0, z_b_m=1.5, z_d_m=0.5), "exactly two"),
    (dict(z_a_m=1.0, z_d_m=0.5, sensor_px=(0, 100)), "sensor"),
    (dict(z_a_m=1.0, z_d_m=float("nan")), "Z_D"),
]


@pytest.mark.parametrize("kw,word", BAD_RIGS)
def test_impossible_geometry(kw, word):
    # issue 2 "Bad input": impossible geometry -> GeometryError, one line naming the problem
    args = dict(focal_length_m=0.05, pixel_pitch_m=5e-6, f_number=8.0) | kw
    with pytest.raises(GeometryError) as exc:
        Rig(**args)
    msg = str(exc.value)
    assert word in msg and "\n" not in msg


# --- acoustics ----------------------------------------------------------------------------------

# Sound amplitude check values, computed outside the project with numpy/CoolProp 8.0.0 from linear
# acoustics (p' = c^2 rho', SPL re 20 uPa, eps = L k n'; textbook relations, from memory):
# SPL -> eps_pk for L = 0.1 m, 40 kHz, 20 degC dry air, with K(632.8 nm) = 2.25642e-4 m^3/kg
# (Ciddor 1996, Appl. Opt. 35:1566, over the CoolProp density) and the CoolProp speed of sound
# 343.344 m/s.
SEC7 = [(94, "1.99e-7"), (120, "3.96e-6"), (140, "3.96e-5"), (150, "1.25e-4"), (160, "3.96e-4")]


@pytest.mark.parametrize("spl,eps_text", SEC7)
def test_sound_deflection_table(spl, eps_text):
    # Same inputs as the table: check the formula chain SPL -> p' -> n' -> eps = L k n' to its printed digits.
    table_air = types.SimpleNamespace(gladstone_dale=2.25642e-4, speed_of_sound=343.344, ambient_index=1.0)
    eps = deflection_from_sound_level(spl, medium=table_air, frequency_hz=40e3, path_m=0.1)
    mant, ex = eps_text.split("e")
    assert abs(eps - float(eps_text)) <= _printed_tol(mant) * 10.0 ** int(ex)
    # with the library's air model (its own c, Ciddor K, n0): eps ~ c^-3, c within 0.1 % -> 0.3 % allowed
    eps_m = deflection_from_sound_level(spl, medium=Medium(wavelength_m=632.8e-9), frequency_hz=40e3, path_m=0.1)
    assert eps_m == pytest.approx(eps, rel=3e-3)
    # inverse of the same chain
    assert sound_level_from_deflection(eps_m, medium=Medium(wavelength_m=632.8e-9), frequency_hz=40e3,
                                       path_m=0.1) == pytest.approx(spl, abs=1e-9)


def test_sound_140db_first_geometry_gives_014_px():
    # computed check value (as SEC7): with TABLE_3_1 row 1 (17.2 mm/rad, 5 um), 140 dB at 40 kHz, L = 0.1 m -> ~0.14 px
    medium = Medium(wavelength_m=632.8e-9)
    p = plan(_rig(), medium=medium, object_width_m=0.1, source_frequency_hz=40e3, target_spl_db=140)
    assert p.expected_displacement_px == pytest.approx(3.96e-5 * 3448.28, rel=5e-3)
    assert round(p.expected_displacement_px, 2) == 0.14
    # and the smallest level at the 0.05 px floor is the level whose displacement is 0.05 px (20 log10 ratio)
    assert p.min_spl_db == pytest.approx(140 + 20 * math.log10(0.05 / p.expected_displacement_px), abs=1e-9)


# --- planning figures ------------------------------------------------------------------------------


def test_plan_detection_limits():
    medium = Medium()
    r = _rig(sensor_px=(4000, 6000))
    W = 0.02
    p = plan(r, medium=medium, object_width_m=W, noise_px=0.1)
    # TABLE_3_1 row 1 (computed): eps_min at 0.1 px = 29.0 urad
    assert p.min_deflection_rad == pytest.approx(29.0e-6, rel=1e-3)
    # 2-D object: d rho/dy = n0 eps / (K W), from eps = (1/n0) int dn/dy dz (Exp. Fluids 2019 Eq. 1)
    K, n0 = medium.gladstone_dale, medium.ambient_index
    assert p.min_density_gradient_kg_m4 == pytest.approx(n0 * 29.0e-6 / (K * W), rel=1e-3)
    assert p.px_per_density_gradient * p.min_density_gradient_kg_m4 == pytest.approx(0.1, rel=1e-12)
    # density difference across an in-plane length W: gradient x W
    assert p.min_density_difference_kg_m3 == pytest.approx(p.min_density_gradient_kg_m4 * W, rel=1e-12)
    # ideal gas at constant pressure (analytic, rho T = const): the heated gas has rho0 - drho;
    # the media module adds a real-gas compressibility Z(T) for air (< 0.1 % here)
    t_hot = medium.temperature_k + p.min_temperature_difference_k
    assert medium.ambient_density * medium.temperature_k / t_hot == pytest.approx(
        medium.ambient_density - p.min_density_difference_kg_m3, rel=1e-3)
    # and exactly the conversion the reconstruction will use (bos.media)
    assert float(medium.density_from_temperature(t_hot)) == pytest.approx(
        medium.ambient_density - p.min_density_difference_kg_m3, rel=1e-9)
    assert p.min_spl_db is None and p.min_sound_pressure_pa is None
    # dot size 2-3 px on the background (common PIV practice, Raffel et al. 2018 PIV guide; from memory)
    assert p.dot_diameter_range_m == pytest.approx((2 * r.background_pixel_m, 3 * r.background_pixel_m))
    assert p.window_object_m == pytest.approx(32 * r.object_pixel_m)
    d = p.as_dict()
    assert d["sensitivity_mm_per_rad"] == pytest.approx(17.24, rel=1e-3)
    assert isinstance(d["field_of_view_m"], list) and d["warnings"] == []


def test_target_deflections_consistent():
    medium = Medium()
    # a temperature target inverts exactly through the plan's own limit
    eps = deflection_from_temperature_difference(12.0, medium=medium)
    assert target_deflection(medium=medium, target_dt_k=12.0) == eps
    # ideal gas, constant pressure (analytic): drho = rho0 dT / (T0 + dT), eps = K drho / n0
    # (bos.media's real-gas Z(T) for air moves it by < 0.5 %)
    drho = medium.ambient_density * 12.0 / (medium.temperature_k + 12.0)
    assert eps == pytest.approx(medium.gladstone_dale * drho / medium.ambient_index, rel=5e-3)
    assert temperature_difference_from_deflection(eps, medium=medium) == pytest.approx(12.0, rel=1e-9)
    with pytest.raises(InputError, match="exactly one target"):
        target_deflection(medium=medium, target_dt_k=1.0, target_spl_db=120)
    with pytest.raises(InputError, match="frequency"):
        target_deflection(medium=medium, target_spl_db=120, object_width_m=0.1)


def _warn(p, word):
    return [w for w in p.warnings if word in w]


def test_warnings():
    medium = Medium()
    # blur larger than the object: 2.09 mm object-plane blur (TABLE_3_1 row 1) vs a 1 mm object
    p = plan(_rig(), medium=medium, object_width_m=1e-3)
    assert _warn(p, "larger than the object")
    # dots too small to print: pixel on background = 5 um * 0.7 / 0.1 = 35 um -> 2.5 px dot 0.0875 mm < 0.1 mm
    p = plan(Rig(focal_length_m=0.1, pixel_pitch_m=5e-6, f_number=4, z_b_m=0.8, z_d_m=0.3),
             medium=medium, object_width_m=0.05)
    assert _warn(p, "too small to print") and "300 dpi" in _warn(p, "too small to print")[0]
    # quarter-window rule: 3448 px/rad * 3 mrad = 10.3 px > 32/4
    p = plan(_rig(), medium=medium, object_width_m=0.05, expected_deflection_rad=3e-3)
    assert p.expected_displacement_px == pytest.approx(10.34, rel=1e-3) and _warn(p, "quarter")
    p = plan(_rig(), medium=medium, object_width_m=0.05, expected_deflection_rad=3e-3, window_px=64)
    assert not _warn(p, "quarter")
    # Z_D too small for the noise floor: 10 urad -> 0.034 px < 0.05 px; the hint solves for Z_D
    p = plan(_rig(), medium=medium, object_width_m=0.05, expected_deflection_rad=1e-5)
    w = _warn(p, "noise floor")
    assert w and "would reach it" in w[0]
    need = design_for_target(solve_for="z_d", target_deflection_rad=1e-5, focal_length_m=0.05,
                             pixel_pitch_m=5e-6, f_number=8, z_a_m=1.0)
    assert f"{need.rig.z_d:.3g} m" in w[0]
    # diffraction spot above the 3 px dot image: 4.4 px at N = 16 (TABLE_3_1 row 2)
    assert _warn(plan(_rig(n=16), medium=medium, object_width_m=0.05), "diffraction spot")
    # a sound design free of problems stays silent
    assert plan(_rig(n=10), medium=medium, object_width_m=0.05).warnings == []


# --- trends ----------------------------------------------------------------------------------------


@pytest.mark.parametrize("keep", ["z_a", "z_b"])
def test_sensitivity_and_blur_grow_with_z_d(keep):
    # Exp. Fluids 2019 Eq. 1 and the aperture-cone blur: sensitivity ~ Z_D/(Z_D+Z_A-f) and object blur ~ Z_D both grow with Z_D
    r = _rig() if keep == "z_a" else Rig(focal_length_m=0.05, pixel_pitch_m=5e-6, f_number=8, z_b_m=1.5, z_d_m=0.5)
    sw = z_d_sweep(r, n=50)
    assert 0.5 in sw["z_d_m"]
    for key in ("sensitivity_m_per_rad", "object_blur_m", "geometric_blur_px"):
        assert np.all(np.diff(sw[key]) > 0), key
    if keep == "z_b":
        assert sw["z_d_m"].max() < 1.5 - 0.05
        # M is fixed when Z_B is: sensitivity is linear in Z_D
        np.testing.assert_allclose(sw["sensitivity_m_per_rad"], r.magnification * sw["z_d_m"], rtol=1e-12)


def test_blur_against_f_number_has_a_minimum():
    # cone blur d_i ~ 1/N falls, diffraction d_d ~ N grows (Raffel et al. 2018, from memory); RSS least at N* = sqrt(d_i(1)/d_d(1))
    ns = np.geomspace(1.0, 64.0, 400)
    geo = np.array([_rig(n=n).geometric_blur_px for n in ns])
    dif = np.array([_rig(n=n).diffraction_blur_px for n in ns])
    tot = np.hypot(geo, dif)
    assert np.all(np.diff(geo) < 0) and np.all(np.diff(dif) > 0)
    i = int(np.argmin(tot))
    assert 0 < i < len(ns) - 1
    n_star = math.sqrt(_rig(n=1).geometric_blur_px / _rig(n=1).diffraction_blur_px)
    assert ns[i] == pytest.approx(n_star, rel=0.02)


# --- inverse design --------------------------------------------------------------------------------

BASE = dict(pixel_pitch_m=5e-6, wavelength_m=550e-9)


@pytest.mark.parametrize("target", [dict(target_dt_k=5.0), dict(target_spl_db=135.0, source_frequency_hz=40e3),
                                    dict(target_deflection_rad=4e-6)])
def test_design_z_d_round_trip(target):
    medium = Medium()
    d = design_for_target(solve_for="z_d", focal_length_m=0.2, f_number=8, z_a_m=1.5, medium=medium,
                          object_width_m=0.05, noise_px=0.05, **BASE, **target)
    # forward evaluation of the solved rig reaches the target exactly at the noise floor
    p = plan(d.rig, medium=medium, object_width_m=0.05, noise_px=0.05,
             source_frequency_hz=target.get("source_frequency_hz"))
    assert p.min_deflection_rad == pytest.approx(d.target_deflection_rad, rel=1e-9)
    if "target_dt_k" in target:
        assert p.min_temperature_difference_k == pytest.approx(5.0, rel=1e-9)
    if "target_spl_db" in target:
        assert p.min_spl_db == pytest.approx(135.0, abs=1e-8)
    # closed form from S = f Z_D / (Z_A + Z_D - f) (Exp. Fluids 2019 Eq. 1, solved by hand)
    s = 0.05 * 5e-6 / d.target_deflection_rad
    assert d.rig.z_d == pytest.approx(s * (1.5 - 0.2) / (0.2 - s), rel=1e-9)
    assert d.rig.z_a == pytest.approx(1.5, rel=1e-12)


def test_design_z_d_with_fixed_z_b_and_focal_length():
    medium = Medium()
    d = design_for_target(solve_for="z_d", target_dt_k=20.0, focal_length_m=0.1, f_number=8, z_b_m=3.0,
                          medium=medium, object_width_m=0.05, **BASE)
    assert d.rig.z_b == pytest.approx(3.0) and d.rig.z_b_m == pytest.approx(3.0)
    assert plan(d.rig, medium=medium, object_width_m=0.05).min_temperature_difference_k == pytest.approx(20.0, rel=1e-9)
    # S linear in Z_D at fixed Z_B: Z_D = S (Z_B - f) / f
    s = 0.05 * 5e-6 / d.target_deflection_rad
    assert d.rig.z_d == pytest.approx(s * 2.9 / 0.1, rel=1e-9)
    f = design_for_target(solve_for="focal_length", target_dt_k=20.0, f_number=8, z_a_m=1.0, z_d_m=1.0,
                          medium=medium, object_width_m=0.05, **BASE)
    assert plan(f.rig, medium=medium, object_width_m=0.05).min_temperature_difference_k == pytest.approx(20.0, rel=1e-9)
    # closed form f = S Z_B / (Z_D + S)
    s = 0.05 * 5e-6 / f.target_deflection_rad
    assert f.value == pytest.approx(s * 2.0 / (1.0 + s), rel=1e-9)


def test_design_f_number():
    # brightest N with total object blur = 1.5 mm (TABLE_3_1 row 1 geometry: 2.09 mm at N = 8)
    d = design_for_target(solve_for="f_number", focal_length_m=0.05, z_a_m=1.0, z_d_m=0.5, max_blur_m=1.5e-3, **BASE)
    assert d.rig.total_object_blur_m == pytest.approx(1.5e-3, rel=1e-9)
    assert 8 < d.value < 16 and d.target_deflection_rad is None
    # without a limit: the N of least blur (analytic minimum of sqrt((a/N)^2 + (bN)^2))
    best = design_for_target(solve_for="f_number", focal_length_m=0.05, z_a_m=1.0, z_d_m=0.5, **BASE)
    blur = lambda n: best.rig.__class__(**{**best.rig.__dict__, "f_number": n}).total_object_blur_m  # noqa: E731
    assert blur(best.value) < blur(best.value * 0.98) and blur(best.value) < blur(best.value * 1.02)


UNREACHABLE = [
    # needs S above f: no Z_D is enough
    (dict(solve_for="z_d", target_dt_k=0.5, focal_length_m=0.05, f_number=8, z_a_m=1.0), "no Z_D"),
    # fixed Z_B: needed Z_D beyond Z_B - f
    (dict(solve_for="z_d", target_dt_k=2.0, focal_length_m=0.05, f_number=8, z_b_m=1.5), "Z_B - f"),
    (dict(solve_for="focal_length", target_dt_k=0.01, f_number=8, z_a_m=1.0, z_d_m=0.5), "increase Z_D"),
    (dict(solve_for="f_number", focal_length_m=0.05, z_a_m=1.0, z_d_m=0.5, max_blur_m=0.1e-3), "no f-number"),
    (dict(solve_for="f_number", target_dt_k=1.0, focal_length_m=0.05, z_a_m=1.0, z_d_m=0.5), "does not change"),
    (dict(solve_for="z_d", target_dt_k=5.0, focal_length_m=0.2, f_number=2, z_a_m=1.0, max_blur_m=1e-3), "blurs"),
    (dict(solve_for="z_d", target_dt_k=5.0, focal_length_m=0.2, f_number=8, z_a_m=1.0, z_d_m=0.5), "unknown"),
    (dict(solve_for="zoom", target_dt_k=5.0), "solve_for"),
]


@pytest.mark.parametrize("kw,word", UNREACHABLE)
def test_design_unreachable(kw, word):
    with pytest.raises(InputError, match=word) as exc:
        design_for_target(medium=Medium(), object_width_m=0.05, **BASE, **kw)
    assert "\n" not in str(exc.value)
