"""Tests of the synthetic forward model (bos.synthetic).

Every check names its outside source next to it.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, ndimage, special

from bos import synthetic as syn
from bos.errors import InputError

FULL12 = 4095.0


def _bg(cy, cx, amp, *, diameter=2.5, base=0.05, shape=(32, 32), margin=40.0):
    return syn.DotBackground(
        centres_y=np.asarray(cy, float),
        centres_x=np.asarray(cx, float),
        amplitude=np.asarray(amp, float),
        dot_diameter_px=diameter,
        base=base,
        shape=shape,
        margin_px=margin,
    )


def _exact(render_kw):
    return syn.render(noise=False, quantize=False, **render_kw)


# ---------------------------------------------------------------------------
# rendering
# ---------------------------------------------------------------------------


def test_single_dot_integrates_to_gaussian_integral():
    # Source: analytic 2-D Gaussian integral  int a exp(-r^2/(2 s^2)) dA = 2 pi s^2 a
    # (standard calculus); the pixel integrals tile the plane, so their sum
    # must equal it (truncation at 5.3 sigma loses ~1e-7).
    a, d = 0.6, 2.5
    bg = _bg([15.3], [16.71], [a], diameter=d, base=0.0)
    img = _exact(dict(background=bg)) / FULL12
    s = d / 4
    assert img.sum() == pytest.approx(2 * math.pi * s**2 * a, rel=1e-6)
    # defocus blur keeps the integral (energy) and widens the spot
    blurred = _exact(dict(background=bg, blur_px=3.0)) / FULL12
    assert blurred.sum() == pytest.approx(2 * math.pi * s**2 * a, rel=1e-6)
    assert blurred.max() < img.max()


def test_pixel_value_matches_numerical_area_integral():
    # Source: scipy.integrate.dblquad of the Gaussian dot over the pixel
    # area displaced by -d(p) (the model definition, general-purpose quadrature).
    rng = np.random.default_rng(3)
    cy, cx = rng.uniform(4, 28, 12), rng.uniform(4, 28, 12)
    amp = rng.uniform(0.4, 0.8, 12)
    bg = _bg(cy, cx, amp, diameter=2.2)

    def field(r, c):
        return 0.8 * np.sin(r / 9.0), -0.6 * np.cos(c / 7.0) + 0.2

    img = _exact(dict(background=bg, displacement=field)) / FULL12
    s = bg.sigma_px
    for (r, c) in [(10, 12), (20, 7), (16, 16), (5, 25)]:
        dy, dx = field(float(r), float(c))
        qy, qx = r - dy, c - dx

        def f(y, x):
            return np.sum(amp * np.exp(-((y - cy) ** 2 + (x - cx) ** 2) / (2 * s**2)))

        val, _ = integrate.dblquad(f, qx - 0.5, qx + 0.5, qy - 0.5, qy + 0.5, epsabs=1e-11)
        assert img[r, c] == pytest.approx(bg.base + val, abs=2e-6)


def test_varying_field_equals_per_pixel_sum_over_all_dots():
    # Source: direct evaluation of the erf-form area integral (scipy.special.erf)
    # summed over every dot for every pixel - no splatting, no table, no truncation.
    bg = syn.random_dots(shape=(40, 48), dot_diameter_px=2.7, seed=5, margin_px=12)

    def field(r, c):
        return 1.7 * np.exp(-((r - 20) ** 2 + (c - 24) ** 2) / 150.0), 0.05 * (c - 24) + 0.3

    img = _exact(dict(background=bg, displacement=field)) / FULL12
    rr, cc = np.mgrid[0:40, 0:48].astype(float)
    dy, dx = field(rr, cc)
    qy, qx = (rr - dy)[..., None], (cc - dx)[..., None]
    s = bg.sigma_px
    k = 1 / (s * math.sqrt(2))

    def pint(u):
        return s * math.sqrt(math.pi / 2) * (special.erf((u + 0.5) * k) - special.erf((u - 0.5) * k))

    ref = bg.base + np.sum(bg.amplitude * pint(qy - bg.centres_y) * pint(qx - bg.centres_x), axis=-1)
    assert np.max(np.abs(img - ref)) < 2e-6


def test_integer_shift_reproduces_shifted_reference():
    # Source: definition of the displacement (docs/architecture.md): a feature at p
    # in the reference appears at p + d.  Render consistency, uniform (exact erf path)
    # and the per-pixel path (forced by a 1e-12 px ripple).
    bg = syn.random_dots(shape=(64, 80), seed=11)
    ref = _exact(dict(background=bg))
    dy, dx = 3, -2
    ones = np.ones((64, 80))
    uniform = _exact(dict(background=bg, displacement=(dy * ones, dx * ones)))
    np.testing.assert_allclose(uniform[dy:, : dx or None], ref[:-dy, -dx:], atol=1e-9)
    by_camera = _exact(dict(background=bg, camera_shift=(dy, dx)))
    np.testing.assert_allclose(by_camera, uniform, atol=1e-9)
    ripple = 1e-12 * np.arange(64 * 80).reshape(64, 80) / (64 * 80)
    general = _exact(dict(background=bg, displacement=(dy * ones + ripple, dx * ones)))
    np.testing.assert_allclose(general[dy:, : dx or None], ref[:-dy, -dx:], atol=2e-6 * FULL12)


def _periodic_background(n, diameter, seed):
    """Dots replicated with period n so the rendered image is exactly periodic."""
    rng = np.random.default_rng(seed)
    k = int(0.5 * n * n / (math.pi * diameter**2 / 4))
    cy, cx, a = rng.uniform(0, n, k), rng.uniform(0, n, k), rng.uniform(0.45, 0.75, k)
    tiles = [(i, j) for i in (-1, 0, 1) for j in (-1, 0, 1)]
    return _bg(
        np.concatenate([cy + i * n for i, j in tiles]),
        np.concatenate([cx + j * n for i, j in tiles]),
        np.tile(a, 9),
        diameter=diameter,
        shape=(n, n),
        margin=n,
    )


def test_subpixel_shift_matches_fourier_shift_theorem():
    # Source: Fourier shift theorem via scipy.ndimage.fourier_shift on a periodic,
    # nearly band-limited image (6 px dots: Gaussian spectrum at Nyquist ~1e-5;
    # with 2.5 px dots the same comparison is off by 0.1 of full scale - aliasing).
    n = 64
    bg = _periodic_background(n, 6.0, seed=2)
    ref = _exact(dict(background=bg))
    for shift in [(0.3, -0.45), (0.5, 0.5), (-0.17, 0.81)]:
        meas = _exact(dict(background=bg, camera_shift=shift))
        fs = np.fft.ifft2(ndimage.fourier_shift(np.fft.fft2(ref), shift)).real
        assert np.max(np.abs(fs - meas)) < 3e-5 * FULL12, shift  # measured 8e-6


def test_table_lookup_matches_erf_form():
    # Source: scipy.special.erf (the exact form the table approximates).
    sigma = 0.7
    table = syn._PixelIntegralTable(sigma, 6.0)
    u = np.linspace(-5.5, 5.5, 100_001)
    exact = syn._pixel_integral(u, sigma)
    assert np.max(np.abs(table(u.copy()) - exact)) < 5e-7 * exact.max()


def test_shot_and_read_noise_statistics():
    # Source: Poisson photon statistics (common practice, photon-transfer relation):
    # variance in counts = mean / gain + (read_noise / gain)^2, gain = full_well / full scale.
    bg = _bg([], [], [], base=0.4, shape=(256, 256))
    full_well, read = 10000.0, 12.0
    gain = full_well / FULL12
    img = syn.render(bg, noise=True, quantize=False, seed=4, full_well=full_well, read_noise=0.0)
    assert img.mean() == pytest.approx(0.4 * FULL12, rel=2e-3)
    assert img.var() == pytest.approx(img.mean() / gain, rel=0.03)
    img = syn.render(bg, noise=True, quantize=True, seed=5, full_well=full_well, read_noise=read)
    assert img.var() == pytest.approx(img.mean() / gain + (read / gain) ** 2 + 1 / 12, rel=0.03)
    assert np.all(img == np.rint(img))


def test_random_dots_density_definition():
    # Source: expected count of a Poisson process = rate x area (standard); the rate is
    # density / (pi D^2 / 4) per px^2 by our definition.
    bg = syn.random_dots(shape=(300, 400), dot_diameter_px=3.0, density=0.4, margin_px=10, seed=1)
    expected = 0.4 / (math.pi * 9 / 4) * 320 * 420
    assert abs(bg.n_dots - expected) < 4 * math.sqrt(expected)
    assert bg.centres_y.min() >= -10.5 and bg.centres_x.max() <= 409.5
    same = syn.random_dots(shape=(300, 400), dot_diameter_px=3.0, density=0.4, margin_px=10, seed=1)
    np.testing.assert_array_equal(same.centres_x, bg.centres_x)


def test_render_pair_truth_and_meta():
    # Source: render consistency - a pair with a uniform 1 px shift equals the reference
    # moved by one pixel (definition of d, docs/architecture.md).
    pair = syn.render_pair(shape=(48, 48), displacement=lambda r, c: (0 * r, 0 * c + 1.0), noise=False, quantize=False)
    np.testing.assert_allclose(pair.measurement[:, 1:], pair.reference[:, :-1], atol=1e-9)
    assert np.all(pair.displacement_x == 1.0) and np.all(pair.displacement_y == 0.0)
    assert pair.meta["n_dots"] > 100


@pytest.mark.parametrize(
    "call, match",
    [
        (lambda: syn.random_dots(shape=(10, 10), dot_diameter_px=-1), "dot_diameter_px"),
        (lambda: syn.random_dots(shape=(10, 0)), "shape"),
        (lambda: syn.random_dots(shape=(10, 10), density=float("nan")), "density"),
        (lambda: syn.render(syn.random_dots(shape=(10, 10)), displacement=(np.zeros((10, 9)), np.zeros((10, 9)))), "shape"),
        (lambda: syn.render(syn.random_dots(shape=(10, 10)), displacement=(np.full((10, 10), np.nan), np.zeros((10, 10)))), "NaN"),
        (lambda: syn.render(syn.random_dots(shape=(10, 10)), bit_depth=7), "bit_depth"),
        (lambda: syn.render(syn.random_dots(shape=(10, 10), margin_px=5), camera_shift=(3, 0)), "margin_px"),
        (lambda: syn.render(syn.random_dots(shape=(20, 20)), displacement=lambda r, c: (0.8 * c, 0 * c)), "folds"),
        (lambda: syn.render("not a background"), "DotBackground"),
    ],
)
def test_bad_input_raises_input_error(call, match):
    # Source: project rule - bad input raises InputError with a one-line message.
    with pytest.raises(InputError, match=match) as info:
        call()
    assert "\n" not in str(info.value)
