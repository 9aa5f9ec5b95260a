"""``bos synth``: render a synthetic reference/measurement pair for a known field.

Writes two 16-bit images (PNG or TIFF; the counts of the chosen bit depth,
not rescaled) and an ``.npz`` with the exact displacement (and deflection)
per pixel, all through atomic writes.
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any

import numpy as np
import typer

from cli._common import emit_json, handle_errors

FIELDS = ("uniform", "gaussian-blob", "hot-column", "planar-layer")
FORMATS = ("png", "tiff")


def _write_image(path: Path, image: np.ndarray) -> None:
    from bos._io import atomic_path

    data = np.clip(np.rint(image), 0, 65535).astype(np.uint16)
    with atomic_path(path) as tmp:
        if path.suffix.lower() in (".tif", ".tiff"):
            import tifffile

            tifffile.imwrite(tmp, data)
        else:
            import imageio.v3 as iio

            iio.imwrite(tmp, data, extension=".png")


def build_field(field: str, *, rig: Any, shape: tuple[int, int], params: dict[str, Any]):
    """Return (displacement callable or arrays, deflection callable or None, description dict)."""
    from bos import synthetic as syn
    from bos.errors import InputError

    if field == "uniform":
        disp = syn.uniform_displacement(shape=shape, dy_px=params["dy_px"], dx_px=params["dx_px"])
        return disp, None, {"dy_px": params["dy_px"], "dx_px": params["dx_px"]}
    radius = params["radius_mm"] * 1e-3
    if field == "gaussian-blob":
        desc = {"amplitude": params["amplitude"], "radius_mm": params["radius_mm"]}

        def deflection(y, x):
            return syn.gaussian_blob_deflection(y, x, amplitude=params["amplitude"], radius_m=radius, n0=params["n0"])

    elif field == "planar-layer":
        width = params["width_mm"] * 1e-3
        desc = {"amplitude": params["amplitude"], "thickness_mm": params["radius_mm"], "width_mm": params["width_mm"]}

        def deflection(y, x):
            return syn.planar_layer_deflection(y, x, amplitude=params["amplitude"], thickness_m=radius, width_m=width, n0=params["n0"])

    elif field == "hot-column":
        medium = params["medium"]
        profile = syn.axisymmetric_temperature_column(delta_t_k=params["delta_t_k"], radius_m=radius, medium=medium)
        desc = {"delta_t_k": params["delta_t_k"], "radius_mm": params["radius_mm"], "gas": medium.gas}

        def deflection(y, x):
            return syn.axisymmetric_column_deflection(y, x, index_profile=profile, radius_m=6 * radius, n0=medium.ambient_index)

    else:
        raise InputError(f"unknown field {field!r}; choose one of {', '.join(FIELDS)}")
    return syn.displacement_from_field(deflection, rig=rig, shape=shape), deflection, desc


def register(app: typer.Typer) -> None:
    @app.command("synth")
    @handle_errors
    def synth(
        field: str = typer.Option("gaussian-blob", "--field", help=f"known field: {', '.join(FIELDS)}"),
        out: Path = typer.Option(Path("."), "--out", help="output directory (must exist)"),
        name: str = typer.Option("synthetic", "--name", help="base name of the output files"),
        rows: int = typer.Option(1024, "--rows", help="image height [px]"),
        cols: int = typer.Option(1024, "--cols", help="image width [px]"),
        dot_px: float = typer.Option(2.5, "--dot-px", help="dot e^-2 diameter [px]"),
        density: float = typer.Option(0.5, "--density", help="fraction of the area covered by dots"),
        contrast: float = typer.Option(1.0, "--contrast", help="dot amplitude scale (0-1.5)"),
        seed: int = typer.Option(0, "--seed", help="random seed of dots and noise"),
        bit_depth: int = typer.Option(12, "--bit-depth", help="camera bit depth (8-16)"),
        noise: bool = typer.Option(True, "--noise/--no-noise", help="photon shot noise and read noise"),
        full_well: float = typer.Option(20000.0, "--full-well", help="electrons at full scale"),
        read_noise: float = typer.Option(5.0, "--read-noise", help="read noise [electrons rms]"),
        blur_px: float = typer.Option(0.0, "--blur-px", help="Gaussian blur spot e^-2 diameter [px]"),
        shift_y_px: float = typer.Option(0.0, "--camera-shift-y-px", help="global camera shift, y (down) [px]"),
        shift_x_px: float = typer.Option(0.0, "--camera-shift-x-px", help="global camera shift, x [px]"),
        fmt: str = typer.Option("png", "--format", help="image format: png or tiff (16-bit)"),
        dy_px: float = typer.Option(0.0, "--dy-px", help="uniform field: displacement y [px]"),
        dx_px: float = typer.Option(0.5, "--dx-px", help="uniform field: displacement x [px]"),
        amplitude: float = typer.Option(-5e-5, "--amplitude", help="blob/layer: index excess n - n0 at the centre"),
        radius_mm: float = typer.Option(15.0, "--radius-mm", help="blob/column 1/e radius, or layer 1/e half-thickness [mm]"),
        width_mm: float = typer.Option(200.0, "--width-mm", help="planar layer: width along the line of sight [mm]"),
        delta_t_k: float = typer.Option(30.0, "--delta-t-k", help="hot column: temperature rise on the axis [K]"),
        gas: str = typer.Option("air", "--gas", help="hot column: gas"),
        focal_mm: float = typer.Option(50.0, "--focal-length-mm", "--focal-mm", help="lens focal length [mm]"),
        pixel_um: float = typer.Option(5.0, "--pixel-pitch-um", "--pixel-um", help="pixel pitch [um]"),
        f_number: float = typer.Option(8.0, "--f-number", help="lens f-number"),
        z_a_m: float = typer.Option(1.0, "--camera-to-object-m", "--za-m", help="camera to object distance Z_A [m]"),
        z_d_m: float = typer.Option(0.5, "--object-to-background-m", "--zd-m", help="object to background distance Z_D [m]"),
        wavelength_nm: float = typer.Option(550.0, "--wavelength-nm", help="light wavelength [nm]"),
        as_json: bool = typer.Option(False, "--json", help="print a JSON summary"),
    ) -> None:
        """Render a synthetic reference + measurement pair with its exact displacement."""
        from bos import synthetic as syn
        from bos.errors import DataFileError, InputError
        from bos.optics import Rig

        if field not in FIELDS:
            raise InputError(f"unknown field {field!r}; choose one of {', '.join(FIELDS)}")
        if fmt not in FORMATS:
            raise InputError(f"unknown format {fmt!r}; choose png or tiff")
        if not name or any(c in name for c in "/\\"):
            raise InputError(f"--name must be a plain file name, got {name!r}")
        if not out.is_dir():
            raise DataFileError(f"output directory does not exist: {out}")
        if rows * cols > 40_000_000:
            raise InputError(f"image of {rows}x{cols} px is larger than the 40 MP limit")
        rig = Rig(focal_length_m=focal_mm * 1e-3, pixel_pitch_m=pixel_um * 1e-6, f_number=f_number,
                  z_a_m=z_a_m, z_d_m=z_d_m, wavelength_m=wavelength_nm * 1e-9)
        shape = (rows, cols)
        syn._check_shape(shape)
        params: dict[str, Any] = dict(dy_px=dy_px, dx_px=dx_px, amplitude=amplitude, radius_mm=radius_mm,
                                      width_mm=width_mm, delta_t_k=delta_t_k, n0=1.0)
        if field != "uniform":
            syn._check_finite_positive(radius_mm, "--radius-mm")
            from bos.media import Medium

            medium = Medium(gas=gas, wavelength_m=wavelength_nm * 1e-9)
            params.update(medium=medium, n0=medium.ambient_index)
        displacement, deflection, desc = build_field(field, rig=rig, shape=shape, params=params)

        t0 = time.perf_counter()
        pair = syn.render_pair(shape=shape, displacement=displacement, dot_diameter_px=dot_px, density=density,
                               contrast=contrast, seed=seed, noise=noise, bit_depth=bit_depth, blur_px=blur_px,
                               camera_shift=(shift_y_px, shift_x_px), full_well=full_well, read_noise=read_noise)
        seconds = time.perf_counter() - t0

        ext = ".png" if fmt == "png" else ".tif"
        ref_path, meas_path = out / f"{name}_reference{ext}", out / f"{name}_measurement{ext}"
        truth_path = out / f"{name}_truth.npz"
        y_m, x_m = syn.pixel_to_object(np.arange(rows), np.arange(cols), shape=shape, rig=rig)
        truth: dict[str, Any] = dict(displacement_y_px=pair.displacement_y, displacement_x_px=pair.displacement_x,
                                     y_m=y_m, x_m=x_m, sensitivity_px_per_rad=rig.sensitivity_px_per_rad,
                                     object_pixel_m=rig.object_pixel_m, camera_shift_px=np.array([shift_y_px, shift_x_px]))
        if deflection is not None:
            ey, ex = deflection(y_m[:, None], x_m[None, :])
            truth.update(deflection_y_rad=np.broadcast_to(ey, shape), deflection_x_rad=np.broadcast_to(ex, shape))
        _write_image(ref_path, pair.reference)
        _write_image(meas_path, pair.measurement)
        from bos._io import atomic_path

        with atomic_path(truth_path) as tmp:
            with open(tmp, "wb") as fh:
                np.savez_compressed(fh, **truth)

        mag = np.hypot(pair.displacement_y, pair.displacement_x)
        summary = {
            "field": field,
            "field_parameters": desc,
            "shape": [rows, cols],
            "n_dots": pair.meta["n_dots"],
            "bit_depth": bit_depth,
            "max_displacement_px": float(mag.max()),
            "rms_displacement_px": float(np.sqrt(np.mean(mag**2))),
            "sensitivity_px_per_rad": rig.sensitivity_px_per_rad,
            "object_pixel_m": rig.object_pixel_m,
            "render_seconds": round(seconds, 2),
            "files": [str(ref_path), str(meas_path), str(truth_path)],
        }
        if as_json:
            emit_json(summary)
        else:
            typer.echo(f"bos synth: {field} field, {rows}x{cols} px, {pair.meta['n_dots']} dots, "
                       f"max |d| = {summary['max_displacement_px']:.4g} px (rendered in {seconds:.1f} s)")
            for f in summary["files"]:
                typer.echo(f"  {f}")
