"""``bos strobe``: plan a stroboscopic or phase-locked acquisition of a periodic source."""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any, Optional

import typer

from cli._common import emit_json, handle_errors, print_notes

# option name -> experiment-file key (file units); names shared with `bos plan`
RIG_OPTIONS = {
    "focal_length_mm": "camera.focal_length_mm",
    "pixel_pitch_um": "camera.pixel_pitch_um",
    "f_number": "camera.f_number",
    "camera_to_object_m": "geometry.camera_to_object_m",
    "object_to_background_m": "geometry.object_to_background_m",
    "camera_to_background_m": "geometry.camera_to_background_m",
    "object_width_mm": "geometry.object_width_mm",
    "gas": "medium.gas",
    "temperature_c": "medium.temperature_c",
    "pressure_pa": "medium.pressure_pa",
    "frequency_hz": "source.frequency_hz",
    "noise_px": "plan.noise_px",
    "target_spl_db": "plan.target_spl_db",
}


def strobe_cautions(exp, *, frequency_hz: float, flash_rate_hz: float | None, apparent_hz: float | None) -> list[str]:
    """Strobe (photosensitive band) and airborne-ultrasound cautions, ending with the deferral to local rules."""
    from bos.safety import DEFER, cautions_for

    kind = exp.source.kind if exp.source.kind not in ("none", "other") else (
        "ultrasound" if frequency_hz >= 20e3 else "other")
    light = exp.source.illumination if exp.source.illumination in ("strobe", "flash") else "strobe"
    # the source, the experiment's own illumination (laser, LED ...), then the strobe with its flash rate
    out = cautions_for(kind, exp.source.illumination, frequency_hz=frequency_hz)[:-1]
    out += cautions_for("none", light, frequency_hz=flash_rate_hz)[:-1]
    if apparent_hz is not None and 3.0 <= abs(apparent_hz) <= 30.0:
        out.append(f"The pattern rolls at {abs(apparent_hz):.3g} Hz, inside the 3-30 Hz photosensitive band: "
                   "take care when showing the live view or replaying the video.")
    out.append(DEFER)
    return list(dict.fromkeys(out))


def build_plan(experiment: Optional[Path], options: dict[str, Any]):
    """Experiment (file + options) -> (StrobePlan, cautions)."""
    from bos.config import load_experiment
    from bos.errors import InputError
    from bos.periodic import plan_strobe

    overrides = {RIG_OPTIONS[k]: v for k, v in options.items() if k in RIG_OPTIONS and v is not None}
    exp = load_experiment(experiment, overrides=overrides)
    f = exp.source.frequency_hz
    if f is None:
        raise InputError("missing --frequency-hz (or source.frequency_hz in the experiment file)")
    tau_us = options["pulse_width_us"]
    if tau_us is None or not (math.isfinite(tau_us) and tau_us >= 0):
        raise InputError(f"--pulse-width-us must be a number >= 0, got {tau_us!r}")
    cam = exp.camera
    rig = exp.rig() if cam.focal_length_m is not None and cam.pixel_pitch_m is not None else None
    path = exp.geometry.object_width_m
    if options.get("spl_resolution_db") is not None and options.get("spl_db") is None:
        raise InputError("--spl-resolution-db needs --spl-db (the level at which to reach that resolution)")
    if options.get("spl_db") is not None and (rig is None or path is None):
        raise InputError("--spl-db needs the rig: --focal-length-mm, --pixel-pitch-um, two distances and "
                         "--object-width-mm (or an experiment file)")
    plan = plan_strobe(frequency_hz=f, pulse_width_s=tau_us * 1e-6, medium=exp.medium_model(),
                       frame_rate_hz=options.get("frame_rate_hz"), phase_steps=options.get("phase_steps"),
                       rig=rig, path_m=path, spl_db=options.get("spl_db"), target_spl_db=exp.plan.target_spl_db,
                       spl_resolution_db=options.get("spl_resolution_db"), noise_px=exp.plan.noise_px)
    flash = options.get("strobe_rate_hz") or options.get("frame_rate_hz")
    apparent = plan.aliasing["apparent_frequency_hz"] if plan.aliasing else None
    return plan, strobe_cautions(exp, frequency_hz=f, flash_rate_hz=flash, apparent_hz=apparent)


def _us(v: float) -> str:
    return f"{v * 1e6:.4g} µs"


def print_plan(plan, cautions: list[str]) -> None:
    from rich.console import Console
    from rich.table import Table

    console = Console()
    t = Table(title="strobe / phase-locked acquisition plan", header_style="bold")
    t.add_column("quantity")
    t.add_column("value", justify="right")
    rows = [
        ("source frequency", f"{plan.frequency_hz:g} Hz"),
        (f"wavelength (c = {plan.speed_of_sound_m_s:.2f} m/s)", f"{plan.wavelength_m * 1e3:.4g} mm"),
        ("pulse width", _us(plan.pulse_width_s)),
        ("pulse contrast sinc(π f τ)", f"{plan.pulse_contrast:.5f}"),
    ]
    rows += [(f"longest pulse for {k} contrast", _us(v)) for k, v in plan.longest_pulse_s_for_contrast.items()]
    rows += [("smear c·τ of a travelling wave", f"{plan.smear_m * 1e3:.4g} mm"),
             ("smear / wavelength", f"{plan.smear_fraction_of_wavelength:.4g}")]
    a = plan.aliasing
    if a:
        rows += [("frame rate", f"{a['frame_rate_hz']:g} Hz"),
                 ("apparent frequency", f"{a['apparent_frequency_hz']:+.6g} Hz"),
                 ("phase advance per frame", f"{a['phase_step_deg']:+.5g}°"),
                 ("frames per apparent cycle", "∞ (frozen)" if a["frozen"] else f"{a['frames_per_apparent_cycle']:.5g}"),
                 ("direction", "ambiguous (half the frame rate)" if a["direction_ambiguous"] else
                  ("frozen" if a["frozen"] else ("forward" if a["apparent_frequency_hz"] > 0 else "backward")))]
    s = plan.phase_steps
    if s:
        rows += [(f"delay step for {s['steps']} phase steps", _us(s["delay_step_s"])),
                 ("delays", ", ".join(f"{d * 1e6:.4g}" for d in s["delays_s"]) + " µs")]
    sig = plan.signal or {}
    for key, label, fmt in (("displacement_amplitude_px", "displacement amplitude at {spl_db:g} dB", "{:.4g} px"),
                            ("frames_for_snr_1", "frames for amplitude = noise", "{}"),
                            ("spl_uncertainty_db", "SPL uncertainty with the phase steps", "{:.3g} dB"),
                            ("frames_for_spl_resolution", "frames for ±{spl_resolution_db:g} dB (1σ)", "{}"),
                            ("target_displacement_amplitude_px", "displacement at target {target_spl_db:g} dB",
                             "{:.4g} px"),
                            ("frames_for_target", "frames to resolve the target level", "{}")):
        if sig.get(key) is not None:
            rows.append((label.format(**sig), fmt.format(sig[key])))
    for label, value in rows:
        t.add_row(label, value)
    console.print(t)
    print_notes(console, warnings=plan.warnings, cautions=cautions)


def register(app: typer.Typer) -> None:
    @app.command("strobe")
    @handle_errors
    def strobe(
        experiment: Optional[Path] = typer.Argument(None, help="experiment TOML file (rig, medium, source); options override it"),
        frequency_hz: Optional[float] = typer.Option(None, "--frequency-hz", help="source frequency (Hz)"),
        pulse_width_us: Optional[float] = typer.Option(None, "--pulse-width-us", help="strobe pulse width or exposure (µs)"),
        frame_rate_hz: Optional[float] = typer.Option(None, "--frame-rate-hz", help="camera frame rate / strobe rate (Hz)"),
        phase_steps: Optional[int] = typer.Option(None, "--phase-steps", help="number of phase steps per period (delay schedule)"),
        strobe_rate_hz: Optional[float] = typer.Option(None, "--strobe-rate-hz", help="flash rate if not the frame rate (Hz)"),
        spl_db: Optional[float] = typer.Option(None, "--spl-db", help="expected sound level (dB re 20 µPa)"),
        target_spl_db: Optional[float] = typer.Option(None, "--target-spl-db", help="smallest sound level to resolve (dB)"),
        spl_resolution_db: Optional[float] = typer.Option(None, "--spl-resolution-db",
                                                          help="wanted 1σ SPL uncertainty at --spl-db (dB)"),
        noise_px: Optional[float] = typer.Option(None, "--noise-px", help="per-frame displacement noise (px, default 0.05)"),
        focal_length_mm: Optional[float] = typer.Option(None, "--focal-length-mm", help="lens focal length (mm)"),
        pixel_pitch_um: Optional[float] = typer.Option(None, "--pixel-pitch-um", help="sensor pixel pitch (µm)"),
        f_number: Optional[float] = typer.Option(None, "--f-number", help="lens f-number"),
        camera_to_object_m: Optional[float] = typer.Option(None, "--camera-to-object-m", help="Z_A (m)"),
        object_to_background_m: Optional[float] = typer.Option(None, "--object-to-background-m", help="Z_D (m)"),
        camera_to_background_m: Optional[float] = typer.Option(None, "--camera-to-background-m", help="Z_B (m)"),
        object_width_mm: Optional[float] = typer.Option(None, "--object-width-mm", help="acoustic path along the line of sight (mm)"),
        gas: Optional[str] = typer.Option(None, "--gas", help="gas (air, co2, he ...)"),
        temperature_c: Optional[float] = typer.Option(None, "--temperature-c", help="ambient temperature (°C)"),
        pressure_pa: Optional[float] = typer.Option(None, "--pressure-pa", help="ambient pressure (Pa)"),
        as_json: bool = typer.Option(False, "--json", help="print every number as JSON"),
    ) -> None:
        """Plan strobe or phase-locked imaging of a periodic source: pulse contrast, smear,
        aliasing and phase advance, delay schedule, expected displacement, frames to average."""
        options = dict(locals())
        plan, cautions = build_plan(experiment, options)
        if as_json:
            emit_json(plan.as_dict() | {"cautions": cautions})
        else:
            print_plan(plan, cautions)
