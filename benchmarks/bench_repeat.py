"""Cost of the adaptive repeat of the final pass against a full final pass.

``bos.displacement.correlate`` repeats the last window size only for the
windows whose predictor still changed by more than ``converged`` (default
0.06 px) in the first final pass (grown by one window).  This prints, for
smooth random displacement fields of three scales on a 4 MP pair (2.5 px
dots, bos.synthetic), the fraction of windows redone and the time of that
partial pass as a multiple of the full final pass of the same run (medians
of 3 runs, 1 and all threads; times measured by wrapping the private pass
function, so they are the passes alone).

    python benchmarks/bench_repeat.py
"""

from __future__ import annotations

import os
import time

import numpy as np
from scipy import ndimage

from bos.displacement import correlation as C
from bos.displacement import estimate
from bos.synthetic import render_pair

SHAPE = (2048, 2048)
FIELDS = ((60, 1.0), (120, 1.5), (200, 2.0))  # (correlation length [px], rms displacement [px])


def main() -> None:
    orig = C._correlation_pass
    times: dict[str, list] = {}

    def timed(*a, **k):
        t = time.perf_counter()
        out = orig(*a, **k)
        if k.get("redo") is not None:
            times["partial"].append((time.perf_counter() - t, float(k["redo"].mean())))
        elif k["statistics"] and k["window"] == 16:
            times["full"].append(time.perf_counter() - t)
        return out

    C._correlation_pass = timed
    print(f"4 MP pairs, default settings, load {os.getloadavg()[0]:.1f}, {os.cpu_count()} cores")
    for scale, amp in FIELDS:
        rng = np.random.default_rng(5)
        dy, dx = (amp * f / f.std() for f in (ndimage.gaussian_filter(rng.standard_normal(SHAPE), scale)
                                              for _ in range(2)))
        pair = render_pair(shape=SHAPE, displacement=(dy, dx), seed=7, dtype=np.float32)
        ref, meas = pair.reference.astype(np.float32), pair.measurement.astype(np.float32)
        for workers in (1, os.cpu_count() or 1):
            times.update(partial=[], full=[])
            for _ in range(3):
                C._BIAS_CACHE.clear()
                estimate(ref, meas, workers=workers)
            if not times["partial"]:
                print(f"field {scale} px / {amp} px, {workers} thread(s): converged after one final pass")
                continue
            p = float(np.median([t for t, _ in times["partial"]]))
            f = float(np.median(times["full"]))
            print(f"field {scale} px / {amp} px, {workers} thread(s): windows redone {times['partial'][0][1]:.2f}, "
                  f"repeat {p:.3f} s = {p / f:.2f} x the full final pass ({f:.3f} s)", flush=True)


if __name__ == "__main__":
    main()
