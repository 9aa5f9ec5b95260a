"""Memory and time of `bos pattern` on a large page (default A0 at 600 dpi).

Each case runs in its own child process so its peak resident memory
(ru_maxrss) is its own:

- reference: the whole page held as one 8-bit array (the size a raster
  page needs when it is not streamed), saved as PNG with Pillow at the same
  zlib level; the pixels are a blank page, so this is a lower bound of a
  whole-array writer's cost;
- ``bos pattern`` PNG (rendered and compressed in 256-row bands);
- ``bos pattern`` TIFF (256 x 256 tiles from the same bands);
- ``bos pattern`` PDF (vector dots, content streamed block row by block row).

Printed: wall time, peak memory, file size and the ratios of peak memory to
the reference's (measured in the same run).  The machine may be shared by
other jobs: the load average is printed; repeat runs to judge the noise.

    python benchmarks/bench_pattern.py                                  # A0, 600 dpi, 0.5 mm dots
    python benchmarks/bench_pattern.py --paper A3 --dpi 300 --skip tiff
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

CHILD_REFERENCE = """
import sys, resource, numpy as np
from PIL import Image
rows, cols, out = int(sys.argv[1]), int(sys.argv[2]), sys.argv[3]
page = np.full((rows, cols), 255, dtype=np.uint8)
Image.fromarray(page).save(out, compress_level=3, dpi=(600, 600))
print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)
"""

CHILD_PATTERN = """
import sys, resource
from bos.pattern import make_spec, parse_paper, write_pattern
paper, dpi, d, fill, out = sys.argv[1], float(sys.argv[2]), float(sys.argv[3]), float(sys.argv[4]), sys.argv[5]
name, w, h = parse_paper(paper)
spec, _ = make_spec(page_mm=(w, h), paper=name, dot_diameter_mm=d, fill=fill, seed=1, dpi=dpi)
res = write_pattern(out, spec)
print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss, res.n_dots or 0)
"""


def run(code: str, args: list[str]) -> tuple[float, list[str]]:
    t0 = time.perf_counter()
    proc = subprocess.run([sys.executable, "-c", code, *args], capture_output=True, text=True, check=True)
    return time.perf_counter() - t0, proc.stdout.split()


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--paper", default="A0")
    ap.add_argument("--dpi", type=float, default=600.0)
    ap.add_argument("--dot-diameter-mm", type=float, default=0.5)
    ap.add_argument("--fill", type=float, default=0.4)
    ap.add_argument("--skip", nargs="*", default=[], help="cases to skip: reference png tiff pdf")
    a = ap.parse_args()

    from bos.pattern import make_spec, parse_paper

    name, w, h = parse_paper(a.paper)
    spec, _ = make_spec(page_mm=(w, h), paper=name, dot_diameter_mm=a.dot_diameter_mm, fill=a.fill, seed=1,
                        dpi=a.dpi)
    rows, cols = spec.raster_shape
    print(f"{name} {w:g} x {h:g} mm at {a.dpi:g} dpi = {cols} x {rows} px ({rows * cols / 1e6:.0f} Mpx, "
          f"{rows * cols / 2**20:.0f} MiB as 8-bit); dots {a.dot_diameter_mm:g} mm, fill {a.fill:g}; "
          f"load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
    results = {}
    with tempfile.TemporaryDirectory() as tmp:
        for case in ("reference", "png", "tiff", "pdf"):
            if case in a.skip:
                continue
            out = str(Path(tmp) / f"page.{case if case != 'reference' else 'png'}")
            if case == "reference":
                dt, fields = run(CHILD_REFERENCE, [str(rows), str(cols), out])
                n = 0
            else:
                dt, fields = run(CHILD_PATTERN, [a.paper, str(a.dpi), str(a.dot_diameter_mm), str(a.fill), out])
                n = int(fields[1])
            peak = int(fields[0]) * 1024
            size = Path(out).stat().st_size
            results[case] = (dt, peak, size, n)
            Path(out).unlink()
    ref = results.get("reference")
    print(f"{'case':<10} {'time [s]':>9} {'peak [MiB]':>11} {'file [MB]':>10} {'dots':>9} {'peak / ref':>11}")
    for case, (dt, peak, size, n) in results.items():
        ratio = f"{peak / ref[1]:.2f}" if ref else "-"
        print(f"{case:<10} {dt:9.1f} {peak / 2**20:11.0f} {size / 1e6:10.1f} {n or '-':>9} {ratio:>11}")


if __name__ == "__main__":
    main()
