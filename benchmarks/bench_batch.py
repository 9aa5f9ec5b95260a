"""Throughput of `bos batch`: frames/s for 1 and 2 local workers and a 2-worker Dask LocalCluster.

Frames: N synthetic 1 MP (1000 x 1000) 16-bit PNG frames of a warm blob
rising through the field (Gaussian potential, peak displacement ~2 px) with
a small camera jitter, rendered once by bos.synthetic and cached (default
~/.cache/bos-toolkit/bench_batch, or BOS_BENCH_CACHE).  Default processing
settings (correlation 64 -> 16 px windows, 3 passes, 50 % overlap, camera
motion from the border) and a planar reconstruction.

Printed: frames/s of each executor, the speedup 1 -> 2 workers (ratio
measured in the same run), frames/s of the displacement stage alone in one
process with 1 thread and with all cores, and the peak resident memory of
each worker process.  The machine may be shared: the load average is
printed with the figures; repeat runs to judge the noise.

    python benchmarks/bench_batch.py                 # 300 frames, all executors
    python benchmarks/bench_batch.py --frames 60 --skip dask
"""

from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

SHAPE = (1000, 1000)

EXPERIMENT = """
[camera]
focal_length_mm = 60
pixel_pitch_um = 5.5
f_number = 11
[geometry]
camera_to_background_m = 2.0
object_to_background_m = 0.8
object_width_mm = 60
[images]
reference = "{ref}"
[reconstruction]
kind = "planar"
reference_region = "left"
[output]
directory = "{out}"
name = "bench"
figures = false
"""


def cache_dir(n: int) -> Path:
    root = Path(os.environ.get("BOS_BENCH_CACHE", Path.home() / ".cache" / "bos-toolkit" / "bench_batch"))
    return root / f"{SHAPE[0]}x{SHAPE[1]}"


def render_frames(n: int) -> Path:
    """Reference + n frames (rendered once, then reused)."""
    import imageio.v3 as iio

    from bos import synthetic

    d = cache_dir(n)
    (d / "frames").mkdir(parents=True, exist_ok=True)
    bg = synthetic.random_dots(shape=SHAPE, dot_diameter_px=2.5, density=0.5, seed=7, margin_px=24)
    rows, cols = np.mgrid[0:SHAPE[0], 0:SHAPE[1]].astype(float)

    def save(path: Path, img: np.ndarray) -> None:
        tmp = path.with_name(f".{path.name}.tmp.png")
        iio.imwrite(tmp, np.clip(np.rint(img), 0, 65535).astype(np.uint16), extension=".png")
        os.replace(tmp, path)

    if not (d / "ref.png").exists():
        save(d / "ref.png", synthetic.render(bg, shape=SHAPE, bit_depth=16, seed=1))
    t0 = time.perf_counter()
    made = 0
    for k in range(n):
        path = d / "frames" / f"frame_{k:05d}.png"
        if path.exists():
            continue
        yc, xc, s = 800.0 - 1.5 * k, 500.0, 120.0   # the blob rises 1.5 px per frame
        g = np.exp(-((rows - yc) ** 2 + (cols - xc) ** 2) / s ** 2)
        a = 2.0 * s / np.sqrt(2.0) * np.exp(0.5)     # peak |grad| = 2 px
        dy, dx = -2 * a * (rows - yc) / s ** 2 * g, -2 * a * (cols - xc) / s ** 2 * g
        jitter = 0.3 * np.sin(0.37 * k), 0.3 * np.cos(0.23 * k)
        save(path, synthetic.render(bg, shape=SHAPE, displacement=(dy, dx), bit_depth=16, seed=100 + k,
                                    camera_shift=jitter))
        made += 1
    if made:
        print(f"rendered {made} frame(s) in {time.perf_counter() - t0:.0f} s into {d}", flush=True)
    return d


def run(label: str, d: Path, work: Path, n: int, **kwargs) -> dict:
    from bos.batch import run_batch
    from bos.config import load_experiment
    from bos.frames import parse_range, resolve_frames

    out = work / label.replace(" ", "_")
    exp_file = work / f"{label.replace(' ', '_')}.toml"
    exp_file.write_text(EXPERIMENT.format(ref=d / "ref.png", out=out))
    frames = resolve_frames(d / "frames", frame_range=parse_range(f"0:{n}"))
    t0 = time.perf_counter()
    rep = run_batch(load_experiment(exp_file), frames, restart=True, **kwargs)
    wall = time.perf_counter() - t0
    rss = max(rep.peak_rss_bytes.values()) if rep.peak_rss_bytes else 0
    row = {"label": label, "fps": rep.computed / wall, "compute_fps": rep.frames_per_second, "wall": wall,
           "failed": len(rep.failed), "rss_gb": rss / 1e9, "workers": len(rep.peak_rss_bytes),
           "series": rep.series_file}
    print(f"{label:28s} {row['fps']:6.2f} frames/s (wall {wall:6.1f} s incl. start-up and join; "
          f"{row['compute_fps']:.2f} frames/s while computing), failed {row['failed']}, "
          f"peak RSS per worker {row['rss_gb']:.2f} GB over {row['workers']} process(es)", flush=True)
    return row


def displacement_stage(d: Path, pairs: int) -> None:
    """frames/s of bos.stages.measure_displacement alone, one process, 1 thread and all cores."""
    from bos import stages
    from bos.batch import apply_thread_budget
    from bos.config import load_experiment
    from bos.images import read_image

    with tempfile.TemporaryDirectory() as tmp:
        f = Path(tmp) / "e.toml"
        f.write_text(EXPERIMENT.format(ref=d / "ref.png", out=tmp))
        exp = load_experiment(f)
    ref = read_image(d / "ref.png").data
    meas = [read_image(d / "frames" / f"frame_{k:05d}.png").data for k in range(pairs)]
    results = {}
    for threads in (os.cpu_count() or 1, 1):
        apply_thread_budget(threads)
        stages.measure_displacement(stages.inputs_from_arrays(ref, meas[0]), exp)  # warm-up
        t0 = time.perf_counter()
        for m in meas:
            stages.measure_displacement(stages.inputs_from_arrays(ref, m), exp)
        results[threads] = pairs / (time.perf_counter() - t0)
        print(f"displacement stage, {threads} thread(s): {results[threads]:.2f} frames/s "
              f"({pairs} pairs, default correlation settings)", flush=True)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--frames", type=int, default=300)
    ap.add_argument("--skip", nargs="*", default=[], choices=["serial", "two", "dask", "stage"])
    ap.add_argument("--stage-pairs", type=int, default=10)
    ap.add_argument("--render-only", action="store_true", help="only render and cache the frames")
    args = ap.parse_args()
    d = render_frames(args.frames)
    if args.render_only:
        return 0
    print(f"{args.frames} frames of {SHAPE[0]}x{SHAPE[1]} px, {os.cpu_count()} cores, "
          f"load average {os.getloadavg()[0]:.1f} at start", flush=True)
    rows = {}
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        if "serial" not in args.skip:
            rows["1"] = run("1 worker (in process)", d, work, args.frames, workers=1)
        if "two" not in args.skip:
            rows["2"] = run("2 local workers", d, work, args.frames, workers=2)
        if "dask" not in args.skip:
            from distributed import LocalCluster

            with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cl:
                rows["dask"] = run("Dask LocalCluster 2x1", d, work, args.frames, scheduler=cl.scheduler_address)
        if "serial" not in args.skip:
            from bos.batch import apply_thread_budget

            apply_thread_budget(1)  # one process limited to one thread: the pure process-scaling reference
            rows["1t"] = run("1 worker, 1 thread", d, work, args.frames, workers=1)
        if "1" in rows and "2" in rows:
            print(f"speedup 1 -> 2 local workers: x{rows['2']['fps'] / rows['1']['fps']:.2f} wall "
                  f"(x{rows['2']['compute_fps'] / rows['1']['compute_fps']:.2f} while computing; target >= 1.7)")
        if "1t" in rows and "2" in rows:
            print(f"speedup 1 worker with 1 thread -> 2 local workers (1 thread each): "
                  f"x{rows['2']['compute_fps'] / rows['1t']['compute_fps']:.2f} while computing")
        if "2" in rows and "dask" in rows:
            print(f"Dask / local (2 workers): x{rows['dask']['fps'] / rows['2']['fps']:.2f}")
        shutil.rmtree(work, ignore_errors=True)
    if "stage" not in args.skip:
        displacement_stage(d, args.stage_pairs)
    print(f"load average at end {os.getloadavg()[0]:.1f} (2-core machine shared with other work: noisy)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
