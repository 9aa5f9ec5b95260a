"""``bos knife-edge``: calibrate a knife-edge picture; ``bos virtual-knife-edge``: render one from a BOS result."""

from __future__ import annotations

from pathlib import Path
from typing import Any, Optional

import typer

from cli._common import emit_json, handle_errors, print_notes

#: Light sources usual on knife-edge rigs (cautions shown when --illumination is not given).
KNIFE_EDGE_SOURCES = ("strobe", "high-power-led", "arc-lamp")


def knife_edge_cautions(illumination: Optional[str]) -> list[str]:
    """Safety cautions for a knife-edge rig (bos.safety), ending with the deferral to local codes."""
    from bos.safety import cautions_for

    kinds = KNIFE_EDGE_SOURCES if illumination is None else (illumination,)
    out: list[str] = []
    for kind in kinds:
        for c in cautions_for("none", kind):
            if c not in out:
                out.append(c)
    # the deferral to local codes last
    out.sort(key=lambda c: c.startswith("These notes are reminders"))
    return out


def print_cautions(cautions: list[str]) -> None:
    from rich.console import Console
    from rich.markup import escape

    console = Console()
    for c in cautions:
        console.print(f"[red]caution:[/] {escape(c)}", highlight=False)
    console.print("safety notes: docs/safety.md, docs/knife-edge.md", highlight=False, markup=False)


def _pair(text: str, what: str) -> tuple[float, float]:
    from bos.errors import InputError

    try:
        a, b = (float(v) for v in text.replace(";", ",").split(","))
    except ValueError:
        raise InputError(f"{what} must be ROW,COL in pixels, got {text!r}") from None
    return a, b


def _lens_or_optics(center, radius, focal, focal_sigma, f2, height_mm, cutoff):
    from bos.errors import InputError
    from bos.schlieren import CalibrationLens, SchlierenOptics

    lens_given = [v is not None for v in (center, radius, focal)]
    optics_given = [v is not None for v in (f2, height_mm)]
    if any(lens_given) and any(optics_given):
        raise InputError("give either the calibration lens (--lens-*) or the optical parameters "
                         "(--schlieren-focal-length-m, --source-image-height-mm), not both")
    if any(lens_given):
        if not all(lens_given):
            raise InputError("a calibration lens needs --lens-center-px ROW,COL, --lens-radius-px and "
                             "--lens-focal-length-m")
        return CalibrationLens(center_px=_pair(center, "--lens-center-px"), radius_px=radius, focal_length_m=focal,
                               sigma_focal_length_m=focal_sigma or 0.0), None
    if any(optics_given):
        if not all(optics_given):
            raise InputError("the optical parameters need both --schlieren-focal-length-m and "
                             "--source-image-height-mm (plus --cutoff)")
        return None, SchlierenOptics(focal_length_m=f2, source_image_height_m=height_mm * 1e-3, cutoff=cutoff)
    raise InputError("no calibration: give a calibration lens (--lens-center-px, --lens-radius-px, "
                     "--lens-focal-length-m) or the optical parameters (--schlieren-focal-length-m, "
                     "--source-image-height-mm, --cutoff)")


def _calibration_plot(res, path: Path) -> Path:
    import numpy as np
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    from bos._io import atomic_path

    fit = res.fit
    fig = Figure(figsize=(6.0, 4.0), layout="constrained")
    FigureCanvasAgg(fig)
    ax = fig.subplots()
    lo, hi = fit.calibrated_range_rad
    span = max(abs(lo), abs(hi), float(np.max(np.abs(fit.eps_bins))) if fit.eps_bins.size else 0.0) * 1.3
    e = np.linspace(-span, span, 400)
    if fit.eps_bins.size:
        ax.plot(fit.eps_bins * 1e6, fit.ratio_bins, "o", ms=4, label="lens data (bin medians)")
    ax.plot(e * 1e6, fit.ratio(e), "-", label=f"{fit.law} response")
    ax.axvspan(lo * 1e6, hi * 1e6, color="tab:green", alpha=0.12, label="calibrated range")
    ax.set_xlabel("deflection normal to the knife [µrad]")
    ax.set_ylabel("picture / no-flow picture")
    ax.grid(True, alpha=0.3)
    ax.legend(loc="best", fontsize="small")
    ax.set_title(f"knife-edge response ({res.orientation.label} knife, {fit.method})")
    with atomic_path(path) as tmp:
        fig.savefig(tmp, dpi=110, format="png")
    return path


def _print_summary(summary: dict[str, Any], files: list[Path]) -> None:
    from rich.console import Console
    from rich.table import Table

    def num(v, fmt):
        return "-" if v is None else format(float(v), fmt)

    console = Console()
    t = Table(title="bos knife-edge", header_style="bold")
    for col in ("quantity", "value", "unit"):
        t.add_column(col)
    lo, hi = summary["calibrated_range_rad"]
    rows = [
        ("calibration", f"{summary['method']}, {summary['law']} law", ""),
        ("knife edge angle", num(summary["knife_angle_deg"], "g"), "deg"),
        ("sensitivity dR/d eps", f"{summary['sensitivity_per_rad']:.5g} ± {summary['sigma_sensitivity_per_rad']:.2g}",
         "1/rad"),
        ("fit residual (rms)", num(summary["fit_residual_rms_rad"], ".3g"), "rad"),
        ("calibrated range", f"{lo:.4g} ... {hi:.4g}", "rad"),
        ("saturates at (dark / bright)", f"{num(summary['dark_saturation_rad'], '.4g')} / "
                                         f"{num(summary['bright_saturation_rad'], '.4g')}", "rad"),
        ("ratio noise (1 sigma)", num(summary["noise_ratio"], ".3g"), ""),
        ("dark saturated", f"{100 * summary['dark_saturated_fraction']:.1f}", "%"),
        ("bright saturated", f"{100 * summary['bright_saturated_fraction']:.1f}", "%"),
        ("outside calibrated range", f"{100 * summary['uncalibrated_fraction']:.1f}", "%"),
        ("deflection min / max", f"{num(summary['min_deflection_rad'], '.4g')} / "
                                 f"{num(summary['max_deflection_rad'], '.4g')}", "rad"),
        ("median uncertainty", num(summary["median_uncertainty_rad"], ".3g"), "rad"),
    ]
    for r in rows:
        t.add_row(*r)
    console.print(t)
    print_notes(console, warnings=summary.get("warnings"), files=files)


def register(app: typer.Typer) -> None:
    @app.command("knife-edge")
    @handle_errors
    def knife_edge(
        image: Path = typer.Argument(..., help="knife-edge picture with flow"),
        no_flow: Optional[Path] = typer.Option(None, "--no-flow", help="no-flow picture (same rig and knife setting)"),
        knife: Optional[str] = typer.Option(None, "--knife", help="knife edge: vertical, horizontal or the edge angle "
                                            "in degrees (counter-clockwise from horizontal on the screen)"),
        object_pixel_mm: Optional[float] = typer.Option(None, "--object-pixel-mm",
                                                        help="size of one picture pixel in the object plane (mm)"),
        out: Optional[Path] = typer.Option(None, "--out", help="output result file (netCDF-4; .nc added when the name has no suffix)"),
        lens_center_px: Optional[str] = typer.Option(None, "--lens-center-px", help="calibration lens centre ROW,COL (px)"),
        lens_radius_px: Optional[float] = typer.Option(None, "--lens-radius-px", help="calibration lens radius (px)"),
        lens_focal_length_m: Optional[float] = typer.Option(
            None, "--lens-focal-length-m", help="calibration lens focal length (m; negative for a diverging lens)"),
        lens_focal_length_sigma_m: Optional[float] = typer.Option(
            None, "--lens-focal-length-sigma-m", help="1-sigma uncertainty of the lens focal length (m)"),
        schlieren_focal_length_m: Optional[float] = typer.Option(
            None, "--schlieren-focal-length-m", help="focal length f2 of the schlieren-head mirror/lens (m)"),
        source_image_height_mm: Optional[float] = typer.Option(
            None, "--source-image-height-mm", help="full height of the source image at the knife, normal to the edge (mm)"),
        cutoff: float = typer.Option(0.5, "--cutoff", help="fraction of the source image blocked with no flow (0-1)"),
        law: str = typer.Option("auto", "--law", help="lens response law: auto, linear or clipped"),
        linearize: bool = typer.Option(False, "--linearize", help="decode the sRGB curve of 8-bit gamma-encoded pictures"),
        plot: Optional[Path] = typer.Option(None, "--plot", help="also write the response curve figure (PNG)"),
        illumination: Optional[str] = typer.Option(
            None, "--illumination", help="light source for the safety notes (strobe, flash, high-power-led, arc-lamp, "
                                         "laser, led ...)"),
        as_json: bool = typer.Option(False, "--json", help="print the calibration summary as JSON"),
    ) -> None:
        """Calibrate a knife-edge picture to the deflection normal to the knife (calibration lens or optics)."""
        from bos import store
        from bos.errors import InputError
        from bos.images import read_image
        from bos.schlieren import calibrate_knife_edge, knife_edge_variables, knife_orientation
        from bos.provenance import jsonable
        from cli.cmd_export import refuse_overwriting_input

        if no_flow is None:
            raise InputError("no-flow picture missing: give --no-flow IMAGE")
        orient = knife_orientation(knife)
        if object_pixel_mm is None:
            raise InputError("object pixel size missing: give --object-pixel-mm")
        if out is None:
            raise InputError("output file missing: give --out FILE.nc")
        if not out.suffix:
            out = out.with_suffix(".nc")
        cautions = knife_edge_cautions(illumination)
        lens, optics = _lens_or_optics(lens_center_px, lens_radius_px, lens_focal_length_m, lens_focal_length_sigma_m,
                                       schlieren_focal_length_m, source_image_height_mm, cutoff)
        refuse_overwriting_input(out, image, no_flow)
        import warnings as _w

        with _w.catch_warnings(record=True) as caught:
            _w.simplefilter("always")
            pic = read_image(image, linearize=linearize)
            ref = read_image(no_flow, linearize=linearize)
        full_scale = None if 32 in (pic.bit_depth, ref.bit_depth) else 1.0
        res = calibrate_knife_edge(pic.data, ref.data, knife=orient, object_pixel_m=object_pixel_mm * 1e-3, lens=lens,
                                   optics=optics, law=law, full_scale=full_scale)
        res.warnings += [" ".join(str(w.message).split()) for w in caught]
        if optics is not None and max(pic.bit_depth, ref.bit_depth) == 8 and not linearize:
            res.warnings.append("8-bit pictures are usually gamma-encoded: the contrast law assumes pixel values "
                                "proportional to light (use --linearize, or a calibration lens)")
        coords, variables, attrs = knife_edge_variables(res)
        from bos import __version__ as version

        attrs.update({"software": "bos-toolkit", "software_version": version,
                      "inputs": {"picture": str(image), "no_flow": str(no_flow)},
                      "input_sha256": {"picture": store.file_sha256(image), "no_flow": store.file_sha256(no_flow)},
                      "cautions": cautions, "Conventions": "CF-1.8"})
        from bos.output import prepare_output_dir

        prepare_output_dir(out.parent if str(out.parent) else Path("."))
        files = [store.write_result(out, coords=coords, variables=variables, attrs=jsonable(attrs),
                                    history=f"bos knife-edge {image} --no-flow {no_flow}")]
        if plot is not None:
            files.append(_calibration_plot(res, plot))
        summary = res.summary()
        if as_json:
            emit_json(jsonable({"summary": summary, "calibration": res.calibration_attrs(), "cautions": cautions,
                                "files": [str(f) for f in files]}))
        else:
            _print_summary(summary, files)
            print_cautions(cautions)

    @app.command("virtual-knife-edge")
    @handle_errors
    def virtual_knife_edge(
        result: Path = typer.Argument(..., help="BOS result file (.nc) with deflection_y, deflection_x"),
        out: Optional[Path] = typer.Option(None, "--out", help="output directory (default: beside the result)"),
        name: Optional[str] = typer.Option(None, "--name", help="base name of the PNGs (default: the result's name)"),
        knife: list[str] = typer.Option(["vertical", "horizontal"], "--knife",
                                        help="knife edge (repeatable): vertical, horizontal or an angle in degrees"),
        cutoff: float = typer.Option(0.5, "--cutoff", help="fraction of the source image blocked (0-1)"),
        range_urad: Optional[float] = typer.Option(
            None, "--range-urad", help="deflection a/f2 that fully darkens the picture (µrad); default: 99th "
                                       "percentile of |deflection|"),
        as_json: bool = typer.Option(False, "--json", help="print the written files as JSON"),
    ) -> None:
        """Render knife-edge-like pictures (any knife, circular cutoff, colour by direction) from a BOS result."""
        from bos import store
        from bos.schlieren.virtual import auto_cutoff_deflection, write_virtual_views

        from bos._io import output_set_members
        from bos.errors import InputError

        data = store.read_result(result)
        d = out if out is not None else result.parent
        base = name or result.stem
        owned = {f: s for f, s in output_set_members(d).items()
                 if f.startswith(f"{base}-knife-") or f in (f"{base}-circular.png", f"{base}-colour.png",
                                                             f"{base}-colour-key.png")}
        if owned:
            f, s = sorted(owned.items())[0]
            raise InputError(f"{d / f} belongs to the output set of run '{s}' (its manifest {s}-run.json): "
                             "give --name or --out so the run's files are not overwritten")
        ec = range_urad * 1e-6 if range_urad is not None else None
        if ec is None and "deflection_y" in data.variables and "deflection_x" in data.variables:
            ec = auto_cutoff_deflection(data.variables["deflection_y"].data, data.variables["deflection_x"].data)
        files = write_virtual_views(data, d, base, knife_angle_deg=list(knife), cutoff=cutoff,
                                    cutoff_deflection_rad=ec)
        if as_json:
            emit_json({"cutoff_deflection_rad": ec, "cutoff": cutoff, "files": [str(f) for f in files]})
        else:
            typer.echo(f"cutoff deflection a/f2 = {ec * 1e6:.4g} µrad, cutoff fraction {cutoff:g}")
            for f in files:
                typer.echo(f"  {f}")
