"""Deflection geometry and density/temperature reconstruction (bos.reconstruct.deflection, .density).

Outside sources: BOS geometry check values computed with numpy from Raffel
(2015), Exp. Fluids 56:60 and Exp. Fluids (2019) doi:10.1007/s00348-019-2865-4,
Eq. 1 (TABLE_3_1 in test_optics.py: sensitivity and eps_min),
analytic profiles (Gaussian temperature column, Gaussian planar layer) pushed
through the forward model of bos.synthetic (quadrature of the forward Abel
transform and of eps = (1/n0) int grad n dz), a ray-equation trace written here from
first principles (numpy), and numpy Monte Carlo for the uncertainty.
"""

import numpy as np
import pytest

from bos import synthetic as S
from bos.errors import InputError
from bos.media import Medium
from bos.optics import Rig
from bos.reconstruct import (abel_invert_deflection, axisymmetric_density, deflection_from_displacement,
                             object_coordinates, obliquity_error, planar_density, planar_index_gradient, ray_slopes)

AIR = Medium()


def test_table_3_1_deflection_per_displacement():
    # TABLE_3_1 row 1 (test_optics.py, computed): f 50 mm, Z_A 1 m, Z_D 0.5 m, 5 um pixels: eps_min at 0.1 px = 29.0 urad
    rig = Rig(focal_length_m=0.05, pixel_pitch_m=5e-6, f_number=8, z_a_m=1.0, z_d_m=0.5)
    ey, ex = deflection_from_displacement(np.array([0.1]), np.array([-0.02]), rig=rig)
    assert ey[0] == pytest.approx(-29.0e-6, rel=2e-3)  # minus: d = -(M Z_D / pitch) eps
    assert ex[0] == pytest.approx(5.8e-6, rel=2e-3)


def test_object_coordinates_follow_architecture_formula():
    rig = Rig(focal_length_m=0.05, pixel_pitch_m=5e-6, f_number=8, z_a_m=1.0, z_d_m=0.5)
    y, x = object_coordinates(np.array([0.0, 99.0]), np.array([49.5]), rig=rig, shape=(100, 100))
    # pitch Z_A / z_i with z_i = f Z_B / (Z_B - f) (docs/architecture.md)
    pix = 5e-6 * 1.0 / (0.05 * 1.5 / 1.45)
    assert y == pytest.approx([-49.5 * pix, 49.5 * pix]) and x == pytest.approx([0.0])


def trace_slab(t_y, t_x, *, grad, n0, z_a, width, z_b, steps=4000):
    """Background hit of the chief ray with slopes (t_y, t_x) through a slab of uniform grad n.

    Ray equation d/ds (n dr/ds) = grad n, integrated with the midpoint rule (first principles).
    Inside the slab z in [z_a - W/2, z_a + W/2]; straight lines elsewhere.
    """
    d = np.array([t_y, t_x, 1.0]) / np.sqrt(1 + t_y**2 + t_x**2)
    z0 = z_a - width / 2
    r = d * z0 / d[2]
    T = n0 * d
    ds = width / d[2] / steps
    g = np.array([grad[0], grad[1], 0.0])
    y_ref = r.copy()
    for _ in range(steps * 2):
        if r[2] >= z_a + width / 2:
            break
        n = n0 + g @ (r - y_ref)
        rm = r + 0.5 * ds * T / n
        T = T + ds * g
        r = r + ds * T / (n0 + g @ (rm - y_ref))
    u = T / np.linalg.norm(T)
    return r + u * (z_b - r[2]) / u[2]


def test_obliquity_correction_against_ray_trace():
    rig = Rig(focal_length_m=0.05, pixel_pitch_m=5e-6, f_number=8, z_a_m=1.0, z_d_m=0.5)
    shape = (2001, 2001)
    rows = np.array([100.0, 1000.0])  # a ray 6 deg off axis and the axis ray
    cols = np.array([400.0])
    ty, tx = ray_slopes(rows, cols, rig=rig, shape=shape)
    n0, width = 1.000273, 0.2
    grad = (2e-4, -1e-4)  # dn/dy, dn/dx [1/m]
    d = np.zeros((2, 2))
    for i in range(2):
        hit0 = trace_slab(ty[i, 0], tx[i, 0], grad=(0, 0), n0=n0, z_a=rig.z_a, width=width, z_b=rig.z_b)
        hit = trace_slab(ty[i, 0], tx[i, 0], grad=grad, n0=n0, z_a=rig.z_a, width=width, z_b=rig.z_b)
        # features move opposite to the background shift seen by the pixel, scaled by z_i / Z_B
        d[i] = -(hit - hit0)[:2] * rig.magnification / rig.pixel_pitch_m
    slopes = (ty, tx)
    eps = deflection_from_displacement(d[:, :1], d[:, 1:], rig=rig, ray_slopes=slopes)
    gy, gx = planar_index_gradient(*eps, width_m=width, n0=n0, ray_slopes=slopes)
    py, px = planar_index_gradient(*deflection_from_displacement(d[:, :1], d[:, 1:], rig=rig), width_m=width, n0=n0)
    for i in range(2):
        assert gy[i, 0] == pytest.approx(grad[0], rel=2e-3) and gx[i, 0] == pytest.approx(grad[1], rel=2e-3)
    # the paraxial model is off by 1/cos^2 - 1 = |t|^2 (1.1 % here, 6 deg) on the oblique ray
    t2 = ty[0, 0] ** 2 + tx[0, 0] ** 2
    assert py[0, 0] / grad[0] - 1 == pytest.approx(t2, rel=0.05) and t2 > 0.01
    assert obliquity_error(rig=rig, shape=shape) == pytest.approx(2 * (1000 * rig.object_pixel_m / rig.z_a) ** 2)


def column_case(delta_t=80.0, n_rows=8, n_cols=121, axis_col=60.4, h=0.25e-3, s=4e-3, medium=AIR):
    x = (np.arange(n_cols) - axis_col) * h
    y = np.arange(n_rows) * h
    prof = S.axisymmetric_temperature_column(delta_t_k=delta_t, radius_m=s, medium=medium)
    ey, ex = S.axisymmetric_column_deflection(y[:, None], x[None, :], index_profile=prof, radius_m=5 * s,
                                              n0=medium.ambient_index)
    t_true = medium.temperature_k + delta_t * np.exp(-x**2 / s**2)
    return ey, ex, x, t_true


def test_axisymmetric_hot_column_analytic_deflection():
    ey, ex, x, t_true = column_case()
    res = axisymmetric_density(ey, ex, spacing_m=0.25e-3, medium=AIR)
    assert res.info["axis_position"] == pytest.approx(60.4, abs=0.02)
    assert np.abs(res.temperature - t_true).max() < 0.3  # K, on an 80 K rise
    assert res.info["asymmetry"] < 1e-3
    # sign physics (design.md): the hot core is a diverging lens, less dense than ambient
    assert np.nanmax(res.density[:, 55:66]) < AIR.ambient_density
    assert np.all(ex[:, x > 0.5e-3] > 0)  # deflection away from the axis, toward higher n


def test_hot_column_displacement_points_toward_axis():
    rig = Rig(focal_length_m=0.1, pixel_pitch_m=5e-6, f_number=8, z_a_m=0.5, z_d_m=1.5)
    ey, ex, x, _ = column_case()
    dy, dx = S.displacement_from_deflection(ey, ex, rig=rig)
    assert np.all(dx[:, x > 0.5e-3] < 0) and np.all(dx[:, x < -0.5e-3] > 0)
    back = deflection_from_displacement(dy, dx, rig=rig)
    assert np.allclose(back[1], ex, rtol=1e-12, atol=0)


def test_horizontal_axis_equals_transposed_vertical():
    ey, ex, x, t_true = column_case(n_rows=5)
    vert = axisymmetric_density(ey, ex, spacing_m=0.25e-3, medium=AIR, axis_position=60.4)
    hor = axisymmetric_density(ex.T, ey.T, spacing_m=0.25e-3, medium=AIR, axis="horizontal", axis_position=60.4)
    assert np.allclose(hor.temperature, vert.temperature.T, rtol=0, atol=1e-9)


def test_onion_peeling_and_mixture_medium():
    # helium-air mixture (Medium composition): the same analytic column recovered with the mixture's K
    mix = Medium(composition={"air": 0.7, "he": 0.3})
    ey, ex, x, t_true = column_case(delta_t=60.0, medium=mix)
    res = axisymmetric_density(ey, ex, spacing_m=0.25e-3, medium=mix, method="onion_peeling", axis_position=60.4)
    assert np.abs(res.temperature - t_true).max() < 1.0  # onion peeling is the coarser method
    assert res.info["reference_index"] == pytest.approx(mix.ambient_index)


def test_axisymmetric_uncertainty_matches_monte_carlo():
    ey, ex, x, t_true = column_case(n_rows=1)
    sigma = 2e-6
    res = axisymmetric_density(ey, ex, spacing_m=0.25e-3, medium=AIR, axis_position=60.4, sigma_x=sigma)
    rng = np.random.default_rng(4)
    temps = np.array([axisymmetric_density(ey, ex + sigma * rng.standard_normal(ex.shape), spacing_m=0.25e-3,
                                           medium=AIR, axis_position=60.4).temperature[0] for _ in range(200)])
    scatter = temps.std(axis=0)
    assert np.allclose(scatter[10:110], res.sigma_temperature[0, 10:110], rtol=0.2)


def planar_case(n=48, h=0.5e-3, s=2e-3, width=0.1, delta_t=30.0):
    y = (np.arange(n) - (n - 1) / 2) * h
    x = (np.arange(n) - (n - 1) / 2) * h
    amp = float(AIR.index_from_density(AIR.density_from_temperature(AIR.temperature_k + delta_t))) - AIR.ambient_index
    ey, ex = S.planar_layer_deflection(y[:, None] * np.ones((1, n)), x[None, :] * np.ones((n, 1)), amplitude=amp,
                                       thickness_m=s, width_m=width, n0=AIR.ambient_index)
    n_true = AIR.ambient_index + amp * np.exp(-y**2 / s**2)
    rho_true = AIR.density_from_index(n_true)[:, None] * np.ones((1, n))
    return ey, ex, rho_true, width


def test_planar_layer_analytic_with_reference_edge_and_uncertainty():
    ey, ex, rho_true, width = planar_case()
    sig = np.full(ey.shape, 2e-6)
    res = planar_density(ey, ex, spacing_m=0.5e-3, width_m=width, medium=AIR, reference_region="top",
                         sigma_y=sig, sigma_x=sig)
    deficit = np.abs(rho_true - AIR.ambient_density).max()
    assert np.sqrt(np.mean((res.density - rho_true) ** 2)) < 0.01 * deficit
    assert res.density[24, 24] < AIR.ambient_density  # hot layer is less dense
    # Monte Carlo sigma: zero spread at the reference edge, growing away from it
    assert res.sigma_density[0].mean() < res.sigma_density[-1].mean()
    assert np.all(np.isfinite(res.sigma_temperature))
    t_true = AIR.temperature_from_density(rho_true[24, 24])
    assert res.temperature[24, 24] == pytest.approx(t_true, abs=0.5)


def test_planar_masked_and_invalid_flags_are_kept_apart():
    ey, ex, rho_true, width = planar_case()
    masked = np.zeros(ey.shape, bool)
    invalid = np.zeros(ey.shape, bool)
    masked[30:36, 10:20] = True
    invalid[5, 40] = True
    ey = np.where(masked | invalid, np.nan, ey)
    res = planar_density(ey, ex, spacing_m=0.5e-3, width_m=width, medium=AIR, reference_region="top",
                         masked=masked, invalid=invalid)
    assert np.array_equal(res.masked, masked) and np.array_equal(res.invalid, invalid)
    assert np.isnan(res.density[masked | invalid]).all()
    good = ~(masked | invalid)
    assert np.sqrt(np.mean((res.density - rho_true)[good] ** 2)) < 0.01 * np.abs(rho_true - AIR.ambient_density).max()


def test_bad_input():
    ey, ex, _, width = planar_case(n=12)
    with pytest.raises(InputError, match="no reference region"):
        planar_density(ey, ex, spacing_m=1e-3, width_m=width, medium=AIR)
    bad = ey.copy()
    bad[3, 3] = np.nan
    with pytest.raises(InputError, match="not flagged"):
        planar_density(bad, ex, spacing_m=1e-3, width_m=width, medium=AIR, reference_region="top")
    with pytest.raises(InputError, match="whole field is masked"):
        planar_density(ey, ex, spacing_m=1e-3, width_m=width, medium=AIR, reference_region="top",
                       masked=np.ones(ey.shape, bool))
    with pytest.raises(InputError, match="outside the image"):
        axisymmetric_density(ey, ex, spacing_m=1e-3, medium=AIR, axis_position=-3.0)
    with pytest.raises(InputError, match="axis must be"):
        axisymmetric_density(ey, ex, spacing_m=1e-3, medium=AIR, axis="diagonal")
    with pytest.raises(InputError, match="object width"):
        planar_density(ey, ex, spacing_m=1e-3, width_m=0.0, medium=AIR, reference_region="top")


def test_vectors_moved_to_their_ray_pixels():
    # analytic: a feature at reference p is seen at x with x - d(x) = p (fixed point solved here, numpy);
    # the vector reported at p carries d(x); after the move it must equal d(p)
    from bos.reconstruct import displacement_at_ray_pixels

    cols = np.arange(0.0, 400.0, 8.0)
    rows = np.arange(0.0, 80.0, 8.0)
    dfun = lambda x: 2.0 * np.sin(2 * np.pi * x / 200.0)  # noqa: E731  px, up to 2 px
    x = cols.copy()
    for _ in range(50):
        x = cols + dfun(x)
    reported = np.tile(dfun(x), (rows.size, 1))
    dy0 = np.zeros_like(reported)
    _, moved = displacement_at_ray_pixels(dy0, reported, rows_px=rows, cols_px=cols)
    inner = slice(2, -2)
    before = np.abs(reported - dfun(cols))[:, inner].max()
    after = np.abs(moved - dfun(cols))[:, inner].max()
    assert before > 0.05 and after < 0.1 * before  # bias d.grad(d) = 0.063 px before


def test_axisymmetric_obliquity_error_size_on_an_example():
    # State-and-test of the small-object assumption for Abel inversion (docs/reconstruction.md):
    # rays traced from first principles (ray equation, midpoint rule, numpy) from a pinhole through a
    # 50 K Gaussian column (1/e radius s = 5 mm) on the optical axis; the paraxial BOS model + Abel
    # inversion then misses the centreline index change by ~1.3 (s/Z_A)^2 on top of the far-camera error.
    s, dt = 5e-3, 50.0
    radius = 4 * s
    prof = S.axisymmetric_temperature_column(delta_t_k=dt, radius_m=s, medium=AIR)
    n0 = AIR.ambient_index

    def grad(p, z_a):
        x, z = p[:, 0], p[:, 1] - z_a
        rho = np.maximum(np.hypot(x, z), 1e-12)
        g = (prof(rho + 1e-6) - prof(rho - 1e-6)) / 2e-6 / rho
        return np.stack([g * x, g * z], 1)

    def background_hit(tx, z_a, z_b, steps=3000):
        d = np.stack([tx, np.ones_like(tx)], 1)
        d /= np.linalg.norm(d, axis=1)[:, None]
        r = d * ((z_a - 1.2 * radius) / d[:, 1])[:, None]
        T = n0 * d
        ds = 2.4 * radius / steps
        index = lambda p: prof(np.hypot(p[:, 0], p[:, 1] - z_a))  # noqa: E731
        while not (r[:, 1] > z_a + 1.2 * radius).all():
            rm = r + 0.5 * ds * T / index(r)[:, None]
            T = T + ds * grad(rm, z_a)
            r = r + ds * T / index(rm)[:, None]
        u = T / np.linalg.norm(T, axis=1)[:, None]
        return r[:, 0] + u[:, 0] * (z_b - r[:, 1]) / u[:, 1]

    errors = {}
    for z_a in (2.0, 0.1):
        z_d = 0.5
        dx = s / 10
        x_o = np.arange(0, radius + dx / 2, dx)  # mid-plane crossing points of the pixel rays
        tx = x_o / z_a
        eps_paraxial = (background_hit(tx, z_a, z_a + z_d) - tx * (z_a + z_d)) / z_d
        dn = abel_invert_deflection(eps_paraxial, dr_m=dx, n0=n0)
        errors[z_a] = abs(dn[0] / (prof(np.array([0.0]))[0] - n0) - 1)
    assert errors[2.0] < 2e-3  # discretisation (10 samples per s) and trace error
    excess = errors[0.1] - errors[2.0]
    assert 0.5 * (s / 0.1) ** 2 < excess < 3 * (s / 0.1) ** 2
