"""Generate the bundled demo data (our own invented scenarios, synthetic forward model).

Two bench-top scenes photographed against a printed random-dot sheet:

``plume``
    The hot plume rising above a soldering-iron tip: an axisymmetric hot
    column with a vertical axis (peak temperature rise 75 K near the bottom
    of the picture, decaying and widening upward).
``plate``
    A heated vertical plate in a span-wise two-dimensional enclosure
    (100 mm deep along the line of sight): a planar thermal boundary layer
    on the right-hand face of the plate (wall 30 K above ambient, thickness
    growing with height like x^(1/4) from the leading edge).  The plate
    itself is opaque and masked (``mask.png``).

For each scene the script writes 16-bit greyscale PNG reference and
measurement images, an experiment TOML, and ``truth.npz`` with the exact
temperature field [K] and the flow displacement [px] (camera shift not
included) on every 4th pixel, plus the object-plane coordinates [m], so the
recovered field can be checked (``bos demo`` does).  In the plate scene the
camera is nudged by (0.35, -0.25) px between the pictures; the experiment
file removes that shift using the ambient region on the right.

Forward model: temperature -> density (ideal gas at the medium's pressure,
:class:`bos.media.Medium`) -> refractive index (Gladstone-Dale) ->
deflection = (1/n0) * gradient of the line-of-sight integral of n
(planar: width * gradient; axisymmetric: numerical quadrature along the
line of sight, then central differences on the pixel grid) -> sensor
displacement ``d = -(M Z_D / pitch) * eps`` (docs/architecture.md) ->
analytic rendering of the dot background (:func:`bos.synthetic.render_pair`,
16-bit, shot + read noise).  Fixed seeds, so rerunning reproduces the files.

Usage::

    python datasets/make_demo.py [OUTDIR] [--rows R --cols C]
"""

from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np

from bos import synthetic
from bos._io import atomic_path
from bos.media import Medium
from bos.optics import Rig

HERE = Path(__file__).resolve().parent
DEFAULT_SHAPE = (600, 800)
TRUTH_STRIDE = 4

# Rig shared by both scenes except the distances (SI).
FOCAL_M = 0.050
PITCH_M = 5.0e-6
F_NUMBER = 16.0
WAVELENGTH_M = 550e-9
T_AMBIENT_K = 295.15
PRESSURE_PA = 101325.0

SCENES = {
    "plume": {
        "z_a_m": 0.5, "z_d_m": 0.7, "seed": 11,
        "delta_t_k": 75.0,          # peak temperature rise at the bottom edge
        "sigma_bottom_m": 3.5e-3,   # 1/e radius of the temperature profile at the bottom edge
        "growth": 0.12,             # radius growth per metre of height (d sigma / d height)
        "decay_m": 0.06,            # height over which the centreline rise falls by 1/e
    },
    "plate": {
        "z_a_m": 0.8, "z_d_m": 0.2, "seed": 23,
        "width_m": 0.100,           # enclosure depth along the line of sight
        "wall_dt_k": 30.0,          # wall temperature above ambient
        "wall_col_frac": 0.18,      # plate face position as a fraction of the image width
        "delta_m": 4.0e-3,          # e-folding thickness of the layer at mid height
        "leading_edge_m": 0.08,     # distance of the leading edge below the bottom edge
        "camera_shift_px": (0.35, -0.25),  # the tripod was nudged between the two pictures
    },
}


def medium() -> Medium:
    return Medium(gas="air", wavelength_m=WAVELENGTH_M, pressure_pa=PRESSURE_PA, temperature_k=T_AMBIENT_K)


def rig(scene: str, shape) -> Rig:
    s = SCENES[scene]
    return Rig(focal_length_m=FOCAL_M, pixel_pitch_m=PITCH_M, f_number=F_NUMBER, z_a_m=s["z_a_m"],
               z_d_m=s["z_d_m"], sensor_px=tuple(shape), wavelength_m=WAVELENGTH_M)


def object_grid(r: Rig, shape) -> tuple[np.ndarray, np.ndarray]:
    """Object-plane coordinates [m] of pixel rows and columns (architecture.md; y down)."""
    rows, cols = shape
    p = r.object_pixel_m
    return (np.arange(rows) - (rows - 1) / 2) * p, (np.arange(cols) - (cols - 1) / 2) * p


def index_of(temperature_k: np.ndarray, med: Medium) -> np.ndarray:
    return med.index_from_density(med.density_from_temperature(temperature_k))


# ----------------------------------------------------------------------------- plume


def plume_temperature(r_m, y_m, y_bottom_m) -> np.ndarray:
    """Temperature [K] of the plume at radius r and object-plane height y (y down)."""
    s = SCENES["plume"]
    height = y_bottom_m - y_m                      # >= 0, grows upward
    sigma = s["sigma_bottom_m"] + s["growth"] * height
    rise = s["delta_t_k"] * np.exp(-height / s["decay_m"])
    return T_AMBIENT_K + rise * np.exp(-(r_m / sigma) ** 2)


def plume_deflection(x_m, y_m, med: Medium, *, nz: int = 1200):
    """Deflection (eps_y, eps_x) [rad] of the plume on the pixel grid.

    The line-of-sight integral P(x, y) = int (n - n0) dz is evaluated with the
    trapezoid rule on |z| <= 10 sigma (nz points, index perturbation below
    1e-40 beyond), then eps = grad(P) / n0 by second-order central differences.
    """
    n0 = med.ambient_index
    y_bottom = y_m[-1]
    s = SCENES["plume"]
    proj = np.empty((len(y_m), len(x_m)))
    for i, y in enumerate(y_m):
        sigma = s["sigma_bottom_m"] + s["growth"] * (y_bottom - y)
        z = np.linspace(0.0, 10.0 * sigma, nz)
        r = np.hypot(x_m[:, None], z[None, :])
        dn = index_of(plume_temperature(r, y, y_bottom), med) - n0
        proj[i] = 2.0 * np.trapezoid(dn, z, axis=1)
    g_y, g_x = np.gradient(proj, y_m, x_m)
    return g_y / n0, g_x / n0


# ----------------------------------------------------------------------------- plate


def plate_geometry(x_m, y_m):
    s = SCENES["plate"]
    x_wall = x_m[0] + s["wall_col_frac"] * (x_m[-1] - x_m[0])
    # distance from the leading edge (below the picture), y down
    from_edge = (y_m[-1] - y_m) + s["leading_edge_m"]
    mid = (y_m[-1] - y_m[0]) / 2 + s["leading_edge_m"]
    delta = s["delta_m"] * (from_edge / mid) ** 0.25
    return x_wall, delta


def plate_temperature(x_m, y_m, *, clip: bool = True) -> np.ndarray:
    """Temperature [K] on the (rows, cols) grid; the plate (x < wall) is at wall temperature.

    ``clip=False`` continues the layer profile into the plate (used only to
    take centred differences right at the wall).
    """
    s = SCENES["plate"]
    x_wall, delta = plate_geometry(x_m, y_m)
    gap = x_m[None, :] - x_wall
    if clip:
        gap = np.clip(gap, 0.0, None)
    return T_AMBIENT_K + s["wall_dt_k"] * np.exp(-gap / delta[:, None])


def plate_deflection(x_m, y_m, med: Medium):
    """Deflection [rad] of the span-wise uniform layer: eps = W grad(n) / n0."""
    n = index_of(plate_temperature(x_m, y_m, clip=False), med)
    g_y, g_x = np.gradient(n, y_m, x_m)
    w = SCENES["plate"]["width_m"]
    return w * g_y / med.ambient_index, w * g_x / med.ambient_index


# ----------------------------------------------------------------------------- writing


def _publish(path: Path) -> None:
    path.chmod(0o644)  # atomic_path's temporary files are private (0600)


def _write_png(path: Path, img: np.ndarray) -> None:
    import imageio.v3 as iio

    with atomic_path(path) as tmp:
        iio.imwrite(tmp, img, extension=".png")
    _publish(path)


def _write_png16(path: Path, counts: np.ndarray) -> None:
    _write_png(path, np.clip(np.rint(counts), 0, 65535).astype(np.uint16))


def _write_png8(path: Path, mask: np.ndarray) -> None:
    _write_png(path, mask.astype(np.uint8) * 255)


TOML_HEAD = """# {title}
# Invented demo scene, rendered by datasets/make_demo.py (synthetic forward model, seed {seed}).
# Paths are relative to this file.

[camera]
focal_length_mm = {f_mm:g}
pixel_pitch_um = {pitch_um:g}
f_number = {n:g}
sensor_px = [{rows}, {cols}]
wavelength_nm = {wl_nm:g}

[geometry]
camera_to_object_m = {z_a:g}
object_to_background_m = {z_d:g}
{width_line}
[medium]
gas = "air"
temperature_k = {t0:g}
pressure_pa = {p:g}

[source]
kind = "{source_kind}"
illumination = "led"
description = "{description}"

[images]
reference = "reference.png"
measurement = "measurement.png"
{mask_line}
[processing]
method = "correlation"
window_px = 64
final_window_px = 16
passes = 3
overlap = 0.5

[reconstruction]
{recon}
[output]
directory = "output"
name = "{name}"
profile = {profile}
"""


def _toml(scene: str, shape, r: Rig, *, extra: dict) -> str:
    rows, cols = shape
    return TOML_HEAD.format(
        seed=SCENES[scene]["seed"], f_mm=FOCAL_M * 1e3, pitch_um=PITCH_M * 1e6, n=F_NUMBER, rows=rows, cols=cols,
        wl_nm=WAVELENGTH_M * 1e9, z_a=r.z_a, z_d=r.z_d, t0=T_AMBIENT_K, p=PRESSURE_PA, name=scene, **extra)


def _fmt_mm(v_m: float) -> str:
    return f"{v_m * 1e3:.2f}"


def make_scene(scene: str, out_dir: Path, *, shape=DEFAULT_SHAPE) -> Path:
    """Render one scene into ``out_dir/scene``; return the experiment file path."""
    d = Path(out_dir) / scene
    d.mkdir(parents=True, exist_ok=True)
    r, med = rig(scene, shape), medium()
    y_m, x_m = object_grid(r, shape)
    mask = None
    if scene == "plume":
        yy, xx = np.meshgrid(y_m, x_m, indexing="ij")
        truth_t = plume_temperature(np.abs(xx), yy, y_m[-1])
        eps_y, eps_x = plume_deflection(x_m, y_m, med)
        y_prof = y_m[int(0.8 * (len(y_m) - 1))]
        extra = dict(
            title="Hot plume above a soldering-iron tip (axisymmetric, vertical axis)",
            width_line="", mask_line="", source_kind="plume",
            description="soldering iron, tip just below the bottom edge of the picture",
            recon=f'kind = "axisymmetric"\naxis = "vertical"\naxis_px = {(shape[1] - 1) / 2:g}\n',
            profile=f"[[{_fmt_mm(x_m[0] * 0.6)}, {_fmt_mm(y_prof)}], [{_fmt_mm(x_m[-1] * 0.6)}, {_fmt_mm(y_prof)}]]",
        )
    elif scene == "plate":
        truth_t = plate_temperature(x_m, y_m)
        eps_y, eps_x = plate_deflection(x_m, y_m, med)
        x_wall, _ = plate_geometry(x_m, y_m)
        mask = np.broadcast_to(x_m[None, :] < x_wall, shape).copy()
        # behind the opaque plate nothing is seen; continue the wall value so the
        # rendered mapping stays smooth (the pixels are overwritten below)
        wall_col = int(np.argmax(~mask[0]))
        eps_y[:, :wall_col] = eps_y[:, wall_col:wall_col + 1]
        eps_x[:, :wall_col] = eps_x[:, wall_col:wall_col + 1]
        y_prof = y_m[len(y_m) // 2]
        extra = dict(
            title="Heated vertical plate in a span-wise 2-D enclosure (planar boundary layer)",
            width_line=f"object_width_mm = {SCENES['plate']['width_m'] * 1e3:g}\n",
            mask_line='mask = "mask.png"\n', source_kind="hot-air",
            # the camera nudge is found by the default flow-aware fit in the reference region
            description="electrically heated aluminium plate, 100 mm deep enclosure with glass side walls",
            recon='kind = "planar"\nreference_region = "right"\nboundary = "neumann"\n',
            profile=f"[[{_fmt_mm(x_wall)}, {_fmt_mm(y_prof)}], [{_fmt_mm(x_m[-1])}, {_fmt_mm(y_prof)}]]",
        )
    else:
        raise ValueError(f"unknown scene {scene!r}")
    scale = r.sensitivity_px_per_rad  # M * Z_D / pitch  [px/rad]
    d_y, d_x = -scale * eps_y, -scale * eps_x
    pair = synthetic.render_pair(shape=shape, displacement=(d_y, d_x), dot_diameter_px=2.8, density=0.55,
                                 seed=SCENES[scene]["seed"], bit_depth=16, noise=True,
                                 camera_shift=SCENES[scene].get("camera_shift_px", (0.0, 0.0)))
    ref, meas = pair.reference, pair.measurement
    if mask is not None:
        # the opaque plate: dark, textureless, the same in both pictures
        dark = 0.04 * 65535
        ref = np.where(mask, dark, ref)
        meas = np.where(mask, dark, meas)
        _write_png8(d / "mask.png", mask)
    _write_png16(d / "reference.png", ref)
    _write_png16(d / "measurement.png", meas)
    with atomic_path(d / "truth.npz") as tmp:
        with open(tmp, "wb") as fh:
            # every TRUTH_STRIDE-th pixel keeps the file small; the fields are smooth
            # on that scale (interpolate linearly to compare)
            k = TRUTH_STRIDE
            np.savez_compressed(fh, temperature_k=truth_t[::k, ::k].astype(np.float32), y_m=y_m[::k], x_m=x_m[::k],
                                displacement_y=d_y[::k, ::k].astype(np.float32),
                                displacement_x=d_x[::k, ::k].astype(np.float32),
                                ambient_temperature_k=T_AMBIENT_K, stride_px=k)
    _publish(d / "truth.npz")
    toml_path = d / "experiment.toml"
    with atomic_path(toml_path) as tmp:
        tmp.write_text(_toml(scene, shape, r, extra=extra), encoding="utf-8")
    _publish(toml_path)
    peak = float(np.hypot(d_y, d_x).max())
    print(f"{scene}: {shape[0]}x{shape[1]} px, object pixel {r.object_pixel_m * 1e6:.1f} um, "
          f"peak |d| {peak:.2f} px, peak dT {truth_t.max() - T_AMBIENT_K:.1f} K -> {d}")
    return toml_path


def generate(out_dir: Path = HERE.parent / "bos" / "data" / "demo", *, shape=DEFAULT_SHAPE, scenes=tuple(SCENES)) -> list[Path]:
    """Render every scene; return the experiment files."""
    return [make_scene(s, out_dir, shape=shape) for s in scenes]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("out", nargs="?", default=str(HERE.parent / "bos" / "data" / "demo"))
    ap.add_argument("--rows", type=int, default=DEFAULT_SHAPE[0])
    ap.add_argument("--cols", type=int, default=DEFAULT_SHAPE[1])
    ap.add_argument("--scene", action="append", choices=sorted(SCENES))
    args = ap.parse_args()
    generate(Path(args.out), shape=(args.rows, args.cols), scenes=tuple(args.scene or SCENES))


if __name__ == "__main__":
    main()
