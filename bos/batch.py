"""Batch processing of frame sequences: executors, resume, the series file.

Every frame goes through the shared per-frame path
(:func:`bos.stages.inputs_from_arrays` + :func:`bos.stages.process_inputs`,
fields from :func:`bos.output.result_variables`) with the same experiment
settings as ``bos run``.

Executors
    ``workers == 1``: in this process (all cores for the estimator's threads);
    ``workers > 1``: that many local processes, each limited to
    ``cores // workers`` BLAS/OpenMP/FFT threads so they do not
    oversubscribe the machine; ``scheduler``: an existing Dask distributed
    cluster (each worker process limited the same way per host).  Each frame
    is computed independently from the same inputs, so the data are
    bit-identical whatever the executor and worker count.

Resume (single writer, per-frame part files)
    Workers only compute; this process is the only writer.  Each finished
    frame is written to ``.<name>-series.parts/frame-NNNNNN.npz`` in the
    output directory (temporary file, flushed to disk, then renamed), next to
    ``settings.json`` (a SHA-256 fingerprint of the experiment settings, the
    frame list and the reference).  When every frame has a part, the parts
    are joined into ``<name>-series.nc`` (written to a temporary file and
    renamed, so the series file is never half-written) and
    ``<name>-frames.csv``, and the parts folder is removed.  A run that is
    interrupted in any way (Ctrl-C, SIGKILL, power loss) and started again
    with the same settings keeps the finished parts and computes only the
    rest; failed frames are tried again.  Different settings are refused
    unless ``restart=True``.
"""

from __future__ import annotations

import contextlib
import dataclasses
import hashlib
import json
import math
import os
import shutil
import time
import warnings as warnings_module
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterable, Iterator

import numpy as np

from ._io import atomic_path
from .config import Experiment
from .errors import BOSError, ConfigError, DataFileError, InputError
from .frames import FrameRef, FrameSet, average_frames, read_frame
from .store import SERIES_FORMAT_NAME

__all__ = ["SERIES_FORMAT", "STATUS_OK", "STATUS_FAILED", "STATUS_REFERENCE", "STATUS_NAMES", "ReferenceSpec",
           "FrameTask", "FrameOutcome", "BatchReport", "batch_paths", "process_frame", "run_batch",
           "default_workers"]

#: Global ``bos_file_format`` attribute of a series file ("bos-toolkit series 2"; series 1 files were plain
#: HDF5 with dotted attribute names).
SERIES_FORMAT = SERIES_FORMAT_NAME
STATUS_OK, STATUS_FAILED, STATUS_REFERENCE = 0, 1, 2
#: status code -> word (file flag_meanings and the CSV table)
STATUS_NAMES = {STATUS_OK: "ok", STATUS_FAILED: "failed", STATUS_REFERENCE: "reference"}
_PART_VERSION = 1

#: (CSV column, summary key or None, units, long name) of the per-frame scalars.
FRAME_COLUMNS = (
    ("valid_fraction", "valid_fraction", "1", "fraction of unmasked vectors that are valid"),
    ("camera_shift_y_px", None, "px", "camera shift removed, along the image rows (down)"),
    ("camera_shift_x_px", None, "px", "camera shift removed, along the image columns (right)"),
    ("peak_displacement_px", "peak_displacement_px", "px", "largest displacement magnitude"),
    ("peak_temperature_rise_k", "peak_temperature_rise_k", "K", "largest temperature above ambient"),
)


# ---------------------------------------------------------------------------
# Tasks and outcomes
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class ReferenceSpec:
    """Which reference each frame is compared with.

    Attributes
    ----------
    mode : {"experiment", "previous", "average"}
        The experiment's reference image, the previous frame, or the mean of
        ``frames``.
    frames : tuple of FrameRef
        The experiment reference (one frame) or the frames to average.
    """

    mode: str = "experiment"
    frames: tuple[FrameRef, ...] = ()


@dataclass(frozen=True)
class FrameTask:
    """Everything a worker needs for one frame (picklable)."""

    index: int
    frame: FrameRef
    reference: ReferenceSpec
    exp: Experiment
    previous: FrameRef | None = None
    threads: Any = None  # int, or {worker address: int} on a Dask cluster
    gas: str = "air"


@dataclass
class FrameOutcome:
    """What a worker returns for one frame.

    ``variables``/``coords`` map names to ``(dims, array, attrs)`` exactly
    as :func:`bos.output.result_variables` gives them (empty for a failed frame).
    """

    index: int
    status: int
    error: str = ""
    variables: dict[str, tuple] = field(default_factory=dict)
    coords: dict[str, tuple] = field(default_factory=dict)
    summary: dict[str, Any] = field(default_factory=dict)
    attrs: dict[str, Any] = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)
    seconds: float = 0.0
    worker: str = ""
    peak_rss_bytes: int = 0


@dataclass
class BatchReport:
    """Result of :func:`run_batch`.

    Attributes
    ----------
    series_file, table_file : Path
    frames : int
        Number of input frames.
    done : int
        Frames processed successfully.
    failed : list of (frame index, error message)
    reference_frames : list of int
        Frames used only as a reference (the first one with ``--reference previous``).
    computed : int
        Frames computed by this call (the others came from an earlier, interrupted run).
    seconds : float
        Wall time of the computing part.
    executor : str
    peak_rss_bytes : dict
        Peak resident memory of each worker process [bytes].
    warnings : list of str
    """

    series_file: Path
    table_file: Path
    frames: int
    done: int
    failed: list[tuple[int, str]]
    reference_frames: list[int]
    computed: int
    seconds: float
    executor: str
    peak_rss_bytes: dict[str, int] = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)

    @property
    def frames_per_second(self) -> float:
        return self.computed / self.seconds if self.seconds > 0 and self.computed else float("nan")


def default_workers() -> int:
    """Number of local worker processes by default: the number of cores."""
    return max(1, os.cpu_count() or 1)


# ---------------------------------------------------------------------------
# Worker side
# ---------------------------------------------------------------------------

_THREADS: dict[str, Any] = {"n": None}
_CACHE: dict[str, tuple[Any, Any]] = {}


def apply_thread_budget(threads: int | None) -> None:
    """Limit this process's compute threads to ``threads`` (process-wide).

    Sets the OpenMP/OpenBLAS/MKL thread counts (environment variables for
    libraries loaded later, threadpoolctl for those already loaded) and the
    thread count the displacement estimators use by default (FFTs,
    prefilters, sampling).  ``None`` leaves everything as it is.
    """
    if threads is None or _THREADS["n"] == threads:
        return
    n = max(1, int(threads))
    for var in _THREAD_VARS:
        os.environ[var] = str(n)
    try:
        from threadpoolctl import threadpool_limits

        threadpool_limits(limits=n)
    except ImportError:  # pragma: no cover - a runtime dependency
        pass
    from . import _threads

    _threads.set_budget(n)  # the estimators' and the direct solver's "all cores"
    _THREADS["n"] = n


def _threads_here(threads: Any) -> int | None:
    if isinstance(threads, dict):
        try:
            from distributed import get_worker

            return threads.get(get_worker().address)
        except (ImportError, ValueError):
            return None
    return threads


def _cached(key: str, build: Callable[[], Any]) -> Any:
    """One cached value per kind (reference image, mask) in each worker process."""
    kind = key.split(":", 1)[0]
    hit = _CACHE.get(kind)
    if hit is not None and hit[0] == key:
        return hit[1]
    value = build()
    _CACHE[kind] = (key, value)
    return value


def _read_with_warnings(ref: FrameRef) -> tuple[np.ndarray, list[str]]:
    with warnings_module.catch_warnings(record=True) as caught:
        warnings_module.simplefilter("always")
        data = read_frame(ref).data
    return data, [" ".join(str(w.message).split()) for w in caught]


def _reference_image(spec: ReferenceSpec) -> tuple[np.ndarray, list[str]]:
    key = "reference:" + json.dumps([spec.mode, [[f.path, f.frame] for f in spec.frames]])
    if spec.mode == "average":
        return _cached(key, lambda: average_frames(spec.frames))
    return _cached(key, lambda: _read_with_warnings(spec.frames[0]))


def _mask(exp: Experiment, shape: tuple[int, int]) -> np.ndarray | None:
    from . import images

    im = exp.images
    if im.mask is None and not im.mask_polygons:
        return None

    def build():
        mask = images.read_mask(exp.resolve(im.mask), shape=shape) if im.mask is not None else None
        if im.mask_polygons:
            mask = images.combine_masks(mask, images.polygon_mask(im.mask_polygons, shape=shape))
        return mask

    return _cached("mask:" + json.dumps([str(exp.resolve(im.mask)), im.mask_polygons, list(shape)]), build)


def _peak_rss_bytes() -> int:
    """Peak resident memory of this process [bytes].

    VmHWM of /proc/self/status where there is one: ``ru_maxrss`` keeps the
    high-water mark of the parent across fork + exec on Linux, so a worker
    started from a large parent would report the parent's peak.
    """
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) * 1024  # kB
    except OSError:
        pass
    try:
        import resource

        return int(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss) * 1024  # Linux: KiB
    except (ImportError, OSError):  # pragma: no cover
        return 0


def _one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    return text or type(exc).__name__


def process_frame(task: FrameTask) -> FrameOutcome:
    """Process one frame through the shared per-frame path (runs on a worker).

    Errors are caught and returned as a failed outcome with a one-line
    message, so a bad frame never stops the batch.
    """
    from . import stages
    from .output import result_variables

    apply_thread_budget(_threads_here(task.threads))
    t0 = time.perf_counter()
    worker = f"{os.uname().nodename}:{os.getpid()}"
    try:
        if task.reference.mode == "previous":
            try:
                ref, ref_warn = _read_with_warnings(task.previous)
            except BOSError as exc:
                raise InputError(f"previous frame {task.previous.name}: {_one_line(exc)}") from None
            ref_path = task.previous.path
        else:
            ref, ref_warn = _reference_image(task.reference)
            ref_path = ";".join(f.path for f in task.reference.frames)
        meas, meas_warn = _read_with_warnings(task.frame)
        if meas.shape != ref.shape:
            raise InputError(f"frame is {meas.shape[1]}x{meas.shape[0]} px but the reference is "
                             f"{ref.shape[1]}x{ref.shape[0]} px")
        mask = _mask(task.exp, ref.shape)
        inputs = stages.inputs_from_arrays(ref, meas, mask=mask,
                                           paths={"reference": Path(ref_path), "measurement": Path(task.frame.path)},
                                           warnings=list(dict.fromkeys(ref_warn + meas_warn)))
        result = stages.process_inputs(inputs, task.exp)
        coords, variables = result_variables(result, gas=task.gas)
        return FrameOutcome(
            index=task.index, status=STATUS_OK,
            variables={k: (tuple(v["dims"]), np.asarray(v["data"]), dict(v["attrs"])) for k, v in variables.items()},
            coords={k: (tuple(v["dims"]), np.asarray(v["data"]), dict(v["attrs"])) for k, v in coords.items()},
            summary=dict(result.summary), attrs=dict(result.attrs), warnings=list(result.warnings),
            seconds=time.perf_counter() - t0, worker=worker, peak_rss_bytes=_peak_rss_bytes())
    except Exception as exc:  # noqa: BLE001 - recorded per frame, the batch goes on
        msg = _one_line(exc) if isinstance(exc, (BOSError, OSError)) else \
            f"internal error ({type(exc).__name__}: {_one_line(exc)})"
        return FrameOutcome(index=task.index, status=STATUS_FAILED, error=msg,
                            seconds=time.perf_counter() - t0, worker=worker, peak_rss_bytes=_peak_rss_bytes())


# ---------------------------------------------------------------------------
# Executors: each yields outcomes in completion order
# ---------------------------------------------------------------------------


def _serial(tasks: list[FrameTask]) -> Iterator[FrameOutcome]:
    for t in tasks:
        yield process_frame(t)


def _init_local_worker(threads: int) -> None:
    import signal

    # Ctrl-C goes to the main process, which stops the workers itself
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    apply_thread_budget(threads)


def _local(tasks: list[FrameTask], workers: int) -> Iterator[FrameOutcome]:
    """Local worker processes (spawned), at most 2 frames in flight per worker.

    A worker that dies (e.g. killed for lack of memory) breaks the pool; the
    pool is started again and the frames that were in flight are retried; a
    frame in flight during three such crashes is recorded as failed.
    """
    import multiprocessing

    threads = max(1, default_workers() // workers)
    ctx = multiprocessing.get_context("spawn")
    with _thread_environment(threads):  # children start with their budget (BLAS pools sized at load)
        yield from _local_pool(tasks, workers, threads, ctx)


_THREAD_VARS = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMEXPR_NUM_THREADS")


@contextlib.contextmanager
def _thread_environment(threads: int) -> Iterator[None]:
    """Thread-count variables for the worker processes started inside (restored afterwards)."""
    saved = {k: os.environ.get(k) for k in _THREAD_VARS}
    os.environ.update({k: str(threads) for k in _THREAD_VARS})
    try:
        yield
    finally:
        for k, v in saved.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v


def _local_pool(tasks: list[FrameTask], workers: int, threads: int, ctx) -> Iterator[FrameOutcome]:
    from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
    from concurrent.futures.process import BrokenProcessPool

    queue = list(reversed(tasks))
    crashes: dict[int, int] = {}
    limit = 2 * workers
    while queue:
        pool = ProcessPoolExecutor(max_workers=workers, mp_context=ctx, initializer=_init_local_worker,
                                   initargs=(threads,))
        pending: dict[Any, FrameTask] = {}
        broken = False
        try:
            while queue or pending:
                while queue and len(pending) < limit:
                    t = queue.pop()
                    pending[pool.submit(process_frame, t)] = t
                finished, _ = wait(pending, return_when=FIRST_COMPLETED)
                for fut in finished:
                    t = pending.pop(fut)
                    try:
                        yield fut.result()
                    except BrokenProcessPool:
                        broken = True
                        pending[fut] = t
                if broken:
                    break
        except BaseException:
            _stop_pool(pool)
            raise
        if not broken:
            pool.shutdown(wait=True)
            return
        _stop_pool(pool)
        for t in pending.values():
            crashes[t.index] = crashes.get(t.index, 0) + 1
            if crashes[t.index] >= 3:
                yield FrameOutcome(index=t.index, status=STATUS_FAILED,
                                   error="the worker process died while processing this frame (out of memory?)")
            else:
                queue.append(t)


def _stop_pool(pool) -> None:
    """Stop a process pool now (Ctrl-C or a broken pool): cancel queued work, end the workers.

    The pool starts its processes on demand (from its manager thread), so the
    process list is read again after the shutdown request and every process
    seen is terminated and joined.
    """
    seen: dict[int, Any] = {}

    def collect() -> None:
        for p in list((getattr(pool, "_processes", None) or {}).values()):
            seen.setdefault(id(p), p)

    collect()
    pool.shutdown(wait=False, cancel_futures=True)
    collect()
    # SIGTERM first; a worker still there after it (seen once in the test suite: a worker that
    # outlived SIGTERM and two 5 s joins) gets SIGKILL, which it cannot block or ignore
    for stop in ("terminate", "kill"):
        for p in list(seen.values()):
            with contextlib.suppress(Exception):
                if p.is_alive():
                    getattr(p, stop)()
        for p in list(seen.values()):
            with contextlib.suppress(Exception):
                p.join(5)
        collect()


def _dask_threads(client) -> dict[str, int]:
    """Thread budget per Dask worker: cores of its host / compute threads of all workers there."""
    info = client.scheduler_info().get("workers", {})
    cores = client.run(os.cpu_count)
    per_host: dict[str, int] = {}
    for addr, w in info.items():
        per_host[w.get("host", addr)] = per_host.get(w.get("host", addr), 0) + int(w.get("nthreads", 1) or 1)
    return {addr: max(1, int(cores.get(addr) or 1) // max(1, per_host[w.get("host", addr)]))
            for addr, w in info.items()}


def _dask(tasks: list[FrameTask], address: str) -> Iterator[FrameOutcome]:
    try:
        from distributed import Client, as_completed
    except ImportError:
        raise InputError("--scheduler needs Dask distributed: pip install 'bos-toolkit[dask]'") from None
    try:
        client = Client(address, timeout="20s")
    except Exception as exc:  # noqa: BLE001 - connection errors come in many types
        raise InputError(f"cannot connect to the Dask scheduler at {address}: {_one_line(exc)}") from None
    try:
        info = client.scheduler_info().get("workers", {})
        if not info:
            raise InputError(f"the Dask scheduler at {address} has no workers")
        budget = _dask_threads(client)
        limit = 2 * sum(int(w.get("nthreads", 1) or 1) for w in info.values())
        queue = [dataclasses.replace(t, threads=budget) for t in reversed(tasks)]
        index: dict[str, int] = {}

        def submit(task: FrameTask):
            fut = client.submit(process_frame, task, pure=False)
            index[fut.key] = task.index
            return fut

        ac = as_completed([submit(queue.pop()) for _ in range(min(limit, len(queue)))])
        for fut in ac:
            try:
                out = fut.result()
            except (ImportError, AttributeError) as exc:
                raise InputError(f"a Dask worker cannot run bos ({_one_line(exc)}): install the same "
                                 "bos-toolkit version on every worker") from None
            except Exception as exc:  # noqa: BLE001 - e.g. a worker killed while on this frame
                out = FrameOutcome(index=index[fut.key], status=STATUS_FAILED,
                                   error=f"Dask: {type(exc).__name__}: {_one_line(exc)}")
            yield out
            if queue:
                ac.add(submit(queue.pop()))
    finally:
        with contextlib.suppress(Exception):
            client.close()


# ---------------------------------------------------------------------------
# Part files (single writer)
# ---------------------------------------------------------------------------


def _jsonable_attrs(attrs: dict) -> dict:
    from .provenance import jsonable

    return {k: jsonable(v) for k, v in attrs.items() if v is not None}


def _fsync_dir(path: Path) -> None:
    with contextlib.suppress(OSError):
        fd = os.open(path, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def _write_part(path: Path, out: FrameOutcome) -> None:
    """Write one frame's part file: temporary file, flushed to disk, renamed."""
    meta = {
        "version": _PART_VERSION, "index": out.index, "status": out.status, "error": out.error,
        "summary": _jsonable_attrs(out.summary), "attrs": _jsonable_attrs(out.attrs),
        "warnings": out.warnings,
        "variables": {k: [list(d), _jsonable_attrs(a)] for k, (d, _, a) in out.variables.items()},
        "coords": {k: [list(d), _jsonable_attrs(a)] for k, (d, _, a) in out.coords.items()},
    }
    arrays = {f"v__{k}": a for k, (_, a, _) in out.variables.items()}
    arrays.update({f"c__{k}": a for k, (_, a, _) in out.coords.items()})
    with atomic_path(path) as tmp:
        with open(tmp, "wb") as fh:
            np.savez(fh, __meta__=np.array(json.dumps(meta, allow_nan=True)), **arrays)
            fh.flush()
            os.fsync(fh.fileno())
    _fsync_dir(path.parent)


def _part_meta(path: Path) -> dict | None:
    """The metadata of a part file, or None when it is unreadable (then it is redone)."""
    try:
        with np.load(path, allow_pickle=False) as z:
            meta = json.loads(str(z["__meta__"]))
        return meta if meta.get("version") == _PART_VERSION else None
    except Exception:  # noqa: BLE001 - any damage means "not finished"
        return None


class _DamagedPart(Exception):
    """A part file that cannot be read back (it is removed and its frame computed again)."""

    def __init__(self, path: Path):
        super().__init__(str(path))
        self.path = path


def _read_part(path: Path) -> tuple[dict, dict[str, np.ndarray]]:
    try:
        with np.load(path, allow_pickle=False) as z:
            meta = json.loads(str(z["__meta__"]))
            arrays = {k: z[k] for k in z.files if k != "__meta__"}
    except Exception:  # noqa: BLE001 - zip CRC, truncation, bad JSON ...
        raise _DamagedPart(path) from None
    return meta, arrays


def _part_name(index: int) -> str:
    return f"frame-{index:06d}.npz"


# ---------------------------------------------------------------------------
# Paths, settings fingerprint, lock
# ---------------------------------------------------------------------------


def batch_paths(exp: Experiment) -> dict[str, Path]:
    """Where a batch of ``exp`` writes: ``series``, ``table`` and the ``parts`` folder."""
    d = exp.resolve(exp.output.directory)
    name = exp.output.name
    return {"series": d / f"{name}-series.nc", "table": d / f"{name}-frames.csv",
            "parts": d / f".{name}-series.parts"}


def _frame_list(frames: Iterable[FrameRef]) -> list:
    out = []
    for f in frames:
        try:
            size = os.stat(f.path).st_size
        except OSError:
            size = None
        out.append([f.path, f.frame, size])
    return out


def _settings(exp: Experiment, frames: FrameSet, reference: ReferenceSpec) -> dict[str, Any]:
    from .provenance import _section_dict, jsonable

    images = _section_dict(exp.images)
    for key in ("measurement", "frame", "measurement_frame"):
        images.pop(key, None)
    return {
        "format": SERIES_FORMAT,
        "camera": _section_dict(exp.camera), "geometry": _section_dict(exp.geometry),
        "medium": _section_dict(exp.medium), "source": _section_dict(exp.source),
        "images": images, "processing": _section_dict(exp.processing),
        "reconstruction": _section_dict(exp.reconstruction),
        "frames": _frame_list(frames.frames),
        "time": [frames.time_source, jsonable([float(t) for t in frames.time_s])],
        "reference": [reference.mode, _frame_list(reference.frames)],
    }


def _fingerprint(settings: dict) -> str:
    text = json.dumps(settings, sort_keys=True, allow_nan=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()


def _differences(old: dict, new: dict) -> str:
    keys = [k for k in sorted(set(old) | set(new)) if old.get(k) != new.get(k)]
    return ", ".join(keys) or "unknown"


@contextlib.contextmanager
def _locked(parts: Path) -> Iterator[None]:
    import fcntl

    fh = open(parts / "lock", "a+")
    try:
        try:
            fcntl.flock(fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            raise DataFileError(f"another bos batch is writing this series ({parts}); "
                                "wait for it to finish or stop it") from None
        yield
    finally:
        fh.close()


def _series_fingerprint(path: Path) -> str | None:
    import h5py

    try:
        with h5py.File(path, "r") as h5:
            value = h5.attrs.get("batch_settings_sha256")
    except Exception:  # noqa: BLE001 - unreadable or not ours: no match
        return None
    return value.decode() if isinstance(value, bytes) else (str(value) if value is not None else None)


def _clean_stale(paths: dict[str, Path]) -> None:
    """Remove temporary files left by a killed run (never complete files)."""
    series = paths["series"]
    # "..name.*": the temporary file bos.store.write_result makes beside the series' own temporary file
    for tmp in [*series.parent.glob(f".{series.stem}.*{series.suffix}.part{series.suffix}"),
                *series.parent.glob(f"..{series.stem}.*{series.suffix}.part{series.suffix}")]:
        with contextlib.suppress(OSError):
            tmp.unlink()
    table = paths["table"]
    for tmp in table.parent.glob(f".{table.stem}.*{table.suffix}.part{table.suffix}"):
        with contextlib.suppress(OSError):
            tmp.unlink()
    if paths["parts"].is_dir():
        for tmp in [*paths["parts"].glob(".frame-*.part.npz"), *paths["parts"].glob(".settings.*.part.json")]:
            with contextlib.suppress(OSError):
                tmp.unlink()


# ---------------------------------------------------------------------------
# The batch
# ---------------------------------------------------------------------------


def _prepare_reference(exp: Experiment, frames: FrameSet, mode: str,
                       reference_frames: FrameSet | None) -> tuple[ReferenceSpec, dict, list[str]]:
    """Reference spec, EXIF of the reference, warnings; reads the reference once to check it."""
    from .images import read_image

    if reference_frames is not None:
        if mode == "previous":
            raise InputError("give either --reference previous or --reference-frames, not both")
        spec = ReferenceSpec("average", tuple(reference_frames.frames))
        _, warns = average_frames(spec.frames)
        exif = dict(read_image(spec.frames[0].path, frame=spec.frames[0].frame).exif or {})
        return spec, exif, warns
    if mode == "previous":
        with warnings_module.catch_warnings():
            warnings_module.simplefilter("ignore")
            exif = dict(read_frame(frames.frames[0]).exif or {}) if frames.frames else {}
        return ReferenceSpec("previous"), exif, []
    if mode != "experiment":
        raise InputError(f"unknown reference mode {mode!r}: use 'previous', or --reference-frames PATTERN")
    path = exp.resolve(exp.images.reference)
    if path is None:
        raise ConfigError("missing value: images.reference (give it in the experiment file, or use "
                          "--reference previous or --reference-frames PATTERN)")
    frame = exp.images.reference_frame if exp.images.reference_frame is not None else exp.images.frame
    ref = FrameRef(str(Path(path).resolve()), frame)
    with warnings_module.catch_warnings(record=True) as caught:
        warnings_module.simplefilter("always")
        img = read_image(ref.path, frame=ref.frame)
    return ReferenceSpec("experiment", (ref,)), dict(img.exif or {}), [str(w.message) for w in caught]


def run_batch(exp: Experiment, frames: FrameSet, *, reference: str = "experiment",
              reference_frames: FrameSet | None = None, workers: int | None = None,
              scheduler: str | None = None, restart: bool = False,
              progress: Callable[[int, int, FrameOutcome | None], None] | None = None) -> BatchReport:
    """Process every frame of ``frames`` and write the series file and the per-frame table.

    Parameters
    ----------
    exp : Experiment
        Settings shared by all frames (as for ``bos run``).
    frames : FrameSet
        From :func:`bos.frames.resolve_frames`.
    reference : {"experiment", "previous"}
        Compare each frame with the experiment's reference image or with the
        previous frame (the first frame is then a reference only).
    reference_frames : FrameSet, optional
        Average these no-flow frames into the reference instead.
    workers : int, optional
        Local worker processes (default: the number of cores; 1 = in this process).
    scheduler : str, optional
        Address of a Dask distributed scheduler (``tcp://host:8786``); the
        image paths must be readable by every worker.
    restart : bool
        Discard the finished frames of an earlier run instead of resuming.
    progress : callable, optional
        ``progress(finished, total, outcome)`` after each frame (outcome is
        None for frames taken over from an earlier run).

    Returns
    -------
    BatchReport

    Raises
    ------
    InputError, ConfigError
        Bad settings, no frames, unreadable reference; an earlier unfinished
        batch with other settings (without ``restart``).
    DataFileError
        The output directory is not writable; another batch is writing it.
    """
    from .output import prepare_output_dir
    from .stages import with_exif_defaults

    if not frames.frames:
        raise InputError("no frames to process")
    if workers is not None and workers < 1:
        raise InputError(f"--workers must be at least 1, got {workers}")
    exp = dataclasses.replace(exp, base_dir=Path(exp.base_dir).resolve())
    spec, exif, ref_warnings = _prepare_reference(exp, frames, reference, reference_frames)
    exp, notes = with_exif_defaults(exp, exif)
    exp.rig()  # missing camera/geometry values stop everything (exit 2), not every frame
    exp.medium_model()
    if exp.reconstruction.kind == "planar" and exp.geometry.object_width_m is None:
        raise ConfigError("missing value: geometry.object_width_mm (needed for a planar reconstruction)")
    gas = exp.medium.gas if not exp.medium.composition else "mixture"
    n = len(frames.frames)
    paths = batch_paths(exp)
    prepare_output_dir(paths["series"].parent)
    settings = _settings(exp, frames, spec)
    digest = _fingerprint(settings)
    parts = paths["parts"]
    created = not parts.exists()
    parts.mkdir(exist_ok=True)
    try:
        with _locked(parts):
            _clean_stale(paths)
            old_series = _resume_state(paths, settings, digest, restart=restart)
            for _ in range(3):
                try:
                    report = _run_locked(exp, frames, spec, paths, n=n, gas=gas, workers=workers,
                                         scheduler=scheduler, old_series=old_series, digest=digest,
                                         progress=progress, warnings=list(dict.fromkeys(ref_warnings + notes)))
                    break
                except _DamagedPart as exc:  # e.g. after a power cut: compute that frame again
                    exc.path.unlink(missing_ok=True)
            else:
                raise DataFileError(f"part files in {parts} keep getting damaged: check the disk")
    except BaseException:
        if created and not any(parts.glob("frame-*.npz")):
            shutil.rmtree(parts, ignore_errors=True)
        raise
    shutil.rmtree(parts, ignore_errors=True)
    return report


def _resume_state(paths: dict[str, Path], settings: dict, digest: str, *, restart: bool) -> Path | None:
    """Check an earlier run's settings; return a finished series file to take frames from."""
    parts, series = paths["parts"], paths["series"]
    stored = parts / "settings.json"
    if restart:
        for p in parts.glob("frame-*.npz"):
            p.unlink()
        with contextlib.suppress(FileNotFoundError):
            stored.unlink()
    if stored.exists():
        try:
            old = json.loads(stored.read_text())
        except (OSError, ValueError):
            old = None
        if old is None:  # damaged: the parts cannot be matched to settings, so they are not used
            stored.unlink()
        elif old.get("sha256") != digest:
            done = len(list(parts.glob("frame-*.npz")))
            raise InputError(f"an unfinished batch in {parts.parent} ({done} frame(s) done) was started with "
                             f"different settings ({_differences(old.get('settings', {}), settings)}); "
                             "rerun with --restart to discard it and start again")
    # an unfinished batch with these settings (e.g. a --restart that was interrupted) may replace
    # a series of other settings; without one, that series is protected
    resuming = stored.exists()
    old_series = None
    if not restart and series.exists():
        found = _series_fingerprint(series)
        if found == digest:
            old_series = series
        elif not resuming:
            raise InputError(f"{series} holds a series made with different settings; rerun with --restart "
                             "to replace it (or choose another output.name)")
    if not stored.exists():
        for p in parts.glob("frame-*.npz"):  # parts of unknown settings are never mixed in
            p.unlink()
        with atomic_path(stored) as tmp:
            with open(tmp, "w", encoding="utf-8") as fh:
                fh.write(json.dumps({"sha256": digest, "settings": settings}, allow_nan=True, default=str))
                fh.flush()
                os.fsync(fh.fileno())
    return old_series


def _old_series_status(path: Path | None, n: int) -> np.ndarray:
    import h5py

    if path is None:
        return np.full(n, STATUS_FAILED)
    with h5py.File(path, "r") as h5:
        return np.asarray(h5["status"][()])


def _run_locked(exp, frames: FrameSet, spec: ReferenceSpec, paths, *, n, gas, workers, scheduler,
                old_series, digest, progress, warnings) -> BatchReport:
    parts = paths["parts"]
    finished: dict[int, int] = {}  # index -> status of the frames already done
    old_status = _old_series_status(old_series, n)
    for i in range(n):
        part = parts / _part_name(i)
        if part.exists():
            meta = _part_meta(part)
            if meta is None or meta.get("index") != i:
                part.unlink()
            elif meta["status"] != STATUS_FAILED:
                finished[i] = meta["status"]
                continue
        if old_status[i] != STATUS_FAILED:
            finished[i] = int(old_status[i])
    taken_over = len(finished)
    if progress is not None:
        progress(taken_over, n, None)
    tasks = []
    for i, ref in enumerate(frames.frames):
        if i in finished:
            continue
        if spec.mode == "previous" and i == 0:
            _write_part(parts / _part_name(0), FrameOutcome(index=0, status=STATUS_REFERENCE,
                                                            error="reference of the next frame"))
            finished[0] = STATUS_REFERENCE
            continue
        tasks.append(FrameTask(index=i, frame=ref, reference=spec, exp=exp, gas=gas,
                               previous=frames.frames[i - 1] if spec.mode == "previous" else None))
    nw = default_workers() if workers is None else int(workers)
    nw = max(1, min(nw, len(tasks)))
    if scheduler:
        executor, outcomes = f"dask {scheduler}", _dask(tasks, scheduler)
    elif nw == 1:
        executor, outcomes = "serial", _serial(tasks)
    else:
        executor, outcomes = f"{nw} local processes", _local(tasks, nw)
    rss: dict[str, int] = {}
    all_warnings = list(warnings)
    t0 = time.perf_counter()
    computed = 0
    try:
        for out in outcomes:
            _write_part(parts / _part_name(out.index), out)
            finished[out.index] = out.status
            computed += 1
            if out.worker:
                rss[out.worker] = max(rss.get(out.worker, 0), out.peak_rss_bytes)
            for w in out.warnings:
                if w not in all_warnings and len(all_warnings) < 50:
                    all_warnings.append(w)
            if progress is not None:
                progress(len(finished), n, out)
    finally:
        # an interruption (Ctrl-C, SIGTERM) while this loop writes a part must stop the workers now:
        # closing the executor generator runs its clean-up (pool stopped, workers terminated); left
        # to the garbage collector, the pool's exit handler would wait for every frame in flight
        close = getattr(outcomes, "close", None)
        if close is not None:
            close()
    seconds = time.perf_counter() - t0
    if computed == 0 and old_series is not None and not any(parts.glob("frame-*.npz")):
        records = _series_records(old_series, frames)  # finished earlier: nothing to rewrite
    else:
        records = _join(paths, frames, spec, n=n, old_series=old_series, digest=digest, warnings=all_warnings,
                        executor=executor, exp=exp)
    failed = [(r["frame"], r["error"]) for r in records if r["status"] == STATUS_FAILED]
    return BatchReport(series_file=paths["series"], table_file=paths["table"], frames=n,
                       done=sum(r["status"] == STATUS_OK for r in records), failed=failed,
                       reference_frames=[r["frame"] for r in records if r["status"] == STATUS_REFERENCE],
                       computed=computed, seconds=seconds, executor=executor, peak_rss_bytes=rss,
                       warnings=all_warnings)


# ---------------------------------------------------------------------------
# Joining the parts: the series file and the per-frame table
# ---------------------------------------------------------------------------


class _FrameSource:
    """Frame data for the join: from a part file or from an earlier finished series file."""

    def __init__(self, parts: Path, old_series: Path | None):
        import h5py

        self.parts = parts
        self.old = h5py.File(old_series, "r") if old_series is not None else None

    def close(self) -> None:
        if self.old is not None:
            self.old.close()

    def get(self, i: int) -> tuple[dict, dict[str, np.ndarray]]:
        """(meta, arrays) of frame ``i`` (meta holds status, error, summary, variables, coords, attrs)."""
        part = self.parts / _part_name(i)
        if part.exists():
            return _read_part(part)
        if self.old is None:
            raise DataFileError(f"frame {i} is missing from {self.parts}")
        return self._from_old(i)

    def meta(self, i: int) -> dict:
        """Status, error and per-frame numbers of frame ``i`` (no field arrays read)."""
        part = self.parts / _part_name(i)
        if part.exists():
            meta = _part_meta(part)
            if meta is None:
                raise _DamagedPart(part)
            return meta
        if self.old is None:
            raise DataFileError(f"frame {i} is missing from {self.parts}")
        return self.meta_only(i)

    def meta_only(self, i: int) -> dict:
        """Status, error and per-frame numbers of frame ``i`` of the earlier series."""
        h5 = self.old
        summary = {col: float(h5[col][i]) for col, _, _, _ in FRAME_COLUMNS if col in h5}
        return {"status": int(h5["status"][i]), "error": _text(h5["error"][i]), "summary": summary,
                "variables": {}, "coords": {}, "attrs": {}, "from_series": True}

    def _from_old(self, i: int) -> tuple[dict, dict[str, np.ndarray]]:
        h5 = self.old
        meta = self.meta_only(i)
        arrays = {}
        for name in json.loads(_text(h5.attrs.get("batch_field_variables", "[]"))):
            ds = h5[name]
            meta["variables"][name] = [["y", "x"], {}]
            arrays[f"v__{name}"] = ds[i]
        return meta, arrays


def _series_records(path: Path, frames: FrameSet) -> list[dict]:
    source = _FrameSource(path.parent, path)
    try:
        return [_frame_record(i, ref, float(frames.time_s[i]), source.meta_only(i))
                for i, ref in enumerate(frames.frames)]
    finally:
        source.close()


def _text(value: Any) -> str:
    if isinstance(value, np.ndarray):  # one row of a CF character array (series 2)
        value = b"".join(value.tolist())
    return value.decode("utf-8", "replace") if isinstance(value, bytes) else str(value)


def _frame_record(i: int, ref: FrameRef, t: float, meta: dict) -> dict[str, Any]:
    s = meta.get("summary", {}) or {}
    shift = s.get("camera_shift_px")
    rec = {"frame": i, "source_file": ref.name, "source_frame": -1 if ref.frame is None else int(ref.frame),
           "time_s": t, "status": int(meta["status"]), "error": str(meta.get("error") or "")}
    for col, key, _, _ in FRAME_COLUMNS:
        v = s.get(key) if key else None
        if col == "camera_shift_y_px":
            v = shift[0] if shift else s.get(col)
        elif col == "camera_shift_x_px":
            v = shift[1] if shift else s.get(col)
        rec[col] = float(v) if v is not None else float("nan")
    if rec["status"] != STATUS_OK:
        for col, _, _, _ in FRAME_COLUMNS:
            rec[col] = float("nan")
    return rec


def _join(paths, frames: FrameSet, spec: ReferenceSpec, *, n, old_series, digest, warnings,
          executor, exp: Experiment) -> list[dict]:
    """Write the series file and the table from the parts (and an earlier series)."""
    source = _FrameSource(paths["parts"], old_series)
    try:
        template = None
        for i in range(n):
            meta, arrays = source.get(i)
            if meta["status"] == STATUS_OK and not meta.get("from_series"):
                template = (meta, arrays)
                break
        if template is None and old_series is not None:
            template = _template_from_series(old_series)
        with atomic_path(paths["series"]) as tmp:
            records = _write_series(tmp, source, frames, spec, n=n, template=template, digest=digest,
                                    warnings=warnings, executor=executor, exp=exp)
    finally:
        source.close()
    _write_table(paths["table"], records)
    _fsync_dir(paths["series"].parent)
    return records


def _template_from_series(path: Path):
    """Variable layout and attributes of an earlier series (all its frames are reused)."""
    import h5py

    with h5py.File(path, "r") as h5:
        names = json.loads(_text(h5.attrs.get("batch_field_variables", "[]")))
        meta: dict[str, Any] = {"variables": {}, "coords": {}, "attrs": json.loads(
            _text(h5.attrs.get("batch_provenance", "{}")))}
        arrays = {}
        for name in names:
            ds = h5[name]
            meta["variables"][name] = [["y", "x"], {k: _attr_value(v) for k, v in ds.attrs.items()
                                                    if k not in _H5_INTERNAL and not k.startswith("_")}]
            arrays[f"v__{name}"] = ds[0]
        for name in ("y", "x", "row_px", "col_px"):
            if name in h5:
                ds = h5[name]
                dims = [name] if name in ("y", "x") else (["y"] if name == "row_px" else ["x"])
                meta["coords"][name] = [dims, {k: _attr_value(v) for k, v in ds.attrs.items()
                                               if k not in _H5_INTERNAL and not k.startswith("_")}]
                arrays[f"c__{name}"] = ds[()]
    return (meta, arrays) if names else None


_H5_INTERNAL = ("CLASS", "NAME", "REFERENCE_LIST", "DIMENSION_LIST", "coordinates")  # and "_..." (netCDF layer)


def _attr_value(v: Any) -> Any:
    if isinstance(v, bytes):
        return v.decode("utf-8", "replace")
    if isinstance(v, np.ndarray):
        return v.tolist()
    if isinstance(v, np.generic):
        return v.item()
    return v


def _write_series(tmp: Path, source: _FrameSource, frames: FrameSet, spec: ReferenceSpec, *, n, template,
                  digest, warnings, executor, exp: Experiment) -> list[dict]:
    """Write the series through :func:`bos.store.write_result` (netCDF-4 / CF-1.8, as the run files): the
    per-frame fields are created empty and filled one frame at a time, so the series is never in memory."""
    from . import output, store

    records = [_frame_record(i, ref, float(frames.time_s[i]), source.meta(i)) for i, ref in enumerate(frames.frames)]
    coords: dict[str, Any] = {"frame": (np.arange(n, dtype=np.int64),
                                        {"units": "1", "long_name": "frame number in input order"})}
    variables: dict[str, Any] = {}
    if template is not None:
        tmeta, tarr = template
        for name, (dims, attrs) in tmeta["coords"].items():
            coords[name] = {"dims": tuple(dims), "data": tarr[f"c__{name}"], "attrs": attrs}
        for name, (dims, attrs) in tmeta["variables"].items():
            arr = tarr[f"v__{name}"]
            variables[name] = {"dims": ("frame", *dims), "shape": (n, *arr.shape), "dtype": arr.dtype,
                               "attrs": attrs}
    fields = list(variables)
    variables.update(_frame_variables(records, frames))
    attrs: dict[str, Any] = dict(template[0].get("attrs", {})) if template is not None else {}
    provenance = {k: v for k, v in attrs.items() if k not in ("inputs", "input_sha256", "input_info", "summary")}
    gattrs = dict(provenance)
    if "source" in gattrs:  # the experiment's [source] section; CF reserves "source" for a text
        gattrs["flow_source"] = gattrs.pop("source")
    import bos

    proc, rec = gattrs.get("processing") or {}, gattrs.get("reconstruction") or {}
    gattrs.update({
        "title": f"BOS series {exp.output.name}",
        "Conventions": "CF-1.8",
        "source": (f"background-oriented schlieren series processed with bos-toolkit {bos.__version__} (bos batch, "
                   f"{n} frames, reference: {spec.mode}; displacement: {proc.get('method', 'correlation')}; "
                   f"reconstruction: {rec.get('kind', 'none')})"),
        "references": output._references(gattrs),
        "experiment_file_text": output._experiment_text(exp),
        "coordinate_note": output.COORDINATE_NOTE,
        "run_name": exp.output.name,
        "batch": {"frames": n, "reference_mode": spec.mode, "reference_files": [f.name for f in spec.frames],
                  "time_source": frames.time_source, "executor": executor, "warnings": list(warnings)},
        "bos_file_format": SERIES_FORMAT,
        "batch_settings_sha256": digest,
        "batch_field_variables": json.dumps(fields),
        "batch_provenance": json.dumps(provenance, allow_nan=True, default=str),
    })

    def fill(write) -> None:
        for i, rec in enumerate(records):
            if rec["status"] != STATUS_OK:
                for name in fields:
                    dtype = np.dtype(variables[name]["dtype"])
                    write(name, i, np.full(variables[name]["shape"][1:], (1 if name == "invalid" else 0)
                                           if dtype.kind in "iub" else np.nan, dtype=dtype))
                continue
            _, arrays = source.get(i)
            for name in fields:
                if f"v__{name}" not in arrays:  # an ok frame without this field: cannot happen with one experiment
                    raise DataFileError(f"frame {i} has no {name!r}; rerun with --restart")
                write(name, i, arrays[f"v__{name}"])

    store.write_result(tmp, coords=coords, variables=variables, attrs=gattrs, fill=fill,
                       history=f"bos batch from {exp.source_file or 'command-line options'} ({n} frames, {executor})")
    with open(tmp, "rb+") as fh:
        os.fsync(fh.fileno())
    return records


#: What a pixel count in the series file carries (CF units "1": UDUNITS and pint read "px" as something else).
_PX_ATTRS = {"units": "1", "display_units": "px",
             "comment": "count of image pixels (dimensionless, CF units '1'; display unit px), along the image "
                        "rows (down) or columns (right) as the name says"}


def _frame_variables(records: list[dict], frames: FrameSet) -> dict[str, Any]:
    """Per-frame variables of the series (dimension ``frame``)."""
    def var(data, attrs, dtype=None):
        return {"dims": ("frame",), "data": np.asarray(data, dtype=dtype), "attrs": attrs}

    out = {
        "status": var([r["status"] for r in records], {
            "units": "1", "long_name": "processing status of the frame",
            "flag_values": np.array(sorted(STATUS_NAMES), np.int8),
            "flag_meanings": " ".join(STATUS_NAMES[k] for k in sorted(STATUS_NAMES))}, np.int8),
        "error": var([r["error"] for r in records], {"long_name": "error message of a failed frame"}, str),
        "source_file": var([r["source_file"] for r in records],
                           {"long_name": "file the frame was read from (#k: frame k inside it)"}, str),
        "source_frame": var([r["source_frame"] for r in records], {
            "units": "1", "long_name": "frame index inside a video or multi-page file (-1: still image)"}, np.int64),
        "time": var([r["time_s"] for r in records], {"units": "s", "long_name": "time of the frame from the first "
                                                     "frame", "source": frames.time_source}, np.float64),
    }
    for col, _, units, long_name in FRAME_COLUMNS:
        attrs = {**_PX_ATTRS, "long_name": long_name} if units == "px" else {"units": units, "long_name": long_name}
        out[col] = var([r[col] for r in records], attrs, np.float64)
    return out


def _write_table(path: Path, records: list[dict]) -> None:
    import csv

    cols = ["frame", "source_file", "source_frame", "time_s", "status", "error"] + [c for c, *_ in FRAME_COLUMNS]
    with atomic_path(path) as tmp:
        with open(tmp, "w", newline="", encoding="utf-8") as fh:
            w = csv.writer(fh)
            w.writerow(cols)
            for r in records:
                row = dict(r, status=STATUS_NAMES[r["status"]])
                w.writerow([_cell(row[c]) for c in cols])


def _cell(v: Any) -> str:
    if isinstance(v, float):
        return "nan" if not math.isfinite(v) else repr(v)
    return str(v)
