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


FIELDS = {
    "smooth": lambda r, c: (1.7 * np.exp(-((r - 20) ** 2 + (c - 24) ** 2) / 150.0), 0.05 * (c - 24) + 0.3),
    # gradient bound ~0.45 px/px, close to the 0.5 fold limit: stresses the splat-disc bound
    "steep": lambda r, c: (0.3 * np.cos(r / 4.0), 2.0 * np.sin(c / 5.0) + 0.5 * np.sin(r / 7.0)),
}


@pytest.mark.parametrize("name, blur", [("smooth", 0.0), ("steep", 0.0), ("smooth", 2.0)])
def test_varying_field_equals_per_pixel_sum_over_all_dots(name, blur):
    # Source: direct evaluation of the erf-form area integral (scipy.special.erf)
    # summed over every dot for every pixel - no splatting, no table, no truncation.
    # With blur: Gaussian convolved with a Gaussian is a Gaussian, variances add and
    # the integral is kept (standard result), so amplitude scales by sigma_0^2 / sigma^2.
    bg = syn.random_dots(shape=(40, 48), dot_diameter_px=2.7, seed=5, margin_px=12)
    field = FIELDS[name]

    img = _exact(dict(background=bg, displacement=field, blur_px=blur)) / FULL12
    rr, cc = np.mgrid[0:40, 0:48].astype(float)
    dy, dx = field(rr, cc)
    qy, qx = (rr - dy)[..., None], (cc - dx)[..., None]
    s = math.hypot(bg.sigma_px, blur / 4)
    amp = bg.amplitude * (bg.sigma_px / s) ** 2
    k = 1 / (s * math.sqrt(2))

    def pint(u):
        return s * math.sqrt(math.pi / 2) * (special.erf((u + 0.5) * k) - special.erf((u - 0.5) * k))

    ref = bg.base + np.sum(amp * pint(qy - bg.centres_y) * pint(qx - bg.centres_x), axis=-1)
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
        (lambda: syn.random_dots(shape=(8000, 8000), dot_diameter_px=0.5, density=2), "dots"),
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


# ---------------------------------------------------------------------------
# known fields
# ---------------------------------------------------------------------------


def test_gaussian_blob_check_value():
    # Source: closed-form line-of-sight integral of a Gaussian index blob (derived by hand from
    # eps = (1/n0) int dn/dx dz, Exp. Fluids 2019 doi:10.1007/s00348-019-2865-4 Eq. 1), check value:
    # A = 1e-5, s = 10 mm, (x, y) = (4, 2) mm -> eps_x = -1.160930e-5 rad.
    ey, ex = syn.gaussian_blob_deflection(2e-3, 4e-3, amplitude=1e-5, radius_m=10e-3)
    assert float(ex) == pytest.approx(-1.160930e-5, rel=1e-6)
    assert float(ey) == pytest.approx(-1.160930e-5 / 2, rel=1e-6)  # y/x = 1/2 by symmetry
    # Source: scipy.integrate.quad of (1/n0) dn/dx along z (definition, Exp. Fluids 2019 Eq. 1).
    n0 = 1.000273
    val, _ = integrate.quad(lambda z: -2 * 4e-3 / 1e-4 * 1e-5 * math.exp(-(16e-6 + 4e-6 + z * z) / 1e-4), -0.1, 0.1, epsabs=1e-16)
    _, ex0 = syn.gaussian_blob_deflection(2e-3, 4e-3, amplitude=1e-5, radius_m=10e-3, n0=n0)
    assert float(ex0) == pytest.approx(val / n0, rel=1e-9)


def _gauss(r):
    return np.exp(-(r**2) / 0.09)


def _quartic(r):
    return np.where(r < 1.0, (1 - r**2) ** 2, 0.0)


def test_abel_projection_matches_analytic_pairs():
    # Source: closed-form Abel pairs and their F(0) values (standard integrals, verified by quadrature)
    # (Gaussian treated with a support radius of 3 so truncation is < 1e-15).
    y = np.linspace(0, 0.95, 40)
    np.testing.assert_allclose(syn.abel_projection(_gauss, y, radius=3.0), math.sqrt(math.pi) * 0.3 * _gauss(y), atol=1e-12)
    np.testing.assert_allclose(syn.abel_projection(_quartic, y, radius=1.0), 16 / 15 * (1 - y**2) ** 2.5, atol=1e-12)
    assert float(syn.abel_projection(lambda r: 1 - r**2, 0.0, radius=1.0)) == pytest.approx(1.333333, abs=1e-6)
    assert float(syn.abel_projection(_gauss, 0.0, radius=3.0)) == pytest.approx(0.531736, abs=1e-6)


def test_abel_projection_matches_pyabel_forward():
    # Source: PyAbel 0.9.1 forward transforms (their accuracy on this Gaussian, measured with
    # PyAbel 0.9.1 against the closed form: basex 3.0e-4, hansenlaw 4.8e-3 of the peak).
    abel = pytest.importorskip("abel")
    r = np.linspace(0, 1, 201)
    ours = syn.abel_projection(_gauss, r, radius=3.0)
    basex = np.asarray(
        abel.basex.basex_transform(_gauss(r)[None, :], sigma=1.0, reg=0.0, correction=True, basis_dir=None, dr=r[1], verbose=False, direction="forward")
    ).ravel()
    hansen = np.asarray(abel.hansenlaw.hansenlaw_transform(_gauss(r)[None, :], dr=r[1], direction="forward")).ravel()
    inner = r < 0.9
    assert np.max(np.abs(ours - basex)[inner]) < 4e-4
    assert np.max(np.abs(ours - hansen)[inner]) < 6e-3


def test_axisymmetric_column_matches_abel_pair_derivatives():
    # Source: eps = F'(y)/n0 (derivative of the forward Abel projection) with the closed-form pairs
    # Gaussian: F' = -2 sqrt(pi) y/s exp(-y^2/s^2) (x A);  (1-r^2)^2: F' = -(16/3) y (1-y^2)^{3/2}.
    # Target accuracy ~1e-6 relative to the peak deflection.
    a, n0 = 2e-4, 1.00027
    x = np.linspace(-0.98, 0.98, 99)
    y = np.zeros_like(x)
    ey, ex = syn.axisymmetric_column_deflection(y, x, index_profile=lambda r: n0 + a * _gauss(r), radius_m=3.0, n0=n0)
    exact = a * (-2 * math.sqrt(math.pi) * x / 0.3 * _gauss(x)) / n0
    assert np.max(np.abs(ex - exact)) < 1e-6 * np.max(np.abs(exact))
    assert np.all(ey == 0)
    _, ex_an = syn.gaussian_column_deflection(y, x, amplitude=a, radius_m=0.3, n0=n0)
    np.testing.assert_allclose(ex_an, exact, rtol=1e-12, atol=0)
    _, ex = syn.axisymmetric_column_deflection(y, x, index_profile=lambda r: n0 + a * _quartic(r), radius_m=1.0, n0=n0)
    exact = a * (-16 / 3 * x * (1 - x**2) ** 1.5) / n0
    assert np.max(np.abs(ex - exact)) < 1e-6 * np.max(np.abs(exact))
    # sampled profile (cubic spline of 2001 samples)
    rs = np.linspace(0, 3.0, 2001)
    _, ex = syn.axisymmetric_column_deflection(y, x, index_profile=(rs, n0 + a * _gauss(rs)), radius_m=3.0, n0=n0)
    exact = a * (-2 * math.sqrt(math.pi) * x / 0.3 * _gauss(x)) / n0
    assert np.max(np.abs(ex - exact)) < 1e-5 * np.max(np.abs(exact))


def test_column_deflection_matches_pyabel_projection_gradient():
    # Source: PyAbel basex forward projection, differentiated with numpy.gradient
    # (2nd order, dr = 0.005): agreement to ~1e-3 of the peak deflection.
    abel = pytest.importorskip("abel")
    r = np.linspace(0, 1, 201)
    proj = np.asarray(
        abel.basex.basex_transform(_gauss(r)[None, :], sigma=1.0, reg=0.0, correction=True, basis_dir=None, dr=r[1], verbose=False, direction="forward")
    ).ravel()
    slope = np.gradient(proj, r[1])
    _, ex = syn.axisymmetric_column_deflection(np.zeros_like(r), r, index_profile=lambda q: 1 + _gauss(q), radius_m=3.0, n0=1.0)
    inner = (r > 0.02) & (r < 0.9)
    assert np.max(np.abs(ex - slope)[inner]) < 2e-3 * np.max(np.abs(ex))


def test_cfd_grid_line_of_sight_matches_blob():
    # Source: closed-form Gaussian blob deflection (see test_gaussian_blob_check_value); the
    # gridded route (trapezoid in z, 4th-order differences, h = s/16) must agree to 5e-5
    # (measured 1.9e-5).
    s, a = 0.01, 1e-5
    h = s / 16
    ax = np.arange(-64, 65) * h
    yy, xx, zz = np.meshgrid(ax, ax, ax, indexing="ij")
    field = 1.0 + a * np.exp(-(xx**2 + yy**2 + zz**2) / s**2)
    ey, ex = syn.line_of_sight_deflection(field, spacing_m=(h, h, h), n0=1.0)
    y2, x2 = np.meshgrid(ax, ax, indexing="ij")
    ey_a, ex_a = syn.gaussian_blob_deflection(y2, x2, amplitude=a, radius_m=s)
    peak = np.abs(ex_a).max()
    assert np.max(np.abs(ex - ex_a)) < 5e-5 * peak
    assert np.max(np.abs(ey - ey_a)) < 5e-5 * peak


def _medium(gas="air"):
    media = pytest.importorskip("bos.media")
    return media.Medium(gas=gas, wavelength_m=532e-9, temperature_k=293.15, pressure_pa=101325.0)


def test_hot_column_matches_linearised_gas_law():
    # Source: ideal gas rho ~ 1/T and Gladstone-Dale n - 1 = K rho (Merzkirch 1987, Flow Visualization; from memory):
    # for a small rise dT, n - n0 ~= -(n0 - 1) dT / T0 * exp(-r^2/s^2), a Gaussian column
    # (analytic deflection from the closed-form Gaussian Abel pair).  Nonlinearity ~ dT/T0 = 2e-4.
    # Nitrogen: bos.media treats it as an ideal gas (air uses the CIPM Z(T), whose
    # T dZ/dT ~ 3e-3 would add a real-gas term to the linearisation).
    medium = _medium("n2")
    n0 = medium.ambient_index
    dt, s = 0.05, 0.02
    prof = syn.axisymmetric_temperature_column(delta_t_k=dt, radius_m=s, medium=medium)
    x = np.linspace(-0.05, 0.05, 101)
    _, ex = syn.axisymmetric_column_deflection(0 * x, x, index_profile=prof, radius_m=6 * s, n0=n0)
    _, ex_lin = syn.gaussian_column_deflection(0 * x, x, amplitude=-(n0 - 1) * dt / 293.15, radius_m=s, n0=n0)
    assert np.max(np.abs(ex - ex_lin)) < 5e-4 * np.abs(ex_lin).max()
    # the same column from a gridded temperature field (uniform along y)
    h = s / 10
    ax = np.arange(-60, 61) * h
    yy, xx, zz = np.meshgrid(np.arange(5) * h, ax, ax, indexing="ij")
    temp = 293.15 + dt * np.exp(-(xx**2 + zz**2) / s**2)
    ey_g, ex_g = syn.line_of_sight_deflection(temp, spacing_m=(h, h, h), kind="temperature", medium=medium)
    _, ex_c = syn.axisymmetric_column_deflection(0 * ax, ax, index_profile=prof, radius_m=6 * s, n0=n0)
    assert np.max(np.abs(ex_g[2] - ex_c)) < 1e-3 * np.abs(ex_c).max()
    assert np.max(np.abs(ey_g)) < 1e-9 * np.abs(ex_c).max()


def test_planar_layer_against_two_d_relation():
    # Source: 2-D object of width W (Exp. Fluids 2019 Eq. 1 with n - 1 = K rho): d(rho)/dy = n0 eps_y / (K W),
    # i.e. eps_y = (W / n0) dn/dy for n - n0 = A exp(-y^2/s^2) (derivative by hand).
    y = np.linspace(-0.03, 0.03, 61)
    ey, ex = syn.planar_layer_deflection(y, 0 * y, amplitude=-1e-6, thickness_m=0.01, width_m=0.2, n0=1.0003)
    dn_dy = -1e-6 * (-2 * y / 1e-4) * np.exp(-(y**2) / 1e-4)
    np.testing.assert_allclose(ey, 0.2 / 1.0003 * dn_dy, rtol=1e-12, atol=1e-20)
    assert np.all(ex == 0)


def test_rig_geometry_and_sign_toward_axis():
    # Source: geometry check values (TABLE_3_1 row 1 in test_optics.py, computed from Raffel 2015,
    # Exp. Fluids 56:60): f = 50 mm, Z_A = 1 m, Z_D = 0.5 m, 5 um pixels
    # -> S = 17.24 mm/rad = 3448 px/rad; design.md: a hot column's displacement points to its axis.
    optics = pytest.importorskip("bos.optics")
    rig = optics.Rig(focal_length_m=0.05, pixel_pitch_m=5e-6, f_number=8, z_a_m=1.0, z_d_m=0.5)
    dy, dx = syn.displacement_from_deflection(np.array([1e-4]), np.array([-2e-4]), rig=rig)
    assert float(dy[0]) == pytest.approx(-0.3448, rel=1e-3)
    assert float(dx[0]) == pytest.approx(+0.6897, rel=1e-3)
    medium = _medium()
    prof = syn.axisymmetric_temperature_column(delta_t_k=30.0, radius_m=0.01, medium=medium)

    def hot(y, x):
        return syn.axisymmetric_column_deflection(y, x, index_profile=prof, radius_m=0.06, n0=medium.ambient_index)

    field = syn.displacement_from_field(hot, rig=rig, shape=(64, 256))
    rows, cols = np.mgrid[0:64, 0:256].astype(float)
    _, dx = field(rows, cols)
    y_m, x_m = syn.pixel_to_object(rows, cols, shape=(64, 256), rig=rig)
    assert x_m[0, 0] == pytest.approx(-127.5 * rig.object_pixel_m)
    moving = np.abs(dx) > 1e-3
    assert moving.sum() > 100
    assert np.all(np.sign(dx[moving]) == -np.sign(x_m[moving]))  # toward the axis x = 0


def test_rendered_motion_direction_with_independent_registration():
    # Source: skimage.registration.phase_cross_correlation (returns the shift that
    # registers the moving image onto the reference, i.e. minus the feature motion).
    registration = pytest.importorskip("skimage.registration")
    bg = syn.random_dots(shape=(128, 128), seed=8)
    ref = syn.render(bg, seed=1)
    meas = syn.render(bg, camera_shift=(0.6, -1.3), seed=2)
    shift, _, _ = registration.phase_cross_correlation(ref, meas, upsample_factor=50)
    np.testing.assert_allclose(shift, [-0.6, 1.3], atol=0.05)


# ---------------------------------------------------------------------------
# bos synth command
# ---------------------------------------------------------------------------


def _invoke(args):
    from typer.testing import CliRunner

    from cli.app import get_app

    return CliRunner().invoke(get_app(), ["synth", *args])


def test_cli_synth_writes_pair_and_truth(tmp_path):
    # Source: design.md sign physics (hot column -> displacement toward the axis) and the
    # sign link d = -S eps of docs/architecture.md; images read back with imageio / tifffile.
    import json

    import imageio.v3 as iio

    res = _invoke(["--field", "hot-column", "--rows", "48", "--cols", "96", "--out", str(tmp_path), "--json", "--delta-t-k", "60"])
    assert res.exit_code == 0, res.output
    summary = json.loads(res.stdout)
    assert summary["shape"] == [48, 96] and len(summary["files"]) == 4  # + the experiment file
    ref = iio.imread(tmp_path / "synthetic_reference.png")
    assert ref.dtype == np.uint16 and ref.shape == (48, 96) and 0 < ref.max() <= 4095
    with np.load(tmp_path / "synthetic_truth.npz") as t:
        dx, ex, x_m, s = t["displacement_x_px"], t["deflection_x_rad"], t["x_m"], float(t["sensitivity_px_per_rad"])
    np.testing.assert_allclose(dx, -s * ex, rtol=1e-12, atol=1e-15)
    moving = np.abs(dx) > 1e-4
    assert np.all(np.sign(dx[moving]) == -np.sign(np.broadcast_to(x_m[None, :], dx.shape)[moving]))
    assert summary["max_displacement_px"] == pytest.approx(np.abs(dx).max())

    res = _invoke(["--field", "uniform", "--dx-px", "1", "--rows", "32", "--cols", "40", "--out", str(tmp_path),
                   "--format", "tiff", "--no-noise", "--name", "u"])
    assert res.exit_code == 0, res.output
    import tifffile

    a, b = tifffile.imread(tmp_path / "u_reference.tif"), tifffile.imread(tmp_path / "u_measurement.tif")
    np.testing.assert_array_equal(b[:, 1:], a[:, :-1])  # features moved by +1 px in x


@pytest.mark.parametrize(
    "args, word",
    [
        (["--field", "vortex"], "field"),
        (["--dot-px", "-2"], "dot_diameter_px"),
        (["--format", "bmp"], "format"),
        (["--rows", "0"], "shape"),
        (["--radius-mm", "0"], "radius"),
        (["--bit-depth", "20"], "bit_depth"),
    ],
)
def test_cli_synth_bad_options_exit_2(tmp_path, args, word):
    # Source: project CLI rule (docs/architecture.md): bad input -> one line on stderr, exit 2.
    res = _invoke(["--out", str(tmp_path), "--rows", "16", "--cols", "16", *args])
    assert res.exit_code == 2
    err = res.stderr.strip()
    assert err.startswith("error:") and "\n" not in err and word in err
