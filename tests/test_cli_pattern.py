"""Tests of the ``bos pattern`` command (typer CliRunner on cli.app.get_app()).

Outside checks: page size read back with pypdfium2, PNG resolution with
Pillow, thin-lens dot size (D = px * pitch * (Z_B - f) / f).
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from PIL import Image
from typer.testing import CliRunner

from cli.app import get_app

RIG = ["--focal-length-mm", "50", "--pixel-pitch-um", "5", "--camera-to-object-m", "1",
       "--object-to-background-m", "0.5"]


def _run(args):
    return CliRunner().invoke(get_app(), ["pattern", *args])


def _json(args):
    res = _run([*args, "--json"])
    assert res.exit_code == 0, res.output
    return json.loads(res.stdout)


def test_pdf_a4_contract(tmp_path):
    pdfium = pytest.importorskip("pypdfium2")
    out = tmp_path / "bg.pdf"
    res = _run([str(out), "--paper", "A4", "--dot-diameter-mm", "2", "--fill", "0.3", "--seed", "4", "--dpi", "300"])
    assert res.exit_code == 0, res.output
    assert "actual size" in res.stdout and "seed 4" in res.stdout
    doc = pdfium.PdfDocument(str(out))
    w, h = doc[0].get_size()
    doc.close()
    assert (w, h) == pytest.approx((210 * 72 / 25.4, 297 * 72 / 25.4), abs=0.002)  # ISO 216 A4


def test_landscape_letter_page(tmp_path):
    info = _json([str(tmp_path / "l.pdf"), "--paper", "letter", "--landscape", "--dot-diameter-mm", "3", "--seed", "2"])
    assert info["page_mm"] == pytest.approx([279.4, 215.9])  # ASME Y14.1 size A (11 x 8.5 in), long side across
    assert info["n_dots"] > 0


def test_png_dpi_and_json(tmp_path):
    out = tmp_path / "bg.png"
    info = _json([str(out), "--paper", "120x90-mm", "--dot-diameter-mm", "0.8", "--seed", "1", "--dpi", "200",
                  "--poisson", "--fill", "0.5"])
    assert info["raster_px"] == [round(120 / 0.127), round(90 / 0.127)]
    assert info["seed"] == 1 and info["poisson"] is True
    with Image.open(out) as im:
        assert im.info["dpi"] == pytest.approx((200, 200), abs=0.01)
        assert im.size == tuple(info["raster_px"])


def test_dot_size_from_rig_options_and_file(tmp_path):
    # f 50 mm, 5 um, Z_B 1.5 m: one pixel = 5 um * (1.5 - 0.05) / 0.05 = 0.145 mm on the background
    info = _json([str(tmp_path / "a.png"), "--paper", "120x90-mm", "--seed", "1", *RIG])
    assert info["dot_diameter_mm"] == pytest.approx(2.5 * 0.145, rel=1e-9)
    assert info["imaged_dot_px"] == pytest.approx(2.5, rel=1e-9)
    info = _json([str(tmp_path / "b.png"), "--paper", "120x90-mm", "--seed", "1", "--target-dot-px", "3", *RIG])
    assert info["dot_diameter_mm"] == pytest.approx(3 * 0.145, rel=1e-9)
    toml = tmp_path / "rig.toml"
    toml.write_text("[camera]\nfocal_length_mm = 50.0\npixel_pitch_um = 5.0\n"
                    "[geometry]\ncamera_to_object_m = 1.0\nobject_to_background_m = 0.5\n")
    info = _json([str(tmp_path / "c.png"), str(toml), "--paper", "120x90-mm", "--seed", "1"])
    assert info["dot_diameter_mm"] == pytest.approx(2.5 * 0.145, rel=1e-9)
    # a distance on the command line replaces the file's: Z_D 1.0 -> Z_B 2.0 m
    info = _json([str(tmp_path / "d.png"), str(toml), "--paper", "120x90-mm", "--seed", "1",
                  "--object-to-background-m", "1.0"])
    assert info["dot_diameter_mm"] == pytest.approx(2.5 * 5e-3 * (2.0 - 0.05) / 0.05, rel=1e-9)
    # explicit dots imaging at 6.9 px: warning
    info = _json([str(tmp_path / "e.png"), "--paper", "120x90-mm", "--seed", "1", "--dot-diameter-mm", "1", *RIG])
    assert any("above 5 px" in w for w in info["warnings"])
    res = _run([str(tmp_path / "f.png"), "--paper", "120x90-mm", "--seed", "1", "--dot-diameter-mm", "0.2", *RIG])
    assert res.exit_code == 0 and "below 2 px" in res.stderr


def test_screen_background(tmp_path):
    out = tmp_path / "screen.png"
    info = _json([str(out), "--screen", "640x480-px", "--screen-pitch-mm", "0.3", "--dot-diameter-mm", "0.9",
                  "--seed", "3"])
    assert info["raster_px"] == [640, 480]
    assert info["page_mm"] == pytest.approx([192.0, 144.0])
    with Image.open(out) as im:
        assert im.info["dpi"] == pytest.approx((25.4 / 0.3,) * 2, abs=0.01)


def test_same_seed_same_file(tmp_path):
    args = ["--paper", "100x100-mm", "--dot-diameter-mm", "1", "--seed", "42"]
    for name in ("a.pdf", "b.pdf", "a.png", "b.png"):
        assert _run([str(tmp_path / name), *args]).exit_code == 0
    assert (tmp_path / "a.pdf").read_bytes() == (tmp_path / "b.pdf").read_bytes()
    assert (tmp_path / "a.png").read_bytes() == (tmp_path / "b.png").read_bytes()


@pytest.mark.parametrize("args, message", [
    (["--dot-diameter-mm", "0"], "dot diameter must be positive"),
    (["--dot-diameter-mm", "-0.5"], "dot diameter must be positive"),
    (["--paper", "A5", "--dot-diameter-mm", "1"], "unknown paper"),
    (["--paper", "0x200-mm", "--dot-diameter-mm", "1"], "paper width must be positive"),
    (["--dot-diameter-mm", "0.03", "--dpi", "600"], "below the printer dot pitch"),
    (["--dot-diameter-mm", "400"], "larger than the patterned area"),
    (["--dot-diameter-mm", "1", "--dpi", "-1"], "dpi must be positive"),
    (["--dot-diameter-mm", "1", "--fill", "0"], "fill"),
    (["--dot-diameter-mm", "1", "--kind", "stripes"], "unknown pattern kind"),
    (["--dot-diameter-mm", "1", "--kind", "noise", "--soft"], "noise patterns are grey"),
    ([], "give --dot-diameter-mm"),
    (["--screen", "800x600-px", "--dot-diameter-mm", "1"], "--screen-pitch-mm"),
    (["--screen", "800x600-px", "--screen-pitch-mm", "0.25", "--dot-diameter-mm", "1"], "PNG or TIFF"),
    (["--focal-length-mm", "50", "--pixel-pitch-um", "5"], "geometry needs exactly two"),
])
def test_bad_input_one_line_exit_2(tmp_path, args, message):
    out = tmp_path / "bad.pdf"
    res = _run([str(out), *args])
    assert res.exit_code == 2, res.output
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error:") and message in lines[0]
    assert "Traceback" not in res.output
    assert not out.exists()


def test_unknown_suffix_and_missing_directory(tmp_path):
    res = _run([str(tmp_path / "bg.jpg"), "--dot-diameter-mm", "1"])
    assert res.exit_code == 2 and "use .pdf, .png" in res.stderr
    res = _run([str(tmp_path / "nope" / "bg.pdf"), "--dot-diameter-mm", "1"])
    assert res.exit_code == 2 and "does not exist" in res.stderr
    assert not list(Path(tmp_path).iterdir())
