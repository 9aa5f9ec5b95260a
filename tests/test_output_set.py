"""A run's output set is a transaction: old complete set or new complete set, never a mix."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest

from bos import output, pipeline
from bos._io import OutputSet, check_output_set, recover_output_sets

from test_pipeline import _crafted


def _snapshot(d: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(d.iterdir()) if p.is_file()}


def _good_set(tmp_path):
    exp, result, _ = _crafted(tmp_path)
    files = pipeline.save_run(result, exp)
    out = files[0].parent
    return exp, result, out


def test_first_run_writes_manifest_matching_every_file(tmp_path):
    exp, result, out = _good_set(tmp_path)
    manifest = json.loads((out / f"{exp.output.name}-run.json").read_text())
    names = {p.name for p in out.iterdir()} - {f"{exp.output.name}-run.json"}
    assert set(manifest["files"]) == names
    assert check_output_set(out / f"{exp.output.name}.nc", manifest["run_id"]) == []
    assert not [p for p in out.iterdir() if p.name.startswith(".")]      # no staging left


@pytest.mark.parametrize("exc", [OSError("disk full (simulated)"), KeyboardInterrupt()])
def test_rerun_failing_while_saving_keeps_the_old_set(tmp_path, monkeypatch, exc):
    exp, result, out = _good_set(tmp_path)
    before = _snapshot(out)

    def broken(*args, **kwargs):
        raise exc

    from bos import plots

    monkeypatch.setattr(plots, "profile_figure", broken)   # fails after the result file and CSV
    with pytest.raises(type(exc)):
        pipeline.save_run(result, exp)
    assert _snapshot(out) == before
    assert not [p for p in out.iterdir() if p.name.startswith(".")]


def test_interrupted_swap_is_rolled_forward_by_the_next_run(tmp_path, monkeypatch):
    exp, result, out = _good_set(tmp_path)
    name = exp.output.name
    # crash in the middle of the swap: make os.replace die after the first file
    calls = {"n": 0}
    real_replace = os.replace

    def dying_replace(src, dst):
        calls["n"] += 1
        if calls["n"] == 3:     # 1: staged manifest temp file, 2: first data file
            raise KeyboardInterrupt
        return real_replace(src, dst)

    monkeypatch.setattr(os, "replace", dying_replace)
    s = OutputSet(out, name)
    s.path(out / f"{name}.nc").write_bytes(b"new result")
    s.path(out / f"{name}-profile.csv").write_bytes(b"new csv")
    with pytest.raises(KeyboardInterrupt):
        s.commit()
    monkeypatch.setattr(os, "replace", real_replace)
    # a mix is on disk now, and the checker says so
    assert check_output_set(out / f"{name}.nc", None)
    recover_output_sets(out, name)
    files = _snapshot(out)
    assert files[f"{name}.nc"] == b"new result" and files[f"{name}-profile.csv"] == b"new csv"
    manifest = json.loads(files[f"{name}-run.json"])
    assert manifest["run_id"] == s.run_id and set(manifest["files"]) == {f"{name}.nc", f"{name}-profile.csv"}
    # figures of the old run, which the new run did not write, are gone: no mix
    assert not any(n.endswith(".png") for n in files)
    assert check_output_set(out / f"{name}.nc", s.run_id) == []


def test_staging_without_manifest_is_discarded(tmp_path):
    exp, result, out = _good_set(tmp_path)
    before = _snapshot(out)
    s = OutputSet(out, exp.output.name)
    s.path(out / f"{exp.output.name}.nc").write_bytes(b"half")
    # process killed here: nothing swapped; the next run (or recovery) removes the staging folder
    recover_output_sets(out, exp.output.name)
    assert _snapshot(out) == before
    assert not s.staging.exists()


def test_checker_flags_a_file_from_another_run(tmp_path):
    exp, result, out = _good_set(tmp_path)
    name = exp.output.name
    run_id = json.loads((out / f"{name}-run.json").read_text())["run_id"]
    (out / f"{name}-profile.csv").write_text("s_m\n0\n")
    warnings = check_output_set(out / f"{name}.nc", run_id)
    assert any("profile.csv" in w for w in warnings)
    assert any("another run" in w for w in check_output_set(out / f"{name}.nc", "some-other-run"))


def test_result_file_records_its_run(tmp_path):
    from bos import store

    exp, result, out = _good_set(tmp_path)
    data = store.read_result(out / f"{exp.output.name}.nc")
    manifest = json.loads((out / f"{exp.output.name}-run.json").read_text())
    assert data.attrs["run_id"] == manifest["run_id"]


def test_sigterm_during_saving_leaves_the_old_set(tmp_path):
    """A real process gets SIGTERM while writing figures: old set intact, no staging left."""
    exp, result, out = _good_set(tmp_path)
    before = _snapshot(out)
    flag = tmp_path / "writing"
    script = textwrap.dedent(f"""
        import sys, time
        sys.path.insert(0, {str(Path(__file__).parent)!r})
        from pathlib import Path
        from bos import pipeline, plots
        from test_pipeline import _crafted
        import cli.app
        cli.app._sigterm_as_interrupt()
        exp, result, _ = _crafted(Path({str(tmp_path)!r}))
        real = plots.profile_figure
        def slow(*a, **k):
            Path({str(flag)!r}).write_text("x")
            time.sleep(60)
            return real(*a, **k)
        plots.profile_figure = slow
        try:
            pipeline.save_run(result, exp)
        except KeyboardInterrupt:
            sys.exit(130)
    """)
    proc = subprocess.Popen([sys.executable, "-c", script])
    t0 = time.time()
    while not flag.exists():
        assert time.time() - t0 < 60 and proc.poll() is None
        time.sleep(0.05)
    proc.send_signal(signal.SIGTERM)
    assert proc.wait(30) == 130
    assert _snapshot(out) == before
    assert not [p for p in out.iterdir() if p.name.startswith(".")]


def test_inspect_warns_about_a_file_from_another_run(tmp_path):
    from typer.testing import CliRunner

    from cli.app import get_app

    exp, result, out = _good_set(tmp_path)
    name = exp.output.name
    (out / f"{name}-profile.csv").write_text("s_m\n0\n")
    res = CliRunner().invoke(get_app(), ["inspect", str(out / f"{name}.nc"), "--json"])
    assert res.exit_code == 0, res.output
    info = json.loads(res.stdout)
    assert any("profile.csv" in w for w in info["file_set_warnings"])
    np.testing.assert_equal(info["run_id"], json.loads((out / f"{name}-run.json").read_text())["run_id"])


def test_report_and_virtual_views_join_the_same_output_set(tmp_path):
    exp, result, _ = _crafted(tmp_path)
    files = pipeline.save_run(result, exp, report=True, virtual_views=True)
    out = files[0].parent
    name = exp.output.name
    manifest = json.loads((out / f"{name}-run.json").read_text())
    assert f"{name}-report.html" in manifest["files"]
    assert {f"{name}-knife-90deg.png", f"{name}-knife-0deg.png", f"{name}-circular.png",
            f"{name}-colour.png"} <= set(manifest["files"])
    assert check_output_set(files[0], manifest["run_id"]) == []
    assert (out / f"{name}-report.html").read_text().lstrip().lower().startswith("<!doctype html")
