"""Refuse or warn instead of silent nonsense (each case was run and gave a wrong answer without a word).

Outside sources: exact renderings of bos.synthetic (known uniform displacement
or none), tifffile-written stacks, and the plane-wave impedance relation of
linear acoustics p = rho0 c u (Kinsler et al., Fundamentals of Acoustics,
4th ed., 2000, section 5.2 -- from memory) for the acoustic Mach number.
"""

from __future__ import annotations

import warnings

import imageio.v3 as iio
import numpy as np
import pytest
import tifffile

from bos import config, stages
from bos import synthetic as S
from bos.errors import ConfigError, InputError
from bos.images import read_mask
from bos.media import Medium

SHAPE = (160, 192)
BASE = {"camera": {"focal_length_mm": 50, "pixel_pitch_um": 5, "f_number": 11},
        "geometry": {"camera_to_object_m": 0.8, "object_to_background_m": 0.4, "object_width_mm": 50},
        "processing": {"window_px": 32, "final_window_px": 16, "passes": 2},
        "reconstruction": {"kind": "planar", "reference_region": "edges"},
        "output": {"directory": "out", "figures": False}}


def _exp(tmp_path, **sections):
    d = {k: dict(v) for k, v in BASE.items()}
    for k, v in sections.items():
        d.setdefault(k, {}).update(v)
    return config.experiment_from_dict(d, base_dir=tmp_path)


@pytest.fixture(scope="module")
def still_pair():
    return S.render_pair(shape=SHAPE, seed=4, bit_depth=16)


def test_pixel_identical_pair_warns(tmp_path, still_pair):
    inputs = stages.inputs_from_arrays(still_pair.reference, still_pair.reference.copy())
    res = stages.process_inputs(inputs, _exp(tmp_path))
    assert any("pixel-identical" in w for w in res.warnings)
    # a genuine pair (independent camera noise) does not warn
    res = stages.process_inputs(stages.inputs_from_arrays(still_pair.reference, still_pair.measurement), _exp(tmp_path))
    assert not any("pixel-identical" in w for w in res.warnings)


def test_same_multipage_tiff_without_frame_keys_is_refused(tmp_path, still_pair):
    stack = np.stack([still_pair.reference, still_pair.measurement]).astype(np.uint16)
    tifffile.imwrite(tmp_path / "pair.tif", stack, photometric="minisblack")     # two pages
    exp = _exp(tmp_path, images={"reference": "pair.tif", "measurement": "pair.tif"})
    with pytest.raises(ConfigError, match="reference_frame"):
        stages.load_inputs(exp)
    exp = _exp(tmp_path, images={"reference": "pair.tif", "measurement": "pair.tif",
                                 "reference_frame": 0, "measurement_frame": 1})
    inputs = stages.load_inputs(exp)
    np.testing.assert_array_equal(inputs.measurement * 65535, stack[1])


def test_three_plane_page_is_not_mixed_as_colour(tmp_path, still_pair):
    stack = np.stack([still_pair.reference] * 3).astype(np.uint16)
    # what tifffile writes by default for a (3, rows, cols) stack: one page of 3 colour planes
    tifffile.imwrite(tmp_path / "planes.tif", stack, photometric="rgb", planarconfig="separate")
    exp = _exp(tmp_path, images={"reference": "planes.tif", "measurement": "planes.tif"})
    with pytest.raises(InputError, match="separate image planes"):
        stages.load_inputs(exp)


def test_all_vectors_rejected_is_an_error(tmp_path, still_pair):
    other = S.render_pair(shape=SHAPE, seed=40, bit_depth=16).measurement   # another background
    inputs = stages.inputs_from_arrays(still_pair.reference, other)
    with pytest.raises(InputError, match="same background"):
        stages.process_inputs(inputs, _exp(tmp_path, processing={"camera_motion": "none"}))


def test_many_rejected_vectors_warn(tmp_path, still_pair):
    meas = still_pair.measurement.copy()
    other = S.render_pair(shape=SHAPE, seed=41, bit_depth=16).measurement
    meas[:, : SHAPE[1] // 2] = other[:, : SHAPE[1] // 2]     # left half shows another background
    res = stages.process_inputs(stages.inputs_from_arrays(still_pair.reference, meas),
                                _exp(tmp_path, processing={"camera_motion": "none"}))
    assert any("rejected by validation" in w for w in res.warnings)
    d = res.displacement
    mag = np.hypot(d.dy, d.dx)
    # the peak is taken over valid vectors only; garbage vectors (weak correlation peak) are invalid
    assert res.summary["peak_displacement_px"] == pytest.approx(np.nanmax(np.where(d.valid, mag, np.nan)))
    assert np.all(np.isnan(mag[~d.valid]))
    right = d.cols > SHAPE[1] / 2 + 32
    assert np.nanmax(mag[:, right]) < 0.1          # the matching half: no motion
    assert d.invalid[:, d.cols < SHAPE[1] / 2 - 32].mean() > 0.8


def test_grey_mask_is_thresholded_with_a_warning_naming_it(tmp_path):
    grey = np.zeros((20, 30), np.uint8)
    grey[:, :10] = 255
    grey[:, 10] = 128          # anti-aliased edge
    grey[:, 11] = 60
    iio.imwrite(tmp_path / "soft.png", grey)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        m = read_mask(tmp_path / "soft.png", shape=(20, 30))
    assert m[:, :11].all() and not m[:, 11:].any()
    assert any("soft.png" in str(w.message) and "grey levels" in str(w.message) for w in caught)


def test_mask_over_the_camera_region_is_named(tmp_path, still_pair):
    mask = np.zeros(SHAPE, bool)
    mask[:, -40:] = True     # covers the whole right-hand reference box
    iio.imwrite(tmp_path / "m.png", mask.astype(np.uint8) * 255)
    inputs = stages.inputs_from_arrays(still_pair.reference, still_pair.measurement, mask=mask,
                                       paths={"mask": tmp_path / "m.png"})
    with pytest.raises(InputError, match=r"mask covers the camera-motion region \(m.png"):
        stages.process_inputs(inputs, _exp(tmp_path, reconstruction={"reference_region": "right"}))


def test_profile_line_outside_the_field_warns(tmp_path, still_pair):
    inputs = stages.inputs_from_arrays(still_pair.reference, still_pair.measurement)
    exp = _exp(tmp_path, output={"profile": [[500.0, 500.0], [600.0, 500.0]]})
    res = stages.process_inputs(inputs, exp)
    assert any("profile line" in w and "outside" in w for w in res.warnings)
    exp = _exp(tmp_path, output={"profile": [[-5.0, 0.0], [5.0, 0.0]]})
    assert not any("profile line" in w for w in stages.process_inputs(inputs, exp).warnings)


@pytest.mark.parametrize("name", ["../../x", "", ".hidden", "a/b"])
def test_result_names_that_escape_or_hide_are_refused(tmp_path, name):
    with pytest.raises(ConfigError, match="output.name"):
        _exp(tmp_path, output={"name": name})


def test_acoustic_mach_number_of_a_140_db_wave():
    # 140 dB re 20 uPa rms -> p_peak = 20e-6 * 10^(140/20) * sqrt(2) = 282.8 Pa;
    # rho0 c^2 of air at 20 C, 1 atm = gamma p0 = 1.4 * 101325 Pa (ideal gas)
    med = Medium(temperature_k=293.15, pressure_pa=101325.0)
    mach = stages.acoustic_mach_number(282.84, medium=med)
    assert mach == pytest.approx(282.84 / (1.4 * 101325.0), rel=2e-3)
    assert stages.acoustic_mach_number(2000.0, medium=med) > stages.LINEAR_ACOUSTICS_MAX_MACH
