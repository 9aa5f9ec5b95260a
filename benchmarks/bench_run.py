"""Stage split of a default ``bos run`` (planar and axisymmetric) on synthetic 24 MP and 4 MP pairs.

For each case a fresh child process runs the same library path as ``bos run``
(``bos.config.load_experiment`` -> ``bos.pipeline.run_experiment`` ->
``bos.pipeline.save_run``: HDF5 + figures) with the default processing and
reconstruction settings (planar: weighted least squares with uncertainty;
axisymmetric: three-point Abel), and reports wall-clock time stamps:

    start   process start -> libraries imported and experiment file read
    read    reading the two 16-bit PNG images
    disp    displacement stage (estimator)
    recon   reconstruction stage (deflection, integration, uncertainty)
    save    HDF5, CSV profile and figures

Printed ratios (goals of issue 9): total / displacement without process start
at 24 MP (goal <= 2.5), and total including process start and reading at 4 MP
(goal <= 3).  Both are ratios of times measured in the same child process, so
they are less sensitive to the load on the shared machine than the absolute
times (which are noisy: the 2 cores are shared with other jobs).

Synthetic pairs (a 3-D Gaussian index blob for the planar case, a hot column
for the axisymmetric one, 2.5 px dots, 12 bit with noise) are rendered once and
cached in ``<tempdir>/bos-bench-run-cache`` (a 24 MP pair takes ~1 min to
render); ``--fresh`` renders them again.

Usage:
    python benchmarks/bench_run.py                 # 4 MP and 24 MP, planar and axisymmetric
    python benchmarks/bench_run.py --sizes 4       # only 4 MP
    python benchmarks/bench_run.py --kinds planar --repeat 2
"""

from __future__ import annotations

import time

T_PROCESS = time.time()  # first statement: process start for the child's "start" stage

import argparse  # noqa: E402
import json  # noqa: E402
import os  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
from pathlib import Path  # noqa: E402

SIZES = {4: (2048, 2048), 24: (4000, 6000)}
CACHE = Path(tempfile.gettempdir()) / "bos-bench-run-cache"
RIG = dict(focal_length_mm=50.0, pixel_pitch_um=5.0, f_number=8.0, camera_to_object_m=1.0, object_to_background_m=0.5)


def _radius_m(shape):
    """Object size scaled with the field of view (blob 1/e radius, column radius) [m]."""
    return 0.06 * max(shape) / 6000 * 1.5


def make_pair(directory: Path, shape, kind: str) -> None:
    """Render and write <kind>_reference.png / <kind>_measurement.png (16-bit) into ``directory``."""
    import imageio.v3 as iio
    import numpy as np

    from bos import synthetic as syn
    from bos.media import Medium
    from bos.optics import Rig

    rig = Rig(focal_length_m=RIG["focal_length_mm"] * 1e-3, pixel_pitch_m=RIG["pixel_pitch_um"] * 1e-6,
              f_number=RIG["f_number"], z_a_m=RIG["camera_to_object_m"], z_d_m=RIG["object_to_background_m"],
              wavelength_m=550e-9)
    medium = Medium(gas="air", wavelength_m=550e-9)
    radius = _radius_m(shape)
    if kind == "planar":
        def deflection(y, x):
            return syn.gaussian_blob_deflection(y, x, amplitude=-5e-5, radius_m=radius, n0=medium.ambient_index)
    else:
        profile = syn.axisymmetric_temperature_column(delta_t_k=30.0, radius_m=radius / 3, medium=medium)

        def deflection(y, x):
            return syn.axisymmetric_column_deflection(y, x, index_profile=profile, radius_m=2 * radius,
                                                      n0=medium.ambient_index)
    t0 = time.perf_counter()
    pair = syn.render_pair(shape=shape, displacement=syn.displacement_from_field(deflection, rig=rig, shape=shape),
                           seed=3, dtype=np.float32)
    for name, img in (("reference", pair.reference), ("measurement", pair.measurement)):
        data = np.clip(np.rint(img), 0, 65535).astype(np.uint16)
        tmp = directory / f".{kind}_{name}.png"
        iio.imwrite(tmp, data, extension=".png")
        os.replace(tmp, directory / f"{kind}_{name}.png")
    print(f"  rendered {kind} {shape[0]}x{shape[1]} pair in {time.perf_counter() - t0:.0f} s (cached in {directory})",
          flush=True)


def experiment_file(directory: Path, shape, kind: str) -> Path:
    """A default experiment file for the cached pair (only rig, object and images given)."""
    width_mm = 1e3 * _radius_m(shape) * 1.7724538509055159  # sqrt(pi) s: equivalent planar width of the blob
    recon = (f'kind = "planar"\nreference_region = "left"\n' if kind == "planar"
             else 'kind = "axisymmetric"\naxis = "vertical"\n')
    text = f"""[camera]
focal_length_mm = {RIG['focal_length_mm']}
pixel_pitch_um = {RIG['pixel_pitch_um']}
f_number = {RIG['f_number']}
wavelength_nm = 550

[geometry]
camera_to_object_m = {RIG['camera_to_object_m']}
object_to_background_m = {RIG['object_to_background_m']}
object_width_mm = {width_mm:.3f}

[medium]
gas = "air"

[images]
reference = "{kind}_reference.png"
measurement = "{kind}_measurement.png"

[reconstruction]
{recon}
[output]
directory = "out_{kind}"
name = "{kind}"
"""
    path = directory / f"{kind}.toml"
    path.write_text(text)
    return path


# ----------------------------------------------------------------------------- child side
def child(toml: str, t_spawn: float) -> None:
    stamps = {"spawn": t_spawn, "process": T_PROCESS}
    from bos import pipeline
    from bos.config import load_experiment

    exp = load_experiment(toml)
    preload = None
    from cli.cmd_run import preload_when_estimating, uses_direct_solver

    # as `bos run` does: matplotlib and the direct solver's kernels load in the background while estimating
    if exp.output.figures or uses_direct_solver(exp):
        preload = preload_when_estimating(figures=bool(exp.output.figures), direct_solver=uses_direct_solver(exp))
    stamps["ready"] = time.time()

    def progress(stage, fraction):
        stamps[f"{stage}:{fraction:g}"] = time.time()
        if preload is not None:
            preload(stage, fraction)

    result = pipeline.run_experiment(exp, progress=progress)
    stamps["computed"] = time.time()
    pipeline.save_run(result, exp)
    stamps["saved"] = time.time()
    info = result.density.info if result.density is not None else {}
    stamps["vectors"] = int(result.eps_x.size)
    stamps["recon_info"] = {k: v for k, v in info.items() if isinstance(v, (int, float, str, bool))}
    print(json.dumps(stamps))


def run_case(toml: Path) -> dict:
    t_spawn = time.time()
    out = subprocess.run([sys.executable, __file__, "--child", str(toml), "--t-spawn", repr(t_spawn)],
                         capture_output=True, text=True, cwd=toml.parent)
    if out.returncode != 0:
        raise SystemExit(f"child failed for {toml}:\n{out.stderr[-3000:]}")
    s = json.loads(out.stdout.strip().splitlines()[-1])
    split = {
        "start": s["ready"] - s["spawn"],
        "read": s["read images:1"] - s["read images:0"],
        "disp": s["displacement:1"] - s["displacement:0"],
        "recon": s["reconstruction:1"] - s["reconstruction:0"],
        "save": s["saved"] - s["computed"],
    }
    split["total"] = s["saved"] - s["spawn"]
    split["vectors"] = s["vectors"]
    split["info"] = s["recon_info"]
    return split


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--sizes", nargs="*", type=int, default=[4, 24], help="image sizes in MP (4 and/or 24)")
    p.add_argument("--kinds", nargs="*", default=["planar", "axisymmetric"], help="planar and/or axisymmetric")
    p.add_argument("--repeat", type=int, default=1, help="runs per case (the median of each stage is printed)")
    p.add_argument("--fresh", action="store_true", help="render the cached pairs again")
    p.add_argument("--child", help=argparse.SUPPRESS)
    p.add_argument("--t-spawn", type=float, help=argparse.SUPPRESS)
    args = p.parse_args()
    if args.child:
        return child(args.child, args.t_spawn)

    import numpy as np

    print(f"{os.cpu_count()} cores, load average {os.getloadavg()[0]:.1f} (shared machine: times are noisy; "
          "the ratios compare stages of the same run)")
    rows = []
    for mp in args.sizes:
        shape = SIZES[mp]
        directory = CACHE / f"{shape[0]}x{shape[1]}"
        directory.mkdir(parents=True, exist_ok=True)
        for kind in args.kinds:
            kind_key = "planar" if kind == "planar" else "axisymmetric"
            if args.fresh or not (directory / f"{kind_key}_measurement.png").exists():
                make_pair(directory, shape, kind_key)
            toml = experiment_file(directory, shape, kind_key)
            runs = [run_case(toml) for _ in range(args.repeat)]
            med = {k: float(np.median([r[k] for r in runs])) for k in ("start", "read", "disp", "recon", "save",
                                                                        "total")}
            rows.append((mp, kind_key, med, runs[-1]))
            print(f"{mp:3d} MP {kind_key:12s} start {med['start']:5.2f}  read {med['read']:5.2f}  "
                  f"disp {med['disp']:6.2f}  recon {med['recon']:6.2f}  save {med['save']:5.2f}  "
                  f"total {med['total']:6.2f} s  ({runs[-1]['vectors']} vectors; {runs[-1]['info']})", flush=True)
    print("\nRATIOS (goal: 24 MP total without process start / displacement <= 2.5; "
          "4 MP total with start and reading / displacement <= 3)")
    for mp, kind, med, _ in rows:
        inner = med["total"] - med["start"]
        print(f"  {mp:3d} MP {kind:12s} (total - start)/disp = {inner / med['disp']:.2f}   "
              f"total/disp = {med['total'] / med['disp']:.2f}   recon/disp = {med['recon'] / med['disp']:.2f}   "
              f"(read+save)/disp = {(med['read'] + med['save']) / med['disp']:.2f}")


if __name__ == "__main__":
    main()
