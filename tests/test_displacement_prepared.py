"""A prepared reference (per-reference work done once) gives the same vectors as the plain image.

Outside check: the exact sub-pixel shifts of band-limited noise (Fourier
shift theorem), and the analytic dot renderer of bos.synthetic.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage as ndi

from bos.displacement import correlate, estimate
from bos.displacement.correlation import PreparedReference, prepare_reference
from bos.errors import NoTextureError
from bos.synthetic import render_pair


def shifted(base, shift):
    return np.fft.ifft2(ndi.fourier_shift(np.fft.fft2(base), shift)).real.astype(np.float32)


@pytest.fixture(scope="module")
def base():
    rng = np.random.default_rng(4)
    return ndi.gaussian_filter(rng.standard_normal((256, 256)), 0.7, mode="wrap").astype(np.float32)


@pytest.mark.parametrize("deformation", ["measurement", "symmetric"])
def test_prepared_reference_gives_identical_vectors_for_a_sequence(base, deformation):
    prep = prepare_reference(base, deformation=deformation)
    for shift in ((0.3, -0.45), (1.7, 0.2)):
        meas = shifted(base, shift)
        plain = correlate(base, meas, deformation=deformation)
        fast = correlate(prep, meas, deformation=deformation)
        for name in ("dy", "dx", "sigma_dy", "sigma_dx"):
            assert np.array_equal(getattr(plain, name), getattr(fast, name), equal_nan=True), name
        assert np.array_equal(plain.invalid, fast.invalid)
        inner = (slice(2, -2), slice(2, -2))
        for got, want in ((fast.dy[inner], shift[0]), (fast.dx[inner], shift[1])):  # exact shift (Fourier)
            assert abs(np.mean(got) - want) < 0.002 and np.abs(got - want).max() < 0.03
    assert len(prep._levels) >= 1 and len(prep._bias) == 1  # one calibration for the whole sequence


def test_prepared_reference_with_other_settings_and_through_estimate():
    shape = (192, 224)

    def field(r, c):
        return 0.8 * np.exp(-((r - 96) ** 2 + (c - 112) ** 2) / 40.0**2), 0.3 + 0 * r

    pair = render_pair(shape=shape, displacement=field, seed=3, dtype=np.float32)
    prep = prepare_reference(pair.reference)  # default windows; the run below uses a 24 px final window
    mask = np.zeros(shape, bool)
    mask[:, :20] = True
    opts = dict(windows=(48, 24), mask=mask)
    a = correlate(pair.reference, pair.measurement, **opts)
    b = correlate(prep, pair.measurement, **opts)
    assert np.array_equal(a.dy, b.dy, equal_nan=True) and np.array_equal(a.masked, b.masked)
    assert len(prep._bias) == 2  # the 24 px bias was measured on demand and kept
    # the array-like prepared reference also goes through estimate() with camera-motion removal
    c = estimate(pair.reference, pair.measurement, camera_motion="border")
    d = estimate(prep, pair.measurement, camera_motion="border")
    assert isinstance(prep, PreparedReference) and prep.shape == shape
    assert np.array_equal(c.dx, d.dx, equal_nan=True) and c.camera_shift == d.camera_shift


def test_prepare_reference_checks_the_texture():
    with pytest.raises(NoTextureError, match="reference"):
        prepare_reference(np.full((64, 64), 7.0))


def test_bias_calibration_reused_only_for_the_same_crop(base):
    from bos.displacement import correlation as C

    C._BIAS_CACHE.clear()
    meas = shifted(base, (0.3, -0.45))
    first = correlate(base, meas)
    assert len(C._BIAS_CACHE) == 1
    again = correlate(base.copy(), meas)  # same content in another array: the calibration is reused
    assert len(C._BIAS_CACHE) == 1
    assert np.array_equal(first.dy, again.dy, equal_nan=True) and np.array_equal(first.dx, again.dx, equal_nan=True)
    other = base.copy()
    other[128, 128] += 0.5  # one pixel of the central calibration crop differs: measured anew
    correlate(other, meas)
    assert len(C._BIAS_CACHE) == 2
    # the kept calibration is what a fresh measurement on this texture gives
    kept = next(iter(C._BIAS_CACHE.values()))
    fresh = C.deformation_bias(base, window=16, order=3, symmetric=False, direct=True)
    np.testing.assert_array_equal(kept.coefficients, fresh.coefficients)
    np.testing.assert_array_equal(kept.residual.coefficients, fresh.residual.coefficients)
    # and the vectors still follow the exact (Fourier) shift
    inner = (slice(2, -2), slice(2, -2))
    assert abs(np.mean(again.dy[inner]) - 0.3) < 0.002 and abs(np.mean(again.dx[inner]) + 0.45) < 0.002
