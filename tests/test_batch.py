"""Batch processing (bos.batch, bos.frames): series file, executors, references, frame sources.

Outside sources of the checks:
* the frames are rendered by the analytic forward model (bos.synthetic:
  exact erf area integrals of Gaussian dots) with a known uniform
  displacement per frame, so the recovered displacement is checked against
  that analytic value;
* the series file is opened with xarray + h5netcdf (general-purpose netCDF4 /
  HDF5 readers) and checked with the CF conventions checker cfchecks (CF 1.8,
  UDUNITS-2; skipped where missing), the table with the standard csv module;
* the averaged reference is checked against numpy's mean of the images read
  with imageio;
* the Dask run uses dask.distributed's LocalCluster (a general-purpose
  scheduler) and must equal the local run bit for bit.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest

from bos import synthetic
from bos.batch import STATUS_FAILED, STATUS_OK, STATUS_REFERENCE, run_batch
from bos.config import load_experiment
from bos.errors import InputError
from bos.frames import natural_key, parse_range, resolve_frames

SHAPE = (128, 128)
N_FRAMES = 5
T0_K = 293.15
# known uniform displacement of frame k [px]: (dy, dx) = k * STEP
STEP = (0.1, -0.2)

EXPERIMENT = """
camera = {{ focal_length_mm = 35, pixel_pitch_um = 4, f_number = 8 }}
geometry = {{ camera_to_background_m = 1.2, object_to_background_m = 0.5, object_width_mm = 40 }}
[medium]
temperature_k = {t0}
[images]
reference = "ref.png"
[processing]
window_px = 32
final_window_px = 16
passes = 2
camera_motion = "{motion}"
[reconstruction]
kind = "planar"
reference_region = "left"
[output]
directory = "{out}"
name = "seq"
"""


def write_png16(path: Path, counts: np.ndarray) -> Path:
    import imageio.v3 as iio

    iio.imwrite(path, np.clip(np.rint(counts), 0, 65535).astype(np.uint16), extension=".png")
    return path


def shift(k: int) -> tuple[float, float]:
    return k * STEP[0], k * STEP[1]


def make_sequence(d: Path, n: int = N_FRAMES, *, noise_seed: int = 10) -> Path:
    """Reference ref.png and frames/f000.png ... with frame k shifted by k * STEP."""
    bg = synthetic.random_dots(shape=SHAPE, dot_diameter_px=2.8, density=0.55, seed=3)
    write_png16(d / "ref.png", synthetic.render(bg, shape=SHAPE, bit_depth=16, seed=1))
    frames = d / "frames"
    frames.mkdir()
    for k in range(n):
        dy, dx = shift(k)
        img = synthetic.render(bg, shape=SHAPE, displacement=(np.full(SHAPE, dy), np.full(SHAPE, dx)),
                               bit_depth=16, seed=noise_seed + k)
        write_png16(frames / f"f{k:03d}.png", img)
    return d


def write_experiment(d: Path, out: str, *, motion: str = "none", extra: str = "") -> Path:
    path = d / f"exp-{out}.toml"
    path.write_text(EXPERIMENT.format(t0=T0_K, out=out, motion=motion) + extra)
    return path


def open_series(path):
    xr = pytest.importorskip("xarray")
    return xr.open_dataset(path, engine="h5netcdf")


def y_sign(ds) -> float:
    """+1 when the file's y grows with the image row (down), -1 when it points up."""
    return float(np.sign(ds["y"].values[1] - ds["y"].values[0]))


def assert_same_series(a_path, b_path):
    """Every variable and coordinate equal bit for bit (NaN where NaN)."""
    with open_series(a_path) as a, open_series(b_path) as b:
        assert set(a.data_vars) == set(b.data_vars)
        for name in list(a.data_vars) + list(a.coords):
            x, y = a[name].values, b[name].values
            if x.dtype.kind == "f":
                assert np.array_equal(x, y, equal_nan=True), name
            else:
                assert np.array_equal(x, y), name


@pytest.fixture(scope="module")
def seq(tmp_path_factory):
    return make_sequence(tmp_path_factory.mktemp("batch"))


@pytest.fixture(scope="module")
def serial_run(seq):
    exp = load_experiment(write_experiment(seq, "serial"))
    frames = resolve_frames(seq / "frames")
    return run_batch(exp, frames, workers=1)


# ----------------------------------------------------------------------------- frame sources


def test_natural_order_list_file_folder_and_range(tmp_path):
    names = ["f10.png", "f9.png", "f1.png", "notes.md"]
    for n in names:
        (tmp_path / n).write_bytes(b"x")
    assert sorted(["f10", "f9", "f1"], key=natural_key) == ["f1", "f9", "f10"]
    fs = resolve_frames(tmp_path)  # folder: images only, digits compared as numbers
    assert [f.name for f in fs.frames] == ["f1.png", "f9.png", "f10.png"]
    fs = resolve_frames(str(tmp_path / "f*.png"), frame_range=parse_range("1:"))
    assert [f.name for f in fs.frames] == ["f9.png", "f10.png"]
    lst = tmp_path / "frames.txt"
    lst.write_text("# chosen order\nf10.png\n\nf1.png\n")
    assert [f.name for f in resolve_frames(lst).frames] == ["f10.png", "f1.png"]
    fs = resolve_frames(tmp_path, frame_rate_hz=100.0, frame_range=parse_range("0:3:2"))
    assert [f.name for f in fs.frames] == ["f1.png", "f10.png"]
    np.testing.assert_allclose(fs.time_s, [0.0, 0.02])  # positions 0 and 2 at 100 Hz
    assert parse_range("3").start == 3 and parse_range("3").stop == 4
    for bad in ("a:b", "1:2:0", "1:2:3:4"):
        with pytest.raises(InputError):
            parse_range(bad)
    with pytest.raises(InputError, match="no frames matched"):
        resolve_frames(str(tmp_path / "nothing*.tif"))
    with pytest.raises(InputError, match="selects none"):
        resolve_frames(tmp_path, frame_range=parse_range("10:"))


def test_multipage_tiff_pages_are_frames(tmp_path):
    tifffile = pytest.importorskip("tifffile")
    pages = np.arange(3 * 8 * 8, dtype=np.uint16).reshape(3, 8, 8)
    with tifffile.TiffWriter(tmp_path / "stack.tif") as tif:
        for page in pages:
            tif.write(page, photometric="minisblack")
    fs = resolve_frames(tmp_path / "stack.tif")
    assert fs.kind == "multipage" and [f.frame for f in fs.frames] == [0, 1, 2]
    from bos.frames import read_frame

    np.testing.assert_array_equal(read_frame(fs.frames[2]).data, pages[2] / 65535.0)


# ----------------------------------------------------------------------------- the series file


def test_series_layout_and_known_displacement(seq, serial_run):
    rep = serial_run
    assert rep.frames == N_FRAMES and rep.done == N_FRAMES and rep.failed == [] and rep.computed == N_FRAMES
    assert rep.series_file.name == "seq-series.nc" and rep.table_file.name == "seq-frames.csv"
    assert not (rep.series_file.parent / ".seq-series.parts").exists()  # joined and cleaned up
    with open_series(rep.series_file) as ds:
        np.testing.assert_array_equal(ds["frame"].values, np.arange(N_FRAMES))
        assert list(ds["source_file"].values) == [f"f{k:03d}.png" for k in range(N_FRAMES)]
        assert np.all(ds["status"].values == STATUS_OK)
        dx = ds["displacement_x"]
        assert dx.dims == ("frame", "y", "x")
        assert dx.encoding["chunksizes"] == (1,) + dx.shape[1:]   # one frame per chunk
        assert dx.encoding["zlib"] and dx.encoding["shuffle"]      # compressed
        # same attrs as bos run (next test); text (error, source_file: CF character arrays) has no units
        assert all(ds[v].attrs.get("units") for v in ds.data_vars if v not in ("error", "source_file"))
        assert ds.attrs["bos_file_format"] == "bos-toolkit series 2"
        for k in range(N_FRAMES):
            dy_true, dx_true = shift(k)
            # analytic uniform shift of the forward model; 0.02 px covers the estimator bias at 16 px windows
            assert float(ds["displacement_x"][k].median()) == pytest.approx(dx_true, abs=0.02)
            assert float(ds["displacement_y"][k].median()) == pytest.approx(y_sign(ds) * dy_true, abs=0.02)


def test_frame_equals_single_run(seq, serial_run):
    """A frame of the series is exactly what `bos run` computes for that pair (one shared path)."""
    from bos import pipeline
    from bos.output import result_variables

    exp = load_experiment(write_experiment(seq, "single"), overrides={"images.measurement": "frames/f003.png"})
    result = pipeline.run_experiment(exp)
    _, variables = result_variables(result)
    with open_series(serial_run.series_file) as ds:
        assert set(variables) <= set(ds.data_vars)
        for name, var in variables.items():
            got = ds[name][3].values
            assert np.array_equal(got, np.asarray(var["data"], dtype=got.dtype), equal_nan=True), name
            assert ds[name].attrs["units"] == var["attrs"]["units"]
            assert ds[name].attrs["long_name"] == var["attrs"]["long_name"]


def test_table_matches_fields(seq):
    """Per-frame table vs the fields; camera shift column vs the analytic shift (border motion removal)."""
    exp = load_experiment(write_experiment(seq, "table", motion="border"))
    rep = run_batch(exp, resolve_frames(seq / "frames"), workers=1)
    with open(rep.table_file, newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [int(r["frame"]) for r in rows] == list(range(N_FRAMES))
    with open_series(rep.series_file) as ds:
        for k, row in enumerate(rows):
            assert row["status"] == "ok" and row["error"] == ""
            mag = ds["displacement_magnitude"][k].values
            assert float(row["peak_displacement_px"]) == pytest.approx(np.nanmax(mag), rel=1e-12)
            flags = (ds["masked"][k].values.astype(bool), ds["invalid"][k].values.astype(bool))
            valid = ~(flags[0] | flags[1]) & np.isfinite(mag)
            assert float(row["valid_fraction"]) == pytest.approx(valid.sum() / (~flags[0]).sum(), rel=1e-12)
            rise = np.nanmax(ds["temperature"][k].values) - T0_K
            assert float(row["peak_temperature_rise_k"]) == pytest.approx(rise, rel=1e-9, abs=1e-9)
            assert float(row["valid_fraction"]) == pytest.approx(float(ds["valid_fraction"][k]), rel=1e-12)
            dy_true, dx_true = shift(k)
            # the whole (uniform) displacement is camera motion here
            # the camera shift is given along the image rows (down), as in the summary of bos run
            assert float(row["camera_shift_y_px"]) == pytest.approx(dy_true, abs=0.02)
            assert float(row["camera_shift_x_px"]) == pytest.approx(dx_true, abs=0.02)
            assert float(row["peak_displacement_px"]) < 0.1  # noise only, against up to 0.9 px removed


# ----------------------------------------------------------------------------- executors


def test_two_local_workers_identical_to_serial(seq, serial_run):
    exp = load_experiment(write_experiment(seq, "two"))
    rep = run_batch(exp, resolve_frames(seq / "frames"), workers=2)
    assert rep.executor == "2 local processes" and rep.done == N_FRAMES
    assert len(rep.peak_rss_bytes) >= 1 and all(v > 10e6 for v in rep.peak_rss_bytes.values())
    assert_same_series(serial_run.series_file, rep.series_file)


def test_dask_local_cluster_equals_local(seq, serial_run):
    distributed = pytest.importorskip("distributed")
    exp = load_experiment(write_experiment(seq, "dask"))
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster:
        rep = run_batch(exp, resolve_frames(seq / "frames"), scheduler=cluster.scheduler_address)
    assert rep.executor.startswith("dask") and rep.done == N_FRAMES
    assert_same_series(serial_run.series_file, rep.series_file)


# ----------------------------------------------------------------------------- references and inputs


def test_reference_previous(seq):
    exp = load_experiment(write_experiment(seq, "previous"))
    rep = run_batch(exp, resolve_frames(seq / "frames"), reference="previous", workers=1)
    assert rep.reference_frames == [0] and rep.failed == [] and rep.done == N_FRAMES - 1
    with open_series(rep.series_file) as ds:
        assert int(ds["status"][0]) == STATUS_REFERENCE
        assert np.all(np.isnan(ds["displacement_x"][0].values))
        for k in range(1, N_FRAMES):  # each frame moved by STEP from the one before
            assert float(ds["displacement_x"][k].median()) == pytest.approx(STEP[1], abs=0.02)
            assert float(ds["displacement_y"][k].median()) == pytest.approx(y_sign(ds) * STEP[0], abs=0.02)


def test_reference_frames_averaged(tmp_path):
    import imageio.v3 as iio

    from bos.frames import average_frames

    d = make_sequence(tmp_path, n=3)
    bg = synthetic.random_dots(shape=SHAPE, dot_diameter_px=2.8, density=0.55, seed=3)
    (d / "noflow").mkdir()
    for k in range(3):
        write_png16(d / "noflow" / f"n{k}.png", synthetic.render(bg, shape=SHAPE, bit_depth=16, seed=100 + k))
    refs = resolve_frames(d / "noflow")
    mean, _ = average_frames(refs.frames)
    expect = np.mean([iio.imread(d / "noflow" / f"n{k}.png").astype(float) / 65535 for k in range(3)], axis=0)
    np.testing.assert_allclose(mean, expect, rtol=0, atol=1e-15)
    exp = load_experiment(write_experiment(d, "avg"))
    rep = run_batch(exp, resolve_frames(d / "frames"), reference_frames=refs, workers=1)
    assert rep.done == 3
    with open_series(rep.series_file) as ds:
        assert json.loads(ds.attrs["batch"])["reference_mode"] == "average"
        for k in range(3):
            assert float(ds["displacement_x"][k].median()) == pytest.approx(shift(k)[1], abs=0.02)


def test_video_frames_with_times_and_range(tmp_path):
    """A lossless video: reference = frame 0 of it, frames 1.. with --range; times from the timestamps."""
    iio = pytest.importorskip("imageio.v3")
    bg = synthetic.random_dots(shape=SHAPE, dot_diameter_px=2.8, density=0.55, seed=3)
    frames = []
    for k in range(5):
        dy, dx = shift(k)
        img = synthetic.render(bg, shape=SHAPE, displacement=(np.full(SHAPE, dy), np.full(SHAPE, dx)),
                               bit_depth=8, seed=20 + k)
        frames.append(np.repeat(np.clip(np.rint(img), 0, 255).astype(np.uint8)[..., None], 3, axis=2))
    video = tmp_path / "seq.mkv"
    iio.imwrite(video, np.stack(frames), plugin="pyav", codec="ffv1", fps=25)
    extra = '\n[images]\nreference = "seq.mkv"\nreference_frame = 0\n'
    text = EXPERIMENT.format(t0=T0_K, out="video", motion="none").replace('[images]\nreference = "ref.png"\n', "")
    (tmp_path / "exp.toml").write_text(text + extra)
    exp = load_experiment(tmp_path / "exp.toml")
    fs = resolve_frames(video, frame_range=parse_range("1::2"))
    assert [f.frame for f in fs.frames] == [1, 3] and fs.time_source == "video timestamps"
    np.testing.assert_allclose(fs.time_s, [0.0, 2 / 25], atol=1e-9)
    rep = run_batch(exp, fs, workers=1)
    assert rep.done == 2
    with open_series(rep.series_file) as ds:
        assert list(ds["source_frame"].values) == [1, 3]
        np.testing.assert_allclose(ds["time"].values, [0.0, 0.08], atol=1e-9)
        for i, k in enumerate((1, 3)):
            # 8-bit video (4:2:0 chroma of a grey image: luma kept within 1 count): 0.05 px
            assert float(ds["displacement_x"][i].median()) == pytest.approx(shift(k)[1], abs=0.05)


def test_corrupt_frame_is_recorded_and_skipped(tmp_path):
    d = make_sequence(tmp_path, n=3)
    (d / "frames" / "f001.png").write_bytes(b"\x89PNG\r\n\x1a\n this is not an image")
    exp = load_experiment(write_experiment(d, "corrupt"))
    rep = run_batch(exp, resolve_frames(d / "frames"), workers=1)
    assert rep.done == 2 and [i for i, _ in rep.failed] == [1]
    assert "cannot read image" in rep.failed[0][1]
    with open_series(rep.series_file) as ds:
        assert list(ds["status"].values) == [STATUS_OK, STATUS_FAILED, STATUS_OK]
        assert np.all(np.isnan(ds["temperature"][1].values)) and np.all(ds["invalid"][1].values == 1)
        assert "cannot read image" in str(ds["error"][1].values)
        assert np.isfinite(ds["temperature"][2].values).any()
    # the series file follows the result-file conventions (docs/file-format.md): CF 1.8, y up, pixel counts
    # in units "1", flags as signed bytes, text as character arrays, provenance as JSON attributes
    from bos.store import open_result

    ds = open_result(rep.series_file)
    a = ds.attrs
    assert a["Conventions"] == "CF-1.8" and a["history"][:4].isdigit() and "bos batch from" in a["history"]
    assert "series" in a["source"] and "Richard, H. and Raffel, M. (2001)" in a["references"]
    assert a["experiment_file_text"] == (d / "exp-corrupt.toml").read_text()
    assert not [k for k in a if "." in k] and a["batch"]["frames"] == 3 and isinstance(a["rig"], dict)
    assert np.all(np.diff(ds.y.values) < 0) and np.all(np.diff(ds.row_px.values) > 0)  # y up, rows down
    assert ds.camera_shift_x_px.attrs["units"] == "1" and ds.camera_shift_x_px.attrs["display_units"] == "px"
    assert ds.masked.dtype == bool and list(ds.invalid[1].values.ravel()) == [True] * ds.invalid[1].size
    assert list(ds.source_file.values) == ["f000.png", "f001.png", "f002.png"]
    assert ds.error.values[0] == "" and "cannot read image" in ds.error.values[1]
    from test_cf_compliance import assert_cfchecks_clean

    assert_cfchecks_clean([rep.series_file], tmp_path)


def test_rerun_reuses_finished_series_and_refuses_other_settings(seq, serial_run, tmp_path):
    import shutil

    exp_path = write_experiment(seq, "again")
    frames = resolve_frames(seq / "frames")
    first = run_batch(load_experiment(exp_path), frames, workers=1)
    before = first.series_file.read_bytes()
    again = run_batch(load_experiment(exp_path), frames, workers=1)
    assert again.computed == 0 and again.done == N_FRAMES
    assert_same_series(serial_run.series_file, again.series_file)
    changed = load_experiment(exp_path, overrides={"processing.passes": 3})
    with pytest.raises(InputError, match="different settings.*--restart"):
        run_batch(changed, frames, workers=1)
    assert first.series_file.read_bytes() == before  # the earlier good result is untouched


    def stop_after_one(finished, total, outcome):
        if outcome is not None:
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):  # a --restart interrupted after one frame ...
        run_batch(changed, frames, workers=1, restart=True, progress=stop_after_one)
    assert first.series_file.read_bytes() == before
    rep = run_batch(changed, frames, workers=1)  # ... continues without --restart and replaces the series
    assert rep.computed == N_FRAMES - 1 and rep.done == N_FRAMES
    shutil.rmtree(rep.series_file.parent)


def test_unfinished_batch_resumes_and_refuses_other_settings(tmp_path):
    d = make_sequence(tmp_path, n=4)
    exp_path = write_experiment(d, "unfinished")
    frames = resolve_frames(d / "frames")

    def stop_after_two(finished, total, outcome):
        if outcome is not None and finished >= 2:
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        run_batch(load_experiment(exp_path), frames, workers=1, progress=stop_after_two)
    parts = d / "unfinished" / ".seq-series.parts"
    assert len(list(parts.glob("frame-*.npz"))) == 2 and not (d / "unfinished" / "seq-series.nc").exists()
    (parts / ".frame-000002.abc.npz.part.npz").write_bytes(b"half")  # left by a kill during a write
    # left by a kill while the series was written (its temporary file, and the one bos.store makes beside it)
    stale = [d / "unfinished" / ".seq-series.ab.nc.part.nc", d / "unfinished" / "..seq-series.ab.nc.part.cd.nc.part.nc"]
    for f in stale:
        f.write_bytes(b"half")
    other = load_experiment(exp_path, overrides={"processing.overlap": 0.25})
    with pytest.raises(InputError, match=r"unfinished batch.*2 frame\(s\) done.*processing.*--restart"):
        run_batch(other, frames, workers=1)
    # a finished part whose data were damaged after its metadata (e.g. by a failing disk): redone
    part = parts / "frame-000001.npz"
    raw = bytearray(part.read_bytes())
    raw[len(raw) // 2: len(raw) // 2 + 64] = b"\0" * 64
    part.write_bytes(bytes(raw))
    rep = run_batch(load_experiment(exp_path), frames, workers=1)
    assert rep.done == 4 and not parts.exists() and not any(f.exists() for f in stale)
    full = run_batch(load_experiment(write_experiment(d, "uninterrupted")), frames, workers=1)
    assert_same_series(full.series_file, rep.series_file)


def test_interrupt_while_writing_a_part_stops_the_workers_at_once(seq, monkeypatch):
    """Ctrl-C can land while the main process writes a finished frame: the worker processes must be
    stopped then and there (not left computing the frames in flight until the interpreter exits)."""
    import multiprocessing

    from bos import batch

    real = batch._write_part
    calls = {"n": 0}

    def interrupted(path, out):
        calls["n"] += 1
        real(path, out)
        if calls["n"] == 1:
            raise KeyboardInterrupt

    monkeypatch.setattr(batch, "_write_part", interrupted)
    exp = load_experiment(write_experiment(seq, "cut-in-write"))
    with pytest.raises(KeyboardInterrupt):
        run_batch(exp, resolve_frames(seq / "frames"), workers=2)
    for child in multiprocessing.active_children():
        child.join(10)
    assert multiprocessing.active_children() == []
    parts = list((seq / "cut-in-write").glob(".*.parts/frame-*.npz"))
    assert len(parts) == 1                       # the frame written before the interruption is kept
