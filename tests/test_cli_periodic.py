"""``bos periodic`` through typer's CliRunner: files, JSON, figures, bad input, no lost results.

The sequence is the analytic standing sound beam of tests/test_periodic_acoustic.py
(linear acoustics, Kinsler et al. 2000); phases from a frame rate follow the
aliasing relation (Shannon 1949), checked here in exact rational arithmetic.
"""

from __future__ import annotations

import json
import math
from fractions import Fraction
from pathlib import Path

import imageio.v3 as iio
import numpy as np
import pytest
from test_periodic_acoustic import EXPERIMENT, render_sequence
from typer.testing import CliRunner

from bos import periodic_output as PO
from bos._io import file_sha256
from cli.app import get_app


def _run(args):
    return CliRunner().invoke(get_app(), ["periodic", *args])


def _one_line_exit_2(res, text=None):
    assert res.exit_code == 2, res.output
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error:"), res.stderr
    if text:
        assert text in lines[0], lines[0]


@pytest.fixture(scope="module")
def sequence(tmp_path_factory):
    seq = render_sequence(tmp_path_factory.mktemp("cli"), kind="standing", spl_db=140.0,
                          phases_deg=np.arange(5) * 72.0, seed=31)
    (seq["dir"] / "exp.toml").write_text(EXPERIMENT.replace("figures = false", "figures = true"))
    return seq


def test_cli_writes_the_periodic_set(sequence):
    d = sequence["dir"]
    res = _run([str(d / "exp.toml"), "--phases", str(d / "phases.csv"), "--json"])
    assert res.exit_code == 0, res.output
    out = json.loads(res.stdout)
    s = out["summary"]
    assert s["frames"] == 5 and s["distinct_phases"] == 5 and s["wave_kind"] == "standing"
    assert len(s["nodes"]) >= 4 and all({"x_m", "y_m", "s_m"} <= set(n) for n in s["nodes"])
    assert all(a["spl_db"] == pytest.approx(140.0, abs=1.0) for a in s["antinodes"])
    assert any("ultrasound" in c for c in out["cautions"])
    names = sorted(Path(f).name for f in out["files"])
    assert names == sorted(["beam-periodic.nc", "beam-periodic-profile.csv", "beam-periodic-spl.png",
                            "beam-periodic-phase.png", "beam-periodic-profile.png", "beam-periodic-cycle.gif"])
    xr = pytest.importorskip("xarray")
    with xr.open_dataset(d / "out" / "beam-periodic.nc", engine="h5netcdf") as ds:
        for name, units in (("pressure_amplitude", "Pa"), ("pressure_phase", "rad"), ("sound_pressure_level", "dB"),
                            ("pressure_amplitude_uncertainty", "Pa"), ("pressure_phase_uncertainty", "rad"),
                            ("sound_pressure_level_uncertainty", "dB"), ("displacement_amplitude_x", "px"),
                            ("displacement_phase_x", "rad"), ("standing_wave_ratio", "1")):
            attrs = ds[name].attrs  # pixel counts may be stored as units "1" with display_units "px"
            assert attrs.get("display_units", attrs["units"]) == units and ds[name].dims == ("y", "x")
        # SPL is the rms level of the stored peak amplitude: L = 20 log10(|P| / (sqrt 2 * 20 uPa))
        p, spl = ds["pressure_amplitude"].values, ds["sound_pressure_level"].values
        ok = np.isfinite(spl)
        assert np.allclose(spl[ok], 20 * np.log10(p[ok] / math.sqrt(2) / 20e-6), atol=1e-9)
        # the nodes of the summary sit on the file's pixel grid (row_px/col_px)
        rows, cols = ds["row_px"].values, ds["col_px"].values
        assert all(rows.min() <= n["row_px"] <= rows.max() and cols.min() <= n["col_px"] <= cols.max()
                   for n in s["nodes"])
    gif = iio.imread(d / "out" / "beam-periodic-cycle.gif", index=None)
    assert gif.shape[0] == PO.CYCLE_FRAMES and not np.array_equal(gif[0], gif[PO.CYCLE_FRAMES // 4])


def test_periodic_file_follows_the_result_file_conventions(sequence, tmp_path):
    """Same conventions as bos run's file: CF 1.8 (cfchecks: 0 errors, 0 warnings), y up, history/source/
    references/experiment text, profile line in file coordinates; the profile CSV has units and y up."""
    from bos.store import open_result

    d = sequence["dir"]
    res = _run([str(d / "exp.toml"), "--phases", str(d / "phases.csv"), "--no-figures", "--json"])
    assert res.exit_code == 0, res.output
    s = json.loads(res.stdout)["summary"]
    nc = d / "out" / "beam-periodic.nc"
    ds = open_result(nc)
    a = ds.attrs
    assert np.all(np.diff(ds.y.values) < 0) and np.all(np.diff(ds.row_px.values) > 0)  # y up, rows down
    assert ds.displacement_amplitude_x.attrs["units"] == "1" and ds.displacement_amplitude_x.attrs["display_units"] == "px"
    assert a["Conventions"] == "CF-1.8" and a["history"][:4].isdigit() and "bos periodic from" in a["history"]
    assert "lock-in" in a["source"] and "IEEE Std 1057" in a["references"] and "Richard, H." in a["references"]
    assert a["experiment_file_text"] == (d / "exp.toml").read_text()
    assert not [k for k in a if "." in k] and isinstance(a["summary"], dict)
    # the profile line of the summary (y down) is stored with y up
    (x0, y0), (x1, y1) = s["profile_m"]
    np.testing.assert_allclose(a["profile_line_m"], [x0, -y0, x1, -y1], rtol=0, atol=1e-15)
    csv = d / "out" / "beam-periodic-profile.csv"
    header = csv.read_text().splitlines()[0].split(",")
    assert header[:4] == ["s [m]", "x [m]", "y [m]", "pressure_real [Pa]"] and "sound_pressure_level [dB]" in header
    table = np.genfromtxt(csv, delimiter=",", skip_header=1)
    np.testing.assert_allclose(table[[0, -1], 2], [-y0, -y1], atol=1e-12)
    np.testing.assert_allclose(np.hypot(table[:, 3], table[:, 4]), table[:, 5], rtol=1e-6)
    from test_cf_compliance import assert_cfchecks_clean

    assert_cfchecks_clean([nc], tmp_path)


def test_higher_harmonics_and_frame_sigma(sequence):
    # 5 distinct phases fit a mean + 2 harmonics exactly (no residual dof): the uncertainties come from
    # the per-frame correlation uncertainties, and a linear field has no second harmonic
    d = sequence["dir"]
    res = _run([str(d / "exp.toml"), "--phases", str(d / "phases.csv"), "--harmonics", "2", "--no-figures", "--json"])
    assert res.exit_code == 0, res.output
    s = json.loads(res.stdout)["summary"]
    assert s["harmonics_fitted"] == 2 and s["uncertainty_from"] == "frame sigma"
    assert s["second_to_first_harmonic_displacement"] < 0.1
    assert s["wave_kind"] == "standing"
    _one_line_exit_2(_run([str(d / "exp.toml"), "--phases", str(d / "phases.csv"), "--harmonics", "3"]),
                     "at least 7 distinct phases")


def test_stack_with_frame_rate_matches_the_phase_list(sequence, tmp_path):
    # the same 5 frames as one multi-page TIFF, phases from the frame rate: 40 kHz at 40000/40.2 fps advances
    # the phase by 0.2 cycle = 72 deg per frame (aliasing), i.e. the phases of the list
    d = sequence["dir"]
    frames = [iio.imread(d / f"frame{j:03d}.png") for j in range(5)]
    iio.imwrite(tmp_path / "stack.tif", np.stack(frames))
    exp = tmp_path / "exp.toml"
    exp.write_text(EXPERIMENT.replace('reference = "ref.png"', f'reference = "{d / "ref.png"}"'))
    rate = 40000 / 40.2
    res = _run([str(exp), "--frames", str(tmp_path / "stack.tif"), "--frame-rate-hz", repr(rate), "--json"])
    assert res.exit_code == 0, res.output
    stack = json.loads(res.stdout)["summary"]
    assert stack["phase_origin"] == "frame rate" and stack["distinct_phases"] == 5
    res = _run([str(d / "exp.toml"), "--phases", str(d / "phases.csv"), "--no-figures", "--json"])
    listed = json.loads(res.stdout)["summary"]
    assert stack["peak_pressure_amplitude_pa"] == pytest.approx(listed["peak_pressure_amplitude_pa"], rel=1e-6)
    assert [n["x_m"] for n in stack["nodes"]] == pytest.approx([n["x_m"] for n in listed["nodes"]], abs=1e-9)


def test_failed_run_keeps_the_earlier_result(sequence, tmp_path):
    d = sequence["dir"]
    res = _run([str(d / "exp.toml"), "--phases", str(d / "phases.csv"), "--no-figures"])
    assert res.exit_code == 0, res.output
    # the table output names the wave kind and the safety notes
    assert "standing" in res.stdout and "caution:" in res.stdout
    nc = d / "out" / "beam-periodic.nc"
    before = file_sha256(nc)
    # a frame of another size fails half-way through the processing
    iio.imwrite(d / "small.png", np.zeros((64, 64), np.uint16))
    rows = (d / "phases.csv").read_text().splitlines()
    (d / "bad.csv").write_text("\n".join(rows[:-1] + ["small.png,300"]) + "\n")
    _one_line_exit_2(_run([str(d / "exp.toml"), "--phases", str(d / "bad.csv")]), "differ in size")
    assert file_sha256(nc) == before
    assert not list((d / "out").glob(".*staging*"))


@pytest.fixture()
def dummy(tmp_path):
    for i in range(4):
        iio.imwrite(tmp_path / f"f{i}.png", np.zeros((16, 16), np.uint16))
    (tmp_path / "exp.toml").write_text(EXPERIMENT)
    return tmp_path


def _write(path, text):
    path.write_text(text)
    return str(path)


def test_bad_inputs_exit_2(dummy):
    exp = str(dummy / "exp.toml")
    two = _write(dummy / "two.csv", "frame,phase_deg\nf0.png,0\nf1.png,180\nf2.png,0\nf3.png,540\n")
    _one_line_exit_2(_run([exp, "--phases", two]), "2 distinct phase")
    missing = _write(dummy / "missing.csv", "frame,phase_deg\nf0.png,0\nnope.png,90\nf2.png,180\n")
    _one_line_exit_2(_run([exp, "--phases", missing]), "do not exist")
    ragged = _write(dummy / "ragged.csv", "frame,phase_deg\nf0.png,0\nf1.png\nf2.png,180\n")
    _one_line_exit_2(_run([exp, "--phases", ragged]), "differ in length")
    frames = _write(dummy / "frames.csv", "frame\nf0.png\nf1.png\nf2.png\nf3.png\n")
    short = _write(dummy / "short.csv", "phase_deg\n0\n120\n240\n")
    _one_line_exit_2(_run([exp, "--frames", frames, "--phases", short]), "3 row(s)")
    # 40 kHz at 1000 fps: every frame at the same phase
    _one_line_exit_2(_run([exp, "--frames", frames, "--frame-rate-hz", "1000"]), "locks to the source")
    _one_line_exit_2(_run([exp, "--frames", frames]), "frame rate")
    _one_line_exit_2(_run([exp]), "--phases")
    # settings that cannot give a pressure, refused before any frame is processed
    ok = _write(dummy / "ok.csv", "frame,phase_deg\nf0.png,0\nf1.png,120\nf2.png,240\n")
    (dummy / "none.toml").write_text(EXPERIMENT.replace('kind = "planar"', 'kind = "none"'))
    _one_line_exit_2(_run([str(dummy / "none.toml"), "--phases", ok]), "planar or axisymmetric")
    (dummy / "nowidth.toml").write_text(EXPERIMENT.replace("object_width_mm", "# object_width_mm"))
    _one_line_exit_2(_run([str(dummy / "nowidth.toml"), "--phases", ok]), "object_width_mm")
    # a multi-frame TIFF with a phase list of another length
    iio.imwrite(dummy / "stack.tif", np.zeros((4, 16, 16), np.uint16))
    _one_line_exit_2(_run([exp, "--frames", str(dummy / "stack.tif"), "--phases", short]), "4 frame(s)")


def test_phases_from_frame_rate_and_time_stamps(dummy):
    _write(dummy / "frames.csv", "frame\nf0.png\nf1.png\nf2.png\nf3.png\n")
    frames = PO.frames_from_list(dummy / "frames.csv", frequency_hz=40e3, frame_rate_hz=999.0)
    exact = [float(2 * math.pi * (Fraction(40000 * j, 999) % 1)) for j in range(4)]
    assert frames.origin == "frame rate" and frames.phases_rad == pytest.approx(exact, abs=1e-12)
    t = _write(dummy / "times.csv", "frame,time_s\nf0.png,0\nf1.png,0.00000625\nf2.png,0.0000125\nf3.png,0.00001875\n")
    fs = PO.frames_from_table(t, frequency_hz=40e3)  # quarter periods at 40 kHz
    assert fs.origin == "time stamps" and np.rad2deg(fs.phases_rad) == pytest.approx([0, 90, 180, 270], abs=1e-9)
    # near half the frame rate the sense of the phase is flagged
    near = PO.frames_from_list(dummy / "frames.csv", frequency_hz=40.46e3, frame_rate_hz=1000.0)
    assert near.warnings and "180" in near.warnings[0]
