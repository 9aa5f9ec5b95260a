"""``bos run``: one reference + one measurement image -> all stages -> HDF5 + figures."""

from __future__ import annotations

import contextlib
import math
import sys
from pathlib import Path
from typing import Any, Optional

import typer

from cli._common import (abs_path, choices, emit_json, handle_errors, key_option, key_overrides, parse_composition,
                         parse_polygons, parse_profile, parse_region, print_notes)

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


def context_lines(summary: dict[str, Any]) -> list[str]:
    """Where the camera motion was fitted and whether the ambient region is ambient (plain text)."""
    out = []
    cm = summary.get("camera_motion")
    if cm:
        rms = cm.get("residual_rms_px") or [float("nan")] * 2
        out.append(f"camera motion fitted on the {cm.get('region')}: {cm.get('used_vectors')} of "
                   f"{cm.get('candidate_vectors')} vectors used ({100 * float(cm.get('excluded_fraction') or 0):.0f} % "
                   f"left out as flow), residual rms (dy, dx) {float(rms[0]):.4f}, {float(rms[1]):.4f} px"
                   + ("" if cm.get("consistent", True) else " -- NOT consistent with one rigid motion"))
    rr = summary.get("reference_region")
    if rr:
        state = "ambient (no signal beyond the noise)" if rr.get("ambient") else "NOT ambient"
        out.append(f"reference region {rr.get('region')}: {state}")
    return out


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
    for line in context_lines(summary):
        console.print(escape(line), highlight=False)
    print_notes(console, warnings=summary.get("warnings"), cautions=summary.get("cautions"))
    if summary.get("cautions"):
        console.print("safety notes: docs/safety.md", highlight=False, markup=False)
    print_notes(console, files=files)


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


def preload_when_estimating(*, figures: bool = True, direct_solver: bool = False):
    """A progress callback that starts background imports when the displacement stage starts:
    :func:`bos.plots.preload_matplotlib` (``figures``) and the direct Poisson solver's compiled
    kernels (``direct_solver``, :func:`bos.reconstruct.poisson.preload_direct_solver`).

    Not earlier: an import running beside the image reading slowed the reading
    (4 MP pair 0.15 -> 0.64 s), while the estimator leaves the interpreter lock
    free most of the time.
    """
    started = []

    def on_stage(stage, fraction):
        if stage == "displacement" and not started:
            started.append(True)
            if direct_solver:
                from bos.reconstruct.poisson import preload_direct_solver

                preload_direct_solver()
            if figures:
                from bos.plots import preload_matplotlib

                preload_matplotlib()
    return on_stage


def uses_direct_solver(exp) -> bool:
    """Whether a run of ``exp`` may factorise its Poisson problem (planar: the uncertainty is always
    computed, and ``solver = "auto"`` factorises problems up to a million cells)."""
    r = exp.reconstruction
    return r.kind == "planar" and r.solver in ("auto", "direct")


def run_and_save(exp, *, quiet: bool = False, report: bool = False, virtual_views: bool = False):
    """Run the pipeline with a progress bar (unless ``quiet``) and save; return (result, files)."""
    from bos import pipeline

    out_dir = pipeline.output_paths(exp)["result"].parent
    created = not out_dir.exists()
    pipeline.prepare_output_dir(out_dir)  # fail fast on an unwritable output before the long work
    # progress bars only on a terminal: piped stderr keeps exactly the one-line error on failure
    quiet = quiet or not sys.stderr.isatty()
    figures = bool(exp.output.figures or report or virtual_views)
    direct = uses_direct_solver(exp)
    preload = preload_when_estimating(figures=figures, direct_solver=direct) if figures or direct else None
    try:
        if quiet:
            result = pipeline.run_experiment(exp, progress=preload)
        else:
            progress, callback = make_progress()

            def both(stage, fraction):
                if preload is not None:
                    preload(stage, fraction)
                callback(stage, fraction)

            with progress:
                result = pipeline.run_experiment(exp, progress=both)
        files = pipeline.save_run(result, exp, report=report, virtual_views=virtual_views)
    except BaseException:
        if created:  # leave no empty output directory behind after a failed run
            with contextlib.suppress(OSError):
                out_dir.rmdir()
        raise
    return result, files


RUN_EPILOG = """\b
Examples:
  bos run experiment.toml
  bos run experiment.toml --window-px 48 --final-window-px 12 --no-figures --json
  bos run --reference ref.png --measurement meas.png --focal-length-mm 50 \\
      --pixel-pitch-um 5 --camera-to-object-m 1 --object-to-background-m 0.5 \\
      --kind axisymmetric --axis vertical --camera-motion mask --reference-region left \\
      --out results

Without an experiment file the options describe the whole run; `bos init` writes a commented template."""


def register(app: typer.Typer) -> None:
    @app.command("run", epilog=RUN_EPILOG)
    @handle_errors
    def run(
        experiment: Optional[Path] = typer.Argument(
            None, help="experiment TOML file (options below override it; without a file the options describe the run)"),
        reference: Optional[Path] = key_option("images.reference", convert=abs_path),
        measurement: Optional[Path] = key_option("images.measurement", convert=abs_path),
        mask: Optional[Path] = key_option("images.mask", convert=abs_path),
        mask_polygon: Optional[list[str]] = key_option(
            "images.mask_polygons", convert=parse_polygons, metavar="'C,R C,R C,R ...'",
            help="no-data polygon 'COL,ROW COL,ROW COL,ROW ...' in pixels (repeat for several)"),
        frame: Optional[int] = key_option("images.frame"),
        reference_frame: Optional[int] = key_option("images.reference_frame"),
        measurement_frame: Optional[int] = key_option("images.measurement_frame"),
        out: Optional[Path] = key_option("output.directory", convert=abs_path),
        name: Optional[str] = key_option("output.name"),
        figures: Optional[bool] = key_option("output.figures"),
        profile: Optional[str] = key_option(
            "output.profile", convert=parse_profile, metavar="X0,Y0,X1,Y1",
            help="profile line 'X0,Y0,X1,Y1' in object-plane mm (y down, origin at the image centre)"),
        method: Optional[choices("processing.method")] = key_option("processing.method"),
        window_px: Optional[int] = key_option("processing.window_px"),
        final_window_px: Optional[int] = key_option("processing.final_window_px"),
        passes: Optional[int] = key_option("processing.passes"),
        overlap: Optional[float] = key_option("processing.overlap"),
        camera_motion: Optional[choices("processing.camera_motion")] = key_option("processing.camera_motion"),
        outlier_threshold: Optional[float] = key_option("processing.outlier_threshold"),
        outlier_eps_px: Optional[float] = key_option("processing.outlier_eps_px"),
        kind: Optional[choices("reconstruction.kind")] = key_option("reconstruction.kind"),
        axis: Optional[choices("reconstruction.axis")] = key_option("reconstruction.axis"),
        axis_px: Optional[float] = key_option("reconstruction.axis_px"),
        reference_region: Optional[str] = key_option(
            "reconstruction.reference_region", convert=parse_region, metavar="NAME|R0,R1,C0,C1",
            help="where the gas is ambient: edges, left, right, top, bottom or 'ROW0,ROW1,COL0,COL1' in pixels"),
        boundary: Optional[choices("reconstruction.boundary")] = key_option("reconstruction.boundary"),
        abel_method: Optional[choices("reconstruction.abel_method")] = key_option("reconstruction.abel_method"),
        solver: Optional[choices("reconstruction.solver")] = key_option("reconstruction.solver"),
        weighted: Optional[bool] = key_option("reconstruction.weighted"),
        object_width_mm: Optional[float] = key_option("geometry.object_width_mm"),
        focal_length_mm: Optional[float] = key_option("camera.focal_length_mm"),
        pixel_pitch_um: Optional[float] = key_option("camera.pixel_pitch_um"),
        f_number: Optional[float] = key_option("camera.f_number"),
        wavelength_nm: Optional[float] = key_option("camera.wavelength_nm"),
        camera_to_object_m: Optional[float] = key_option("geometry.camera_to_object_m"),
        object_to_background_m: Optional[float] = key_option("geometry.object_to_background_m"),
        camera_to_background_m: Optional[float] = key_option("geometry.camera_to_background_m"),
        gas: Optional[str] = key_option("medium.gas"),
        composition: Optional[str] = key_option(
            "medium.composition", convert=parse_composition, metavar="GAS=FRACTION,...",
            help="mixture mole fractions 'GAS=FRACTION,...', e.g. he=0.5,air=0.5 (instead of --gas)"),
        temperature_c: Optional[float] = key_option("medium.temperature_c"),
        temperature_k: Optional[float] = key_option("medium.temperature_k"),
        pressure_pa: Optional[float] = key_option("medium.pressure_pa"),
        humidity_pct: Optional[float] = key_option("medium.relative_humidity"),
        co2_ppm: Optional[float] = key_option("medium.co2_ppm"),
        source: Optional[choices("source.kind")] = key_option("source.kind"),
        illumination: Optional[choices("source.illumination")] = key_option("source.illumination"),
        frequency_hz: Optional[float] = key_option("source.frequency_hz"),
        report: bool = typer.Option(False, "--report", help="also write the one-page HTML report <name>-report.html"),
        virtual_knife_edge: bool = typer.Option(
            False, "--virtual-knife-edge",
            help="also write virtual knife-edge pictures of the deflection (vertical and horizontal knife, "
                 "graded circular cutoff, colour by direction)"),
        as_json: bool = typer.Option(False, "--json", help="print the summary as JSON"),
    ) -> None:
        """Process one image pair: displacement, deflection, density, temperature -> result file + figures."""
        from bos.config import check_run_settings, load_experiment
        from bos.pipeline import jsonable

        overrides = key_overrides(run, locals())
        exp = load_experiment(experiment, overrides=overrides)
        check_run_settings(exp)  # every missing setting at once, named by option and key
        result, files = run_and_save(exp, quiet=as_json, report=report, virtual_views=virtual_knife_edge)
        summary = dict(result.summary, cautions=result.attrs.get("cautions", []))
        if as_json:
            emit_json({"summary": jsonable(summary), "files": [str(f) for f in files]})
        else:
            print_summary(summary, title=f"bos run: {exp.output.name}", files=files)
