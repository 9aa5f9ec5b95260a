"""`bos batch` through the command line: JSON, exit codes, resume after SIGKILL and Ctrl-C.

Outside sources of the checks: the frames come from the analytic forward
model (see tests/test_batch.py); the series files are compared with xarray +
h5netcdf; the JSON output is parsed with the standard library; the
interruption is a real SIGKILL of the whole process group (POSIX signals).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from typer.testing import CliRunner

from cli.app import get_app
from test_batch import N_FRAMES, assert_same_series, make_sequence, open_series, write_experiment

runner = CliRunner()
ROOT = Path(__file__).resolve().parents[1]


def invoke(*args):
    return runner.invoke(get_app(), [str(a) for a in args])


def bos_command(*args) -> list[str]:
    return [sys.executable, "-c", "from cli.app import main; main()", *[str(a) for a in args]]


@pytest.fixture(scope="module")
def seq(tmp_path_factory):
    return make_sequence(tmp_path_factory.mktemp("cli-batch"), n=N_FRAMES)


def test_json_summary_and_exit_code_0(seq):
    res = invoke("batch", write_experiment(seq, "cli"), "--frames", str(seq / "frames" / "f*.png"),
                 "--workers", "1", "--json")
    assert res.exit_code == 0, res.output
    out = json.loads(res.stdout)
    assert out["frames"] == N_FRAMES and out["done"] == N_FRAMES and out["failed"] == []
    assert Path(out["series_file"]).name == "seq-series.nc" and Path(out["series_file"]).is_file()
    with open_series(out["series_file"]) as ds:
        assert ds.sizes["frame"] == N_FRAMES


def test_one_line_summary_without_terminal(seq):
    res = invoke("batch", write_experiment(seq, "plain"), "--frames", str(seq / "frames"), "--workers", "1",
                 "--range", "0:2")
    assert res.exit_code == 0, res.output
    lines = [ln for ln in res.stdout.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("bos batch: 2 frames, 2 done, 0 failed")


def test_corrupt_frame_exit_code_3(tmp_path):
    d = make_sequence(tmp_path, n=3)
    (d / "frames" / "f002.png").write_text("not an image")
    res = invoke("batch", write_experiment(d, "bad"), "--frames", str(d / "frames" / "*.png"), "--workers", "1",
                 "--json")
    assert res.exit_code == 3, res.output
    out = json.loads(res.stdout)
    assert out["done"] == 2 and [f["frame"] for f in out["failed"]] == [2]
    assert "cannot read image" in out["failed"][0]["error"]


@pytest.mark.parametrize("args, message", [
    (("missing.toml", "--frames", "x"), "experiment file not found"),
    (("{exp}", "--frames", "{d}/nothing-*.png"), "no frames matched"),
    (("{exp}", "--frames", "{d}/frames", "--range", "a:b"), "--range"),
    (("{exp}", "--frames", "{d}/frames", "--reference", "median"), "--reference"),
    (("{exp}", "--frames", "{d}/frames", "--reference", "previous", "--reference-frames", "{d}/frames"),
     "not both"),
    (("{exp}", "--frames", "{d}/frames", "--workers", "0"), "--workers"),
])
def test_bad_input_exit_2(tmp_path, seq, args, message):
    exp = write_experiment(seq, "badinput")
    res = invoke("batch", *[a.format(exp=exp, d=seq) for a in args])
    assert res.exit_code == 2, res.output
    err = res.stderr.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("error:") and message in err[0]
    assert not (seq / "badinput" / "seq-series.nc").exists()


def _wait_for_parts(parts: Path, count: int, proc, timeout: float = 180.0) -> None:
    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout:
        if parts.is_dir() and len(list(parts.glob("frame-*.npz"))) >= count:
            return
        if proc.poll() is not None:
            pytest.fail(f"batch ended before it could be interrupted: {proc.stderr.read()}")
        time.sleep(0.05)
    pytest.fail("no frames were finished in time")


@pytest.fixture(scope="module")
def resume_case(tmp_path_factory):
    """Frames and an uninterrupted serial run to compare the resumed ones with."""
    d = make_sequence(tmp_path_factory.mktemp("resume"), n=RESUME_FRAMES)
    full = invoke("batch", write_experiment(d, "full"), "--frames", str(d / "frames"), "--workers", "1",
                  "--json")
    assert full.exit_code == 0, full.output
    return d, json.loads(full.stdout)["series_file"]


RESUME_FRAMES = 12  # enough that the kill lands before the last frame now that frames take ~0.1 s


@pytest.mark.parametrize("how", ["sigkill", "ctrl-c"])
def test_interrupted_batch_resumes_bit_identical(resume_case, how):
    d, full_series = resume_case
    n = RESUME_FRAMES
    exp = write_experiment(d, f"cut-{how}")
    cmd = bos_command("batch", exp, "--frames", str(d / "frames"), "--workers", "2", "--json")
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env,
                            start_new_session=True)
    parts = d / f"cut-{how}" / ".seq-series.parts"
    try:
        _wait_for_parts(parts, 2, proc)
        # the whole process group (main process and workers), as a terminal's Ctrl-C or a kill -9 would
        os.killpg(proc.pid, signal.SIGKILL if how == "sigkill" else signal.SIGINT)
        code = proc.wait(60)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
    assert code == (-signal.SIGKILL if how == "sigkill" else 130)
    finished = len(list(parts.glob("frame-*.npz")))
    assert 2 <= finished < n
    assert not (d / f"cut-{how}" / "seq-series.nc").exists()  # no half-written series
    # finished in this process (another executor than the interrupted run: the data do not depend on it)
    again = subprocess.run(cmd[:-3] + ["--workers", "1", "--json"], capture_output=True, text=True, env=env,
                           timeout=600)
    assert again.returncode == 0, again.stderr
    out = json.loads(again.stdout)
    assert out["computed"] == n - finished  # finished frames were not computed again
    assert out["done"] == n and out["failed"] == []
    with open_series(out["series_file"]) as ds:
        assert list(ds["frame"].values) == list(range(n))  # every frame exactly once, in order
        assert list(ds["source_file"].values) == [f"f{k:03d}.png" for k in range(n)]
    assert_same_series(full_series, out["series_file"])
    assert not parts.exists()
