"""``bos run``: one reference + one measurement image -> all stages -> HDF5 + figures."""

from __future__ import annotations

import contextlib
import math
import sys
from pathlib import Path
from typing import Any, Optional

import typer

from cli._common import emit_json, handle_errors

KINDS = ("planar", "axisymmetric", "none")

# Rows of the terminal summary: (summary key, label, unit, format).
SUMMARY_ROWS = (
    ("peak_displacement_px", "peak |displacement|", "px", ".3f"),
    ("valid_fraction", "valid vectors", "%", "pct"),
    ("masked_fraction", "masked (user)", "%", "pct"),
    ("invalid_fraction", "invalid (rejected)", "%", "pct"),
    ("median_uncertainty_px", "median displacement uncertainty", "px", ".4f"),
    ("camera_shift_px", "camera shift removed (dy, dx)", "px", "pair"),
    ("min_density_kg_m3", "min density", "kg/m³", ".5f"),
    ("max_density_kg_m3", "max density", "kg/m³", ".5f"),
    ("min_temperature_k", "min temperature", "K", ".2f"),
    ("max_temperature_k", "max temperature", "K", ".2f"),
    ("peak_temperature_rise_k", "peak temperature rise", "K", ".2f"),
    ("median_temperature_uncertainty_k", "median temperature uncertainty", "K", ".3f"),
    ("peak_acoustic_pressure_pa", "peak acoustic pressure", "Pa", ".1f"),
    ("peak_sound_pressure_level_db", "peak sound level (sine)", "dB re 20 µPa", ".1f"),
)


def _fmt(value: Any, fmt: str) -> str:
    if value is None:
        return "-"
    if fmt == "pair":
        return ", ".join(f"{float(v):+.3f}" for v in value)
    if isinstance(value, float) and not math.isfinite(value):
        return "-"
    if fmt == "pct":
        return f"{100.0 * float(value):.1f}"
    return format(float(value), fmt)


def print_summary(summary: dict[str, Any], *, title: str, files: list[Path] | None = None) -> None:
    """Print the run summary as a table (stdout), then warnings and files."""
    from rich.console import Console
    from rich.markup import escape
    from rich.table import Table

    console = Console()
    table = Table(title=title, show_header=True, header_style="bold")
    table.add_column("quantity")
    table.add_column("value", justify="right")
    table.add_column("unit")
    for key, label, unit, fmt in SUMMARY_ROWS:
        if key in summary:
            table.add_row(label, _fmt(summary[key], fmt), unit)
    console.print(table)
    for w in summary.get("warnings") or []:
        console.print(f"[yellow]warning:[/] {escape(str(w))}", highlight=False)
    for c in summary.get("cautions") or []:
        console.print(f"[red]caution:[/] {escape(str(c))}", highlight=False)
    if summary.get("cautions"):
        console.print("safety notes: docs/safety.md", highlight=False, markup=False)
    if files:
        console.print("written:", highlight=False)
        for f in files:
            console.print(f"  {escape(str(f))}", highlight=False, soft_wrap=True)


def make_progress():
    """A rich progress callback on stderr for ``run_experiment`` (and a context to close it)."""
    from rich.console import Console
    from rich.progress import BarColumn, Progress, SpinnerColumn, TextColumn, TimeElapsedColumn

    from bos.pipeline import STAGES

    progress = Progress(SpinnerColumn(), TextColumn("{task.description}"), BarColumn(), TimeElapsedColumn(),
                        console=Console(stderr=True), transient=True)
    tasks: dict[str, Any] = {}

    def callback(stage: str, fraction: float) -> None:
        if stage not in tasks:
            tasks[stage] = progress.add_task(stage, total=1.0)
        progress.update(tasks[stage], completed=fraction)

    for stage in STAGES:
        callback(stage, 0.0)
    return progress, callback


def run_and_save(exp, *, quiet: bool = False):
    """Run the pipeline with a progress bar (unless ``quiet``) and save; return (result, files)."""
    from bos import pipeline

    out_dir = pipeline.output_paths(exp)["result"].parent
    created = not out_dir.exists()
    pipeline.prepare_output_dir(out_dir)  # fail fast on an unwritable output before the long work
    # progress bars only on a terminal: piped stderr keeps exactly the one-line error on failure
    quiet = quiet or not sys.stderr.isatty()
    try:
        if quiet:
            result = pipeline.run_experiment(exp)
        else:
            progress, callback = make_progress()
            with progress:
                result = pipeline.run_experiment(exp, progress=callback)
        files = pipeline.save_run(result, exp)
    except BaseException:
        if created:  # leave no empty output directory behind after a failed run
            with contextlib.suppress(OSError):
                out_dir.rmdir()
        raise
    return result, files


def _abs(path: Optional[Path]) -> Optional[str]:
    return None if path is None else str(Path(path).expanduser().resolve())


def register(app: typer.Typer) -> None:
    @app.command("run")
    @handle_errors
    def run(
        experiment: Optional[Path] = typer.Argument(
            None, help="experiment TOML file (options below override it; without a file the options describe the run)"),
        reference: Optional[Path] = typer.Option(None, "--reference", help="reference image (no flow)"),
        measurement: Optional[Path] = typer.Option(None, "--measurement", help="measurement image (with flow)"),
        mask: Optional[Path] = typer.Option(None, "--mask", help="mask image, nonzero = no data"),
        out: Optional[Path] = typer.Option(None, "--out", help="output directory"),
        name: Optional[str] = typer.Option(None, "--name", help="base name of the output files"),
        method: Optional[str] = typer.Option(None, "--method", help="displacement estimator (correlation, flow)"),
        window_px: Optional[int] = typer.Option(None, "--window-px", help="first-pass interrogation window (px)"),
        final_window_px: Optional[int] = typer.Option(None, "--final-window-px", help="final interrogation window (px)"),
        passes: Optional[int] = typer.Option(None, "--passes", help="number of correlation passes"),
        overlap: Optional[float] = typer.Option(None, "--overlap", help="window overlap fraction (0-0.9)"),
        kind: Optional[str] = typer.Option(None, "--kind", help="reconstruction: planar, axisymmetric or none"),
        axis_px: Optional[float] = typer.Option(None, "--axis-px", help="symmetry-axis position (px) (axisymmetric)"),
        width_mm: Optional[float] = typer.Option(None, "--width-mm", help="object width along the line of sight (mm)"),
        focal_length_mm: Optional[float] = typer.Option(None, "--focal-length-mm", help="lens focal length (mm)"),
        pixel_pitch_um: Optional[float] = typer.Option(None, "--pixel-pitch-um", "--pixel-um", help="sensor pixel pitch (um)"),
        f_number: Optional[float] = typer.Option(None, "--f-number", help="lens f-number"),
        camera_to_object_m: Optional[float] = typer.Option(None, "--camera-to-object-m", help="Z_A (m)"),
        object_to_background_m: Optional[float] = typer.Option(None, "--object-to-background-m", help="Z_D (m)"),
        camera_to_background_m: Optional[float] = typer.Option(None, "--camera-to-background-m", help="Z_B (m)"),
        gas: Optional[str] = typer.Option(None, "--gas", help="gas name (air, co2, he ...)"),
        temperature_c: Optional[float] = typer.Option(None, "--temperature-c", help="ambient temperature (degC)"),
        pressure_pa: Optional[float] = typer.Option(None, "--pressure-pa", help="static pressure (Pa)"),
        no_figures: bool = typer.Option(False, "--no-figures", help="skip the figures"),
        as_json: bool = typer.Option(False, "--json", help="print the summary as JSON"),
    ) -> None:
        """Process one image pair: displacement, deflection, density, temperature -> HDF5 + figures."""
        from bos.config import load_experiment
        from bos.pipeline import jsonable

        overrides = {
            "images.reference": _abs(reference),
            "images.measurement": _abs(measurement),
            "images.mask": _abs(mask),
            "output.directory": _abs(out),
            "output.name": name,
            "output.figures": False if no_figures else None,
            "processing.method": method,
            "processing.window_px": window_px,
            "processing.final_window_px": final_window_px,
            "processing.passes": passes,
            "processing.overlap": overlap,
            "reconstruction.kind": kind,
            "reconstruction.axis_px": axis_px,
            "geometry.object_width_mm": width_mm,
            "camera.focal_length_mm": focal_length_mm,
            "camera.pixel_pitch_um": pixel_pitch_um,
            "camera.f_number": f_number,
            "geometry.camera_to_object_m": camera_to_object_m,
            "geometry.object_to_background_m": object_to_background_m,
            "geometry.camera_to_background_m": camera_to_background_m,
            "medium.gas": gas,
            "medium.temperature_c": temperature_c,
            "medium.pressure_pa": pressure_pa,
        }
        exp = load_experiment(experiment, overrides=overrides)
        result, files = run_and_save(exp, quiet=as_json)
        summary = dict(result.summary, cautions=result.attrs.get("cautions", []))
        if as_json:
            emit_json({"summary": jsonable(summary), "files": [str(f) for f in files]})
        else:
            print_summary(summary, title=f"bos run: {exp.output.name}", files=files)
