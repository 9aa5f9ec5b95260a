"""``bos plan``: sensitivity, detection limits, blur and dot size of a rig, before building it."""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path
from typing import Any, Optional

import typer

from cli._common import emit_json, handle_errors, print_notes

# option name -> experiment-file key ("section.key", file units)
OVERRIDES = {
    "focal_length_mm": "camera.focal_length_mm",
    "pixel_um": "camera.pixel_pitch_um",
    "f_number": "camera.f_number",
    "wavelength_nm": "camera.wavelength_nm",
    "camera_to_background_m": "geometry.camera_to_background_m",
    "object_to_background_m": "geometry.object_to_background_m",
    "camera_to_object_m": "geometry.camera_to_object_m",
    "object_width_mm": "geometry.object_width_mm",
    "gas": "medium.gas",
    "pressure_pa": "medium.pressure_pa",
    "temperature_c": "medium.temperature_c",
    "humidity_pct": "medium.relative_humidity",
    "co2_ppm": "medium.co2_ppm",
    "source": "source.kind",
    "illumination": "source.illumination",
    "frequency_hz": "source.frequency_hz",
    "noise_px": "plan.noise_px",
    "window_px": "plan.window_px",
    "expected_deflection_rad": "plan.expected_deflection_rad",
    "target_dt_k": "plan.target_dt_k",
    "target_spl_db": "plan.target_spl_db",
    "solve_for": "plan.solve_for",
    "max_blur_mm": "plan.max_blur_mm",
    "smallest_feature_mm": "plan.smallest_feature_mm",
}

# settings a plan depends on that have a default: (file key, label, unit, scale to the shown unit)
DEFAULTED = (("camera.f_number", "f-number", "", 1.0), ("camera.wavelength_nm", "light wavelength", "nm", 1.0),
             ("medium.gas", "gas", "", None), ("medium.pressure_pa", "ambient pressure", "Pa", 1.0),
             ("medium.temperature_c", "ambient temperature", "°C", 1.0),
             ("plan.noise_px", "displacement noise floor", "px", 1.0),
             ("plan.window_px", "final interrogation window", "px", 1.0))


def defaults_used(exp, experiment_file: Path | None, options: dict[str, Any]) -> dict[str, Any]:
    """The planning settings left at their defaults: ``{"camera.f_number": 8.0, ...}``.

    A setting counts as given when it is in the experiment file (any of its
    spellings, e.g. temperature_k for temperature_c) or on the command line.
    """
    import tomllib

    given: set[str] = {OVERRIDES[k] for k, v in options.items() if k in OVERRIDES and v is not None}
    if experiment_file is not None:
        with open(experiment_file, "rb") as fh:
            doc = tomllib.load(fh)
        given |= {f"{sec}.{key}" for sec, keys in doc.items() if isinstance(keys, dict) for key in keys}
    aliases = {"medium.temperature_c": ("medium.temperature_k",), "camera.wavelength_nm": ("camera.wavelength_m",)}
    out: dict[str, Any] = {}
    for key, *_ in DEFAULTED:
        if key in given or any(a in given for a in aliases.get(key, ())):
            continue
        section, name = key.split(".")
        if key == "medium.temperature_c":
            out[key] = round(exp.medium.temperature_k - 273.15, 6)
        elif key == "camera.wavelength_nm":
            out[key] = round(exp.camera.wavelength_m * 1e9, 6)
        else:
            out[key] = getattr(getattr(exp, section), name)
    return out
# geometry option -> Rig field; a file distance not named on the command line is
# dropped in this order (least specific first) until two remain
DISTANCES = (("camera_to_background_m", "z_b_m"), ("object_to_background_m", "z_d_m"),
             ("camera_to_object_m", "z_a_m"))
SOLVED = {"z_d": "z_d_m", "focal_length": "focal_length_m", "f_number": "f_number"}

# Rows of the table: (Plan attribute, label, unit, scale, format); None scale -> text
ROWS = (
    ("Rig", None),
    ("focal_length_m", "focal length", "mm", 1e3, ".4g"),
    ("f_number", "f-number", "", 1, ".3g"),
    ("pixel_pitch_m", "pixel pitch", "µm", 1e6, ".4g"),
    ("z_a_m", "camera to object Z_A", "m", 1, ".4g"),
    ("z_d_m", "object to background Z_D", "m", 1, ".4g"),
    ("z_b_m", "camera to background Z_B", "m", 1, ".4g"),
    ("object_width_m", "object width W", "mm", 1e3, ".4g"),
    ("Imaging", None),
    ("magnification", "background magnification M", "", 1, ".5g"),
    ("object_magnification", "object-plane magnification", "", 1, ".5g"),
    ("object_pixel_m", "object-plane pixel", "mm", 1e3, ".4g"),
    ("field_of_view_m", "field of view (h × w)", "mm", 1e3, ".4g"),
    ("window_object_m", "window footprint in object", "mm", 1e3, ".4g"),
    ("Sensitivity", None),
    ("sensitivity_mm_per_rad", "sensitivity M·Z_D", "mm/rad", 1, ".4g"),
    ("sensitivity_px_per_rad", "sensitivity", "px/rad", 1, ".5g"),
    ("px_per_density_gradient", "per density gradient", "px per kg/m⁴", 1, ".4g"),
    ("Smallest detectable (displacement = noise floor)", None),
    ("noise_px", "noise floor", "px", 1, ".3g"),
    ("min_deflection_rad", "deflection", "µrad", 1e6, ".4g"),
    ("min_density_gradient_kg_m4", "density gradient", "kg/m⁴", 1, ".4g"),
    ("min_density_difference_kg_m3", "density difference across W", "kg/m³", 1, ".4g"),
    ("min_temperature_difference_k", "temperature difference across W", "K", 1, ".4g"),
    ("min_sound_pressure_pa", "sound pressure (peak, plane wave)", "Pa", 1, ".4g"),
    ("min_spl_db", "sound pressure level", "dB", 1, ".4g"),
    ("Blur", None),
    ("geometric_blur_px", "aperture cone on sensor d_i", "px", 1, ".3g"),
    ("diffraction_blur_px", "diffraction spot d_d", "px", 1, ".3g"),
    ("total_blur_px", "total (root-sum-square)", "px", 1, ".3g"),
    ("object_blur_geometric_m", "object-plane blur (cone)", "mm", 1e3, ".3g"),
    ("object_blur_m", "object-plane blur (total)", "mm", 1e3, ".3g"),
    ("Background", None),
    ("background_pixel_m", "one pixel on the background", "mm", 1e3, ".3g"),
    ("dot_diameter_m", "dot diameter (2.5 px image)", "mm", 1e3, ".3g"),
    ("dot_diameter_range_m", "dot diameter for 2-3 px", "mm", 1e3, ".3g"),
    ("Expected signal", None),
    ("expected_deflection_rad", "deflection", "µrad", 1e6, ".4g"),
    ("expected_displacement_px", "displacement", "px", 1, ".3g"),
)


def _fmt(value: Any, scale: float, fmt: str, sep: str = " × ") -> str:
    if value is None:
        return "-"
    if isinstance(value, (tuple, list)):
        return sep.join(_fmt(v, scale, fmt) for v in value)
    v = float(value) * scale
    return format(v, fmt) if math.isfinite(v) else str(v)


def _parse_sensor(text: str | None) -> list[int] | None:
    from bos.errors import InputError

    if text is None:
        return None
    parts = text.lower().replace(",", "x").split("x")
    try:
        rows, cols = (int(p) for p in parts)
    except ValueError:
        raise InputError(f"--sensor-px must look like ROWSxCOLS (e.g. 4000x6000), got {text!r}") from None
    return [rows, cols]


def build(experiment_file: Path | None, options: dict[str, Any]):
    """Merge the file and the options; return (experiment, rig keyword arguments in SI)."""
    from bos.config import load_experiment
    from bos.errors import InputError

    overrides = {OVERRIDES[k]: v for k, v in options.items() if k in OVERRIDES and v is not None}
    if options.get("sensor_px") is not None:
        overrides["camera.sensor_px"] = _parse_sensor(options["sensor_px"])
    exp = load_experiment(experiment_file, overrides=overrides)
    # a target named on the command line replaces the file's other target
    for opt, other in (("target_dt_k", "target_spl_db"), ("target_spl_db", "target_dt_k")):
        if options.get(opt) is not None and options.get(other) is None:
            exp = dataclasses.replace(exp, plan=dataclasses.replace(exp.plan, **{other: None}))
    cam, geo = exp.camera, exp.geometry
    rig_kw = dict(focal_length_m=cam.focal_length_m, pixel_pitch_m=cam.pixel_pitch_m, f_number=cam.f_number,
                  sensor_px=cam.sensor_px, wavelength_m=cam.wavelength_m,
                  z_a_m=geo.z_a_m, z_b_m=geo.z_b_m, z_d_m=geo.z_d_m)
    solve_for = exp.plan.solve_for
    if solve_for is not None:
        rig_kw[SOLVED[solve_for]] = None
    for opt, key in DISTANCES:
        given = sum(rig_kw[k] is not None for _, k in DISTANCES)
        if given > 2 or (solve_for == "z_d" and given > 1):
            if options.get(opt) is None:
                rig_kw[key] = None
    if rig_kw["pixel_pitch_m"] is None:
        raise InputError("missing --pixel-um (or camera.pixel_pitch_um in the experiment file)")
    if rig_kw["focal_length_m"] is None and solve_for != "focal_length":
        raise InputError("missing --focal-length-mm (or camera.focal_length_mm in the experiment file)")
    if geo.object_width_m is None:
        raise InputError("missing --object-width-mm (or geometry.object_width_mm in the experiment file)")
    return exp, rig_kw


def run_plan(exp, rig_kw: dict[str, Any], *, max_blur_m: float | None = None):
    """Plan (and, with plan.solve_for, design) the rig; return (plan, design or None, cautions)."""
    from bos.optics import Rig, design_for_target, plan
    from bos.safety import cautions_for

    medium = exp.medium_model()
    p_cfg, src = exp.plan, exp.source
    width = exp.geometry.object_width_m
    design = None
    if p_cfg.solve_for is not None:
        kw = {k: v for k, v in rig_kw.items() if v is not None}
        design = design_for_target(
            solve_for=p_cfg.solve_for, target_dt_k=p_cfg.target_dt_k, target_spl_db=p_cfg.target_spl_db,
            target_deflection_rad=p_cfg.expected_deflection_rad if p_cfg.target_dt_k is None
            and p_cfg.target_spl_db is None else None,
            source_frequency_hz=src.frequency_hz, medium=medium, object_width_m=width,
            noise_px=p_cfg.noise_px, max_blur_m=max_blur_m, **kw)
        rig = design.rig
    else:
        rig = Rig(**rig_kw)
    result = plan(rig, medium=medium, object_width_m=width, noise_px=p_cfg.noise_px, window_px=p_cfg.window_px,
                  expected_deflection_rad=p_cfg.expected_deflection_rad, source_frequency_hz=src.frequency_hz,
                  target_dt_k=p_cfg.target_dt_k, target_spl_db=p_cfg.target_spl_db,
                  smallest_feature_m=p_cfg.smallest_feature_m)
    cautions = cautions_for(src.kind, src.illumination, frequency_hz=src.frequency_hz,
                            gas=list(medium.mole_fractions))
    return rig, result, design, cautions


def build_chart(rig, result):
    """Sensitivity, smallest detectable deflection and object-plane blur against Z_D (a Figure, not saved).

    Three stacked panels on a shared logarithmic Z_D axis, each on its own
    logarithmic scale (the curves span decades and no longer share one axis),
    the chosen design marked with the same marker in every panel and in the
    legend.
    """
    import numpy as np
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.ticker import ScalarFormatter

    from bos.optics import z_d_sweep

    sw = z_d_sweep(rig)
    z = sw["z_d_m"]
    noise = float(getattr(result, "noise_px", 0.05) or 0.05)
    fig = Figure(figsize=(6.4, 7.2))
    FigureCanvasAgg(fig)
    fig.subplots_adjust(left=0.15, right=0.96, top=0.88, bottom=0.08, hspace=0.12)
    axes = fig.subplots(3, 1, sharex=True)
    chosen = dict(marker="o", ms=7, mfc="white", mew=1.8, ls="none", zorder=5)
    curves = (
        (sw["sensitivity_m_per_rad"] * 1e3, result.sensitivity_mm_per_rad, "sensitivity M·Z_D\n[mm/rad on the sensor]",
         "tab:blue"),
        (noise / sw["sensitivity_px_per_rad"] * 1e6, result.min_deflection_rad * 1e6,
         f"smallest deflection\n[µrad] at {noise:g} px noise", "tab:green"),
        (sw["object_blur_m"] * 1e3, result.object_blur_m * 1e3, "object-plane blur\n(total) [mm]", "tab:red"),
    )
    for ax, (values, at_design, label, colour) in zip(axes, curves):
        ax.plot(z, values, "-", color=colour, lw=1.6)
        ax.plot([rig.z_d], [at_design], color=colour, **chosen)
        ax.set_yscale("log")
        ax.set_ylabel(label)
        ax.axvline(rig.z_d, color="0.4", ls="--", lw=1)
        ax.grid(True, which="both", alpha=0.25)
    blur_ax = axes[2]
    width_mm = result.object_width_m * 1e3
    lo, hi = np.nanmin(curves[2][0]), np.nanmax(curves[2][0])
    if lo <= width_mm <= 10 * hi:
        blur_ax.axhline(width_mm, color="tab:red", ls=":", lw=1.2)
        blur_ax.annotate(f"object width {width_mm:.3g} mm", (z[0], width_mm), xytext=(2, 3),
                         textcoords="offset points", fontsize=8, color="tab:red")
    axes[-1].set_xscale("log")
    axes[-1].set_xlabel("object to background distance Z_D [m]")
    fmt = ScalarFormatter(useOffset=False)
    axes[-1].xaxis.set_major_formatter(fmt)
    from matplotlib.lines import Line2D

    handles = [Line2D([], [], color="0.2", **chosen,
                      label=f"chosen design: Z_D = {rig.z_d:.3g} m, {result.sensitivity_mm_per_rad:.3g} mm/rad, "
                            f"{result.min_deflection_rad * 1e6:.3g} µrad, blur {result.object_blur_m * 1e3:.3g} mm"),
               Line2D([], [], color="0.4", ls="--", lw=1, label="chosen Z_D")]
    fig.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, 0.955), fontsize=8, frameon=False, ncols=1)
    fixed = f"Z_A = {rig.z_a:.3g} m fixed" if rig.z_a_m is not None else f"Z_B = {rig.z_b:.3g} m fixed"
    fig.suptitle(f"f = {rig.focal_length_m * 1e3:.4g} mm, N = {rig.f_number:.3g}, {fixed}", fontsize=10, y=0.995)
    return fig


def write_chart(path: Path, rig, result) -> None:
    """Write :func:`build_chart` as PNG (atomic)."""
    from bos._io import atomic_path

    fig = build_chart(rig, result)
    with atomic_path(path) as tmp:
        fig.savefig(tmp, format="png", dpi=100)


def print_table(result, design, cautions: list[str], defaults: dict[str, Any] | None = None) -> None:
    from rich.console import Console
    from rich.markup import escape
    from rich.table import Table

    console = Console()
    if design is not None:
        unit = "" if design.solve_for == "f_number" else (" m" if design.solve_for == "z_d" else " mm")
        scale = 1e3 if design.solve_for == "focal_length" else 1.0
        console.print(f"[bold]solved {design.solve_for} = {design.value * scale:.4g}{unit}[/]", highlight=False)
    table = Table(title="BOS rig plan", show_header=True, header_style="bold")
    for col, just in (("quantity", "left"), ("value", "right"), ("unit", "left")):
        table.add_column(col, justify=just)
    d = result.as_dict()
    header = None
    for row in ROWS:
        if row[1] is None:
            header = row[0]
            continue
        key, label, unit, scale, fmt = row
        if d.get(key) is None:
            continue
        if header is not None:
            table.add_row(f"[bold cyan]{header}[/]", "", "")
            header = None
        sep = " – " if key.endswith("range_m") else " × "
        table.add_row(label, _fmt(d[key], scale, fmt, sep), unit)
    console.print(table)
    if defaults:
        labels = {k: (lab, unit) for k, lab, unit, _ in DEFAULTED}
        parts = [f"{labels[k][0]} {v}{' ' + labels[k][1] if labels[k][1] else ''} ({k})" for k, v in defaults.items()]
        console.print(f"[cyan]defaults assumed (not given):[/] {escape('; '.join(parts))}", highlight=False)
    print_notes(console, warnings=result.warnings, cautions=cautions)


def register(app: typer.Typer) -> None:
    @app.command("plan")
    @handle_errors
    def plan_command(
        experiment_file: Optional[Path] = typer.Argument(None, help="experiment TOML file (options override it)"),
        focal_length_mm: Optional[float] = typer.Option(None, help="lens focal length (mm)"),
        pixel_um: Optional[float] = typer.Option(None, "--pixel-pitch-um", "--pixel-um",
                                                 help="sensor pixel pitch (µm)"),
        f_number: Optional[float] = typer.Option(None, help="lens f-number N"),
        sensor_px: Optional[str] = typer.Option(None, help="sensor size ROWSxCOLS in pixels, e.g. 4000x6000"),
        wavelength_nm: Optional[float] = typer.Option(None, help="effective wavelength of the light (nm)"),
        camera_to_background_m: Optional[float] = typer.Option(None, help="Z_B: lens to background (m)"),
        object_to_background_m: Optional[float] = typer.Option(None, help="Z_D: object mid-plane to background (m)"),
        camera_to_object_m: Optional[float] = typer.Option(None, help="Z_A: lens to object mid-plane (m)"),
        object_width_mm: Optional[float] = typer.Option(None, help="object width along the line of sight, or diameter (mm)"),
        gas: Optional[str] = typer.Option(None, help="gas (air, n2, o2, co2, ar, he, h2, h2o, ch4, sf6, c3h8)"),
        pressure_pa: Optional[float] = typer.Option(None, help="ambient pressure (Pa)"),
        temperature_c: Optional[float] = typer.Option(None, help="ambient temperature (°C)"),
        humidity_pct: Optional[float] = typer.Option(None, help="relative humidity of air (%)"),
        co2_ppm: Optional[float] = typer.Option(None, help="CO2 content of air (ppm)"),
        source: Optional[str] = typer.Option(None, help="source kind: plume, hot-air, flame, gas-jet, compressed-gas, spark, ultrasound, shock, other, none"),
        illumination: Optional[str] = typer.Option(None, help="ambient, led, high-power-led, strobe, flash, laser, arc-lamp, screen"),
        frequency_hz: Optional[float] = typer.Option(None, help="source frequency (Hz; sound sources, strobes)"),
        noise_px: Optional[float] = typer.Option(None, help="displacement noise floor (px, default 0.05)"),
        window_px: Optional[int] = typer.Option(None, help="final interrogation window (px, default 32)"),
        expected_deflection_rad: Optional[float] = typer.Option(None, help="largest expected deflection (rad)"),
        target_dt_k: Optional[float] = typer.Option(None, help="smallest temperature difference to resolve (K)"),
        target_spl_db: Optional[float] = typer.Option(None, help="smallest sound level to resolve (dB re 20 µPa)"),
        solve_for: Optional[str] = typer.Option(None, help="inverse design: z_d, focal_length or f_number"),
        max_blur_mm: Optional[float] = typer.Option(None, help="largest acceptable object-plane blur (mm, inverse design)"),
        smallest_feature_mm: Optional[float] = typer.Option(
            None, help="smallest flow feature to resolve (mm): warns when the object-plane blur is larger"),
        json_out: bool = typer.Option(False, "--json", help="print machine-readable JSON"),
        chart: Optional[Path] = typer.Option(None, help="write a PNG of sensitivity and blur against Z_D"),
    ) -> None:
        """Plan a rig: sensitivity, smallest detectable deflection / density / temperature / sound level,
        blur, background dot size, warnings and safety cautions; or solve for Z_D, f or N (--solve-for)."""
        options = dict(locals())
        exp, rig_kw = build(experiment_file, options)
        rig, result, design, cautions = run_plan(exp, rig_kw, max_blur_m=exp.plan.max_blur_m)
        defaults = defaults_used(exp, experiment_file, options)
        if chart is not None:
            write_chart(chart, rig, result)
        if json_out:
            out = result.as_dict()
            out["cautions"] = cautions
            out["design"] = None if design is None else {
                "solve_for": design.solve_for, "value": design.value,
                "target_deflection_rad": design.target_deflection_rad,
                "min_deflection_rad": design.min_deflection_rad}
            out["chart"] = None if chart is None else str(chart)
            out["defaults_used"] = defaults
            emit_json(out)
        else:
            print_table(result, design, cautions, defaults)
            if chart is not None:
                typer.echo(f"chart written: {chart}")
