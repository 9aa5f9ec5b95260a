"""bos.report and bos report: the one-page HTML report.

Outside checks:
* the page is parsed with the standard library's html.parser and its
  embedded images decoded with base64 + the PNG signature (ISO/IEC 15948);
* it is loaded in a real headless browser (Debian's chromium, when
  installed) with every host name unresolvable: the screenshot must not be
  blank and the DOM text must hold the headline numbers, computed here from
  the crafted field itself (not from the summary the report prints);
* input hashes are recomputed with hashlib.
"""

from __future__ import annotations

import base64
import hashlib
import os
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from bos import output, report
from bos.provenance import cautions

from test_pipeline import _crafted


class _Page(HTMLParser):
    def __init__(self):
        super().__init__()
        self.refs: list[tuple[str, str, str]] = []   # (tag, attribute, value)
        self.text: list[str] = []
        self.headings: list[str] = []
        self._in_h2 = False

    def handle_starttag(self, tag, attrs):
        for k, v in attrs:
            if k in ("src", "href", "srcset", "action", "data", "poster") and v is not None:
                self.refs.append((tag, k, v))
        self._in_h2 = tag == "h2"

    def handle_endtag(self, tag):
        if tag == "h2":
            self._in_h2 = False

    def handle_data(self, data):
        self.text.append(data)
        if self._in_h2:
            self.headings.append(data.strip())


def _saved(tmp_path):
    exp, result, temperature = _crafted(tmp_path)
    result.attrs["cautions"] = cautions(exp)            # the run records the cautions of its source
    files = output.save_run(result, exp)
    nodata = result.displacement.masked | result.displacement.invalid
    rise = float(np.max(temperature[~nodata]) - exp.medium.temperature_k)
    return exp, result, files[0], rise


def _headline(rise: float) -> list[str]:
    return [format(rise, ".4g"), "reference image is lossy", "0.2236"]   # |d| = hypot(0.1, 0.2) px


def test_report_is_self_contained_and_ordered(tmp_path):
    exp, result, nc, rise = _saved(tmp_path)
    path = report.write_report(nc, tmp_path / "r.html")
    html = path.read_text(encoding="utf-8")
    page = _Page()
    page.feed(html)
    text = " ".join(page.text)
    # no reference outside the page: every src/href is an embedded PNG or an anchor
    assert page.refs, "figures expected"
    for tag, attr, value in page.refs:
        assert value.startswith("data:image/png;base64,") or value.startswith("#"), (tag, attr, value[:40])
        if value.startswith("data:"):
            assert base64.b64decode(value.split(",", 1)[1])[:8] == b"\x89PNG\r\n\x1a\n"
    assert not re.search(r"(?i)(src|href)\s*=\s*[\"']?\s*(https?:)?//", html)
    assert not re.search(r"(?i)url\(|@import|<script|<link", html)
    assert "default-src 'none'" in html                     # the browser itself refuses external loads
    assert sum(v.startswith("data:image/png") for _, _, v in page.refs) == 4
    # warnings first, then the summary; provenance, inputs, software, cautions follow
    order = ["Warnings", "Summary", "Figures", "Rig, medium and processing", "Input files", "Software",
             "Safety cautions"]
    assert [h for h in page.headings if h in order] == order
    for number in _headline(rise):
        assert number in text, number
    assert hashlib.sha256(b"reference bytes").hexdigest() in text
    import bos

    assert bos.__version__ in text
    for c in cautions(exp):
        assert " ".join(c.split())[:40] in " ".join(text.split())


def test_report_from_a_run_result_in_memory(tmp_path):
    exp, result, temperature = _crafted(tmp_path)
    path = report.write_report(result, tmp_path / "mem.html", figures=False, name="crafted")
    text = path.read_text(encoding="utf-8")
    assert "BOS report: crafted" in text and "data:image" not in text
    with pytest.raises(Exception, match="output path"):
        report.write_report(result)


def test_bos_report_command(tmp_path):
    from typer.testing import CliRunner

    from cli.app import get_app

    exp, result, nc, rise = _saved(tmp_path)
    runner = CliRunner()
    res = runner.invoke(get_app(), ["report", str(nc)])
    assert res.exit_code == 0, res.output
    default = nc.with_name(f"{nc.stem}-report.html")
    assert default.is_file() and format(rise, ".4g") in default.read_text(encoding="utf-8")
    before = nc.read_bytes()
    same = runner.invoke(get_app(), ["report", str(nc), "--out", str(nc)])
    assert same.exit_code == 2 and "error:" in same.output and nc.read_bytes() == before
    txt = runner.invoke(get_app(), ["report", str(nc), "--out", str(tmp_path / "r.txt")])
    assert txt.exit_code == 2 and ".html" in txt.output
    missing = runner.invoke(get_app(), ["report", str(tmp_path / "none.nc")])
    assert missing.exit_code == 2 and "Traceback" not in missing.output
    assert not [p for p in tmp_path.iterdir() if ".part" in p.name]


def _chromium() -> str | None:
    for name in ("chromium", "chromium-browser", "google-chrome"):
        path = shutil.which(name)
        if path:
            return path
    return None


def _browser(binary: str, profile: Path, *args: str, timeout: float = 120) -> subprocess.CompletedProcess:
    cmd = [binary, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
           "--disable-component-update", "--disable-sync", "--no-first-run", "--disable-default-apps",
           f"--user-data-dir={profile}",
           # every host name fails to resolve: a page that needed the network would render incompletely
           "--host-resolver-rules=MAP * ~NOTFOUND", *args]
    env = dict(os.environ, HOME=str(profile))
    return subprocess.run(cmd, capture_output=True, text=True, timeout=timeout, env=env)


def test_report_in_a_headless_browser(tmp_path):
    binary = _chromium()
    if binary is None:
        pytest.skip("chromium is not installed (Debian: apt-get install -y chromium)")
    exp, result, nc, rise = _saved(tmp_path)
    page = report.write_report(nc, tmp_path / "page.html")
    url = page.resolve().as_uri()
    shot = tmp_path / "shot.png"
    res = _browser(binary, tmp_path / "profile1", "--window-size=1200,2400", f"--screenshot={shot}", url)
    assert shot.is_file(), res.stderr[-2000:]
    from matplotlib.image import imread

    img = imread(shot)[..., :3]
    assert img.shape[0] >= 2000 and img.shape[1] >= 1100
    ink = (img < 0.85).any(axis=2)                         # pixels that are not (near) white
    assert 0.03 < ink.mean() < 0.9                          # text, tables and figures drawn, not blank
    # the figures were rendered: colourful pixels (colour maps) in the lower part of the page
    colourful = (img.max(axis=2) - img.min(axis=2)) > 0.3
    assert colourful[img.shape[0] // 4:].mean() > 0.01
    dom = _browser(binary, tmp_path / "profile2", "--dump-dom", url)
    assert dom.returncode == 0, dom.stderr[-2000:]
    for number in _headline(rise):
        assert number in dom.stdout, number
    assert dom.stdout.count("<img") == 4 and "data:image/png;base64," in dom.stdout
