"""Camera-motion removal must not eat the flow; the ambient region is checked.

Outside source: the exact forward model of bos.synthetic renders pairs from
analytic fields (a Gaussian hot-air column whose axis crosses the top and
bottom of the picture, a planar layer along a vertical wall crossing them
too), with and without a known global camera shift.  The default settings
(no ``camera_motion`` key) are compared with the truth and with a run told
that the camera did not move.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from bos import config, stages
from bos import synthetic as S
from bos.displacement import (check_ambient_region, fit_camera_motion, fit_camera_motion_flow_aware,
                              camera_region)
from bos.displacement.motion import half_sample_mode
from bos.media import Medium
from bos.optics import Rig

AIR = Medium()
RIG = Rig(focal_length_m=0.05, pixel_pitch_m=5e-6, f_number=16, z_a_m=0.8, z_d_m=0.4)
SHAPE = (256, 384)


def _exp(kind: str, **extra) -> config.Experiment:
    d = {"camera": {"focal_length_mm": 50, "pixel_pitch_um": 5, "f_number": 16},
         "geometry": {"camera_to_object_m": 0.8, "object_to_background_m": 0.4, "object_width_mm": 100},
         "medium": {"gas": "air", "temperature_k": AIR.temperature_k},
         "reconstruction": {"kind": kind, **extra.pop("reconstruction", {})}}
    for k, v in extra.items():
        d.setdefault(k, {}).update(v)
    return config.experiment_from_dict(d)


def _column(shift=(0.0, 0.0), *, axis_col=140.0, radius_px=70.0, dt=80.0, seed=11):
    ys, xs = S.pixel_to_object(np.arange(SHAPE[0]), np.arange(SHAPE[1]), shape=SHAPE, rig=RIG)
    axis_x = float(np.interp(axis_col, np.arange(SHAPE[1]), xs))
    s = radius_px * RIG.object_pixel_m
    prof = S.axisymmetric_temperature_column(delta_t_k=dt, radius_m=s, medium=AIR)
    field = lambda y, x: S.axisymmetric_column_deflection(  # noqa: E731
        y, x, index_profile=prof, radius_m=5 * s, n0=AIR.ambient_index, axis_x_m=axis_x)
    pair = S.render_pair(shape=SHAPE, displacement=S.displacement_from_field(field, rig=RIG, shape=SHAPE),
                         seed=seed, camera_shift=shift)
    return pair, lambda x: AIR.temperature_k + dt * np.exp(-((x - axis_x) ** 2) / s ** 2)


def _run(pair, exp):
    return stages.process_inputs(stages.inputs_from_arrays(pair.reference, pair.measurement), exp)


def _core_error(res, truth):
    """Median over rows of (recovered - true) on the axis column, and rms over the core, relative to dT."""
    t_true = truth(res.x_m)
    rise = t_true.max() - AIR.temperature_k
    core = (t_true - AIR.temperature_k) > 0.5 * rise
    err = res.density.temperature[:, core] - t_true[core]
    j = int(np.argmax(t_true))
    centre = float(np.nanmedian(res.density.temperature[:, j] - t_true[j])) / rise
    return centre, float(np.sqrt(np.nanmean(err ** 2))) / rise


@pytest.fixture(scope="module")
def column_pairs():
    return {"still": _column(), "nudged": _column((0.2, 0.3))}


def test_default_camera_motion_leaves_a_column_crossing_the_border_alone(column_pairs):
    pair, truth = column_pairs["still"]
    exp = _exp("axisymmetric", reconstruction={"axis": "vertical"})     # no camera_motion key
    res = _run(pair, exp)
    still = _run(pair, dataclasses.replace(exp, processing=dataclasses.replace(exp.processing, camera_motion="none")))
    # measured: the former border fit removed dx = +0.0088 px and moved the centreline
    # by +4.8 % (rms 5.1 %); the flow-aware fit removes < 0.002 px
    assert np.hypot(*res.summary["camera_shift_px"]) < 0.002
    c_auto, rms_auto = _core_error(res, truth)
    c_none, rms_none = _core_error(still, truth)
    assert abs(c_auto - c_none) < 0.01 and abs(rms_auto - rms_none) < 0.01
    assert abs(c_auto) < 0.03 and rms_auto < 0.03
    fit = res.summary["camera_motion"]
    assert fit["region"] == "border band" and 0.3 < fit["excluded_fraction"] < 0.98


def test_default_camera_motion_recovers_a_nudge_with_the_column_crossing_the_border(column_pairs):
    pair, truth = column_pairs["nudged"]
    res = _run(pair, _exp("axisymmetric", reconstruction={"axis": "vertical"}))
    np.testing.assert_allclose(res.summary["camera_shift_px"], (0.2, 0.3), atol=0.002)
    centre, rms = _core_error(res, truth)
    assert abs(centre) < 0.02 and rms < 0.03


def test_plain_border_median_fit_is_biased_by_the_column(column_pairs):
    """The reason for the flow-aware fit: a median fit over the border band takes flow for camera motion."""
    pair, _ = column_pairs["still"]
    exp = _exp("axisymmetric", reconstruction={"axis": "vertical"}, processing={"camera_motion": "none"})
    f = stages.measure_displacement(stages.inputs_from_arrays(pair.reference, pair.measurement), exp)
    region = camera_region(SHAPE)
    plain = fit_camera_motion(f, region)
    aware, report = fit_camera_motion_flow_aware(f, region)
    assert abs(plain.shift[1]) > 0.005                       # measured 0.0088 px
    assert np.hypot(*aware.shift) < 0.002
    assert report.used_vectors < report.candidate_vectors


def _plate(*, thickness_px: float, wall_col: int = 70, dt: float = 30.0, shift=(0.0, 0.0), seed=21):
    shape = (320, 400)
    ys, xs = S.pixel_to_object(np.arange(shape[0]), np.arange(shape[1]), shape=shape, rig=RIG)
    xw = float(np.interp(wall_col, np.arange(shape[1]), xs))
    s = thickness_px * RIG.object_pixel_m
    amp = float(AIR.index_from_density(AIR.density_from_temperature(AIR.temperature_k + dt))) - AIR.ambient_index
    field = lambda y, x: S.planar_layer_deflection(  # noqa: E731
        y, x, amplitude=amp, thickness_m=s, width_m=0.1, n0=AIR.ambient_index, position_m=xw, normal="x")
    pair = S.render_pair(shape=shape, displacement=S.displacement_from_field(field, rig=RIG, shape=shape),
                         seed=seed, camera_shift=shift)
    mask = np.zeros(shape, bool)
    mask[:, :wall_col] = True
    ref, meas = pair.reference.copy(), pair.measurement.copy()
    ref[mask] = meas[mask] = 200.0          # the opaque plate, the same in both pictures

    def truth(x):
        n = AIR.ambient_index + amp * np.exp(-((x - xw) ** 2) / s ** 2)
        return AIR.temperature_from_density(AIR.density_from_index(n))
    return stages.inputs_from_arrays(ref, meas, mask=mask), truth


@pytest.mark.parametrize("shift", [(0.0, 0.0), (0.35, -0.25)])
def test_plate_layer_with_reference_region_right_and_default_camera_motion(shift):
    inputs, truth = _plate(thickness_px=70, shift=shift)
    res = stages.process_inputs(inputs, _exp("planar", reconstruction={"reference_region": "right"}))
    np.testing.assert_allclose(res.summary["camera_shift_px"], shift, atol=0.002)
    assert res.summary["camera_motion"]["region"] == "reference region right"
    t_true = truth(res.x_m)
    rise = t_true.max() - AIR.temperature_k
    layer = (t_true - AIR.temperature_k) > 0.1 * rise
    err = res.density.temperature[:, layer] - t_true[layer]
    assert np.sqrt(np.nanmean(err ** 2)) < 0.02 * rise
    assert res.summary["reference_region"]["ambient"]
    assert not [w for w in res.warnings if "NOT ambient" in w or "camera motion" in w]


def test_reference_region_with_flow_is_reported():
    # default reference_region = "edges": the layer crosses the top and bottom edges
    inputs, _ = _plate(thickness_px=30)
    res = stages.process_inputs(inputs, _exp("planar"))
    rep = res.summary["reference_region"]
    assert not rep["ambient"] and {"top", "bottom"} <= set(rep["sides_with_signal"])
    assert any("NOT ambient" in w and "'edges'" in w for w in res.warnings)
    assert any("NOT ambient" in w for w in res.summary["warnings"])        # -> file attribute and CLI


def test_flow_tail_reaching_the_camera_region_is_warned():
    # a thick layer (1/e half-width 120 px) reaches the right-hand reference box: the shift
    # fitted there contains flow, which the data reveal only as a gradient -> a warning
    inputs, _ = _plate(thickness_px=120)
    res = stages.process_inputs(inputs, _exp("planar", reconstruction={"reference_region": "right"}))
    assert any("camera motion" in w and "gradient" in w for w in res.warnings)


def test_ambient_check_on_pure_noise_is_quiet():
    rng = np.random.default_rng(3)
    from bos.displacement import DisplacementField

    shape = (30, 40)
    sig = np.full(shape, 0.01)
    f = DisplacementField(dy=rng.normal(0, 0.01, shape), dx=rng.normal(0, 0.01, shape),
                          rows=np.arange(shape[0]) * 8.0, cols=np.arange(shape[1]) * 8.0,
                          masked=np.zeros(shape, bool), invalid=np.zeros(shape, bool), sigma_dy=sig, sigma_dx=sig)
    chk = check_ambient_region(f, np.ones(shape, bool))
    assert chk.ambient and chk.signal_fraction < 0.05
    f.dx[:, 30:] += 0.02          # a coherent 2-sigma step over a quarter of the region
    assert not check_ambient_region(f, np.ones(shape, bool)).ambient


def test_half_sample_mode_against_known_mixtures():
    # Bickel & Fruehwirth (2006): the half-sample mode of a peaked sample with a one-sided tail
    rng = np.random.default_rng(0)
    peak = rng.normal(0.0, 0.01, 600)
    tail = rng.uniform(0.02, 0.5, 400)          # 40 % contamination on one side
    v = np.concatenate([peak, tail])
    assert abs(half_sample_mode(v)) < 0.005 < abs(np.median(v))
    assert half_sample_mode(np.array([1.0, 2.0, 2.1, 9.0])) == pytest.approx(2.05)


def test_terminal_summary_names_the_camera_region_and_the_ambient_check():
    from cli.cmd_run import context_lines

    lines = context_lines({"camera_motion": {"region": "border band", "used_vectors": 72, "candidate_vectors": 497,
                                             "excluded_fraction": 0.855, "residual_rms_px": [0.0019, 0.0021],
                                             "consistent": False},
                           "reference_region": {"region": "edges", "ambient": False}})
    assert "border band: 72 of 497 vectors used (86 % left out as flow)" in lines[0]
    assert "NOT consistent" in lines[0] and lines[1] == "reference region edges: NOT ambient"


# --- coarse global shift: masked normalised cross-correlation -------------------------------
# Reference: scikit-image's phase_cross_correlation with reference_mask / moving_mask, an
# independent implementation of Padfield (2012), "Masked object registration in the Fourier
# domain", IEEE Trans. Image Process. 21, 2706-2718.

@pytest.mark.parametrize("shift", [(3, -5), (-11, 7), (0, 0), (17, 2)])
@pytest.mark.parametrize("kind", ["border", "strip"])
def test_masked_ncc_shift_matches_scikit_image(shift, kind):
    skreg = pytest.importorskip("skimage.registration")
    from bos.displacement.motion import masked_ncc_shift

    rng = np.random.default_rng(3)
    big = rng.random((200, 220))
    ref = big[40:160, 40:180]
    dy, dx = shift
    meas = big[40 - dy:160 - dy, 40 - dx:180 - dx] + 0.05 * rng.random((120, 140))
    region = np.zeros(ref.shape, dtype=bool)
    if kind == "border":
        region[:20] = region[-20:] = True
        region[:, :20] = region[:, -20:] = True
    else:
        region[:, 5:45] = True
    ours = masked_ncc_shift(ref, meas, region)
    theirs, *_ = skreg.phase_cross_correlation(ref, meas, reference_mask=region, moving_mask=region)
    assert ours == (dy, dx)
    assert ours == (-int(theirs[0]), -int(theirs[1]))


@pytest.mark.parametrize("true", [(7.6, -3.2), (-23.4, 41.7), (52.0, -12.5)])
def test_coarse_camera_shift_within_its_bin_factor(true):
    from bos.displacement import coarse_camera_shift

    bg = S.random_dots(shape=(512, 512), dot_diameter_px=2.5, density=0.5, seed=7, margin_px=60)
    ref = S.render(bg, shape=(512, 512), bit_depth=16, seed=1)
    meas = S.render(bg, shape=(512, 512), bit_depth=16, seed=2, camera_shift=true)
    region = camera_region(ref.shape, region="border")
    got = coarse_camera_shift(ref, meas, region)
    # 512 px images are binned by 4 (smaller side kept >= 128 px): error at most half a bin + 1 px
    assert abs(got[0] - true[0]) <= 3.0 and abs(got[1] - true[1]) <= 3.0
