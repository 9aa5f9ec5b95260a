"""Speed and accuracy of the Poisson integrators (bos.reconstruct.poisson).

Targets (issue 4): DCT solve of 4096 x 4096 <= 2 s; masked 2048 x 2048
multigrid-class solve <= 10 s on 2 cores; both with the relative error
against a manufactured solution.  Each timing is printed with a ratio against
a reference solver run in the same process on the same problem (scipy's
sparse LU ``spsolve``; it cannot hold the largest grids, so the ratio is
taken at a size it can, and printed with that size).

Weighted case (issue 9): weights 1/sigma^2 spanning ~x600 (sigma: a smooth x5 trend times
independent x5 factors, like the per-vector uncertainty of a measured field) on a full
rectangle, at 256^2, 512^2 and 611^2 (373 321 cells, the size of a 24 MP run).  Printed in the
same run: at 256^2 the main solve with the DCT-preconditioned CG tried first (it hits its
iteration limit, then falls back to multigrid; what ``method="auto"`` did before) against
``method="auto"`` (multigrid straight away); at every size, in 3 interleaved rounds (medians),
one ``auto`` main solve and the main solve plus the 32-sample Monte Carlo uncertainty through one
set-up, by the new path (the grid Cholesky, ``"direct"``, random-sign noise) and by the previous
one (SuperLU in the grid's nested-dissection order, ``"sparse"``, Gaussian noise), each as a
multiple of one auto solve, with the peak memory of the new path (child process) and the rms
difference of the two sigma fields (independent noise: about sqrt(2)/sqrt(64) expected).  The
direct solver's compiled kernels are loaded once before timing (printed), as ``bos run`` does in
the background.

Usage:  python benchmarks/bench_poisson.py [--quick] [--weighted-only] [--sizes 256 512 611 1000]
"""

from __future__ import annotations

import contextlib
import gc
import subprocess
import sys
import time

import numpy as np
import scipy.sparse.linalg as spla

from bos.reconstruct import poisson
from bos.reconstruct.analytic import gaussian_potential
from bos.reconstruct.poisson import integrate_gradient

REPEATS = 3  # the 2 cores are shared: each large case is run 3 times and the median printed


def problem(n, masked):
    h = 2.0 / n
    x = -1 + (np.arange(n) + 0.5) * h
    phi, gy, gx = gaussian_potential(x[:, None], x[None, :], x0=0.2, y0=0.0, s=0.4)
    mask = None
    if masked:
        # a disc-shaped model in the field of view plus a masked strip at the bottom
        mask = ((x[None, :] + 0.4) ** 2 + (x[:, None] - 0.3) ** 2 < 0.2**2) | (x[:, None] > 0.9) & (x[None, :] < -0.5)
    return h, phi, gy, gx, mask


def rel_error(phi_num, phi):
    ok = np.isfinite(phi_num)
    a = phi_num[ok] - phi_num[ok].mean()
    b = phi[ok] - phi[ok].mean()
    return float(np.sqrt(np.mean((a - b) ** 2)) / np.sqrt(np.mean(b**2)))


def timed(n, masked, method):
    h, phi, gy, gx, mask = problem(n, masked)
    t = time.perf_counter()
    out = integrate_gradient(gy, gx, spacing_m=h, mask=mask, method=method)
    return time.perf_counter() - t, rel_error(out, phi)


def multigrid_split(n):
    """Seconds for assembly / hierarchy set-up / CG solve of the multigrid solver (its internals)."""
    h, phi, gy, gx, mask = problem(n, True)
    t0 = time.perf_counter()
    pb = poisson._Problem(gy, gx, h, mask, None, None, "neumann", None)
    A, b, _ = poisson._sparse_system(pb)
    t1 = time.perf_counter()
    cycle = poisson._v_cycle(poisson._multigrid_hierarchy(A, pb.valid))
    t2 = time.perf_counter()
    its = []
    spla.cg(A, b, M=spla.LinearOperator(A.shape, matvec=cycle, dtype=float), rtol=1e-8, maxiter=1000,
            callback=its.append)
    return t1 - t0, t2 - t1, time.perf_counter() - t2, len(its)


def weighted_case(n):
    """Gradient, sigma and weights of the weighted benchmark (weights spanning ~x600)."""
    h, phi, gy, gx, _ = problem(n, False)
    x = -1 + (np.arange(n) + 0.5) * h
    rng = np.random.default_rng(1)
    trend = 1 + 4 * np.exp(-((x[:, None] - 0.3) ** 2 + (x[None, :] + 0.2) ** 2) / 0.1)
    sigma = 1e-3 * trend * np.exp(rng.uniform(0, np.log(5), (n, n)))  # sigma x5 * x5: w = 1/sigma^2 spans ~x600
    return h, gy, gx, sigma


OLD_METHOD = "sparse"
"""The uncertainty path before this revision: scipy's SuperLU in the grid's nested-dissection order
(``method="sparse"``), the main solve and 32 samples from one factorisation, Gaussian noise."""


@contextlib.contextmanager
def old_path():
    """Gaussian noise draws, as before this revision (the samples' random signs are new)."""
    signs = poisson._random_signs
    poisson._random_signs = lambda rng, shape: rng.standard_normal(shape)
    try:
        yield
    finally:
        poisson._random_signs = signs


def _memory_mb(key):
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith(key):
                return int(line.split()[1]) / 1024
    return float("nan")


def peak_memory(n):
    """Child process: peak resident memory of the new path above what the process held before (Linux)."""
    from bos.reconstruct.poisson import integrate_gradient_with_uncertainty

    h, gy, gx, sigma = weighted_case(n)
    before = _memory_mb("VmRSS")
    integrate_gradient_with_uncertainty(gy, gx, sigma_y=sigma, sigma_x=sigma, n_samples=32, spacing_m=h,
                                        weights=1 / sigma**2, reference_region="left")
    print(f"{_memory_mb('VmHWM') - before:.0f}")


def _child_peak_mb(n):
    out = subprocess.run([sys.executable, __file__, "--peak", str(n)], capture_output=True, text=True)
    return float(out.stdout.split()[-1]) if out.returncode == 0 and out.stdout.strip() else float("nan")


def weighted(n, *, cg_first=False, rounds=REPEATS):
    """Main solve + 32-sample uncertainty, new path and old path, in units of one auto solve.

    ``rounds`` interleaved rounds (auto solve, new path, old path), medians printed.
    """
    from bos.reconstruct.poisson import integrate_gradient_with_uncertainty

    h, gy, gx, sigma = weighted_case(n)
    w = 1 / sigma**2
    pb = poisson._Problem(gy, gx, h, None, None, w, "neumann", None)
    opts = dict(spacing_m=h, weights=w, reference_region="left")
    unc = dict(sigma_y=sigma, sigma_x=sigma, n_samples=32, **opts)
    print(f"weighted {n}^2 ({int(pb.valid.sum())} cells, weights spanning x{w.max() / w.min():.0f}; "
          f"auto main solve picks {poisson.auto_method(pb)!r}):")
    if cg_first:
        t0 = time.perf_counter()
        integrate_gradient(gy, gx, method="pcg", **opts)
        t1 = time.perf_counter()
        integrate_gradient(gy, gx, method="auto", **opts)
        t2 = time.perf_counter()
        print(f"  main solve, CG tried first: {t1 - t0:6.2f} s   auto: {t2 - t1:6.2f} s   "
              f"ratio {(t1 - t0) / (t2 - t1):.1f}x")
    times = {"auto": [], "new": [], "old": []}
    for _ in range(rounds):
        t = time.perf_counter()
        integrate_gradient(gy, gx, method="auto", **opts)
        times["auto"].append(time.perf_counter() - t)
        gc.collect()
        t = time.perf_counter()
        _, s_new, solver_new = integrate_gradient_with_uncertainty(gy, gx, **unc)
        times["new"].append(time.perf_counter() - t)
        with old_path():
            gc.collect()
            t = time.perf_counter()
            _, s_old, solver_old = integrate_gradient_with_uncertainty(gy, gx, method=OLD_METHOD, **unc)
            times["old"].append(time.perf_counter() - t)
    med = {k: float(np.median(v)) for k, v in times.items()}
    ok = s_old > 0.05 * s_old.max()
    dev = float(np.sqrt(np.mean((s_new[ok] / s_old[ok] - 1) ** 2)))
    name = {"sparse": "SuperLU", "multigrid": "multigrid samples", "direct": "grid Cholesky"}
    print(f"  one auto main solve: {med['auto']:6.2f} s (runs {', '.join(f'{t:.2f}' for t in times['auto'])})")
    print(f"  main solve + 32-sample uncertainty, new path ({name[solver_new]}, random signs): "
          f"{med['new']:6.2f} s = {med['new'] / med['auto']:.1f} auto solves "
          f"(runs {', '.join(f'{t:.2f}' for t in times['new'])}), peak memory +{_child_peak_mb(n):.0f} MB")
    print(f"  main solve + 32-sample uncertainty, old path ({name[solver_old]}, nested dissection, Gaussian "
          f"noise): {med['old']:6.2f} s = "
          f"{med['old'] / med['auto']:.1f} auto solves (runs {', '.join(f'{t:.2f}' for t in times['old'])})")
    print(f"  sigma new vs old (independent noise draws): rms relative difference {dev:.3f} where sigma > 5 % "
          f"of its maximum (two independent 32-sample estimates: expected about sqrt(2) / sqrt(64) = 0.18)")


def main(quick=False):
    big_dct, big_mask, ref_n = (1024, 512, 256) if quick else (4096, 2048, 512)
    print(f"{'case':42s} {'time s':>8s} {'rel err':>9s}")
    rows = []
    for label, n, masked, method, target in (
        (f"DCT rectangle {big_dct}^2", big_dct, False, "dct", 2.0),
        (f"PCG (DCT-preconditioned) masked {big_mask}^2", big_mask, True, "pcg", 10.0),
        (f"multigrid (2x2 aggregation) masked {big_mask}^2", big_mask, True, "multigrid", 10.0),
    ):
        runs = [timed(n, masked, method) for _ in range(REPEATS)]
        t, e = float(np.median([r[0] for r in runs])), runs[0][1]
        rows.append((label, t, e, target))
        print(f"{label:42s} {t:8.2f} {e:9.2e}   target <= {target:.0f} s: {'met' if t <= target else 'NOT met'}"
              f"   (runs {', '.join(f'{r[0]:.2f}' for r in runs)})")
    splits = [multigrid_split(big_mask) for _ in range(REPEATS)]
    a, s_, v = (float(np.median([x[k] for x in splits])) for k in range(3))
    print(f"  multigrid {big_mask}^2 split (median of {REPEATS}): assembly {a:.2f} s, set-up {s_:.2f} s, "
          f"solve {v:.2f} s ({splits[0][3]} CG iterations)")
    print(f"\nratios against scipy spsolve (sparse LU) on the same problem at {ref_n}^2:")
    t_ref, e_ref = timed(ref_n, True, "sparse")
    t_ref_rect, _ = timed(ref_n, False, "sparse")
    for label, masked, method, tr in (("dct (rectangle)", False, "dct", t_ref_rect),
                                      ("pcg (masked)", True, "pcg", t_ref),
                                      ("multigrid (masked)", True, "multigrid", t_ref)):
        t, e = timed(ref_n, masked, method)
        print(f"  {label:20s} {t:7.3f} s vs spsolve {tr:7.3f} s: {tr / t:6.1f}x faster, rel err {e:.2e} (spsolve {e_ref:.2e})")


if __name__ == "__main__":
    if "--peak" in sys.argv:
        peak_memory(int(sys.argv[sys.argv.index("--peak") + 1]))
        sys.exit()
    if "--weighted-only" not in sys.argv:
        main(quick="--quick" in sys.argv)
    quick = "--quick" in sys.argv
    sizes = (256,) if quick else (256, 512, 611)
    if "--sizes" in sys.argv:
        sizes = tuple(int(a) for a in sys.argv[sys.argv.index("--sizes") + 1:] if a.isdigit())
    # once per process: numba's import and the cached kernels of the direct solver (``bos run`` loads
    # them in the background while the displacement is estimated); the first round of each size also
    # builds the grid structure (cached per shape, as for the frames of a batch)
    t0 = time.perf_counter()
    from bos.reconstruct import _nested

    _nested.warm_up()
    print(f"direct solver's compiled kernels loaded in {time.perf_counter() - t0:.2f} s (once per process)")
    for k, n in enumerate(sizes):
        weighted(n, cg_first=k == 0)
