"""Tests of bos.pattern / bos.pattern_pdf: printable backgrounds at physical scale.

Outside checks: paper sizes from ISO 216 and ASME Y14.1; PDFs rendered
with pypdfium2 (a general-purpose PDF renderer) and measured; the
autocorrelation of Poisson-placed discs against the Boolean-model formula
(covariance of a union of Poisson discs); PNG/TIFF resolution read back with
Pillow and tifffile; B-spline moments from scipy.
"""

from __future__ import annotations

import math
import re

import numpy as np
import pytest
from PIL import Image
from scipy.optimize import brentq
from scipy.spatial import cKDTree

from bos import pattern as P
from bos.errors import InputError


def _spec(**kw):
    base = dict(page_mm=(120.0, 100.0), dot_diameter_mm=1.0, fill=0.3, seed=5, dpi=254.0)
    base.update(kw)
    spec, warnings = P.make_spec(**base)
    return spec, warnings


def _area_pixels(spec, layout, img):
    """Crop of the patterned area (pixel centres inside it)."""
    p = spec.pitch_mm
    x0, y0, x1, y1 = layout.area
    return img[math.ceil(y0 / p - 0.5):math.floor(y1 / p - 0.5) + 1,
               math.ceil(x0 / p - 0.5):math.floor(x1 / p - 0.5) + 1]


# ---------------------------------------------------------------------------
# paper sizes and parsing
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("name, w, h", [
    # ISO 216:2007, A series trimmed sizes [mm]
    ("A0", 841, 1189), ("A1", 594, 841), ("A2", 420, 594), ("A3", 297, 420), ("A4", 210, 297),
    # ASME Y14.1 size A = US letter, 8.5 x 11 in
    ("letter", 8.5 * 25.4, 11 * 25.4),
])
def test_paper_sizes_from_the_standards(name, w, h):
    got = P.parse_paper(name.lower())
    assert got[1:] == pytest.approx((w, h), abs=1e-9)
    assert P.parse_paper(name, landscape=True)[1:] == pytest.approx((h, w), abs=1e-9)


def test_custom_paper_and_screen_parsing():
    assert P.parse_paper("300x200-mm")[1:] == (300.0, 200.0)
    assert P.parse_paper("297.5 X 420mm")[1:] == (297.5, 420.0)
    assert P.parse_screen("1920x1080-px") == (1920, 1080)
    for bad in ("A5", "B4", "300x200", "x200-mm", "300x200-in"):
        with pytest.raises(InputError, match="unknown paper"):
            P.parse_paper(bad)
    for bad in ("0x200-mm", "-3x200-mm", "300x0-mm"):
        with pytest.raises(InputError, match="positive"):
            P.parse_paper(bad)
    for bad in ("1920x1080-mm", "0x100-px", "big"):
        with pytest.raises(InputError):
            P.parse_screen(bad)


# ---------------------------------------------------------------------------
# checks and warnings
# ---------------------------------------------------------------------------

def test_bad_requests_raise():
    with pytest.raises(InputError, match="dot diameter must be positive"):
        _spec(dot_diameter_mm=0.0)
    with pytest.raises(InputError, match="dot diameter must be positive"):
        _spec(dot_diameter_mm=-1.0)
    with pytest.raises(InputError, match="below the printer dot pitch"):
        _spec(dot_diameter_mm=0.04, dpi=600.0)  # pitch 25.4/600 = 0.0423 mm
    with pytest.raises(InputError, match="larger than the patterned area"):
        _spec(page_mm=(210.0, 297.0), dot_diameter_mm=250.0)
    with pytest.raises(InputError, match="fill"):
        _spec(fill=1.0)
    with pytest.raises(InputError, match="at most 0.45"):
        _spec(fill=0.5)
    with pytest.raises(InputError, match="dpi must be positive"):
        _spec(dpi=-300.0)
    with pytest.raises(InputError, match="too small"):
        _spec(page_mm=(30.0, 30.0))
    with pytest.raises(InputError, match="seed"):
        _spec(seed=-1)
    with pytest.raises(InputError, match="noise patterns are grey"):
        _spec(kind="noise", soft=True)


def test_printer_resolution_warning():
    # 0.1 mm at 600 dpi spans 2.4 printer dots (< 3): warn; 0.15 mm spans 3.5: no warning
    _, w = _spec(dot_diameter_mm=0.1, dpi=600.0)
    assert any("cannot resolve" in m for m in w)
    _, w = _spec(dot_diameter_mm=0.15, dpi=600.0)
    assert not any("cannot resolve" in m for m in w)


def test_dot_size_from_rig_thin_lens():
    from bos.optics import Rig

    # f 50 mm, 5 um pixels, Z_A 1 m, Z_D 0.5 m: M = f/(Z_B - f) = 0.05/1.45;
    # one pixel on the background = 5 um * 1.45/0.05 = 0.145 mm; 2.5 px -> 0.3625 mm
    rig = Rig(focal_length_m=0.05, pixel_pitch_m=5e-6, f_number=8, z_a_m=1.0, z_d_m=0.5)
    assert P.dot_diameter_for_rig(rig) == pytest.approx(2.5 * 5e-6 * (1.5 - 0.05) / 0.05, rel=1e-12)
    assert P.imaged_dot_px(rig, 0.29e-3) == pytest.approx(2.0, rel=1e-12)
    _, w = _spec(dot_diameter_mm=0.2, rig=rig)  # 1.38 px
    assert any("below 2 px" in m for m in w)
    _, w = _spec(dot_diameter_mm=1.0, rig=rig)  # 6.9 px
    assert any("above 5 px" in m for m in w)
    spec, w = _spec(dot_diameter_mm=0.3625, rig=rig)
    assert not any(" px on the sensor" in m for m in w)
    assert any("dots image at 2.50 px" in n for n in spec.notes)


def test_layout_furniture_outside_the_patterned_area():
    for page in ((210.0, 297.0), (841.0, 1189.0), (120.0, 100.0)):
        spec, _ = _spec(page_mm=page, dot_diameter_mm=1.0)
        lay = P.page_layout(spec)
        x0, y0, x1, y1 = lay.area
        w, h = page
        assert 0 < x0 < x1 < w and 0 < y0 < y1 < h
        boxes = list(lay.rects) + [(cx - d / 2, cy - d / 2, cx + d / 2, cy + d / 2) for cx, cy, d in lay.discs]
        boxes += [(x - (P._text_width_mm(t, size) if a == "m" else 0), y - size, x + P._text_width_mm(t, size), y + 0.21 * size)  # Helvetica descent 0.207 em
                  for x, y, size, t, a in lay.texts]
        for bx0, by0, bx1, by1 in boxes:
            assert bx1 <= x0 or bx0 >= x1 or by1 <= y0 or by0 >= y1  # no overlap with the area
            assert bx0 >= 0 and by0 >= 0 and bx1 <= w and by1 <= h - P.PRINT_MARGIN_MM + 1e-9
        # four L-shaped corner markers (two arms each), the ruler's 101 ticks, seed in the footer
        assert sum(1 for t in lay.texts if "seed 5" in t[3]) == 1
        assert sum(1 for r in lay.rects if abs((r[2] - r[0]) - P.TICK_W_MM) < 1e-9) >= 101
        assert any("100 %" in t[3] for t in lay.texts)


# ---------------------------------------------------------------------------
# dot placement
# ---------------------------------------------------------------------------

def test_non_overlapping_dots_across_blocks_and_fill():
    # 0.4 mm dots: blocks of 128 cells x 0.283 mm = 36 mm, so this page has 3 x 5 blocks
    spec, _ = _spec(page_mm=(130.0, 200.0), dot_diameter_mm=0.4, fill=0.42)
    layout = P.page_layout(spec)
    xy = P.all_dots(spec, layout)
    nearest = cKDTree(xy).query(xy, k=2)[0][:, 1]
    assert nearest.min() >= 0.4 * (1 - 1e-9)
    # fill counted from the dot list: N a / (area of the centre region), exact up to rounding
    rx0, ry0, rx1, ry1 = P._dot_region(spec, layout)
    fill = len(xy) * math.pi * 0.2 ** 2 / ((rx1 - rx0) * (ry1 - ry0))
    assert fill == pytest.approx(0.42, rel=0.01)
    # rasterised (pixel centre inside a disc): the dark fraction is the fill
    img = P.render_page(spec, layout)
    dark = 1 - _area_pixels(spec, layout, img) / 255.0
    assert set(np.unique(dark)) <= {0.0, 1.0}
    assert dark.mean() == pytest.approx(0.42, abs=0.01)
    # uniform: dot density in the left and right halves agree within 4 %
    mid = 0.5 * (rx0 + rx1)
    assert np.mean(xy[:, 0] < mid) == pytest.approx(0.5, abs=0.02)


def test_poisson_dots_fill_is_boolean_model_coverage():
    # a union of Poisson discs with intensity lam covers 1 - exp(-lam a) of the plane
    spec, _ = _spec(page_mm=(150.0, 120.0), poisson=True, fill=0.6)
    layout = P.page_layout(spec)
    xy = P.all_dots(spec, layout)
    rx0, ry0, rx1, ry1 = P._dot_region(spec, layout)
    lam = len(xy) / ((rx1 - rx0) * (ry1 - ry0))
    assert 1 - math.exp(-lam * math.pi / 4) == pytest.approx(0.6, abs=0.015)
    dark = 1 - _area_pixels(spec, layout, P.render_page(spec, layout)) / 255.0
    assert dark.mean() == pytest.approx(0.6, abs=0.015)


def _lens_area(s, d):
    """Overlap area of two discs of diameter d with centres s apart."""
    s = np.minimum(np.abs(s), d)
    r = d / 2
    return 2 * r * r * np.arccos(s / d) - s / 2 * np.sqrt(np.maximum(d * d - s * s, 0))


def _half_width_px(dark):
    x = dark - dark.mean()
    f = np.fft.rfft2(x, s=(2 * x.shape[0], 2 * x.shape[1]))
    ac = np.fft.irfft2(np.abs(f) ** 2)[:64, :64]
    ac /= ac[0, 0]

    def half(v):
        k = int(np.argmax(v < 0.5))
        return k - 1 + (v[k - 1] - 0.5) / (v[k - 1] - v[k])

    return 0.5 * (half(ac[0, :]) + half(ac[:, 0]))


@pytest.mark.parametrize("fill", [0.15, 0.5])
def test_png_dpi_and_dot_size_from_autocorrelation(tmp_path, fill):
    # Poisson discs of diameter D: normalised autocovariance of the dark indicator is
    # (exp(lam A(s)) - 1) / (exp(lam a) - 1), A(s) the overlap of two discs s apart
    # (Boolean model); its half width fixes D.
    d = 1.0
    spec, _ = _spec(page_mm=(150.0, 120.0), dot_diameter_mm=d, poisson=True, fill=fill, dpi=254.0)
    out = P.write_pattern(tmp_path / "p.png", spec)
    with Image.open(out.path) as im:
        assert im.info["dpi"] == pytest.approx((254.0, 254.0), abs=0.01)  # pHYs in px/m
        assert im.size == (round(150 / 0.1), round(120 / 0.1))
        img = np.asarray(im)
    layout = P.page_layout(spec)
    dark = 1 - _area_pixels(spec, layout, img) / 255.0
    hw_mm = _half_width_px(dark) * spec.pitch_mm
    # at a fixed coverage (lam a = -ln(1 - fill)) the model scales with D: half width = h1 * D
    lam_a = -math.log1p(-fill)
    h1 = brentq(lambda s: math.expm1(lam_a * _lens_area(s, 1.0) / (math.pi / 4)) / math.expm1(lam_a) - 0.5,
                1e-9, 1.0)
    d_measured = hw_mm / h1
    assert d_measured == pytest.approx(d, rel=0.03)


def test_tiff_resolution_and_same_pixels_as_png(tmp_path):
    import tifffile

    spec, _ = _spec(dot_diameter_mm=0.5, dpi=300.0)
    png = P.write_pattern(tmp_path / "p.png", spec)
    tif = P.write_pattern(tmp_path / "p.tiff", spec)
    with tifffile.TiffFile(tif.path) as tf:
        page = tf.pages[0]
        assert page.tags["XResolution"].value == (300, 1)
        assert page.tags["YResolution"].value == (300, 1)
        assert page.tags["ResolutionUnit"].value == 2  # inch
        a = page.asarray()
    with Image.open(png.path) as im:
        b = np.asarray(im)
    assert a.shape == b.shape == spec.raster_shape
    assert np.array_equal(a, b)


def test_banding_does_not_change_the_page():
    spec, _ = _spec(dot_diameter_mm=0.7, soft=True)
    layout = P.page_layout(spec)
    a = np.concatenate(list(P.render_bands(spec, layout, band_rows=37)))
    b = np.concatenate(list(P.render_bands(spec, layout, band_rows=512)))
    assert np.array_equal(a, b)


def test_soft_dot_profile_and_darkness_integral():
    from scipy.integrate import quad

    d = 1.2
    assert P.soft_profile(np.array([0.0, d / 4, d / 2, 3 * d / 4]), d) == pytest.approx([1, 1, 0.5, 0], abs=1e-12)
    # a raised-cosine edge symmetric about r = d/2 in r but not in area: integral of darkness
    integral = quad(lambda r: 2 * math.pi * r * float(P.soft_profile(np.array(r), d)), 0, d)[0]
    spec, _ = _spec(page_mm=(120.0, 100.0), dot_diameter_mm=d, soft=True, fill=0.05, dpi=508.0)
    layout = P.page_layout(spec)
    xy = P.all_dots(spec, layout)
    img = P.render_page(spec, layout)
    dark = 1 - img / 255.0
    p = spec.pitch_mm
    x0, y0, x1, y1 = layout.area
    inner = xy[(xy[:, 0] > x0 + 2) & (xy[:, 0] < x1 - 2) & (xy[:, 1] > y0 + 2) & (xy[:, 1] < y1 - 2)]
    # isolated dots (no other dot within 1.5 d) integrate to the analytic value
    dist = cKDTree(xy).query(inner, k=2)[0][:, 1]
    sums = []
    for cx, cy in inner[dist > 1.6 * d][:40]:
        r0, c0 = int(cy / p), int(cx / p)
        h = int(d / p) + 2
        sums.append(dark[r0 - h:r0 + h + 1, c0 - h:c0 + h + 1].sum() * p * p)
    assert len(sums) >= 20
    assert np.mean(sums) == pytest.approx(integral, rel=0.01)


# ---------------------------------------------------------------------------
# noise
# ---------------------------------------------------------------------------

def test_bspline_variance_constant_against_scipy():
    from scipy.interpolate import BSpline

    b3 = BSpline.basis_element(np.arange(5))  # cubic B-spline on [0, 4]
    t = np.linspace(0, 1, 20001)
    w = np.stack([b3(t + k) for k in range(4)])  # weights of the four lattice points
    assert np.allclose(w.sum(axis=0), 1.0)
    assert np.trapezoid((w ** 2).sum(axis=0), t) == pytest.approx(P._BSPLINE_SQ, rel=1e-6)
    assert P._bspline_weights(t) == pytest.approx(w[::-1], abs=1e-12)


def test_noise_unit_variance_fill_and_scales():
    spec, _ = _spec(kind="noise", dot_diameter_mm=0.5, octaves=4, fill=0.3)
    ys = np.arange(0, 400, 0.1)
    z = P.noise_field(spec, ys[:1500], ys[:1500])
    assert z.var() == pytest.approx(1.0, rel=0.1)
    assert abs(z.mean()) < 0.1
    layout = P.page_layout(spec)
    dark = 1 - _area_pixels(spec, layout, P.render_page(spec, layout)) / 255.0
    # grey: mean darkness = fill, +-2.5 sigma inside [0, 1] (clipped well under 2 % of the area)
    assert dark.mean() == pytest.approx(0.3, abs=0.01)
    assert np.mean((dark == 0) | (dark == 1)) < 0.02
    assert dark.std() == pytest.approx(0.3 / 2.5, rel=0.1)
    # multi-scale: with more octaves the autocorrelation extends further
    one, _ = _spec(kind="noise", dot_diameter_mm=0.5, octaves=1)
    z1 = P.noise_field(one, ys[:1500], ys[:1500])

    def corr(f, lag):
        return np.corrcoef(f[:, :-lag].ravel(), f[:, lag:].ravel())[0, 1]

    lag = 20  # 2 mm = 4 finest scales
    assert corr(z1, lag) < 0.05
    assert corr(z, lag) > 0.3


# ---------------------------------------------------------------------------
# PDF, rendered with pypdfium2
# ---------------------------------------------------------------------------

def _render_pdf(path, dpi):
    pdfium = pytest.importorskip("pypdfium2")
    doc = pdfium.PdfDocument(str(path))
    page = doc[0]
    size = page.get_size()
    img = page.render(scale=dpi / 72.0, grayscale=True).to_numpy()
    img = img[..., 0] if img.ndim == 3 else img
    doc.close()
    return size, img.astype(float)


@pytest.mark.parametrize("paper", ["A4", "letter"])
def test_pdf_page_size(tmp_path, paper):
    name, w, h = P.parse_paper(paper)
    spec, _ = P.make_spec(page_mm=(w, h), paper=name, dot_diameter_mm=4.0, fill=0.2, seed=1)
    P.write_pattern(tmp_path / "p.pdf", spec)
    (w_pt, h_pt), _ = _render_pdf(tmp_path / "p.pdf", 10)
    assert (w_pt, h_pt) == pytest.approx((w * 72 / 25.4, h * 72 / 25.4), abs=0.002)


def test_pdf_dot_diameters_positions_and_ruler(tmp_path):
    d = 1.5
    spec, _ = _spec(page_mm=(130.0, 90.0), dot_diameter_mm=d, fill=0.12, seed=9)
    res = P.write_pattern(tmp_path / "p.pdf", spec)
    layout = P.page_layout(spec)
    xy = P.all_dots(spec, layout)
    dpi = 508.0  # about 20 px per mm
    (w_pt, h_pt), img = _render_pdf(res.path, dpi)
    # the renderer fits the page to a whole number of pixels: use its own scale per axis
    pxx, pxy = w_pt * 25.4 / 72 / img.shape[1], h_pt * 25.4 / 72 / img.shape[0]
    assert pxx == pytest.approx(25.4 / dpi, rel=1e-3)
    dark = 1 - img / 255.0
    x0, y0, x1, y1 = layout.area
    inside = xy[(xy[:, 0] > x0 + d) & (xy[:, 0] < x1 - d) & (xy[:, 1] > y0 + d) & (xy[:, 1] < y1 - d)]
    assert res.n_dots == len(xy[(xy[:, 0] > x0 - d) & (xy[:, 0] < x1 + d)
                                & (xy[:, 1] > y0 - d) & (xy[:, 1] < y1 + d)])
    isolated = cKDTree(xy).query(inside, k=2)[0][:, 1] > 1.6 * d
    diam, err = [], []
    for cx, cy in inside[isolated]:
        r0, c0 = int(cy / pxy), int(cx / pxx)
        h = int(0.75 * d / pxx)  # window half-width 1.125 mm: this dot only
        win = dark[r0 - h:r0 + h + 1, c0 - h:c0 + h + 1]
        area = win.sum() * pxx * pxy  # antialiased coverage
        diam.append(math.sqrt(4 * area / math.pi))
        rr, cc = np.mgrid[r0 - h:r0 + h + 1, c0 - h:c0 + h + 1]
        err.append(math.hypot(((cc + 0.5) * win).sum() / win.sum() * pxx - cx,
                              ((rr + 0.5) * win).sum() / win.sum() * pxy - cy))
    assert len(diam) > 100
    assert np.mean(diam) == pytest.approx(d, rel=0.005)
    assert np.std(diam) < 0.01 * d
    assert np.max(err) < 0.005  # centres where the dot list says (rounded to 1 um in the file)
    # the 100 mm ruler: 0 and 100 mm ticks 100 mm apart on the rendered page
    row = int((layout.page_mm[1] - P.PRINT_MARGIN_MM - 3.2 - 3.0) / pxy)  # through the tall ticks only
    cols = np.flatnonzero(dark[row] > 0.5)
    assert (cols.max() - cols.min()) * pxx == pytest.approx(100.0, abs=2 * pxx + 0.15)


def test_pdf_soft_and_noise_match_the_raster(tmp_path):
    for kw in (dict(soft=True, dot_diameter_mm=1.0, fill=0.3),
               dict(kind="noise", dot_diameter_mm=0.8, fill=0.4, octaves=3)):
        spec, _ = _spec(page_mm=(120.0, 90.0), dpi=127.0, **kw)
        P.write_pattern(tmp_path / "p.pdf", spec)
        layout = P.page_layout(spec)
        raster = _area_pixels(spec, layout, P.render_page(spec, layout)) / 255.0
        _, img = _render_pdf(tmp_path / "p.pdf", 127.0)
        pdf = _area_pixels(spec, layout, img[:spec.raster_shape[0], :spec.raster_shape[1]]) / 255.0
        assert pdf.shape == raster.shape
        # mean darkness agrees; the soft PDF is a 6-level staircase of the raster's profile
        assert pdf.mean() == pytest.approx(raster.mean(), abs=0.02)
        assert np.corrcoef(pdf.ravel(), raster.ravel())[0, 1] > 0.9


@pytest.mark.parametrize("kind", ["dots", "noise"])
def test_pdf_structure_xref_offsets(tmp_path, kind):
    spec, _ = _spec(dot_diameter_mm=1.0, kind=kind)
    data = P.write_pattern(tmp_path / "p.pdf", spec).path.read_bytes()
    assert data.startswith(b"%PDF-1.4") and data.rstrip().endswith(b"%%EOF")
    start = int(re.search(rb"startxref\s+(\d+)", data).group(1))
    assert data[start:start + 4] == b"xref"
    m = re.match(rb"xref\s+0 (\d+)\s+", data[start:])
    n = int(m.group(1))
    entries = data[start + m.end():].split(b"\n")[:n]
    for num, entry in enumerate(entries[1:], start=1):
        off = int(entry[:10])
        assert data[off:].startswith(b"%d 0 obj" % num)
    # no timestamps or ids that would change between runs
    assert b"CreationDate" not in data and b"/ID" not in data


# ---------------------------------------------------------------------------
# determinism
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("suffix", [".pdf", ".png", ".tiff"])
def test_same_seed_same_bytes(tmp_path, suffix):
    spec, _ = _spec(dot_diameter_mm=0.8, seed=123)
    a = P.write_pattern(tmp_path / f"a{suffix}", spec).path.read_bytes()
    b = P.write_pattern(tmp_path / f"b{suffix}", spec).path.read_bytes()
    assert a == b
    other, _ = _spec(dot_diameter_mm=0.8, seed=124)
    c = P.write_pattern(tmp_path / f"c{suffix}", other).path.read_bytes()
    assert c != a


def test_noise_same_seed_same_pixels():
    spec, _ = _spec(kind="noise", dot_diameter_mm=0.6, seed=77)
    a = P.render_page(spec)
    b = P.render_page(spec)
    assert np.array_equal(a, b)
    c = P.render_page(_spec(kind="noise", dot_diameter_mm=0.6, seed=78)[0])
    assert not np.array_equal(a, c)


def test_screen_background(tmp_path):
    spec, _ = P.make_spec(screen_px=(800, 600), screen_pitch_mm=0.25, dot_diameter_mm=0.75, fill=0.4, seed=2)
    assert spec.page_mm == pytest.approx((200.0, 150.0))
    out = P.write_pattern(tmp_path / "s.png", spec)
    with Image.open(out.path) as im:
        assert im.size == (800, 600)
        assert im.info["dpi"] == pytest.approx((101.6, 101.6), abs=0.01)
    with pytest.raises(InputError, match="PNG or TIFF"):
        P.write_pattern(tmp_path / "s.pdf", spec)
    with pytest.raises(InputError, match="screen pixel pitch"):
        P.make_spec(screen_px=(800, 600), screen_pitch_mm=0.3, dot_diameter_mm=0.2)
