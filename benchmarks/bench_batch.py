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
import contextlib
import os
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


def _cpu_seconds() -> float:
    import resource

    return sum(r.ru_utime + r.ru_stime for r in (resource.getrusage(resource.RUSAGE_SELF),
                                                 resource.getrusage(resource.RUSAGE_CHILDREN)))


def run(label: str, d: Path, work: Path, n: int, *, threads: int | None = None, **kwargs) -> dict:
    """One batch of n frames; frame rate overall and in the steady state (first frames excluded)."""
    from bos.batch import apply_thread_budget, run_batch
    from bos.config import load_experiment
    from bos.frames import parse_range, resolve_frames

    out = work / label.replace(" ", "_").replace(",", "")
    exp_file = work / f"{out.name}.toml"
    exp_file.write_text(EXPERIMENT.format(ref=d / "ref.png", out=out))
    frames = resolve_frames(d / "frames", frame_range=parse_range(f"0:{n}"))
    if threads is not None:
        apply_thread_budget(threads)  # in-process runs: this process's thread budget
    stamps: list[float] = []

    def progress(finished, total, outcome):
        if outcome is not None:
            stamps.append(time.perf_counter())

    cpu0 = _cpu_seconds()
    t0 = time.perf_counter()
    rep = run_batch(load_experiment(exp_file), frames, restart=True, progress=progress, **kwargs)
    wall = time.perf_counter() - t0
    # CPU time of this process and its finished worker processes (Dask workers are not counted)
    cpu_per_frame = (_cpu_seconds() - cpu0) / max(1, rep.computed)
    w = max(1, len(rep.peak_rss_bytes))
    # steady state: from the w-th finished frame on (pool start-up and the first frames excluded)
    steady = (len(stamps) - w) / (stamps[-1] - stamps[w - 1]) if len(stamps) > w else float("nan")
    rss = max(rep.peak_rss_bytes.values()) if rep.peak_rss_bytes else 0
    row = {"label": label, "fps": rep.computed / wall, "steady_fps": steady, "wall": wall,
           "failed": len(rep.failed), "rss_gb": rss / 1e9, "workers": len(rep.peak_rss_bytes)}
    print(f"  {label:26s} {row['fps']:6.3f} frames/s overall (wall {wall:6.1f} s incl. start-up and join), "
          f"{steady:6.3f} frames/s steady; failed {row['failed']}; peak RSS per worker {row['rss_gb']:.2f} GB "
          f"({row['workers']} process(es)); CPU {cpu_per_frame:.2f} s/frame"
          f"{' (scheduler side only)' if 'scheduler' in kwargs else ''}; load {os.getloadavg()[0]:.1f}", flush=True)
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
    ap.add_argument("--frames", type=int, default=300, help="frames per batch")
    ap.add_argument("--rounds", type=int, default=1,
                    help="repeat all executors this many times, interleaved (ratios from each round)")
    ap.add_argument("--skip", nargs="*", default=[], choices=["serial", "one-thread", "two", "dask", "stage"])
    ap.add_argument("--stage-pairs", type=int, default=10)
    ap.add_argument("--render-only", action="store_true", help="only render and cache the frames")
    args = ap.parse_args()
    d = render_frames(args.frames)
    if args.render_only:
        return 0
    cores = os.cpu_count() or 1
    print(f"{args.frames} frames of {SHAPE[0]}x{SHAPE[1]} px per batch, {args.rounds} round(s), {cores} cores, "
          f"load average {os.getloadavg()[0]:.1f} at start", flush=True)
    configs = [("serial", "1 worker (in process)", dict(workers=1, threads=cores)),
               ("one-thread", "1 worker, 1 thread", dict(workers=1, threads=1)),
               ("two", "2 local workers", dict(workers=2)),
               ("dask", "Dask LocalCluster 2x1", dict())]
    configs = [c for c in configs if c[0] not in args.skip]
    ratios: dict[str, list[float]] = {}
    with contextlib.ExitStack() as stack:
        scheduler = None
        if any(c[0] == "dask" for c in configs):
            from distributed import LocalCluster

            cluster = stack.enter_context(LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                                       dashboard_address=None))
            scheduler = cluster.scheduler_address
        for r in range(args.rounds):
            print(f"round {r + 1}", flush=True)
            rows = {}
            with tempfile.TemporaryDirectory() as tmp:
                for key, label, kw in configs:
                    if key == "dask":
                        kw = dict(scheduler=scheduler)
                    rows[key] = run(label, d, Path(tmp), args.frames, **kw)
            for a, b, name in (("serial", "two", "1 -> 2 local workers"),
                               ("one-thread", "two", "1 worker 1 thread -> 2 workers 1 thread each"),
                               ("two", "dask", "local 2 -> Dask 2x1")):
                if a in rows and b in rows:
                    ratios.setdefault(name, []).append(rows[b]["steady_fps"] / rows[a]["steady_fps"])
    for name, vals in ratios.items():
        print(f"speedup {name}: x{np.median(vals):.2f} median of {len(vals)} round(s) "
              f"({', '.join(f'x{v:.2f}' for v in vals)}), steady frame rates; target 1 -> 2 >= 1.7")
    if "stage" not in args.skip:
        displacement_stage(d, args.stage_pairs)
    print(f"load average at end {os.getloadavg()[0]:.1f} (2-core machine shared with other work: noisy)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
