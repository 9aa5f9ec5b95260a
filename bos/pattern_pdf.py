"""PDF writer for :mod:`bos.pattern`: vector dots at exact physical scale.

The file is written directly (PDF is an open ISO standard) and streamed:
the page content is Flate-compressed block row by block row as the dots are
generated, so even an A0 page of millions of dots needs little memory.

Page geometry: the MediaBox is the paper size in points (1 pt = 25.4/72 mm);
the content stream first sets a matrix that makes one unit one micrometre
with y pointing down, so page millimetres from :mod:`bos.pattern` map
directly (dot centres rounded to 1 um).  Each dot is one placement of a Form
XObject that fills a disc of the dot diameter with four Bezier arcs (radius
error of the arc approximation 0.027 %).  Soft dots are a staircase of
``SOFT_LEVELS`` concentric grey discs painted with the Darken blend mode, so
overlapping soft dots combine as the darker of the two, as in the raster.
Noise patterns are embedded as an 8-bit image at the requested dpi, or at
a quarter of the finest scale if that is coarser (the B-spline noise has
little detail below it; viewers interpolate).

References
----------
.. [1] ISO 32000-1:2008, Document management - Portable document format -
   Part 1: PDF 1.7 (file structure 7.5, content streams and operators 8,
   Form XObjects 8.10, blend modes 11.3.5, standard Type 1 fonts 9.6.2.2).
"""

from __future__ import annotations

import math
import zlib
from pathlib import Path

import numpy as np

from .pattern import (SOFT_LEVELS, Layout, PatternSpec, _noise_darkness, iter_dot_rows, noise_pitch_mm,
                      soft_profile)

PT_PER_MM = 72.0 / 25.4
KAPPA = 0.5522847498  # Bezier control distance of a quarter circle (unit radius)


def _num(v: float) -> str:
    s = f"{v:.3f}".rstrip("0").rstrip(".")
    return "0" if s in ("-0", "") else s


def _disc_path(cx: float, cy: float, r: float) -> str:
    """Closed path of a circle (four cubic Bezier arcs)."""
    k = KAPPA * r
    n = _num
    return (f"{n(cx + r)} {n(cy)} m "
            f"{n(cx + r)} {n(cy + k)} {n(cx + k)} {n(cy + r)} {n(cx)} {n(cy + r)} c "
            f"{n(cx - k)} {n(cy + r)} {n(cx - r)} {n(cy + k)} {n(cx - r)} {n(cy)} c "
            f"{n(cx - r)} {n(cy - k)} {n(cx - k)} {n(cy - r)} {n(cx)} {n(cy - r)} c "
            f"{n(cx + k)} {n(cy - r)} {n(cx + r)} {n(cy - k)} {n(cx + r)} {n(cy)} c h")


def _pdf_string(text: str) -> str:
    t = text.encode("latin-1", "replace").decode("latin-1")
    return "(" + t.replace("\\", "\\\\").replace("(", "\\(").replace(")", "\\)") + ")"


def _helvetica_width(text: str) -> float:
    """Width of ``text`` in em of Helvetica (digits and space exactly; others approximately)."""
    widths = {" ": 0.278, ".": 0.278, "m": 0.833}
    return sum(widths.get(ch, 0.556) for ch in text)


class _Writer:
    def __init__(self, fh):
        self.fh = fh
        self.pos = 0
        self.offsets: dict[int, int] = {}

    def raw(self, data: bytes) -> None:
        self.fh.write(data)
        self.pos += len(data)

    def obj(self, num: int, body: str | bytes) -> None:
        self.offsets[num] = self.pos
        body = body.encode("latin-1") if isinstance(body, str) else body
        self.raw(b"%d 0 obj\n" % num + body + b"\nendobj\n")

    def stream(self, num: int, dictionary: str, chunks) -> int:
        """Write a Flate stream from an iterator of byte chunks; return its compressed length."""
        self.offsets[num] = self.pos
        self.raw(f"{num} 0 obj\n<< {dictionary} /Filter /FlateDecode /Length {num + 1} 0 R >>\nstream\n"
                 .encode("latin-1"))
        comp = zlib.compressobj(6)
        length = 0
        for chunk in chunks:
            data = comp.compress(chunk)
            length += len(data)
            self.raw(data)
        data = comp.flush()
        length += len(data)
        self.raw(data + b"\nendstream\nendobj\n")
        self.obj(num + 1, str(length))
        return length

    def finish(self, root: int, info: int) -> None:
        xref = self.pos
        n = max(self.offsets) + 1
        lines = [b"xref\n0 %d\n" % n, b"0000000000 65535 f \n"]
        lines += [b"%010d 00000 n \n" % self.offsets[i] for i in range(1, n)]
        self.raw(b"".join(lines))
        self.raw(f"trailer\n<< /Size {n} /Root {root} 0 R /Info {info} 0 R >>\nstartxref\n{xref}\n%%EOF\n"
                 .encode("latin-1"))


def _furniture_ops(spec: PatternSpec, layout: Layout) -> str:
    um = 1000.0
    ops = ["0 g"]
    for x0, y0, x1, y1 in layout.rects:
        ops.append(f"{_num(x0 * um)} {_num(y0 * um)} {_num((x1 - x0) * um)} {_num((y1 - y0) * um)} re f")
    for cx, cy, d in layout.discs:
        ops.append(_disc_path(cx * um, cy * um, d * um / 2) + " f")
    for x, y, size, text, anchor in layout.texts:
        if anchor == "m":
            x -= _helvetica_width(text) * size / 2
        s = size * um
        # y is down in user space: flip the text matrix so glyphs stand upright
        ops.append(f"BT /F1 1 Tf {_num(s)} 0 0 {_num(-s)} {_num(x * um)} {_num(y * um)} Tm "
                   f"{_pdf_string(text)} Tj ET")
    return "\n".join(ops) + "\n"


def _dot_xobject(spec: PatternSpec) -> str:
    """Content of the Form XObject of one dot, centred on the origin (um)."""
    d = spec.dot_diameter_mm * 1000.0
    if not spec.soft:
        return "0 g " + _disc_path(0, 0, d / 2) + " f"
    ops = []
    # staircase: level k (darkness (k+1)/L) covers r where darkness(r) >= (k+0.5)/L
    rr = np.linspace(0.0, 0.75 * d, 20001)
    prof = soft_profile(rr, d)
    for k in range(SOFT_LEVELS):
        thr = (k + 0.5) / SOFT_LEVELS
        r = float(rr[prof >= thr].max())
        ops.append(f"{_num(1.0 - (k + 1) / SOFT_LEVELS)} g " + _disc_path(0, 0, r) + " f")
    return "\n".join(ops)


def write_pdf(path: str | Path, spec: PatternSpec, layout: Layout) -> int | None:
    """Write the page as a one-page PDF; return the number of dots (None for noise)."""
    w_mm, h_mm = spec.page_mm
    w_pt, h_pt = w_mm * PT_PER_MM, h_mm * PT_PER_MM
    a = PT_PER_MM / 1000.0  # points per micrometre
    x0, y0, x1, y1 = layout.area
    um = 1000.0
    d_um = spec.dot_diameter_mm * um
    n_dots = [0]
    # object numbers
    CATALOG, PAGES, PAGE, INFO, FONT, GSTATE, DOT, CONTENT, IMAGE = 1, 2, 3, 4, 5, 6, 7, 9, 11
    noise = spec.kind == "noise"
    if noise:  # image pixels of size p whose centres lie in the patterned area
        p = noise_pitch_mm(spec)
        ic0, ic1 = math.ceil(x0 / p - 0.5), math.floor(x1 / p - 0.5) + 1
        ir0, ir1 = math.ceil(y0 / p - 0.5), math.floor(y1 / p - 0.5) + 1

    def content():
        head = f"q {a:.12f} 0 0 {-a:.12f} 0 {h_pt:.6f} cm\n"  # 1 unit = 1 um, y down
        yield head.encode("latin-1")
        yield _furniture_ops(spec, layout).encode("latin-1")
        yield (f"q {_num(x0 * um)} {_num(y0 * um)} {_num((x1 - x0) * um)} {_num((y1 - y0) * um)} re W n\n"
               .encode("latin-1"))
        if noise:
            yield (f"q {_num((ic1 - ic0) * p * um)} 0 0 {_num(-(ir1 - ir0) * p * um)} "
                   f"{_num(ic0 * p * um)} {_num(ir1 * p * um)} cm /Im Do Q\n").encode("latin-1")
        else:
            if spec.soft:
                yield b"/GS gs\n"
            for _, _, xy in iter_dot_rows(spec, layout):
                if xy.size == 0:
                    continue
                keep = ((xy[:, 0] > x0 - d_um / um) & (xy[:, 0] < x1 + d_um / um)
                        & (xy[:, 1] > y0 - d_um / um) & (xy[:, 1] < y1 + d_um / um))
                xy = np.rint(xy[keep] * um).astype(np.int64)
                n_dots[0] += len(xy)
                yield "".join(f"q 1 0 0 1 {x} {y} cm /D Do Q\n" for x, y in xy.tolist()).encode("latin-1")
        yield b"Q\nQ\n"

    def image_rows():
        band = 256
        xs = (np.arange(ic0, ic1) + 0.5) * p
        for r in range(ir0, ir1, band):
            ys = (np.arange(r, min(r + band, ir1)) + 0.5) * p
            dark = _noise_darkness(spec, ys, xs)
            yield np.rint(255.0 * (1.0 - dark)).astype(np.uint8).tobytes()

    title = "BOS background: " + spec.describe()
    with open(path, "wb") as fh:
        wr = _Writer(fh)
        wr.raw(b"%PDF-1.4\n%\xe2\xe3\xcf\xd3\n")
        wr.obj(CATALOG, f"<< /Type /Catalog /Pages {PAGES} 0 R >>")
        wr.obj(PAGES, f"<< /Type /Pages /Kids [{PAGE} 0 R] /Count 1 >>")
        xobjects = f"/Im {IMAGE} 0 R" if noise else f"/D {DOT} 0 R"
        wr.obj(PAGE, f"<< /Type /Page /Parent {PAGES} 0 R /MediaBox [0 0 {_num(w_pt)} {_num(h_pt)}] "
                     f"/Resources << /Font << /F1 {FONT} 0 R >> /XObject << {xobjects} >> "
                     f"/ExtGState << /GS {GSTATE} 0 R >> >> /Contents {CONTENT} 0 R >>")
        wr.obj(INFO, f"<< /Title {_pdf_string(title)} /Producer (bos-toolkit bos.pattern) >>")
        wr.obj(FONT, "<< /Type /Font /Subtype /Type1 /BaseFont /Helvetica /Encoding /WinAnsiEncoding >>")
        wr.obj(GSTATE, "<< /Type /ExtGState /BM /Darken >>")
        r = d_um / 2 * (0.75 / 0.5 if spec.soft else 1.0)
        wr.stream(DOT, f"/Type /XObject /Subtype /Form /BBox [{_num(-r)} {_num(-r)} {_num(r)} {_num(r)}]",
                  [_dot_xobject(spec).encode("latin-1")])
        wr.stream(CONTENT, "", content())
        if noise:
            wr.stream(IMAGE, f"/Type /XObject /Subtype /Image /Width {ic1 - ic0} /Height {ir1 - ir0} "
                             "/ColorSpace /DeviceGray /BitsPerComponent 8 /Interpolate true", image_rows())
        wr.finish(CATALOG, INFO)
    return None if noise else n_dots[0]
