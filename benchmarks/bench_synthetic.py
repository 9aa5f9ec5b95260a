"""Speed, memory and exactness of the synthetic renderer (bos.synthetic).

For each size, a random-dot background (2.5 px dots, density 0.5) is
rendered as a reference (uniform path) and as a measurement through a smooth
field (|d| up to ~3.6 px; per-pixel path), noise-free and unquantised.  The
reference method, timed in the same run, is what the analytic renderer
replaces: warping the rendered reference with scipy.ndimage.map_coordinates
(cubic spline, order 3) to the sample positions p - d(p).  Printed: wall
times, the time ratio (exact / warp), and the rms and max difference of the
warp from the exact image in counts of 12 bit (the interpolation error that
the analytic rendering avoids).  Peak memory of a full pair (float32) is
measured in a child process (ru_maxrss).

Usage:  python benchmarks/bench_synthetic.py [--quick] [--large]
"""

from __future__ import annotations

import resource
import subprocess
import sys
import time

import numpy as np
from scipy import ndimage

from bos import synthetic as syn


def field(rows, cols):
    def f(r, c):
        return (2.0 * np.sin(r / 200.0) * np.cos(c / 150.0),
                3.0 * np.exp(-((r - rows / 2) ** 2 + (c - cols / 2) ** 2) / (rows / 4) ** 2))
    return f


def one_size(rows, cols):
    bg = syn.random_dots(shape=(rows, cols), seed=1)
    kw = dict(noise=False, quantize=False)
    t0 = time.perf_counter()
    ref = syn.render(bg, **kw)
    t1 = time.perf_counter()
    meas = syn.render(bg, displacement=field(rows, cols), **kw)
    t2 = time.perf_counter()
    dy, dx = syn.evaluate_displacement(field(rows, cols), shape=(rows, cols))
    rr, cc = np.mgrid[0:rows, 0:cols].astype(float)
    t3 = time.perf_counter()
    warped = ndimage.map_coordinates(ref, [rr - dy, cc - dx], order=3, mode="nearest")
    t4 = time.perf_counter()
    inner = (slice(8, -8), slice(8, -8))
    diff = (warped - meas)[inner]
    print(f"{rows}x{cols}: {bg.n_dots} dots | reference {t1 - t0:.2f} s | measurement {t2 - t1:.2f} s | "
          f"cubic warp {t4 - t3:.2f} s | ratio exact/warp {(t2 - t1) / (t4 - t3):.2f} | "
          f"warp error rms {np.sqrt(np.mean(diff ** 2)):.2f} max {np.abs(diff).max():.1f} counts "
          f"(signal rms {ref.std():.0f})")


def child_pair(rows, cols):
    t0 = time.perf_counter()
    syn.render_pair(shape=(rows, cols), displacement=field(rows, cols), dtype=np.float32)
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"pair {rows}x{cols} (float32, noise): {time.perf_counter() - t0:.1f} s, peak RSS {peak_mb:.0f} MB")


if __name__ == "__main__":
    if len(sys.argv) == 4 and sys.argv[1] == "--child":
        child_pair(int(sys.argv[2]), int(sys.argv[3]))
        sys.exit(0)
    quick = "--quick" in sys.argv
    sizes = [(512, 512)] if quick else [(1024, 1024), (2048, 2048)]
    for rows, cols in sizes:
        one_size(rows, cols)
    pairs = [(2048, 2048)] + ([(4000, 6000)] if "--large" in sys.argv else [])
    for rows, cols in ([] if quick else pairs):
        subprocess.run([sys.executable, __file__, "--child", str(rows), str(cols)], check=True)
