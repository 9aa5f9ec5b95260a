"""One-page report of a run: a single self-contained HTML file.

The page is built from the result alone (the file, or the same content in
memory): warnings first, the job summary, the figures (embedded as
``data:`` URIs), the rig / medium / processing provenance, the input files
and their SHA-256 hashes, the software version and the safety cautions.
It has inline CSS only, no script, and a Content-Security-Policy that
forbids the browser to load anything from outside the page, so it opens
offline and makes no network request.  Written atomically.
"""

from __future__ import annotations

import base64
import html
import math
import os
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np

from ._io import atomic_path
from .errors import DataFileError, InputError

#: Summary rows: (key in the summary, label, unit, scale, format).
SUMMARY_ROWS: tuple[tuple[str, str, str, float, str], ...] = (
    ("vectors", "vectors", "", 1, "d"),
    ("grid_shape", "vector grid (rows × columns)", "", 1, "d"),
    ("method", "displacement method", "", 1, ""),
    ("peak_displacement_px", "peak displacement |d|", "px", 1, ".4g"),
    ("median_uncertainty_px", "median displacement uncertainty (1σ)", "px", 1, ".3g"),
    ("valid_fraction", "valid vectors (of the unmasked)", "%", 100, ".4g"),
    ("masked_fraction", "masked", "%", 100, ".3g"),
    ("invalid_fraction", "invalid (rejected)", "%", 100, ".3g"),
    ("camera_shift_px", "camera shift removed (y, x)", "px", 1, ".3g"),
    ("ambient_temperature_k", "ambient temperature", "K", 1, ".5g"),
    ("ambient_density_kg_m3", "ambient density", "kg/m³", 1, ".5g"),
    ("min_density_kg_m3", "lowest density", "kg/m³", 1, ".5g"),
    ("max_density_kg_m3", "highest density", "kg/m³", 1, ".5g"),
    ("min_temperature_k", "lowest temperature", "K", 1, ".5g"),
    ("max_temperature_k", "highest temperature", "K", 1, ".5g"),
    ("peak_temperature_rise_k", "peak temperature rise", "K", 1, ".4g"),
    ("median_temperature_uncertainty_k", "median temperature uncertainty (1σ)", "K", 1, ".3g"),
    ("median_density_uncertainty_kg_m3", "median density uncertainty (1σ)", "kg/m³", 1, ".3g"),
    ("temperature_model", "temperature model", "", 1, ""),
    ("peak_acoustic_pressure_pa", "peak acoustic pressure", "Pa", 1, ".4g"),
    ("peak_sound_pressure_level_db", "peak sound pressure level", "dB re 20 µPa", 1, ".4g"),
)

#: Provenance sections: (attribute group, heading).
PROVENANCE = (
    ("rig", "Rig (derived optics)"),
    ("camera", "Camera"),
    ("geometry", "Geometry"),
    ("medium", "Medium"),
    ("processing", "Processing"),
    ("displacement_params", "Displacement estimator"),
    ("reconstruction", "Reconstruction"),
    ("reconstruction_info", "Reconstruction result"),
    ("flow_source", "Flow source"),
    ("source", "Flow source"),
)

_CSS = """
body{font:15px/1.45 system-ui,-apple-system,"Segoe UI",Roboto,"DejaVu Sans",sans-serif;margin:0;color:#1b1f24;background:#fff}
main{max-width:1100px;margin:0 auto;padding:18px 22px 40px}
h1{font-size:1.6em;margin:.2em 0 .1em}h2{font-size:1.2em;margin:1.4em 0 .4em;border-bottom:1px solid #d0d7de;padding-bottom:.2em}
h3{font-size:1em;margin:1em 0 .3em}
.sub{color:#57606a;margin:0 0 1em}
.box{border-radius:6px;padding:10px 14px;margin:10px 0}
.warn{background:#fff4e5;border:1px solid #f0b35a}.ok{background:#eef8f0;border:1px solid #8bc79a}
.caution{background:#fdecec;border:1px solid #e39a9a}
.box ul{margin:.3em 0 .2em 1.2em;padding:0}
table{border-collapse:collapse;margin:.3em 0 .8em;font-size:.95em}
th,td{border:1px solid #d0d7de;padding:3px 9px;text-align:left;vertical-align:top;max-width:640px;overflow-wrap:anywhere}
th{background:#f6f8fa;font-weight:600}td.num{text-align:right;font-variant-numeric:tabular-nums}
td.hash{font-family:ui-monospace,"DejaVu Sans Mono",monospace;font-size:.85em;word-break:break-all}
figure{margin:12px 0 18px}figure img{max-width:100%;height:auto;border:1px solid #eaeef2}
figcaption{color:#57606a;font-size:.9em}
pre{background:#f6f8fa;border:1px solid #d0d7de;padding:8px;overflow:auto;font-size:.85em}
.grid{display:grid;grid-template-columns:repeat(auto-fit,minmax(320px,1fr));gap:0 24px}
"""

_FIGURE_CAPTIONS = {
    "fig_displacement": "Apparent background displacement [px] on the vector grid.",
    "fig_deflection": "Light-ray deflection [µrad].",
    "fig_density": "Density [kg/m³] and temperature [K].",
    "fig_acoustic": "Acoustic pressure p′ [Pa] and its 1σ uncertainty.",
    "fig_profile": "Profile along the line drawn in the field figures (deflection: component along the line).",
}


def _e(text: Any) -> str:
    return html.escape(str(text), quote=True)


def _number(value: Any, fmt: str, scale: float = 1.0) -> str:
    if value is None:
        return "–"
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (list, tuple, np.ndarray)):
        return ", ".join(_number(v, fmt, scale) for v in np.asarray(value, dtype=object).ravel())
    if isinstance(value, (int, float, np.integer, np.floating)):
        v = float(value) * scale
        if not math.isfinite(v):
            return "–"
        if fmt == "d":
            return f"{int(round(v)):d}"
        return format(v, fmt or ".6g")
    return str(value)


def _plain(value: Any) -> str:
    """A provenance value as text: numbers to 6 significant digits, lists joined, dicts as key = value."""
    if isinstance(value, Mapping):
        return "; ".join(f"{k} = {_plain(v)}" for k, v in value.items())
    if isinstance(value, str):
        return value
    return _number(value, ".6g")


def _table(rows: Sequence[tuple[str, str, str]], *, header: tuple[str, str, str] = ("quantity", "value", "unit"),
           num: bool = True) -> str:
    out = ["<table><thead><tr>" + "".join(f"<th>{_e(h)}</th>" for h in header) + "</tr></thead><tbody>"]
    for a, b, c in rows:
        cls = ' class="num"' if num else ""
        out.append(f"<tr><td>{_e(a)}</td><td{cls}>{_e(b)}</td><td>{_e(c)}</td></tr>")
    out.append("</tbody></table>")
    return "".join(out)


def _collect_warnings(attrs: Mapping[str, Any]) -> list[str]:
    """Every warning the result carries: the summary's list and any ``*warning*`` attribute."""
    found: list[str] = []

    def add(value: Any) -> None:
        if isinstance(value, str) and value.strip():
            found.append(" ".join(value.split()))
        elif isinstance(value, (list, tuple)):
            for v in value:
                add(v)

    summary = attrs.get("summary")
    if isinstance(summary, Mapping):
        add(summary.get("warnings"))
    for key, value in attrs.items():
        if "warning" in str(key).lower():
            add(value)
        elif isinstance(value, Mapping) and key != "summary":
            for k2, v2 in value.items():
                if "warning" in str(k2).lower():
                    add(v2)
    return list(dict.fromkeys(found))


def summary_rows(attrs: Mapping[str, Any], *, axis=None) -> list[tuple[str, str, str]]:
    """The job-summary table: (label, formatted value, unit) from the ``summary`` attribute."""
    summary = attrs.get("summary") if isinstance(attrs.get("summary"), Mapping) else {}
    rows = []
    for key, label, unit, scale, fmt in SUMMARY_ROWS:
        if key not in summary or summary[key] is None:
            continue
        value = summary[key]
        text = " × ".join(_number(v, fmt) for v in value) if key == "grid_shape" else _number(value, fmt, scale)
        rows.append((label, text, unit))
    asym = summary.get("asymmetry")
    if asym is not None:
        rows.append(("asymmetry of the two halves (rms / peak)", _plain(asym), ""))
    if axis is not None:
        coord = "x" if axis.orientation == "vertical" else "y"
        rows.append((f"fitted symmetry axis ({axis.orientation}), {coord}", _number(axis.m * 1e3, ".4g"), "mm"))
        if axis.px is not None:
            what = "column" if axis.orientation == "vertical" else "row"
            rows.append((f"fitted symmetry axis, image {what}", _number(axis.px, ".5g"), "px"))
    return rows


def other_summary_rows(attrs: Mapping[str, Any]) -> list[tuple[str, str, str]]:
    """Entries of the ``summary`` attribute that :data:`SUMMARY_ROWS` does not name, under their own names."""
    summary = attrs.get("summary") if isinstance(attrs.get("summary"), Mapping) else {}
    known = {r[0] for r in SUMMARY_ROWS} | {"asymmetry", "warnings"}
    return [(key.replace("_", " "), _plain(value), "") for key, value in summary.items()
            if key not in known and value is not None and value != [] and value != {}]


def _figures_html(fd, *, line, dpi: int) -> str:
    from . import plots

    parts = []
    for key, fig in plots.build_run_figures(fd, line=line).items():
        data = base64.b64encode(plots.png_bytes(fig, dpi=dpi)).decode("ascii")
        caption = _FIGURE_CAPTIONS.get(key, "")
        parts.append(f'<figure><img alt="{_e(key[4:])} figure" src="data:image/png;base64,{data}">'
                     f"<figcaption>{_e(caption)}</figcaption></figure>")
    return "".join(parts)


def _provenance_html(attrs: Mapping[str, Any]) -> str:
    blocks, seen = [], set()
    for key, heading in PROVENANCE:
        group = attrs.get(key)
        if not isinstance(group, Mapping) or not group or heading in seen:
            continue
        seen.add(heading)
        rows = [(str(k), _plain(v), "") for k, v in group.items()]
        blocks.append(f"<div><h3>{_e(heading)}</h3>"
                      + _table(rows, header=("setting", "value", ""), num=False) + "</div>")
    return '<div class="grid">' + "".join(blocks) + "</div>" if blocks else "<p>No provenance recorded.</p>"


def _inputs_html(attrs: Mapping[str, Any]) -> str:
    paths = attrs.get("inputs") if isinstance(attrs.get("inputs"), Mapping) else {}
    hashes = attrs.get("input_sha256") if isinstance(attrs.get("input_sha256"), Mapping) else {}
    names = list(dict.fromkeys(list(paths) + list(hashes)))
    if not names:
        return "<p>No input files recorded.</p>"
    out = ["<table><thead><tr><th>input</th><th>file</th><th>SHA-256</th></tr></thead><tbody>"]
    for n in names:
        out.append(f"<tr><td>{_e(n)}</td><td>{_e(paths.get(n, '–'))}</td>"
                   f'<td class="hash">{_e(hashes.get(n, "–"))}</td></tr>')
    out.append("</tbody></table>")
    return "".join(out)


def report_html(source: Any, *, name: str | None = None, line: Sequence[Sequence[float]] | None = None,
                figures: bool = True, dpi: int | None = None) -> str:
    """The report page of a result as an HTML string.

    Parameters
    ----------
    source : path, bos.store.ResultData, xarray.Dataset, bos.plots.FigureData or RunResult
        The result (a :class:`bos.stages.RunResult` is converted with
        :func:`bos.output.as_result_data`).
    name : str, optional
        Run name (default: from the result).
    line : [[x0, y0], [x1, y1]], optional
        Profile line [m, y down] (default: stored in the result, else
        :func:`bos.plots.default_profile_line`).
    figures : bool
        Embed the figures (PNG as ``data:`` URIs).
    dpi : int, optional
        Resolution of the embedded figures (default :data:`bos.plots.DPI`).

    Returns
    -------
    str
        A complete HTML5 document with no external reference.
    """
    import bos
    from . import plots

    fd = plots.figure_data(source, name=name)
    attrs = fd.attrs
    line = plots.profile_line_of(fd) if line is None else line
    version = attrs.get("software_version") or bos.__version__
    warnings = _collect_warnings(attrs)
    cautions = [str(c) for c in (attrs.get("cautions") or []) if str(c).strip()]
    if isinstance(attrs.get("cautions"), str):
        cautions = [attrs["cautions"]]
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta http-equiv="Content-Security-Policy" content="default-src \'none\'; img-src data:; '
        "style-src 'unsafe-inline'\">",
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>BOS report: {_e(fd.name)}</title><style>{_CSS}</style></head><body><main>",
        f"<h1>BOS report: {_e(fd.name)}</h1>",
        f'<p class="sub">bos-toolkit {_e(version)}'
        + (f" · run {_e(attrs['run_id'])}" if attrs.get("run_id") else "")
        + (f" · {_e(attrs['source'])}" if isinstance(attrs.get("source"), str) else "") + "</p>",
        '<h2 id="warnings">Warnings</h2>',
    ]
    if warnings:
        parts.append('<div class="box warn"><strong>' + _e(f"{len(warnings)} warning(s)") + "</strong><ul>"
                     + "".join(f"<li>{_e(w)}</li>" for w in warnings) + "</ul></div>")
    else:
        parts.append('<div class="box ok">No warnings.</div>')
    parts.append('<h2 id="summary">Summary</h2>')
    rows = summary_rows(attrs, axis=fd.axis)
    parts.append(_table(rows) if rows else "<p>No summary recorded.</p>")
    other = other_summary_rows(attrs)
    if other:
        parts.append("<h3>Also recorded</h3>" + _table(other, header=("item", "value", ""), num=False))
    (x0, y0), (x1, y1) = line
    parts.append(f'<p class="sub">Profile line: ({x0 * 1e3:.3f}, {y0 * 1e3:.3f}) → ({x1 * 1e3:.3f}, '
                 f"{y1 * 1e3:.3f}) mm, object-plane x right, y down.</p>")
    if figures:
        parts.append('<h2 id="figures">Figures</h2>')
        parts.append(_figures_html(fd, line=line, dpi=dpi or plots.DPI))
    parts += ['<h2 id="provenance">Rig, medium and processing</h2>', _provenance_html(attrs),
              '<h2 id="inputs">Input files</h2>', _inputs_html(attrs), '<h2 id="software">Software</h2>']
    soft = [("software", f"{attrs.get('software', 'bos-toolkit')} {version}", "")]
    for key in ("run_id", "history", "Conventions", "experiment_file"):
        if attrs.get(key):
            soft.append((key, _plain(attrs[key]), ""))
    parts.append(_table(soft, header=("item", "value", ""), num=False))
    if isinstance(attrs.get("references"), str) and attrs["references"].strip():
        parts.append("<h3>Methods (references)</h3><ul>"
                     + "".join(f"<li>{_e(r)}</li>" for r in attrs["references"].splitlines() if r.strip()) + "</ul>")
    if isinstance(attrs.get("experiment_file_text"), str) and attrs["experiment_file_text"].strip():
        parts.append("<h3>Experiment file</h3><pre>" + _e(attrs["experiment_file_text"]) + "</pre>")
    parts.append('<h2 id="cautions">Safety cautions</h2>')
    if cautions:
        parts.append('<div class="box caution"><ul>' + "".join(f"<li>{_e(c)}</li>" for c in cautions)
                     + "</ul><p>Follow local codes and your organisation's safety rules; these notes do not "
                       "replace them.</p></div>")
    else:
        parts.append("<p>No cautions recorded for this source and illumination.</p>")
    parts.append("</main></body></html>")
    return "\n".join(parts) + "\n"


def default_report_path(result_path: str | os.PathLike) -> Path:
    """``<dir>/<stem>-report.html`` beside a result file."""
    p = Path(result_path)
    return p.with_name(f"{p.stem}-report.html")


def write_report(source: Any, path: str | os.PathLike | None = None, *, name: str | None = None,
                 line: Sequence[Sequence[float]] | None = None, figures: bool = True,
                 dpi: int | None = None) -> Path:
    """Write the one-page HTML report of a result, atomically.

    Parameters
    ----------
    source : path or result data
        See :func:`report_html`.
    path : path-like, optional
        Output file (default :func:`default_report_path` of ``source`` when
        it is a path).
    name, line, figures, dpi
        See :func:`report_html`.

    Returns
    -------
    Path
        The written file.

    Raises
    ------
    InputError
        No output path for an in-memory result, or the output path is the
        result file itself.
    DataFileError
        The result cannot be read or the report cannot be written.
    """
    if path is None:
        if not isinstance(source, (str, os.PathLike)):
            raise InputError("give the report's output path (the result is not a file)")
        path = default_report_path(source)
    out = Path(path)
    if isinstance(source, (str, os.PathLike)) and out.exists() and Path(source).exists() \
            and os.path.samefile(out, source):                      # the same file, also through links
        raise InputError(f"the report path {out} is the result file itself; choose another --out")
    if out.suffix.lower() not in (".html", ".htm"):
        raise InputError(f"the report is an HTML page: give a .html path, got {out.name}")
    text = report_html(source, name=name, line=line, figures=figures, dpi=dpi)
    try:
        with atomic_path(out) as tmp:
            Path(tmp).write_text(text, encoding="utf-8")
    except DataFileError:
        raise
    except OSError as exc:
        raise DataFileError(f"cannot write {out}: {exc.strerror or exc}") from None
    return out
