"""``bos synth``: render a synthetic reference/measurement pair for a known field.

Writes two 16-bit images (PNG or TIFF; the counts of the chosen bit depth,
not rescaled) and an ``.npz`` with the exact displacement (and deflection)
per pixel, all through atomic writes.
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any, Optional

import numpy as np
import typer

from cli._common import choice_type, emit_json, handle_errors, key_option, key_overrides, plain

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


def truth_fields(field: str, *, params: dict[str, Any], y_m: np.ndarray, x_m: np.ndarray) -> dict[str, np.ndarray]:
    """Gas density [kg/m^3] and temperature [K] of the known field on the pixel grid.

    In the plane through the object's centre (z = 0): the meridional plane of
    the axisymmetric blob and column (axis through the image centre), the
    mid-plane of the planar layer.  ``{}`` for the uniform field (no gas).
    """
    if field == "uniform":
        return {}
    medium = params["medium"]
    y, x = y_m[:, None], x_m[None, :]
    s = params["radius_mm"] * 1e-3
    if field == "hot-column":
        temperature = medium.temperature_k + params["delta_t_k"] * np.exp(-(x**2) / s**2) + 0.0 * y
        density = medium.density_from_temperature(temperature)
    else:
        g = np.exp(-(x**2 + y**2) / s**2) if field == "gaussian-blob" else np.exp(-(y**2) / s**2) + 0.0 * x
        density = medium.density_from_index(medium.ambient_index + params["amplitude"] * g)
        temperature = medium.temperature_from_density(density)
    return {"density_kg_m3": np.asarray(density, float), "temperature_k": np.asarray(temperature, float),
            "ambient_density_kg_m3": np.float64(medium.ambient_density),
            "ambient_temperature_k": np.float64(medium.temperature_k)}


def experiment_for(field: str, *, rig: Any, shape: tuple[int, int], params: dict[str, Any], name: str,
                   files: tuple[str, str], camera_shift: tuple[float, float]) -> dict[str, dict[str, Any]]:
    """The experiment-file mapping that processes the synthetic pair as rendered."""
    rows, cols = shape
    exp: dict[str, dict[str, Any]] = {
        "camera": {"focal_length_mm": rig.focal_length_m * 1e3, "pixel_pitch_um": rig.pixel_pitch_m * 1e6,
                   "f_number": rig.f_number, "wavelength_nm": rig.wavelength_m * 1e9},
        "geometry": {"camera_to_object_m": rig.z_a, "object_to_background_m": rig.z_d},
        "medium": {},
        "source": {"description": f"bos synth --field {field} (synthetic pair)"},
        "images": {"reference": files[0], "measurement": files[1]},
        "processing": {},
        "reconstruction": {},
        "output": {"directory": f"{name}-output", "name": name},
    }
    if camera_shift == (0.0, 0.0):
        exp["processing"]["camera_motion"] = "none"  # rendered without camera motion: remove none
    medium = params.get("medium")
    if medium is not None:
        exp["medium"] = {"gas": medium.gas, "temperature_k": medium.temperature_k, "pressure_pa": medium.pressure_pa}
    if field == "uniform":
        exp["reconstruction"]["kind"] = "none"
    elif field == "planar-layer":  # layer along x through the centre: the top band is ambient gas
        exp["geometry"]["object_width_mm"] = params["width_mm"]
        exp["reconstruction"].update(kind="planar", reference_region="top")
    else:  # blob and column: axisymmetric about the vertical axis through the image centre
        exp["reconstruction"].update(kind="axisymmetric", axis="vertical", axis_px=(cols - 1) / 2.0)
    return {k: v for k, v in exp.items() if v}


SYNTH_EPILOG = """\b
Examples:
  bos synth --field hot-column --delta-t-k 30 --out pairs --name column
  bos run pairs/column_experiment.toml      # process it; compare with pairs/column_truth.npz
  bos synth --field uniform --dx-px 0.25 --no-noise --format tiff --rows 512 --cols 512
  bos synth --field planar-layer --object-width-mm 150 --dot-fill 0.4 --json"""


def register(app: typer.Typer) -> None:
    @app.command("synth", epilog=SYNTH_EPILOG)
    @handle_errors
    def synth(
        field: choice_type("Field", FIELDS) = typer.Option("gaussian-blob", "--field", help="known field"),
        out: Path = typer.Option(Path("."), "--out", help="output directory (must exist)"),
        name: str = typer.Option("synthetic", "--name", help="base name of the output files"),
        rows: int = typer.Option(1024, "--rows", help="image height [px]"),
        cols: int = typer.Option(1024, "--cols", help="image width [px]"),
        dot_px: float = typer.Option(2.5, "--dot-px", help="dot e^-2 diameter [px]"),
        dot_fill: float = typer.Option(0.5, "--dot-fill", help="fraction of the background area covered by dots"),
        old_density: Optional[float] = typer.Option(None, "--density", hidden=True,
                                                    help="deprecated spelling of --dot-fill"),
        contrast: float = typer.Option(1.0, "--contrast", help="dot amplitude scale (0-1.5)"),
        seed: int = typer.Option(0, "--seed", help="random seed of dots and noise"),
        bit_depth: int = typer.Option(12, "--bit-depth", help="camera bit depth (8-16)"),
        noise: bool = typer.Option(True, "--noise/--no-noise", help="photon shot noise and read noise"),
        full_well: float = typer.Option(20000.0, "--full-well", help="electrons at full scale"),
        read_noise: float = typer.Option(5.0, "--read-noise", help="read noise [electrons rms]"),
        blur_px: float = typer.Option(0.0, "--blur-px", help="Gaussian blur spot e^-2 diameter [px]"),
        shift_y_px: float = typer.Option(0.0, "--camera-shift-y-px", help="global camera shift, y (down) [px]"),
        shift_x_px: float = typer.Option(0.0, "--camera-shift-x-px", help="global camera shift, x [px]"),
        fmt: choice_type("ImageFormat", FORMATS) = typer.Option("png", "--format", help="image format (16-bit)"),
        dy_px: float = typer.Option(0.0, "--dy-px", help="uniform field: displacement y [px]"),
        dx_px: float = typer.Option(0.5, "--dx-px", help="uniform field: displacement x [px]"),
        amplitude: float = typer.Option(-5e-5, "--amplitude", help="blob/layer: index excess n - n0 at the centre"),
        radius_mm: float = typer.Option(15.0, "--radius-mm", help="blob/column 1/e radius, or layer 1/e half-thickness [mm]"),
        width_mm: float = key_option("geometry.object_width_mm", default=200.0,
                                     help="planar layer: width along the line of sight [mm]"),
        delta_t_k: float = typer.Option(30.0, "--delta-t-k", help="hot column: temperature rise on the axis [K]"),
        gas: str = typer.Option("air", "--gas", help="hot column: gas"),
        focal_mm: float = key_option("camera.focal_length_mm", default=50.0),
        pixel_um: float = key_option("camera.pixel_pitch_um", default=5.0),
        f_number: float = key_option("camera.f_number", default=8.0),
        z_a_m: float = key_option("geometry.camera_to_object_m", default=1.0),
        z_d_m: float = key_option("geometry.object_to_background_m", default=0.5),
        wavelength_nm: float = key_option("camera.wavelength_nm", default=550.0),
        as_json: bool = typer.Option(False, "--json", help="print a JSON summary"),
    ) -> None:
        """Render a synthetic reference + measurement pair with its exact displacement.

        Writes NAME_reference / NAME_measurement images, NAME_truth.npz (displacement, deflection,
        gas density and temperature) and NAME_experiment.toml that processes the pair with `bos run`.
        """
        from bos import config
        from bos import synthetic as syn
        from bos.errors import DataFileError, InputError
        from bos.optics import Rig

        field, fmt = plain(field), plain(fmt)
        if old_density is not None:
            typer.echo("warning: --density is deprecated (it is the dot fill fraction, not gas density); "
                       "use --dot-fill", err=True)
            dot_fill = old_density
        overrides = key_overrides(synth, locals())  # checks the rig values against the experiment-file ranges
        config.load_experiment(None, overrides=overrides)
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
        pair = syn.render_pair(shape=shape, displacement=displacement, dot_diameter_px=dot_px, density=dot_fill,
                               contrast=contrast, seed=seed, noise=noise, bit_depth=bit_depth, blur_px=blur_px,
                               camera_shift=(shift_y_px, shift_x_px), full_well=full_well, read_noise=read_noise)
        seconds = time.perf_counter() - t0

        ext = ".png" if fmt == "png" else ".tif"
        ref_path, meas_path = out / f"{name}_reference{ext}", out / f"{name}_measurement{ext}"
        truth_path = out / f"{name}_truth.npz"
        exp_path = out / f"{name}_experiment.toml"
        y_m, x_m = syn.pixel_to_object(np.arange(rows), np.arange(cols), shape=shape, rig=rig)
        truth: dict[str, Any] = dict(displacement_y_px=pair.displacement_y, displacement_x_px=pair.displacement_x,
                                     y_m=y_m, x_m=x_m, sensitivity_px_per_rad=rig.sensitivity_px_per_rad,
                                     object_pixel_m=rig.object_pixel_m, camera_shift_px=np.array([shift_y_px, shift_x_px]))
        if deflection is not None:
            ey, ex = deflection(y_m[:, None], x_m[None, :])
            truth.update(deflection_y_rad=np.broadcast_to(ey, shape), deflection_x_rad=np.broadcast_to(ex, shape))
        truth.update(truth_fields(field, params=params, y_m=y_m, x_m=x_m))
        exp_data = experiment_for(field, rig=rig, shape=shape, params=params, name=name,
                                  files=(ref_path.name, meas_path.name), camera_shift=(shift_y_px, shift_x_px))
        exp_text = config.dumps_toml(exp_data, header=f"written by bos synth for {ref_path.name} / {meas_path.name}\n"
                                     f"the exact fields are in {truth_path.name}")
        _write_image(ref_path, pair.reference)
        _write_image(meas_path, pair.measurement)
        from bos._io import atomic_path

        with atomic_path(truth_path) as tmp:
            with open(tmp, "wb") as fh:
                np.savez_compressed(fh, **truth)
        with atomic_path(exp_path) as tmp:
            Path(tmp).write_text(exp_text, encoding="utf-8")

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
            "files": [str(ref_path), str(meas_path), str(truth_path), str(exp_path)],
        }
        if as_json:
            emit_json(summary)
        else:
            typer.echo(f"bos synth: {field} field, {rows}x{cols} px, {pair.meta['n_dots']} dots, "
                       f"max |d| = {summary['max_displacement_px']:.4g} px (rendered in {seconds:.1f} s)")
            for f in summary["files"]:
                typer.echo(f"  {f}")
