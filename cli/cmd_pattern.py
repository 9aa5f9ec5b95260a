"""``bos pattern``: a printable (or displayable) background at true physical scale."""

from __future__ import annotations

import dataclasses
import secrets
from pathlib import Path
from typing import Any, Optional

import typer

from cli._common import emit_json, handle_errors

# rig options, spelled as in ``bos plan`` (option name -> experiment-file key)
RIG_OPTIONS = ("focal_length_mm", "pixel_um", "f_number", "camera_to_background_m",
               "object_to_background_m", "camera_to_object_m")


def build_rig(experiment_file: Path | None, options: dict[str, Any]):
    """The rig from the experiment file and/or the rig options, or None if neither is given."""
    from bos.config import load_experiment
    from cli.cmd_plan import DISTANCES, OVERRIDES

    given = {k: options[k] for k in RIG_OPTIONS if options.get(k) is not None}
    if experiment_file is None and not given:
        return None
    exp = load_experiment(experiment_file, overrides={OVERRIDES[k]: v for k, v in given.items()})
    geo = exp.geometry
    dist = {key: getattr(geo, key) for _, key in DISTANCES}
    for opt, key in DISTANCES:  # a distance named on the command line wins over the file's others
        if sum(v is not None for v in dist.values()) > 2 and opt not in given:
            dist[key] = None
    exp = dataclasses.replace(exp, geometry=dataclasses.replace(geo, **dist))
    return exp.rig()


def register(app: typer.Typer) -> None:
    @app.command("pattern")
    @handle_errors
    def pattern_command(
        out: Path = typer.Argument(..., help="output file: .pdf (vector), .png or .tif/.tiff (raster)"),
        experiment_file: Optional[Path] = typer.Argument(
            None, help="experiment TOML file: the rig (camera, geometry) sets or checks the dot size"),
        paper: Optional[str] = typer.Option(None, help="A4, A3, A2, A1, A0, letter or WxH-mm (default A4)"),
        landscape: bool = typer.Option(False, "--landscape", help="long side horizontal"),
        dot_diameter_mm: Optional[float] = typer.Option(
            None, help="dot diameter [mm] (default: dots imaging at --target-dot-px for the rig)"),
        fill: float = typer.Option(0.4, help="dark fraction of the patterned area (0-1; <= 0.45 non-overlapping; noise: mean darkness)"),
        seed: Optional[int] = typer.Option(None, help="random seed (default: a fresh one, printed in the footer)"),
        dpi: float = typer.Option(600.0, help="printer resolution [dpi]; raster resolution of PNG/TIFF"),
        kind: str = typer.Option("dots", help="dots (random dots) or noise (grey multi-scale noise)"),
        poisson: bool = typer.Option(False, "--poisson", help="overlapping dots at Poisson-random positions"),
        soft: bool = typer.Option(False, "--soft", help="soft-edged dots (dots only; noise is always grey)"),
        octaves: int = typer.Option(4, help="noise scales, each twice the previous, from the dot diameter up"),
        screen: Optional[str] = typer.Option(None, help="display background instead of paper: WxH-px"),
        screen_pitch_mm: Optional[float] = typer.Option(None, help="display pixel pitch [mm] (with --screen)"),
        target_dot_px: float = typer.Option(2.5, help="dot image size on the sensor [px] when sized from the rig"),
        focal_length_mm: Optional[float] = typer.Option(None, help="rig: lens focal length [mm]"),
        pixel_um: Optional[float] = typer.Option(None, "--pixel-pitch-um", "--pixel-um",
                                                 help="rig: sensor pixel pitch [µm]"),
        f_number: Optional[float] = typer.Option(None, help="rig: lens f-number N"),
        camera_to_background_m: Optional[float] = typer.Option(None, help="rig: Z_B, lens to background [m]"),
        object_to_background_m: Optional[float] = typer.Option(None, help="rig: Z_D, object to background [m]"),
        camera_to_object_m: Optional[float] = typer.Option(None, help="rig: Z_A, lens to object [m]"),
        json_out: bool = typer.Option(False, "--json", help="print machine-readable JSON"),
    ) -> None:
        """Write a random-dot or multi-scale noise background at true physical scale, with a 100 mm
        ruler, scale bar, corner markers and a footer (parameters, seed) outside the patterned area.
        Print it at 100 % / "actual size" and check the ruler."""
        from bos.errors import InputError
        from bos.pattern import dot_diameter_for_rig, make_spec, parse_paper, parse_screen, write_pattern

        rig = build_rig(experiment_file, dict(locals()))
        if dot_diameter_mm is None:
            if rig is None:
                raise InputError("give --dot-diameter-mm, or a rig (experiment file or --focal-length-mm, "
                                 "--pixel-pitch-um and two distances) to size the dots")
            dot_diameter_mm = dot_diameter_for_rig(rig, target_px=target_dot_px) * 1e3
        if screen is not None:
            if paper is not None:
                raise InputError("give either --paper or --screen, not both")
            if screen_pitch_mm is None:
                raise InputError("--screen needs --screen-pitch-mm (the display's pixel pitch)")
            page, name, screen_px = None, "screen", parse_screen(screen)
        else:
            if screen_pitch_mm is not None:
                raise InputError("--screen-pitch-mm needs --screen")
            name, w, h = parse_paper(paper or "A4", landscape=landscape)
            page, screen_px = (w, h), None
        if seed is None:
            seed = secrets.randbelow(2**31)
        spec, warnings = make_spec(page_mm=page, paper=name, dot_diameter_mm=dot_diameter_mm, fill=fill, seed=seed,
                                   dpi=dpi, kind=kind, poisson=poisson, soft=soft, octaves=octaves,
                                   screen_px=screen_px, screen_pitch_mm=screen_pitch_mm, rig=rig)
        result = write_pattern(out, spec)
        if json_out:
            emit_json({
                "path": str(result.path), "format": result.format, "paper": spec.paper,
                "page_mm": list(result.page_mm), "area_mm": list(result.area_mm),
                "raster_px": None if result.raster_shape is None else list(result.raster_shape[::-1]),
                "dpi": result.dpi, "kind": spec.kind, "poisson": spec.poisson, "soft": spec.soft,
                "dot_diameter_mm": result.dot_diameter_mm, "fill": result.fill, "seed": result.seed,
                "n_dots": result.n_dots, "bytes": result.bytes, "ruler_mm": result.ruler_mm,
                "imaged_dot_px": None if rig is None else dot_diameter_mm * 1e-3 / rig.background_pixel_m,
                "warnings": warnings})
        else:
            for w in warnings:
                typer.echo(f"warning: {w}", err=True)
            size = (f"{result.raster_shape[1]} x {result.raster_shape[0]} px at {result.dpi:.4g} dpi"
                    if result.raster_shape else f"{result.page_mm[0]:g} x {result.page_mm[1]:g} mm")
            dots = f"{result.n_dots} dots, " if result.n_dots is not None else ""
            typer.echo(f"wrote {result.path} ({result.format}, {spec.paper}, {size}, {dots}"
                       f"{result.bytes / 1e6:.3g} MB): {spec.describe()}")
            typer.echo(f"print at 100 % / actual size and check that the ruler measures {result.ruler_mm:g} mm"
                       if screen_px is None else "show at 100 % (one image pixel per screen pixel)")
