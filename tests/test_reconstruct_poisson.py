"""Least-squares Poisson integration (bos.reconstruct.poisson).

Outside sources: DCT-Neumann check values computed outside the project with
numpy/scipy (Gaussian on [-1, 1]^2; DCT Poisson solver of Simchony, Chellappa
& Shao 1990, IEEE TPAMI 12:435, from memory); analytic manufactured solutions; scipy's sparse LU
(spsolve) and numpy's dense least squares (lstsq) as reference solvers.
"""

import numpy as np
import pytest

from bos.errors import InputError
from bos.reconstruct.analytic import gaussian_potential
from bos.reconstruct.poisson import SOLVERS, integrate_gradient, integrate_gradient_uncertainty


def grid(n, **kw):
    h = 2.0 / n
    x = -1 + (np.arange(n) + 0.5) * h
    phi, gy, gx = gaussian_potential(x[:, None], x[None, :], **kw)
    return h, x, phi, gy, gx


def errors(num, phi):
    ok = np.isfinite(num)
    e = (num[ok] - num[ok].mean()) - (phi[ok] - phi[ok].mean())
    return np.abs(e).max(), np.sqrt(np.mean(e**2))


# DCT-Neumann check values (computed outside the project with numpy/scipy): (N, max error, rms error)
CHECK_VALUES = [(64, 2.7e-3, 3.7e-4), (128, 7.0e-4, 9.5e-5), (256, 1.9e-4, 2.9e-5)]


@pytest.mark.parametrize("n, emax, erms", CHECK_VALUES)
def test_dct_neumann_matches_reference_check_values(n, emax, erms):
    h, _, phi, gy, gx = grid(n, s=0.3)
    got_max, got_rms = errors(integrate_gradient(gy, gx, spacing_m=h, method="dct"), phi)
    # our least-squares face discretisation equals the central-difference divergence in the interior;
    # within 5 % of the tabulated values (which are given to 2 digits)
    assert got_max <= 1.05 * emax and got_rms <= 1.05 * erms
    assert got_max >= 0.5 * emax  # the same discretisation, not a different (better) scheme


def test_second_order_convergence_neumann():
    # second-order scheme (5-point Laplacian, central-difference divergence): halving h quarters the error
    rms = [errors(integrate_gradient(*grid(n, s=0.3)[3:], spacing_m=2.0 / n), grid(n, s=0.3)[2])[1]
           for n in (64, 128, 256)]
    orders = np.log2(np.array(rms[:-1]) / np.array(rms[1:]))
    assert np.all(orders > 1.9)


def off_centre(n):
    # edges carry non-zero values and fluxes (analytic manufactured solution)
    return grid(n, x0=0.3, y0=-0.2, s=0.5)


def edge_values(x, edges):
    f = lambda yy, xx: gaussian_potential(yy, xx, x0=0.3, y0=-0.2, s=0.5)[0]  # noqa: E731
    vals = {"top": f(-1.0, x), "bottom": f(1.0, x), "left": f(x, -1.0), "right": f(x, 1.0)}
    return {e: vals[e] for e in edges}


@pytest.mark.parametrize("edges", [("top", "bottom", "left", "right"), ("top",), ("left", "bottom")])
def test_dirichlet_and_mixed_converge_to_analytic_without_shift(edges):
    # analytic solution, values imposed on the cell edge; no free constant is removed here
    errs = []
    for n in (32, 64, 128):
        h, x, phi, gy, gx = off_centre(n)
        out = integrate_gradient(gy, gx, spacing_m=h, dirichlet=edge_values(x, edges),
                                 boundary="dirichlet" if len(edges) == 4 else "neumann")
        errs.append(np.abs(out - phi).max())
    assert errs[-1] < 3e-4  # measured 2.6e-4 at N = 128 (s = 0.5); the order below is the real check
    assert np.log2(errs[0] / errs[1]) > 1.8 and np.log2(errs[1] / errs[2]) > 1.8


@pytest.mark.parametrize("edges", [(), ("top",), ("right", "bottom"), ("top", "bottom", "left", "right")])
def test_fast_solvers_equal_scipy_sparse_lu(edges):
    # reference: scipy.sparse.linalg.spsolve on the same normal equations
    h, x, phi, gy, gx = off_centre(40)
    rng = np.random.default_rng(1)
    gy = gy + 0.05 * rng.standard_normal(gy.shape)  # non-integrable data: a true least-squares problem
    d = edge_values(x, edges) or None
    ref = integrate_gradient(gy, gx, spacing_m=h, dirichlet=d, method="sparse")
    for m in ("dct", "pcg", "multigrid", "direct"):
        assert np.abs(integrate_gradient(gy, gx, spacing_m=h, dirichlet=d, method=m) - ref).max() < 1e-8


def hole_case(n):
    h, x, phi, gy, gx = grid(n, x0=0.2, s=0.4)
    hole = (x[None, :] + 0.4) ** 2 + (x[:, None] - 0.3) ** 2 < 0.25**2
    gy, gx = gy.copy(), gx.copy()
    gy[hole] = np.nan  # no data inside the model
    gx[hole] = np.nan
    return h, phi, gy, gx, hole


@pytest.mark.parametrize("method", ["pcg", "multigrid"])
def test_masked_domain_with_hole_converges_to_analytic(method):
    errs = []
    for n in (64, 128):
        h, phi, gy, gx, hole = hole_case(n)
        out = integrate_gradient(gy, gx, spacing_m=h, mask=hole, method=method)
        assert np.isnan(out[hole]).all() and np.isfinite(out[~hole]).all()
        errs.append(errors(out, np.where(hole, np.nan, phi))[0])
    assert errs[1] < 4.5e-4  # vs the analytic solution; measured 3.8e-4 at N = 128
    assert np.log2(errs[0] / errs[1]) > 1.8


def test_masked_solution_is_the_dense_least_squares_solution():
    # numpy.linalg.lstsq on the face equations (phi_b - phi_a)/h = (g_a + g_b)/2, written out here
    rng = np.random.default_rng(3)
    ny, nx, h = 9, 11, 0.1
    gy, gx = rng.standard_normal((ny, nx)), rng.standard_normal((ny, nx))
    wy, wx = rng.uniform(0.5, 4, (ny, nx)), rng.uniform(0.5, 4, (ny, nx))
    mask = np.zeros((ny, nx), bool)
    mask[3:6, 4:7] = True
    idx = -np.ones((ny, nx), int)
    idx[~mask] = np.arange((~mask).sum())
    rows, rhs = [], []
    for (a, b, g, w) in [((i, j), (i + 1, j), gy, wy) for i in range(ny - 1) for j in range(nx)] + \
                        [((i, j), (i, j + 1), gx, wx) for i in range(ny) for j in range(nx - 1)]:
        if mask[a] or mask[b]:
            continue
        sw = np.sqrt(2 * w[a] * w[b] / (w[a] + w[b]))  # harmonic-mean face weight (documented)
        r = np.zeros(idx.max() + 1)
        r[idx[a]], r[idx[b]] = -sw / h, sw / h
        rows.append(r)
        rhs.append(sw * 0.5 * (g[a] + g[b]))
    sol = np.linalg.lstsq(np.array(rows), np.array(rhs), rcond=None)[0]
    want = np.full((ny, nx), np.nan)
    want[~mask] = sol - sol.mean()
    for m in ("pcg", "multigrid", "sparse", "direct"):
        got = integrate_gradient(gy, gx, spacing_m=h, mask=mask, weights=(wy, wx), method=m)
        assert np.nanmax(np.abs(got - want)) < 1e-8


def test_weighted_least_squares_beats_plain_with_varying_noise():
    # noise 20x larger in the right third; weights 1/sigma^2 (analytic truth)
    n = 128
    h, x, phi, gy, gx = grid(n, s=0.4)
    sigma = np.where(x[None, :] > 0.33, 2.0, 0.1) * np.ones((n, 1))
    rng = np.random.default_rng(7)
    ny_, nx_ = gy + sigma * rng.standard_normal(gy.shape), gx + sigma * rng.standard_normal(gx.shape)
    plain = integrate_gradient(ny_, nx_, spacing_m=h)
    weighted = integrate_gradient(ny_, nx_, spacing_m=h, weights=1 / sigma**2)
    left = x[None, :].repeat(n, 0) < 0.33
    rms_plain = np.sqrt(np.mean(((plain - plain[left].mean()) - (phi - phi[left].mean()))[left] ** 2))
    rms_w = np.sqrt(np.mean(((weighted - weighted[left].mean()) - (phi - phi[left].mean()))[left] ** 2))
    assert rms_w < 0.5 * rms_plain


def test_reference_edge_sets_level_and_disconnected_part_is_nan():
    h, x, phi, gy, gx = grid(48, s=0.4)
    mask = np.zeros(phi.shape, bool)
    mask[:, 30:33] = True  # cuts the domain into a left and a right part
    out = integrate_gradient(gy, gx, spacing_m=h, mask=mask, reference_region="left", reference_value=5.0)
    assert out[:, 0].mean() == pytest.approx(5.0, abs=1e-12)
    assert np.isnan(out[:, 33:]).all()  # right part has no reference: its level is unknown
    left = out[:, :30]
    assert np.abs((left - left[:, 0].mean()) - (phi[:, :30] - phi[:, 0].mean())).max() < 4e-3  # measured 2.7e-3 (N = 48)


def test_monte_carlo_uncertainty_matches_linear_propagation():
    # exact linear propagation: the solution map L (columns = responses to unit inputs, numpy),
    # sigma_phi^2 = sum_k L_ik^2 sigma_k^2; Monte Carlo with 400 samples agrees to ~10 %
    ny, nx, h = 6, 7, 0.2
    sig = 0.3
    opts = dict(spacing_m=h, reference_region="top")
    zero = np.zeros((ny, nx))
    var = np.zeros((ny, nx))
    for comp in range(2):
        for k in range(ny * nx):
            e = zero.ravel().copy()
            e[k] = 1.0
            e = e.reshape(ny, nx)
            resp = integrate_gradient(e if comp == 0 else zero, zero if comp == 0 else e, **opts)
            var += (resp * sig) ** 2
    mc = integrate_gradient_uncertainty(zero, zero, sigma_y=sig, sigma_x=sig, n_samples=400, seed=2, **opts)
    inner = np.sqrt(var) > 1e-9
    assert np.allclose(mc[inner], np.sqrt(var)[inner], rtol=0.15)
    again = integrate_gradient_uncertainty(zero, zero, sigma_y=sig, sigma_x=sig, n_samples=400, seed=2, **opts)
    assert np.array_equal(mc, again)  # fixed seed: reproducible


def test_registry_names():
    assert {"dct", "pcg", "multigrid", "sparse", "direct"} <= set(SOLVERS)


@pytest.mark.parametrize("kwargs, match", [
    (dict(mask=np.ones((8, 8), bool)), "no valid vectors"),
    (dict(method="nope"), "unknown integration method"),
    (dict(dirichlet={"north": 0.0}), "unknown edge"),
    (dict(boundary="dirichlet", dirichlet={"top": 0.0}), "all four edges"),
    (dict(reference_region=np.zeros((8, 8), bool)), "reference region is empty"),
    (dict(reference_region="middle"), "unknown reference edge"),
    (dict(spacing_m=-1.0), "spacing_m"),
])
def test_bad_input(kwargs, match):
    g = np.ones((8, 8))
    kw = dict(spacing_m=1.0)
    kw.update(kwargs)
    with pytest.raises(InputError, match=match):
        integrate_gradient(g, g, **kw)


def test_unflagged_nan_and_reference_without_valid_vectors():
    g = np.ones((8, 8))
    bad = g.copy()
    bad[2, 2] = np.nan
    with pytest.raises(InputError, match="NaN/inf vectors not flagged"):
        integrate_gradient(bad, g, spacing_m=1.0)
    mask = np.zeros((8, 8), bool)
    mask[0] = True
    with pytest.raises(InputError, match="reference region contains no valid vectors"):
        integrate_gradient(g, g, spacing_m=1.0, mask=mask, reference_region="top")


def test_dirichlet_part_and_reference_part_each_get_their_level():
    # analytic solution; left part fixed by its Dirichlet edge, right part (cut off) by the region
    h, x, phi, gy, gx = off_centre(64)
    mask = np.zeros(phi.shape, bool)
    mask[:, 40:42] = True
    region = np.zeros(phi.shape, bool)
    region[:, -1] = True
    out = integrate_gradient(gy, gx, spacing_m=h, mask=mask, dirichlet=edge_values(x, ("left",)),
                             reference_region=region, reference_value=float(phi[:, -1].mean()))
    assert np.abs(out[:, :40] - phi[:, :40]).max() < 5e-3
    assert np.abs(out[:, 42:] - phi[:, 42:]).max() < 5e-3


def test_weighted_multigrid_with_zero_weights_prints_nothing_and_equals_sparse_lu(capfd):
    # Scales of a measured field (step 0.6 mm, weights 1/sigma^2 ~ 1e8-3e9, 5 % zero weights): the
    # former Ruge-Stuben hierarchy printed "Inner denominator was zero." on fd 1 here (a few hundred
    # times).  Zero-weight faces also split the domain into parts the solver must pin separately.
    # Reference: scipy's sparse LU (splu) on the same normal equations.
    rng = np.random.default_rng(4)
    ny, nx, h = 48, 64, 6e-4
    wy, wx = 10 ** rng.uniform(8, 9.5, (2, ny, nx))
    wy[rng.random((ny, nx)) < 0.05] = 0.0
    wx[rng.random((ny, nx)) < 0.05] = 0.0
    gy, gx = 1e-3 * rng.standard_normal((2, ny, nx))
    opts = dict(spacing_m=h, weights=(wy, wx))
    got = integrate_gradient(gy, gx, method="multigrid", **opts)
    assert capfd.readouterr().out == ""
    ref = integrate_gradient(gy, gx, method="sparse", **opts)
    assert np.isfinite(got).sum() == np.isfinite(ref).sum() > 0.99 * ny * nx
    assert np.nanmax(np.abs(got - ref)) < 1e-7 * np.nanmax(np.abs(ref))  # measured 4e-9 (CG rtol 1e-9)
    # the grid Cholesky (separately pinned parts, zero-weight faces) against the same reference
    direct = integrate_gradient(gy, gx, method="direct", **opts)
    assert np.array_equal(np.isfinite(direct), np.isfinite(ref))
    assert np.nanmax(np.abs(direct - ref)) < 1e-9 * np.nanmax(np.abs(ref))
