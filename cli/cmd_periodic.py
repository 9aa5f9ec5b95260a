"""``bos periodic``: phase-resolved BOS of a periodic sound field -> pressure amplitude, phase and SPL maps."""

from __future__ import annotations

import contextlib
import sys
from pathlib import Path
from typing import Any, Optional

import typer

from cli._common import emit_json, handle_errors, print_notes


def _frames(options: dict[str, Any], exp):
    from bos.errors import InputError
    from bos.periodic_output import (
        frames_from_list,
        frames_from_table,
        read_frame_table,
    )

    phases, frames = options["phases"], options["frames"]
    f, rate = exp.source.frequency_hz, options["frame_rate_hz"]
    if phases is None and frames is None:
        raise InputError("give the frames and their phases: --phases PHASES.csv (columns frame,phase_deg), or "
                         "--frames (a CSV with a frame column, or a multi-frame file) with --frame-rate-hz")
    if frames is None:
        if "frame" not in read_frame_table(phases):
            raise InputError(f"{Path(phases).name} has no frame column: add one (frame,phase_deg) or give --frames")
        return frames_from_table(phases, frequency_hz=f, frame_rate_hz=rate)
    return frames_from_list(frames, phases_csv=phases, frequency_hz=f, frame_rate_hz=rate)


def _print(summary: dict[str, Any], cautions: list[str], files: list[Path]) -> None:
    from rich.console import Console
    from rich.markup import escape
    from rich.table import Table

    console = Console()
    t = Table(title="bos periodic: first harmonic of the sound field", header_style="bold")
    t.add_column("quantity")
    t.add_column("value", justify="right")

    def num(key, fmt, scale=1.0, unit=""):
        v = summary.get(key)
        return "-" if v is None else f"{format(v * scale, fmt)}{unit}"

    from bos.acoustics import SWR_CAP

    v = float(summary["standing_wave_ratio"])
    swr = f"≥ {SWR_CAP:.0f}" if v >= SWR_CAP else f"{v:.3g}"
    rows = [
        ("frames / distinct phases", f"{summary['frames']} / {summary['distinct_phases']} ({summary['phase_origin']})"),
        ("peak displacement amplitude", num("peak_displacement_amplitude_px", ".4f", unit=" px")),
        ("median amplitude uncertainty", num("median_displacement_amplitude_uncertainty_px", ".4f", unit=" px")),
        ("peak pressure amplitude", num("peak_pressure_amplitude_pa", ".4g", unit=" Pa")),
        ("peak SPL (rms, 1st harmonic)", num("peak_sound_pressure_level_db", ".1f", unit=" dB")),
        ("median SPL uncertainty in the beam", num("median_spl_uncertainty_db_in_beam", ".2f", unit=" dB")),
        ("wavelength c/f | measured", f"{num('wavelength_expected_m', '.4g', 1e3)} | "
                                       f"{num('wavelength_measured_m', '.4g', 1e3)} mm"),
        ("standing-wave ratio along the beam", f"{swr} ({summary['wave_kind']})"),
        ("nodes along the beam (x, y) mm", "; ".join(f"{n['x_m'] * 1e3:.2f}, {n['y_m'] * 1e3:.2f}"
                                                     for n in summary["nodes"]) or "-"),
        ("antinodes: SPL dB", "; ".join(f"{a['spl_db']:.1f}" for a in summary["antinodes"]) or "-"),
    ]
    for label, value in rows:
        t.add_row(label, value)
    console.print(t)
    for n in summary.get("phase_notes") or []:
        console.print(f"note: {escape(n)}", highlight=False)
    print_notes(console, warnings=summary.get("warnings"), cautions=cautions, files=files)


def register(app: typer.Typer) -> None:
    @app.command("periodic")
    @handle_errors
    def periodic(
        experiment: Path = typer.Argument(..., help="experiment TOML file (rig, medium, reference image, reconstruction)"),
        phases: Optional[Path] = typer.Option(None, "--phases", help="CSV with columns frame,phase_deg (paths relative "
                                                                     "to the CSV); or phase_deg only with --frames"),
        frames: Optional[Path] = typer.Option(None, "--frames", help="frames: a CSV with a frame column (optional "
                                                                     "time_s) or a multi-frame TIFF/video"),
        frame_rate_hz: Optional[float] = typer.Option(None, "--frame-rate-hz", help="camera frame rate (phases from "
                                                                                    "aliasing with the source frequency)"),
        frequency_hz: Optional[float] = typer.Option(None, "--frequency-hz", help="source frequency (Hz; default "
                                                                                  "source.frequency_hz)"),
        harmonics: int = typer.Option(1, "--harmonics", help="harmonics fitted per pixel (the first is reconstructed)"),
        out: Optional[Path] = typer.Option(None, "--out", help="output directory"),
        name: Optional[str] = typer.Option(None, "--name", help="base name (files <name>-periodic.*)"),
        no_figures: bool = typer.Option(False, "--no-figures", help="skip the figures and the animation"),
        as_json: bool = typer.Option(False, "--json", help="print the summary as JSON"),
    ) -> None:
        """Phase-resolved sound field: lock-in fit over the phases, complex pressure reconstruction,
        pressure amplitude/phase/SPL maps with uncertainties, standing-wave ratio, nodes and antinodes."""
        from bos.config import load_experiment
        from bos.output import prepare_output_dir
        from bos.periodic_output import periodic_paths, run_periodic, save_periodic
        from bos.provenance import jsonable

        overrides = {"output.directory": None if out is None else str(Path(out).expanduser().resolve()),
                     "output.name": name, "output.figures": False if no_figures else None,
                     "source.frequency_hz": frequency_hz}
        exp = load_experiment(experiment, overrides=overrides)
        frame_set = _frames({"phases": phases, "frames": frames, "frame_rate_hz": frame_rate_hz}, exp)
        out_dir = periodic_paths(exp)["result"].parent
        created = not out_dir.exists()
        prepare_output_dir(out_dir)
        try:
            if as_json or not sys.stderr.isatty():  # progress bars only on a terminal
                result = run_periodic(exp, frame_set, harmonics=harmonics)
            else:
                from cli.cmd_run import make_progress

                progress, callback = make_progress()
                with progress:
                    callback("read images", 1.0)
                    result = run_periodic(exp, frame_set, harmonics=harmonics, progress=callback)
            files = save_periodic(result, exp)
        except BaseException:
            if created:
                with contextlib.suppress(OSError):
                    out_dir.rmdir()
            raise
        cautions = result.reference_run.attrs.get("cautions", [])
        if as_json:
            emit_json({"summary": jsonable(result.summary), "cautions": cautions, "files": [str(f) for f in files]})
        else:
            _print(result.summary, cautions, files)
        sys.stdout.flush()
