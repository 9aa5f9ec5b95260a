"""Knife-edge calibration (bos.schlieren.calibration) on synthetic knife-edge pictures.

Outside sources of the checks:
* the pictures are rendered here from an analytic deflection field (the
  gradient of a Gaussian index "column", eps = grad(phi)) and an analytic
  weak lens (a thin lens of focal length f_L deflects a ray at r from its
  axis by -r/f_L, paraxial optics), through the knife-edge contrast law
  I/I0 = clip(1 + f2 eps_n / a, 0, h/a) (Settles 2001, *Schlieren and
  Shadowgraph Techniques*, ch. 3, from memory), with vignetting, a lens
  transmission loss and Gaussian noise;
* the expected sensitivity is f2 / a of that law;
* knife orientations are checked against plane geometry (edge direction
  perpendicular to the normal).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from bos.errors import InputError
from bos.schlieren import CalibrationLens, SchlierenOptics, calibrate_knife_edge, knife_orientation

SHAPE = (160, 220)
PIX_M = 1e-4                 # 0.1 mm object-plane pixel
F2_M = 1.0                   # schlieren-head focal length
H_M = 1e-3                   # source image height at the knife
CUTOFF = 0.5
A_M = (1 - CUTOFF) * H_M     # unobstructed height: linear range |eps_n| <= a/f2 = 5e-4 rad
PEAK_RAD = 7.5e-4            # column peak |eps_x|: 1.5 x the linear range -> dark and bright saturation
LENS = dict(center=(80.0, 180.0), radius=32.0, focal_m=4.0, transmission=0.96)
NOISE = 0.002


def column_field(shape=SHAPE, *, peak=PEAK_RAD):
    """eps = grad(phi), phi = -B exp(-(x-x0)^2/s^2 - (y-y0)^2/sy^2): a hot, elongated column [rad]."""
    rr, cc = np.mgrid[0:shape[0], 0:shape[1]].astype(float)
    x = (cc - (shape[1] - 1) / 2) * PIX_M
    y = (rr - (shape[0] - 1) / 2) * PIX_M
    x0, y0, s, sy = -4e-3, 0.0, 2e-3, 12e-3
    b = peak * s / (math.sqrt(2.0) * math.exp(-0.5))
    e = np.exp(-((x - x0) / s) ** 2 - ((y - y0) / sy) ** 2)
    return b * 2 * (y - y0) / sy ** 2 * e, b * 2 * (x - x0) / s ** 2 * e


def knife_scene(*, knife_deg=90.0, peak=PEAK_RAD, lens=LENS, seed=0, shape=SHAPE, noise=NOISE, level=0.42):
    """(picture, no-flow picture, true eps_n, lens mask, true ratio) for a knife at ``knife_deg``."""
    t = math.radians(knife_deg)
    ky, kx = math.cos(t), math.sin(t)       # knife normal: edge turned 90 deg clockwise on the screen
    ey, ex = column_field(shape, peak=peak)
    rr, cc = np.mgrid[0:shape[0], 0:shape[1]].astype(float)
    in_lens = np.zeros(shape, bool)
    trans = np.ones(shape)
    if lens is not None:
        r0, c0 = lens["center"]
        in_lens = np.hypot(rr - r0, cc - c0) <= lens["radius"]
        ey = np.where(in_lens, -(rr - r0) * PIX_M / lens["focal_m"], ey)
        ex = np.where(in_lens, -(cc - c0) * PIX_M / lens["focal_m"], ex)
        trans = np.where(in_lens, lens["transmission"], 1.0)
    eps_n = ky * ey + kx * ex
    ratio = np.clip(1.0 + F2_M * eps_n / A_M, 0.0, H_M / A_M)
    u = (rr / shape[0] - 0.5) ** 2 + (cc / shape[1] - 0.45) ** 2
    illum = level * (1.0 - 0.6 * u) * (1.0 + 0.05 * cc / shape[1])   # vignetting and a tilt
    rng = np.random.default_rng(seed)
    ref = illum + rng.normal(0.0, noise, shape)
    pic = illum * trans * ratio + rng.normal(0.0, noise, shape)
    return np.clip(pic, 0.0, 1.0), np.clip(ref, 0.0, 1.0), eps_n, in_lens, ratio


def _lens():
    return CalibrationLens(center_px=LENS["center"], radius_px=LENS["radius"], focal_length_m=LENS["focal_m"])


def _usable(res):
    return np.isfinite(res.deflection_normal) & ~res.lens & ~res.uncalibrated & ~res.invalid


def test_lens_calibration_recovers_the_column_and_flags_saturation():
    pic, ref, eps_n, in_lens, ratio = knife_scene()
    res = calibrate_knife_edge(pic, ref, knife="vertical", object_pixel_m=PIX_M, lens=_lens())
    fit = res.fit
    assert fit.law == "clipped"                               # the lens spans beyond the linear range
    assert fit.sensitivity_per_rad == pytest.approx(F2_M / A_M, rel=0.03)
    assert fit.lens_transmission == pytest.approx(LENS["transmission"], abs=0.02)
    assert fit.dark_level == pytest.approx(0.0, abs=0.03)
    assert fit.bright_level == pytest.approx(H_M / A_M, rel=0.03)
    dark_eps, bright_eps = fit.saturation_deflections()            # the ends of the linear law: -a/f2, (h-a)/f2
    assert dark_eps == pytest.approx(-A_M / F2_M, rel=0.05) and bright_eps == pytest.approx((H_M - A_M) / F2_M, rel=0.05)
    lo, hi = fit.calibrated_range_rad
    assert -A_M / F2_M * 1.05 < lo < -A_M / F2_M * 0.8 and A_M / F2_M * 0.8 < hi < A_M / F2_M * 1.05
    ok = _usable(res)
    assert ok.mean() > 0.6
    err = res.deflection_normal[ok] - eps_n[ok]
    rms = float(np.sqrt(np.mean(err ** 2)))
    assert rms <= 0.05 * PEAK_RAD                             # the acceptance figure
    # stated uncertainty is of the right size (z-scores of the errors)
    z = err / res.deflection_normal_uncertainty[ok]
    assert 0.5 < float(np.sqrt(np.mean(z ** 2))) < 2.0
    # saturation: the truly saturated pixels are flagged, on the right side
    true_dark = (ratio <= 0.0) & ~in_lens
    true_bright = (ratio >= H_M / A_M) & ~in_lens
    assert true_dark.sum() > 200 and true_bright.sum() > 200
    assert (res.saturation[true_dark] == -1).mean() > 0.97
    assert (res.saturation[true_bright] == 1).mean() > 0.97
    far = (np.abs(ratio - 1.0) < 0.8) & ~in_lens
    assert res.saturated[far].mean() < 0.002
    assert np.all(np.isnan(res.deflection_normal[res.saturated]))
    # the lens pixels reproduce the lens deflection (self-check of the flags and of the lens scaling)
    lens_ok = in_lens & np.isfinite(res.deflection_normal) & (np.abs(eps_n) < 0.8 * A_M / F2_M)
    assert float(np.sqrt(np.mean((res.deflection_normal[lens_ok] - eps_n[lens_ok]) ** 2))) < 0.05 * PEAK_RAD
    assert res.lens.sum() == pytest.approx(math.pi * LENS["radius"] ** 2, rel=0.05)


def test_weak_lens_inside_the_linear_range_gives_the_linear_law():
    lens = dict(LENS, focal_m=12.0)                           # |eps| <= 2.4e-4: no plateau in the lens
    pic, ref, eps_n, in_lens, _ = knife_scene(peak=4e-4, lens=lens, seed=3)
    res = calibrate_knife_edge(pic, ref, knife="vertical", object_pixel_m=PIX_M,
                               lens=CalibrationLens(LENS["center"], LENS["radius"], 12.0))
    assert res.fit.law == "linear"
    assert res.fit.sensitivity_per_rad == pytest.approx(F2_M / A_M, rel=0.03)
    lo, hi = res.fit.calibrated_range_rad
    rmax = 0.9 * LENS["radius"] * PIX_M / 12.0                # lens coverage
    assert lo == pytest.approx(-rmax, rel=0.1) and hi == pytest.approx(rmax, rel=0.1)
    good = np.isfinite(res.deflection_normal) & ~res.lens
    err = res.deflection_normal[good] - eps_n[good]
    assert float(np.sqrt(np.mean(err ** 2))) <= 0.05 * 4e-4
    # column values beyond the lens coverage are flagged as extrapolated, not silently trusted
    assert res.uncalibrated[good & (np.abs(eps_n) > 1.1 * rmax)].mean() > 0.95


def test_optical_parameters_instead_of_a_lens():
    pic, ref, eps_n, in_lens, ratio = knife_scene(lens=None, seed=5)
    res = calibrate_knife_edge(pic, ref, knife="vertical", object_pixel_m=PIX_M,
                               optics=SchlierenOptics(focal_length_m=F2_M, source_image_height_m=H_M, cutoff=CUTOFF))
    assert res.fit.sensitivity_per_rad == pytest.approx(F2_M / A_M, rel=1e-12)
    ok = _usable(res)
    err = res.deflection_normal[ok] - eps_n[ok]
    assert float(np.sqrt(np.mean(err ** 2))) <= 0.05 * PEAK_RAD
    assert (res.saturation[ratio <= 0] == -1).mean() > 0.97


@pytest.mark.parametrize("angle", [30.0, 0.0, 270.0])
def test_rotated_knife_senses_the_component_along_its_normal(angle):
    pic, ref, eps_n, in_lens, _ = knife_scene(knife_deg=angle, peak=4e-4, seed=7)
    res = calibrate_knife_edge(pic, ref, knife=str(angle), object_pixel_m=PIX_M, lens=_lens())
    ok = _usable(res)
    assert ok.mean() > 0.5
    err = res.deflection_normal[ok] - eps_n[ok]
    # 5 % of the field's peak deflection (the horizontal knife sees only the small eps_y of the column)
    assert float(np.sqrt(np.mean(err ** 2))) <= 0.05 * 4e-4


def test_blade_on_the_other_side_is_found_by_the_lens():
    """Picture made with the normal +x, calibrated as a 270-deg knife (normal -x): the lens data give a negative
    sensitivity and the result is the component along -x."""
    pic, ref, eps_n, in_lens, _ = knife_scene(knife_deg=90.0, seed=9)
    res = calibrate_knife_edge(pic, ref, knife=270, object_pixel_m=PIX_M, lens=_lens())
    assert res.fit.sensitivity_per_rad == pytest.approx(-F2_M / A_M, rel=0.03)
    dark_eps, bright_eps = res.fit.saturation_deflections()
    assert dark_eps == pytest.approx(A_M / F2_M, rel=0.05)
    ok = _usable(res)
    assert float(np.sqrt(np.mean((res.deflection_normal[ok] + eps_n[ok]) ** 2))) <= 0.05 * PEAK_RAD
    assert (res.saturation[(eps_n >= A_M / F2_M) & ~in_lens] == 1).mean() > 0.97      # still the bright side


def test_knife_orientation_geometry():
    v, h = knife_orientation("vertical"), knife_orientation("horizontal")
    assert v.normal == (0.0, 1.0) and h.normal == (1.0, 0.0)
    for angle in (0.0, 17.0, 90.0, 135.0, 200.0):
        o = knife_orientation(angle)
        t = math.radians(angle)
        edge_yx = (-math.sin(t), math.cos(t))            # edge direction on the screen, y down
        assert abs(o.normal[0] * edge_yx[0] + o.normal[1] * edge_yx[1]) < 1e-12
        assert math.hypot(*o.normal) == pytest.approx(1.0)
        # normal = edge turned 90 deg clockwise on the screen: cross product (screen, y up) is negative
        ex, ey_up = edge_yx[1], -edge_yx[0]
        nx, ny_up = o.normal[1], -o.normal[0]
        assert ex * ny_up - ey_up * nx == pytest.approx(-1.0)
    assert knife_orientation("270").normal == pytest.approx((0.0, -1.0))


def _err(fn):
    with pytest.raises(InputError) as info:
        fn()
    msg = str(info.value)
    assert "\n" not in msg
    return msg


def test_bad_input_is_a_clear_error():
    pic, ref, *_ = knife_scene()
    kw = dict(knife="vertical", object_pixel_m=PIX_M)
    assert "outside the picture" in _err(lambda: calibrate_knife_edge(
        pic, ref, **kw, lens=CalibrationLens((500.0, 20.0), 30.0, 4.0)))
    assert "different sizes" in _err(lambda: calibrate_knife_edge(pic, ref[:, :-5], **kw, lens=_lens()))
    assert "knife orientation missing" in _err(lambda: calibrate_knife_edge(
        pic, ref, knife=None, object_pixel_m=PIX_M, lens=_lens()))
    assert "either" in _err(lambda: calibrate_knife_edge(pic, ref, **kw))
    # lens response saturated everywhere: the lens region is over-exposed (camera clipping) ...
    rr, cc = np.mgrid[0:SHAPE[0], 0:SHAPE[1]]
    burnt = pic.copy()
    burnt[np.hypot(rr - 80, cc - 180) <= 33] = 1.0
    assert "saturated" in _err(lambda: calibrate_knife_edge(burnt, ref, **kw, lens=_lens()))
    # ... or the lens shows one flat level (knife fully closed there)
    dark = pic.copy()
    dark[np.hypot(rr - 80, cc - 180) <= 33] = 0.01
    assert "saturated" in _err(lambda: calibrate_knife_edge(dark, ref, **kw, lens=_lens()))


def test_camera_clipping_and_exposure_change_are_reported():
    pic, ref, eps_n, in_lens, _ = knife_scene(peak=3e-4, seed=13)
    burnt = pic.copy()
    burnt[10:20, 10:30] = 1.0                                    # over-exposed patch (camera clipping)
    res = calibrate_knife_edge(burnt, ref, knife="vertical", object_pixel_m=PIX_M, lens=_lens())
    assert np.all(res.saturation[10:20, 10:30] == 1)
    assert not np.any(res.saturation[40:120, 10:60])             # column region below the linear limit
    assert not any("exposure" in w for w in res.warnings)
    # a 6 % brighter flash for the flow picture: the ratio around the lens shows it, and a warning says so
    res2 = calibrate_knife_edge(pic * 1.06, ref, knife="vertical", object_pixel_m=PIX_M, lens=_lens())
    assert res2.exposure_ratio == pytest.approx(1.06, abs=0.01)
    assert any("exposure changed" in w for w in res2.warnings)
    # the lens focal-length uncertainty enters the stated uncertainty in proportion to the deflection
    lens_s = CalibrationLens(LENS["center"], LENS["radius"], LENS["focal_m"], sigma_focal_length_m=0.2)
    res0 = calibrate_knife_edge(pic, ref, knife="vertical", object_pixel_m=PIX_M, lens=_lens())
    res3 = calibrate_knife_edge(pic, ref, knife="vertical", object_pixel_m=PIX_M, lens=lens_s)
    big = np.isfinite(res3.deflection_normal) & (np.abs(eps_n) > 2e-4) & ~in_lens
    extra = np.sqrt(res3.deflection_normal_uncertainty[big] ** 2 - res0.deflection_normal_uncertainty[big] ** 2)
    assert np.allclose(extra, np.abs(res3.deflection_normal[big]) * 0.2 / LENS["focal_m"], rtol=1e-6)
