"""Time to draw and write the figures of one run (bos.plots.write_run_figures).

The run is synthetic: a 24 MP image (4000 x 6000 px) processed with a
vector spacing of 8 px gives a 500 x 750 vector grid (the largest grid a
24 MP run normally produces), with a hot Gaussian plume, a masked block and
scattered rejected vectors; a 4 MP case (2000 x 2000 px, 250 x 250 grid)
is timed too.  Reference, measured in the same process on the same data:
the figure code of commit b6e6341 (before the figures were drawn from the
result data), loaded from git; it is skipped when git or that commit is not
available.  Each case is run REPEATS times, new and reference interleaved, and
the medians printed with the ratio reference / new.  The machine is shared (2 cores, several jobs), so
single timings are noisy: compare the ratios, not the seconds.

Usage:  python benchmarks/bench_figures.py [--quick]
"""

from __future__ import annotations

import importlib.util
import statistics
import subprocess
import sys
import tempfile
import time
import types
from pathlib import Path

import numpy as np

from bos import output, plots
from bos.displacement import DisplacementField
from bos.media import Medium
from bos.stages import Inputs, RunResult

REPEATS = 3
REFERENCE_COMMIT = "b6e6341"
ROOT = Path(__file__).resolve().parent.parent


def synthetic_result(image_shape: tuple[int, int], step: int = 8) -> RunResult:
    """A run on a vector grid with a plume, a masked block and 0.5 % rejected vectors."""
    rows = np.arange(step / 2, image_shape[0], step, dtype=float)
    cols = np.arange(step / 2, image_shape[1], step, dtype=float)
    pix = 50e-6                                           # object-plane pixel [m]
    y = (rows - (image_shape[0] - 1) / 2) * pix
    x = (cols - (image_shape[1] - 1) / 2) * pix
    yy, xx = np.meshgrid(y, x, indexing="ij")
    w = 0.08 * (x[-1] - x[0])
    rise = 60.0 * np.exp(-(xx / w) ** 2) * (1 + 0.5 * (yy - y[0]) / (y[-1] - y[0]))
    rng = np.random.default_rng(0)
    masked = np.zeros(yy.shape, bool)
    masked[-yy.shape[0] // 8:, : yy.shape[1] // 5] = True
    invalid = (rng.random(yy.shape) < 0.005) & ~masked
    nodata = masked | invalid
    med = Medium()
    temperature = np.where(nodata, np.nan, med.temperature_k + rise + rng.normal(0, 0.2, yy.shape))
    rho = med.density_from_temperature(temperature)
    dx = np.where(nodata, np.nan, -2.0 * xx / w * np.exp(-(xx / w) ** 2) + rng.normal(0, 0.02, yy.shape))
    dy = np.where(nodata, np.nan, rng.normal(0, 0.02, yy.shape))
    sig = np.where(nodata, np.nan, 0.02)
    disp = DisplacementField(dy=dy, dx=dx, rows=rows, cols=cols, masked=masked, invalid=invalid,
                             sigma_dy=sig, sigma_dx=sig, camera_shift=(0.0, 0.0), method="correlation")
    dens = types.SimpleNamespace(density=rho, temperature=temperature, index=med.index_from_density(rho),
                    sigma_density=np.full(yy.shape, 1e-4), sigma_temperature=np.full(yy.shape, 0.3),
                    sigma_index=np.full(yy.shape, 1e-8))
    inputs = Inputs(reference=np.zeros((2, 2)), measurement=np.zeros((2, 2)), mask=None, paths={}, sha256={})
    s_px_per_rad = 2.0e4
    return RunResult(displacement=disp, eps_y=-dy / s_px_per_rad, eps_x=-dx / s_px_per_rad, density=dens,
                     y_m=y, x_m=x, summary={}, warnings=[], attrs={"run_name": "bench"}, inputs=inputs)


def reference_module():
    """bos/plots.py of REFERENCE_COMMIT as a module (None without git or the commit)."""
    try:
        src = subprocess.run(["git", "-C", str(ROOT), "show", f"{REFERENCE_COMMIT}:bos/plots.py"],
                             capture_output=True, text=True, check=True).stdout
    except (OSError, subprocess.CalledProcessError):
        return None
    spec = importlib.util.spec_from_loader("bos._plots_reference", loader=None)
    mod = types.ModuleType(spec.name)
    mod.__package__ = "bos"
    sys.modules[spec.name] = mod
    exec(compile(src, f"{REFERENCE_COMMIT}:bos/plots.py", "exec"), mod.__dict__)
    return mod


def reference_figures(ref, result: RunResult, directory: Path) -> None:
    """The four figures as drawn at REFERENCE_COMMIT (its bos/output.py::_figures, same calls)."""
    P = ref.Panel
    disp, dens = result.displacement, result.density
    line = [[float(result.x_m[0]), 0.0], [float(result.x_m[-1]), 0.0]]
    kw = {"x_m": result.x_m, "y_m": result.y_m, "profile_m": line}
    ref.fields_figure([P(disp.dx, "displacement x", "px", "RdBu_r", True), P(disp.dy, "displacement y", "px", "RdBu_r", True),
                       P(np.hypot(disp.dy, disp.dx), "displacement magnitude", "px", "magma")],
                      path=directory / "r-displacement.png", suptitle="apparent background displacement", **kw)
    ref.fields_figure([P(result.eps_x * 1e6, "deflection x", "µrad", "RdBu_r", True),
                       P(result.eps_y * 1e6, "deflection y", "µrad", "RdBu_r", True)],
                      path=directory / "r-deflection.png", suptitle="light-ray deflection", **kw)
    ref.fields_figure([P(dens.density, "density", "kg/m³", "cividis"), P(dens.temperature, "temperature", "K", "inferno")],
                      path=directory / "r-density.png", suptitle="density and temperature", **kw)
    data = output.as_result_data(result)
    samples = output.sample_profile(data, line)
    curves = [(samples[k][0], k, samples[k][1]) for k in ("displacement_magnitude", "deflection_x", "density",
                                                          "temperature") if k in samples]
    ref.profile_figure(samples["s_m"][0], curves, path=directory / "r-profile.png", title="profile")


def new_figures(result: RunResult, directory: Path) -> None:
    data = output.as_result_data(result)
    plots.write_run_figures(data, plots.figure_paths(directory, "n"), name="bench")


def interleaved_medians(runs: dict) -> dict:
    """Median seconds of each ``name -> (fn, args)``, the runs interleaved (A B A B ...) so that a
    change of the machine's load hits both alike."""
    times: dict = {k: [] for k in runs}
    for _ in range(REPEATS):
        for name, (fn, args) in runs.items():
            t = time.perf_counter()
            fn(*args)
            times[name].append(time.perf_counter() - t)
    return {k: statistics.median(v) for k, v in times.items()}


def main(quick: bool) -> None:
    cases = [("4 MP (2000 x 2000 px, 250 x 250 vectors)", (2000, 2000))]
    if not quick:
        cases.append(("24 MP (4000 x 6000 px, 500 x 750 vectors)", (4000, 6000)))
    ref = reference_module()
    with tempfile.TemporaryDirectory() as tmp:
        d = Path(tmp)
        new_figures(synthetic_result((200, 200)), d)        # warm-up: imports, font cache
        for label, shape in cases:
            result = synthetic_result(shape)
            runs = {"new": (new_figures, (result, d))}
            if ref is not None:
                runs["reference"] = (reference_figures, (ref, result, d))
            t = interleaved_medians(runs)
            size_new = sum(p.stat().st_size for p in d.glob("n-*.png"))
            line = f"{label}: new {t['new']:.2f} s ({size_new / 1e3:.0f} kB, dpi {plots.DPI})"
            if ref is not None:
                size_ref = sum(p.stat().st_size for p in d.glob("r-*.png"))
                line += f"; reference {REFERENCE_COMMIT} {t['reference']:.2f} s ({size_ref / 1e3:.0f} kB, dpi 110); " \
                        f"ratio reference/new x{t['reference'] / t['new']:.2f}"
            print(line, flush=True)
    if ref is None:
        print(f"(reference {REFERENCE_COMMIT} not available: run inside the git checkout)")


if __name__ == "__main__":
    main("--quick" in sys.argv)
