"""Uncertainty of the integrated field and the solver choice for weighted problems.

Reference: a brute-force Monte Carlo with many samples, computed independently
of the library: the weighted least-squares problem on the faces is written out
as a dense matrix (numpy), its solution map applied to 20 000 Gaussian noise
draws; the exact linear propagation diag(L Sigma L^T) from the same matrix is
checked against it first.
"""

from __future__ import annotations

import numpy as np
import pytest

from bos.reconstruct import poisson
from bos.reconstruct.poisson import (auto_method, integrate_gradient, integrate_gradient_uncertainty,
                                     integrate_gradient_with_uncertainty)

NY, NX, H = 14, 18, 0.05


def case():
    """Weights spanning x100 (smooth trend x10 times random x10), a masked hole, reference = left edge."""
    rng = np.random.default_rng(11)
    yy, xx = np.mgrid[0:NY, 0:NX]
    sig_y = 0.02 * (1 + 9 * xx / (NX - 1)) ** 0.5 * np.exp(rng.uniform(0, np.log(10), (NY, NX)) / 2)
    sig_x = 0.02 * (1 + 9 * yy / (NY - 1)) ** 0.5 * np.exp(rng.uniform(0, np.log(10), (NY, NX)) / 2)
    mask = np.zeros((NY, NX), bool)
    mask[5:8, 8:11] = True
    region = np.zeros((NY, NX), bool)
    region[:, 0] = True
    return sig_y, sig_x, mask, region


def solution_map(wy, wx, mask, region):
    """Dense map noise (g_y cells then g_x cells) -> phi on valid cells, level set on the region (numpy)."""
    idx = -np.ones((NY, NX), int)
    idx[~mask] = np.arange((~mask).sum())
    n = idx.max() + 1
    rows, cols = [], []  # face equations: rows of D (scaled by sqrt w) and of the averaging map
    for axis, w in ((0, wy), (1, wx)):
        for i in range(NY - (axis == 0)):
            for j in range(NX - (axis == 1)):
                a, b = (i, j), ((i + 1, j) if axis == 0 else (i, j + 1))
                if mask[a] or mask[b]:
                    continue
                sw = np.sqrt(2 * w[a] * w[b] / (w[a] + w[b]))
                r = np.zeros(n)
                r[idx[a]], r[idx[b]] = -sw / H, sw / H
                c = np.zeros(2 * NY * NX)
                off = axis * NY * NX
                c[off + a[0] * NX + a[1]] = c[off + b[0] * NX + b[1]] = 0.5 * sw
                rows.append(r)
                cols.append(c)
    D, G = np.array(rows), np.array(cols)
    L = np.linalg.pinv(D) @ G  # least-squares solution for any data, minimum-norm constant
    ref = region[~mask]
    L -= L[ref].mean(axis=0)  # level: mean over the reference cells is zero
    return L


@pytest.fixture(scope="module")
def reference():
    sig_y, sig_x, mask, region = case()
    L = solution_map(1 / sig_y**2, 1 / sig_x**2, mask, region)
    s = np.concatenate([sig_y.ravel(), sig_x.ravel()])
    exact = np.sqrt(((L * s) ** 2).sum(axis=1))
    rng = np.random.default_rng(5)
    acc = np.zeros(L.shape[0])
    for _ in range(10):  # 20 000 brute-force samples in blocks
        z = rng.standard_normal((L.shape[1], 2000)) * s[:, None]
        acc += ((L @ z) ** 2).sum(axis=1)
    brute = np.sqrt(acc / 20000)
    return dict(sig_y=sig_y, sig_x=sig_x, mask=mask, region=region, exact=exact, brute=brute)


def grid(values, mask):
    out = np.full(mask.shape, np.nan)
    out[~mask] = values
    return out


def fast(ref, n_samples, method="auto", seed=0):
    zero = np.zeros((NY, NX))
    return integrate_gradient_uncertainty(zero, zero, sigma_y=ref["sig_y"], sigma_x=ref["sig_x"], spacing_m=H,
                                          mask=ref["mask"], weights=(1 / ref["sig_y"] ** 2, 1 / ref["sig_x"] ** 2),
                                          reference_region=ref["region"], method=method, n_samples=n_samples,
                                          seed=seed)


def test_brute_force_reference_matches_exact_propagation(reference):
    # 20 000 samples: relative precision 1/sqrt(40000) = 0.5 %
    far = reference["exact"] > 0.25 * reference["exact"].max()
    assert np.allclose(reference["brute"][far], reference["exact"][far], rtol=0.02)


def test_fast_uncertainty_against_brute_force(reference):
    brute = grid(reference["brute"], reference["mask"])
    where = brute > 0.25 * np.nanmax(brute)  # where it matters: away from the reference edge (sigma -> 0 there)
    assert where.sum() > 150
    # many samples through the fast path (solves to rtol 1e-3, one multigrid set-up): within 10 % at every
    # point (per-point precision 1/sqrt(2000) = 2.2 %; measured max 0.054, 0.071, 0.061 for seeds 0, 1, 2,
    # the same to 3 digits for both paths)
    for method in ("auto", "multigrid"):  # direct (exact solves) and iterative (rtol 1e-3) sample solves
        many = fast(reference, 1000, method=method)
        assert np.abs(many[where] / brute[where] - 1).max() < 0.10
    # the default 32 samples over 24 seeds: unbiased and with the precision 1/sqrt(2 n) = 12.5 % per point.
    # One seed alone is not a test of the mean: the errors of neighbouring points are strongly correlated
    # (the integrated noise is a smooth field), so a seed's median deviation is one draw of spread ~0.07
    # (measured for seeds 0-23: medians -0.15..0.13, std 0.069, mean -0.001; rms per seed 0.130, max 0.18;
    # the 24 seeds pooled: max 0.057 at any point)
    runs = [fast(reference, 32, seed=seed) for seed in range(24)]
    devs = np.array([r[where] / brute[where] - 1 for r in runs])
    assert abs(np.median(devs, axis=1).mean()) < 0.05  # 3.5 standard errors
    assert 0.09 < np.sqrt(np.mean(devs**2, axis=1)).mean() < 0.16  # about 1/sqrt(64)
    pooled = np.sqrt(np.mean(np.square(runs), axis=0))  # 768 samples
    assert np.abs(pooled[where] / brute[where] - 1).max() < 0.10
    assert np.isnan(fast(reference, 32)[reference["mask"]]).all()


@pytest.mark.parametrize("method", ["pcg", "sparse", "multigrid"])
def test_all_solvers_give_the_same_uncertainty(reference, method):
    # same seed, same noise: the solvers agree to the sample solves' tolerance
    a, b = fast(reference, 8), fast(reference, 8, method=method)
    ok = np.isfinite(a) & (a > 0.05 * np.nanmax(a))
    assert np.allclose(a[ok], b[ok], rtol=0.02)


def test_auto_picks_multigrid_for_widely_spread_weights_and_pcg_otherwise():
    g = np.zeros((NY, NX))
    w = np.ones((NY, NX))
    w[:, :5] = 100.0
    pb = poisson._Problem(g, g, H, None, None, w, "neumann", None)
    assert auto_method(pb) == "multigrid"
    w[:, :5] = 10.0
    assert auto_method(poisson._Problem(g, g, H, None, None, w, "neumann", None)) == "pcg"
    assert auto_method(poisson._Problem(g, g, H, None, None, None, "neumann", None)) == "dct"


def test_failed_pcg_is_not_run_again_for_later_right_hand_sides(monkeypatch):
    # a weight pattern CG cannot finish in 3 iterations: the first solve falls back, later ones go straight
    # to multigrid (one CG call each, not two)
    rng = np.random.default_rng(2)
    w = np.exp(rng.uniform(0, np.log(1e4), (NY, NX)))
    gy, gx = rng.standard_normal((2, NY, NX))
    pb = poisson._Problem(gy, gx, H, None, None, w, "neumann", None)
    solve = poisson.prepare_pcg(pb, maxiter=3)
    calls = []
    real_cg = poisson.spla.cg

    def counting_cg(*args, **kwargs):
        calls.append(kwargs.get("maxiter"))
        return real_cg(*args, **kwargs)

    monkeypatch.setattr(poisson.spla, "cg", counting_cg)
    rhs = poisson._grid_system(pb, rhs_only=True)
    first = solve(rhs.copy())
    assert calls == [3, 1000]  # pcg failed, then multigrid
    second = solve(rhs.copy())
    assert calls == [3, 1000, 1000]
    want = integrate_gradient(gy, gx, spacing_m=H, weights=w, method="sparse")
    for got in (first, second):
        assert np.allclose(got - got.mean(), want, atol=1e-6 * np.abs(want).max())


def test_with_uncertainty_matches_separate_calls_and_reports_progress(reference):
    rng = np.random.default_rng(4)
    gy, gx = rng.standard_normal((2, NY, NX))
    opts = dict(spacing_m=H, mask=reference["mask"], weights=(1 / reference["sig_y"] ** 2, 1 / reference["sig_x"] ** 2),
                reference_region=reference["region"])
    want = integrate_gradient(gy, gx, reference_value=2.0, **opts)
    # small problem: factorised once (direct; progress after the factorisation and after the block of
    # samples, which carries the main solve), larger ones or an explicit choice: multigrid
    for method, name, calls in (("auto", "direct", 2), ("multigrid", "multigrid", 7)):
        seen = []
        phi, sigma, solver = integrate_gradient_with_uncertainty(
            gy, gx, sigma_y=reference["sig_y"], sigma_x=reference["sig_x"], reference_value=2.0, n_samples=6,
            progress=seen.append, method=method, **opts)
        assert solver == name
        assert np.allclose(phi, want, equal_nan=True, atol=1e-9)
        alone = integrate_gradient_uncertainty(gy, gx, sigma_y=reference["sig_y"], sigma_x=reference["sig_x"],
                                               n_samples=6, method=method, **opts)
        assert np.array_equal(sigma, alone, equal_nan=True)
        assert seen == sorted(seen) and seen[-1] == pytest.approx(1.0) and len(seen) == calls


def test_n_samples_below_two_is_an_input_error():
    from bos.errors import InputError

    z = np.zeros((4, 4))
    with pytest.raises(InputError, match="n_samples"):
        integrate_gradient_with_uncertainty(z, z, sigma_y=1.0, sigma_x=1.0, spacing_m=1.0, n_samples=1,
                                            reference_region="left")


def test_density_functions_report_progress_and_the_solver_used():
    from bos.media import Medium
    from bos.reconstruct import axisymmetric_density, planar_density

    rng = np.random.default_rng(8)
    ey, ex = 1e-5 * rng.standard_normal((2, NY, NX))
    sig = 1e-6 * np.exp(rng.uniform(0, np.log(30), (NY, NX)))  # weights span ~x900
    seen = []
    res = planar_density(ey, ex, spacing_m=1e-3, width_m=0.1, medium=Medium(), reference_region="left",
                         sigma_y=sig, sigma_x=sig, n_samples=4, progress=seen.append)
    assert res.info["solver"] == "direct" and res.info["method"] == "auto"  # small: factorised once
    assert seen == sorted(seen) and seen[-1] == 1.0 and len(seen) >= 3
    seen.clear()
    axisymmetric_density(ey, ex, spacing_m=1e-3, medium=Medium(), axis_position=8.0, progress=seen.append)
    assert seen == [0.0, 1.0]


def large_case(n=400):
    """A 400 x 400 weighted problem with a masked disc: above the former 150 000-cell direct limit.

    Gradient of phi = exp(-r^2 / s^2) (analytic), sigma spanning x13 (weights x160), reference = left edge.
    """
    h = 1.0 / n
    c = (np.arange(n) + 0.5) * h
    yy, xx = c[:, None], c[None, :]
    s2 = 0.2**2
    phi = np.exp(-((yy - 0.5) ** 2 + (xx - 0.6) ** 2) / s2)
    gy, gx = -2 * (yy - 0.5) / s2 * phi, -2 * (xx - 0.6) / s2 * phi
    mask = (yy - 0.4) ** 2 + (xx - 0.3) ** 2 < 0.1**2
    rng = np.random.default_rng(3)
    sig = 1e-2 * (1 + 3 * xx) * np.exp(rng.uniform(0, np.log(10), (n, n)) / 2)
    return h, phi, gy, gx, mask, sig


def test_direct_uncertainty_above_the_old_limit_is_one_factorisation(monkeypatch):
    # 400 x 400 with a masked disc (~152 800 cells): before, above 150 000 cells, the samples went to
    # multigrid; now one factorisation (nested dissection on the grid) serves the main solve and all samples
    from bos.reconstruct import _nested

    h, phi, gy, gx, mask, sig = large_case()
    ok = ~mask
    assert 150_000 < ok.sum() <= poisson.MC_DIRECT_MAX_UNKNOWNS
    factorisations = []
    real = _nested.GridCholesky.__init__

    def counting(self, diag, off_y, off_x):
        factorisations.append(diag.shape)
        real(self, diag, off_y, off_x)

    monkeypatch.setattr(_nested.GridCholesky, "__init__", counting)
    opts = dict(spacing_m=h, mask=mask, weights=1 / sig**2, reference_region="left", sigma_y=sig, sigma_x=sig,
                n_samples=8)
    phi_d, sig_d, solver = integrate_gradient_with_uncertainty(gy, gx, **opts)
    assert solver == "direct" and factorisations == [(400, 400)]  # main solve + 8 samples
    # main solve against the analytic field (level: zero mean over the left edge): second-order
    # discretisation error, measured 4.0e-5 of the field's range
    want = phi - phi[:, 0].mean()
    assert np.abs(phi_d[ok] - want[ok]).max() < 2e-4 * np.ptp(want)
    assert np.isnan(phi_d[mask]).all() and np.isnan(sig_d[mask]).all()
    # the same problem by multigrid (main solve to rtol 1e-8, samples to rtol 1e-3; same seed, so the
    # same noise): the main solves agree to the CG tolerance (measured 7e-10 of the range), sigma to the
    # samples' tolerance (measured max 2.0 %, median 0.05 %)
    phi_m, sig_m, solver_m = integrate_gradient_with_uncertainty(gy, gx, method="multigrid", **opts)
    assert solver_m == "multigrid"
    assert np.abs(phi_d[ok] - phi_m[ok]).max() < 1e-6 * np.ptp(want)
    far = sig_m > 0.05 * np.nanmax(sig_m)
    assert np.allclose(sig_d[far], sig_m[far], rtol=0.05)


def test_nested_dissection_order_gives_the_same_solution_as_minimum_degree():
    # a masked grid with a part cut off by the mask (pinned separately) and zero-weight faces;
    # reference: scipy's SuperLU with its own minimum-degree ordering (the former solver) and
    # numpy's dense solve of the same normal equations
    rng = np.random.default_rng(6)
    ny, nx = 37, 52
    gy, gx = rng.standard_normal((2, ny, nx))
    w = np.exp(rng.uniform(0, np.log(600), (ny, nx)))
    w[rng.random((ny, nx)) < 0.03] = 0.0
    mask = np.zeros((ny, nx), bool)
    mask[:, 30] = True  # splits the domain in two parts
    mask[10:15, 5:12] = True
    pb = poisson._Problem(gy, gx, 0.01, mask, None, w, "neumann", None)
    A, b, index = poisson._sparse_system(pb)
    order = poisson._grid_nested_dissection(index)
    assert np.array_equal(np.sort(order), np.arange(A.shape[0]))  # every valid cell once
    rhs = poisson._grid_system(pb, rhs_only=True)
    nd = poisson.prepare_sparse(pb)(rhs.copy())
    mmd = poisson.prepare_sparse(pb, ordering="mmd")(rhs.copy())
    dense = np.linalg.solve(A.toarray(), b)
    scale = np.abs(dense).max()
    ok = pb.valid  # not masked and not zero-weight in both components
    assert np.abs(nd[ok] - dense[index[ok]]).max() < 1e-9 * scale
    assert np.abs(mmd[ok] - dense[index[ok]]).max() < 1e-9 * scale
    assert np.isnan(nd[~ok]).all()
    from bos.errors import InputError

    with pytest.raises(InputError, match="ordering"):
        poisson.prepare_sparse(pb, ordering="amd")


def test_pipelined_block_solves_give_the_same_sigma_bit_for_bit(monkeypatch):
    # the direct path solves blocks of samples in a second thread while the next right-hand
    # sides are built; the samples are added in order, so the result must equal one thread's
    import os

    from bos.reconstruct import poisson

    rng = np.random.default_rng(0)
    gy, gx = rng.standard_normal((60, 70)), rng.standard_normal((60, 70))
    sig = np.exp(0.8 * rng.standard_normal((60, 70)))
    kw = dict(sigma_y=sig, sigma_x=sig, spacing_m=1.0, weights=1 / sig**2, n_samples=20)
    monkeypatch.setattr(poisson, "MC_ONE_BLOCK_MAX_UNKNOWNS", 0)  # blocks of 16: 2, the first with the main solve
    monkeypatch.setattr(os, "cpu_count", lambda: 2)
    phi2, s2, solver = poisson.integrate_gradient_with_uncertainty(gy, gx, **kw)
    monkeypatch.setattr(os, "cpu_count", lambda: 1)
    phi1, s1, _ = poisson.integrate_gradient_with_uncertainty(gy, gx, **kw)
    assert solver == "direct"
    assert np.array_equal(s1, s2, equal_nan=True) and np.array_equal(phi1, phi2, equal_nan=True)
    # and one block (small problems) gives the same numbers up to rounding
    monkeypatch.setattr(poisson, "MC_ONE_BLOCK_MAX_UNKNOWNS", 10**9)
    phi3, s3, _ = poisson.integrate_gradient_with_uncertainty(gy, gx, **kw)
    assert np.allclose(s3, s2, rtol=1e-10, equal_nan=True)
    assert np.allclose(phi3, phi2, rtol=0, atol=1e-10 * np.nanmax(np.abs(phi2)), equal_nan=True)
    assert np.nanmin(s2) > 0


def test_without_the_compiled_kernels_auto_factorises_with_superlu(monkeypatch, reference):
    # numba missing or unable to cache: the uncertainty falls back to SuperLU (same numbers up to rounding)
    opts = dict(sigma_y=reference["sig_y"], sigma_x=reference["sig_x"], spacing_m=H, mask=reference["mask"],
                weights=(1 / reference["sig_y"] ** 2, 1 / reference["sig_x"] ** 2),
                reference_region=reference["region"], n_samples=8)
    g = np.random.default_rng(9).standard_normal((2, NY, NX))
    phi_d, sig_d, solver_d = integrate_gradient_with_uncertainty(g[0], g[1], **opts)
    monkeypatch.setattr(poisson, "_COMPILER", False)
    phi_s, sig_s, solver_s = integrate_gradient_with_uncertainty(g[0], g[1], **opts)
    assert (solver_d, solver_s) == ("direct", "sparse")
    assert np.allclose(phi_d, phi_s, atol=1e-10, equal_nan=True)
    assert np.allclose(sig_d, sig_s, rtol=1e-8, equal_nan=True)


@pytest.mark.parametrize("weighted", [False, True])
@pytest.mark.parametrize("masked", [False, True])
@pytest.mark.parametrize("dirichlet", [{}, {"top": 0.0, "right": 0.0}, dict.fromkeys(poisson.EDGES, 0.0)])
def test_stacked_noise_right_hand_sides_equal_the_per_field_ones(weighted, masked, dirichlet):
    # the Monte Carlo builds the right-hand sides of 8 samples in one pass; the per-field assembly
    # (checked against scipy's LU and analytic fields in test_reconstruct_poisson.py) is the reference
    rng = np.random.default_rng(0)
    ny, nx = 23, 31
    mask = rng.random((ny, nx)) < 0.1 if masked else None
    w = tuple(np.exp(rng.standard_normal((2, ny, nx)))) if weighted else None
    g = rng.standard_normal((2, ny, nx))
    pb = poisson._Problem(g[0], g[1], (0.3, 0.7), mask, None, w, "neumann", dirichlet)
    pb.dirichlet = {e: np.zeros_like(v) for e, v in pb.dirichlet.items()}  # noise: the values are exact
    stack = rng.standard_normal((3, 2, ny, nx)) * pb.valid
    got = poisson._rhs_stack(pb, stack[:, 0], stack[:, 1])
    for j in range(3):
        pb.gy, pb.gx = stack[j]
        want = poisson._grid_system(pb, rhs_only=True)
        assert np.abs(got[j] - want).max() < 1e-12 * np.abs(want).max()
