"""Phase-resolved processing of a periodic source: frames -> lock-in -> complex pressure -> files.

The path of ``bos periodic``:

1. :func:`frames_from_table` / :func:`frames_from_list` - the frames and the
   source phase of each (a phase list, a frame rate and the source frequency
   via the aliasing relation, or time stamps).
2. :func:`run_periodic` - every frame against the experiment's reference
   through the shared per-frame stages (:func:`bos.stages.inputs_from_arrays`
   + :func:`bos.stages.measure_displacement`); a per-pixel lock-in fit
   (:func:`bos.periodic.lockin_fit`) of both displacement components; the
   real and imaginary parts of the first harmonic reconstructed separately
   with :func:`bos.stages.reconstruct` (the chain deflection -> index ->
   density is linear) and turned into the complex pressure P = c^2 rho'
   (:func:`bos.acoustics.complex_pressure`); standing-wave ratio, nodes and
   antinodes along the beam (:mod:`bos.acoustics`).
3. :func:`save_periodic` - ``<name>-periodic.nc`` (same coordinate/variable
   convention as :func:`bos.output.result_variables`), a profile CSV, the SPL
   and phase maps, a profile figure and a GIF of one reconstructed cycle, all
   written as one :class:`bos._io.OutputSet` (an earlier good set survives a
   failed run).
"""

from __future__ import annotations

import csv
import dataclasses
import math
import warnings as warnings_module
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .config import Experiment
from .errors import ConfigError, DataFileError, InputError

PHASE_COLUMNS = ("frame", "index", "phase_deg", "time_s")
CYCLE_FRAMES = 24  # frames of the animated cycle


# ---------------------------------------------------------------------------
# Frames and phases
# ---------------------------------------------------------------------------


@dataclass
class FrameSet:
    """The frames of a phase-resolved sequence and the source phase of each.

    Attributes
    ----------
    paths : list of Path
        Image file of each frame.
    indices : list of int or None
        Frame inside a multi-frame file (TIFF page, video frame), or None.
    phases_rad : ndarray
        Source phase of each frame [rad], in [0, 2 pi).
    origin : str
        ``"phase list"``, ``"frame rate"`` or ``"time stamps"``.
    table : Path or None
        The CSV the frames came from.
    notes : list of str
        How the phases were obtained (for the summary).
    warnings : list of str
        Doubts about the phases (e.g. a phase step near 180 deg).
    """

    paths: list[Path]
    indices: list[int | None]
    phases_rad: np.ndarray
    origin: str
    table: Path | None = None
    notes: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)

    def __len__(self) -> int:
        return len(self.paths)


def read_frame_table(path: str | Path) -> dict[str, list[str]]:
    """Read a CSV with a header naming some of ``frame, index, phase_deg, time_s``.

    Raises
    ------
    DataFileError
        The file is missing or unreadable.
    InputError
        No header, an unknown or repeated column, a row of a different length
        than the header, an empty value, or no rows.
    """
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise DataFileError(f"phase list not found: {p}") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise DataFileError(f"cannot read the phase list {p}: {exc}") from None
    rows = [r for r in csv.reader(text.splitlines()) if r and any(c.strip() for c in r)
            and not r[0].lstrip().startswith("#")]
    if not rows:
        raise InputError(f"{p.name} is empty: expected a header such as frame,phase_deg and one row per frame")
    header = [h.strip().lower() for h in rows[0]]
    unknown = [h for h in header if h not in PHASE_COLUMNS]
    if unknown or len(set(header)) != len(header):
        raise InputError(f"{p.name} header {','.join(rows[0])!r} must name columns from "
                         f"{', '.join(PHASE_COLUMNS)} once each (e.g. frame,phase_deg)")
    table: dict[str, list[str]] = {h: [] for h in header}
    for n, row in enumerate(rows[1:], start=2):
        if len(row) != len(header):
            raise InputError(f"{p.name} line {n} has {len(row)} value(s) but the header has {len(header)} "
                             f"({','.join(header)}): the columns differ in length")
        for h, v in zip(header, row):
            if not v.strip():
                raise InputError(f"{p.name} line {n}: empty {h} value")
            table[h].append(v.strip())
    if not table[header[0]]:
        raise InputError(f"{p.name} has a header but no frames")
    return table


def _numbers(table: dict[str, list[str]], column: str, name: str) -> np.ndarray:
    try:
        out = np.array([float(v) for v in table[column]])
    except ValueError:
        raise InputError(f"{name}: column {column} must hold numbers") from None
    if not np.all(np.isfinite(out)):
        raise InputError(f"{name}: column {column} must hold finite numbers")
    return out


def _phases(table: dict[str, list[str]], n: int, *, name: str, frequency_hz: float | None,
            frame_rate_hz: float | None) -> tuple[np.ndarray, str, list[str]]:
    """Phases of n frames from the table's phase_deg or time_s, or from a frame rate."""
    from . import periodic

    if "phase_deg" in table:
        notes = [] if frame_rate_hz is None else ["the phase list was used; --frame-rate-hz ignored"]
        return periodic.phases_from_list(_numbers(table, "phase_deg", name)), "phase list", notes
    if "time_s" in table:
        if frequency_hz is None:
            raise InputError(f"{name} gives time stamps: the source frequency is needed "
                             "(--frequency-hz or source.frequency_hz)")
        ph = periodic.phases_from_timestamps(_numbers(table, "time_s", name), frequency_hz=frequency_hz)
        return ph, "time stamps", [f"phases from time stamps at {frequency_hz:g} Hz"]
    if frame_rate_hz is None or frequency_hz is None:
        raise InputError(f"{name} has no phase_deg or time_s column: give the frame rate and the source "
                         "frequency (--frame-rate-hz, --frequency-hz or source.frequency_hz)")
    ph = periodic.phases_from_frame_rate(n, frequency_hz=frequency_hz, frame_rate_hz=frame_rate_hz)
    a = periodic.aliasing(frequency_hz, frame_rate_hz)
    notes = [f"phases from the frame rate: {frame_rate_hz:g} fps, {frequency_hz:g} Hz source, "
             f"{a.phase_step_deg:+.4g} deg per frame"]
    return ph, "frame rate", notes


def _rate_warnings(origin: str, frequency_hz: float | None, frame_rate_hz: float | None) -> list[str]:
    from . import periodic

    if origin != "frame rate":
        return []
    a = periodic.aliasing(frequency_hz, frame_rate_hz)
    if a.near_half_rate:
        return [f"phase step {a.phase_step_deg:+.1f} deg per frame is close to 180 deg: the sense of the phase "
                "(direction of travel) is unreliable; choose a frame rate nearer a subharmonic of the source"]
    return []


def _check_frames(paths: list[Path], name: str) -> None:
    missing = sorted({str(p) for p in paths if not p.is_file()})
    if missing:
        shown = ", ".join(Path(m).name for m in missing[:3]) + (" ..." if len(missing) > 3 else "")
        raise InputError(f"{name} names {len(missing)} frame file(s) that do not exist: {shown}")


def _frame_list(source: Path) -> tuple[list[Path], list[int | None], dict[str, list[str]]]:
    """Frames named by a CSV (column frame, optional index) or all frames of a multi-frame file."""
    from . import images

    if source.suffix.lower() in (".csv", ".txt"):
        table = read_frame_table(source)
        if "frame" not in table:
            raise InputError(f"{source.name} needs a frame column (image paths relative to the file), "
                             "e.g. frame,phase_deg")
        paths = []
        for v in table["frame"]:
            f = Path(v).expanduser()
            paths.append(f if f.is_absolute() else source.parent / f)
        indices: list[int | None] = [None] * len(paths)
        if "index" in table:
            idx = _numbers(table, "index", source.name)
            if np.any(idx < 0) or np.any(idx != np.round(idx)):
                raise InputError(f"{source.name}: column index must hold frame numbers 0, 1, 2 ...")
            indices = [int(i) for i in idx]
        _check_frames(paths, source.name)
        return paths, indices, table
    if not source.is_file():
        raise InputError(f"frame file not found: {source}")
    n = int(images.read_image(source, frame=0).n_frames or 1)
    return [source] * n, list(range(n)), {}


def frames_from_table(csv_path: str | Path, *, frequency_hz: float | None = None,
                      frame_rate_hz: float | None = None) -> FrameSet:
    """Frames listed in a CSV (column ``frame`` = image path relative to the CSV).

    The phase of each frame comes from a ``phase_deg`` column, else a
    ``time_s`` column (with the source frequency), else from the frame rate
    and the source frequency (rows in acquisition order, one frame period
    apart).  An optional ``index`` column picks a frame in a multi-frame file.

    Raises
    ------
    InputError
        Bad table, frames that do not exist, fewer than 3 distinct phases,
        missing frequency/rate, or a frame rate that locks to the source.
    """
    return frames_from_list(csv_path, frequency_hz=frequency_hz, frame_rate_hz=frame_rate_hz)


def frames_from_list(frames: str | Path, *, phases_csv: str | Path | None = None, frequency_hz: float | None = None,
                     frame_rate_hz: float | None = None) -> FrameSet:
    """Frames from a CSV (``frame`` column) or a multi-frame file (TIFF stack, video).

    Phases: from ``phases_csv`` (columns ``phase_deg`` or ``time_s`` only,
    one row per frame in order; it must have exactly as many rows as there
    are frames), else from the frame CSV's own ``phase_deg``/``time_s``
    column, else from ``frame_rate_hz`` and ``frequency_hz``.

    Raises
    ------
    InputError
        A phase list of a different length, frames that do not exist, no
        phase information, fewer than 3 distinct phases, a locked rate.
    """
    from . import periodic

    src = Path(frames)
    paths, indices, table = _frame_list(src)
    table_path = src if table else None
    name = src.name
    if phases_csv is not None:
        pc = Path(phases_csv)
        ptable = read_frame_table(pc)
        if "frame" in ptable or "index" in ptable:
            raise InputError(f"{pc.name} names frames while the frames come from {src.name}: "
                             "give the phases only (phase_deg or time_s), one row per frame")
        rows = len(next(iter(ptable.values())))
        if rows != len(paths):
            raise InputError(f"the phase list {pc.name} has {rows} row(s) but {src.name} gives {len(paths)} "
                             "frame(s): one phase per frame is needed")
        table, table_path, name = ptable, pc, pc.name
    phases, origin, notes = _phases(table, len(paths), name=name, frequency_hz=frequency_hz,
                                    frame_rate_hz=frame_rate_hz)
    periodic.check_phases(phases)
    return FrameSet(paths=paths, indices=indices, phases_rad=phases, origin=origin, table=table_path, notes=notes,
                    warnings=_rate_warnings(origin, frequency_hz, frame_rate_hz))


# ---------------------------------------------------------------------------
# Processing
# ---------------------------------------------------------------------------


@dataclass
class PeriodicResult:
    """Everything computed by :func:`run_periodic`.

    Attributes
    ----------
    frames : FrameSet
    lockin_y, lockin_x : bos.periodic.LockinResult
        Per-pixel fits of the displacement components [px].
    reference_run : bos.stages.RunResult
        The real part of the first harmonic as a run (grid, coordinates,
        flags, reconstruction of Re P); its ``attrs`` carry the provenance.
    density_imag : bos.reconstruct.DensityField
        Reconstruction of the imaginary part.
    pressure : bos.acoustics.ComplexPressure
        First-harmonic pressure with uncertainties.
    swr, reflection : ndarray
        Local standing-wave ratio and |reflection coefficient| maps.
    profile : dict
        ``line_m`` [[x0, y0], [x1, y1]], ``s_m``, ``x_m``, ``y_m``, complex
        ``pressure`` and ``spl_db`` samples along the beam.
    wave : bos.acoustics.StandingWave
        Standing-wave analysis along the profile.
    summary : dict
        JSON-ready numbers (nodes, antinodes, SWR, levels, warnings).
    warnings : list of str
    """

    frames: FrameSet
    lockin_y: Any
    lockin_x: Any
    reference_run: Any
    density_imag: Any
    pressure: Any
    swr: np.ndarray
    reflection: np.ndarray
    profile: dict[str, Any]
    wave: Any
    summary: dict[str, Any]
    warnings: list[str]

    @property
    def y_m(self) -> np.ndarray:
        return self.reference_run.y_m

    @property
    def x_m(self) -> np.ndarray:
        return self.reference_run.x_m


def _read_frame(path: Path, index: int | None):
    from . import images

    with warnings_module.catch_warnings(record=True) as caught:
        warnings_module.simplefilter("always")
        img = images.read_image(path, frame=index)
    return img.data, [" ".join(str(w.message).split()) for w in caught]


def _measure_all(exp: Experiment, frames: FrameSet, progress: Callable[[str, float], None] | None):
    """Displacement of every frame against the reference (shared per-frame stages)."""
    from . import stages, store

    images_cfg = dataclasses.replace(exp.images, measurement=frames.paths[0], measurement_frame=frames.indices[0],
                                     frame=None)
    first = stages.load_inputs(dataclasses.replace(exp, images=images_cfg))
    ref, mask = first.reference, first.mask
    fields = []
    warnings = list(first.warnings)
    for n, (path, idx) in enumerate(zip(frames.paths, frames.indices)):
        if n == 0:
            inputs = first
        else:
            data, w = _read_frame(path, idx)
            warnings += w
            inputs = stages.inputs_from_arrays(ref, data, mask=mask)
        fields.append(stages.measure_displacement(inputs, exp))
        if n and (fields[n].dy.shape != fields[0].dy.shape or not np.array_equal(fields[n].rows, fields[0].rows)):
            raise InputError(f"frame {n} gives another vector grid than frame 0 (images of different size?)")
        if progress is not None:
            progress("displacement", (n + 1) / len(frames))
    sha = dict(first.sha256)
    for path in dict.fromkeys(frames.paths):
        sha[f"frame:{path.name}"] = store.file_sha256(path)
    return first, fields, list(dict.fromkeys(warnings)), sha


def _profile_line(exp: Experiment, p: np.ndarray, y_m: np.ndarray, x_m: np.ndarray,
                  spacing: tuple[float, float]) -> list[list[float]]:
    """The user's output.profile, else the beam axis: through the |P|^2 centroid along the propagation axis."""
    from .acoustics import propagation_axis

    if exp.output.profile:
        return [list(map(float, pt)) for pt in exp.output.profile]
    uy, ux = propagation_axis(p, spacing_m=spacing)
    w = np.where(np.isfinite(p), np.abs(p) ** 2, 0.0)
    yy, xx = np.meshgrid(y_m, x_m, indexing="ij")
    tot = w.sum()
    yc, xc = (float((w * yy).sum() / tot), float((w * xx).sum() / tot)) if tot > 0 else (0.0, 0.0)
    # clip the infinite line through (xc, yc) with direction (ux, uy) to the grid rectangle
    ts = []
    for lo, hi, c, u in ((x_m[0], x_m[-1], xc, ux), (y_m[0], y_m[-1], yc, uy)):
        if abs(u) > 1e-12:
            ts += sorted([(lo - c) / u, (hi - c) / u])
    t0 = max(ts[0::2]) if ts else 0.0
    t1 = min(ts[1::2]) if ts else 0.0
    return [[xc + t0 * ux, yc + t0 * uy], [xc + t1 * ux, yc + t1 * uy]]


def _result_data(coords: dict, variables: dict):
    from .store import ResultData, Variable

    def conv(d):
        return {k: Variable(dims=tuple(v["dims"]), data=v["data"], attrs=dict(v["attrs"])) for k, v in d.items()}

    return ResultData(coords=conv(coords), variables=conv(variables), attrs={})


def _sample(coords: dict, variables: dict, line: list[list[float]], names: tuple[str, ...]) -> dict[str, np.ndarray]:
    from . import store

    data = _result_data(coords, {k: variables[k] for k in names})
    out: dict[str, np.ndarray] = {}
    for name in names:
        prof = store.profile(data, name, start=tuple(line[0]), end=tuple(line[1]))
        out.setdefault("s_m", prof.s_m)
        out.setdefault("x_m", prof.x_m)
        out.setdefault("y_m", prof.y_m)
        out[name] = prof.values
    return out


def _finite(a) -> float | None:
    v = float(a)
    return v if math.isfinite(v) else None


def run_periodic(exp: Experiment, frames: FrameSet, *, harmonics: int = 1,
                 progress: Callable[[str, float], None] | None = None) -> PeriodicResult:
    """Phase-resolved BOS of a periodic sound field.

    Parameters
    ----------
    exp : Experiment
        Rig, medium, reference image (``images.reference``, still air), mask,
        processing and reconstruction (planar with ``geometry.object_width_mm``,
        or axisymmetric), source frequency (optional), output.
    frames : FrameSet
        The measurement frames and their phases.
    harmonics : int
        Harmonics fitted per pixel (>= 1); only the first is reconstructed.
    progress : callable, optional
        ``progress(stage, fraction)``.

    Returns
    -------
    PeriodicResult

    Raises
    ------
    ConfigError
        ``reconstruction.kind = "none"``.
    InputError
        Too few distinct phases, frames of another size, no valid vector.

    References
    ----------
    IEEE Std 1057-2017 (sine fit); Kinsler et al. (2000) (p' = c^2 rho',
    standing-wave ratio); see :mod:`bos.periodic` and :mod:`bos.acoustics`.
    """
    from . import acoustics, periodic, stages
    from .provenance import _medium_dict, _rig_dict, _section_dict, cautions, jsonable

    if exp.reconstruction.kind == "none":
        raise ConfigError("bos periodic reconstructs the pressure: reconstruction.kind must be planar or axisymmetric")
    if exp.reconstruction.kind == "planar" and exp.geometry.object_width_m is None:
        raise ConfigError("missing value: geometry.object_width_mm (depth of the sound beam along the line of sight, "
                          "needed for a planar reconstruction)")
    if len(frames) != frames.phases_rad.size:
        raise InputError(f"{frames.phases_rad.size} phases for {len(frames)} frames: the counts must match")
    n_distinct = periodic.check_phases(frames.phases_rad, harmonics=harmonics)
    rig, medium = exp.rig(), exp.medium_model()
    # one linear operator for both parts and for their uncertainty: uniform weights
    rec_exp = dataclasses.replace(exp, reconstruction=dataclasses.replace(exp.reconstruction, weighted=False))
    first, fields, warnings, sha = _measure_all(exp, frames, progress)
    d0 = fields[0]
    stack = {k: np.stack([getattr(f, k) for f in fields]) for k in ("dy", "dx", "sigma_dy", "sigma_dx")}
    fit_y = periodic.lockin_fit(stack["dy"], frames.phases_rad, harmonics=harmonics, frame_sigma=stack["sigma_dy"])
    fit_x = periodic.lockin_fit(stack["dx"], frames.phases_rad, harmonics=harmonics, frame_sigma=stack["sigma_dx"])
    a_y, a_x = fit_y.first, fit_x.first
    masked = np.asarray(d0.masked, bool)
    invalid = ~masked & ~(np.isfinite(a_y) & np.isfinite(a_x))
    if not (~masked & ~invalid).any():
        raise InputError("no vector has a valid fit over the phases (every grid point lost in some frame)")
    if progress is not None:
        progress("reconstruction", 0.0)
    bad = masked | invalid
    # random error of P: the frames' residual fields through the same linear chain (see the function)
    sig_rho = _residual_density_sigma(rec_exp, frames, (fit_y, fit_x), stack, d0, bad,
                                      shape=first.reference.shape, rig=rig, medium=medium)
    pinv = np.linalg.pinv(periodic._design(frames.phases_rad, harmonics))

    def propagated(sig, row):
        return np.sqrt(np.nansum(pinv[row][:, None, None] ** 2 * np.asarray(sig, float) ** 2, axis=0))

    parts = []
    for part, row in (("real", 1), ("imag", 2)):
        if sig_rho is None:  # no residual dof: per-frame correlation sigmas, Monte Carlo in the reconstruction
            sy, sx = propagated(stack["sigma_dy"], row), propagated(stack["sigma_dx"], row)
        else:  # uncertainty known already: skip the Monte Carlo
            sy = sx = np.zeros(bad.shape)
        dy, dx = getattr(a_y, part), getattr(a_x, part)
        disp = dataclasses.replace(d0, dy=np.where(bad, np.nan, dy), dx=np.where(bad, np.nan, dx),
                                   sigma_dy=np.where(bad, np.nan, sy), sigma_dx=np.where(bad, np.nan, sx),
                                   invalid=invalid.copy(), camera_shift=(0.0, 0.0))
        parts.append((disp, stages.reconstruct(disp, rec_exp, image_shape=first.reference.shape, rig=rig,
                                               medium=medium)))
    (disp_re, (eps_y, eps_x, y_m, x_m, dens_re)), (_, (_, _, _, _, dens_im)) = parts
    if progress is not None:
        progress("reconstruction", 1.0)
    if sig_rho is None:
        sig_rho, pressure_sigma_from = (dens_re.sigma_density, dens_im.sigma_density), "propagated frame sigma"
    else:
        pressure_sigma_from = "frame residuals through the reconstruction"
    pres = acoustics.complex_pressure(dens_re.density, dens_im.density, medium=medium,
                                      sigma_real=sig_rho[0], sigma_imag=sig_rho[1])
    spacing = (float(np.median(np.diff(y_m))) if y_m.size > 1 else rig.object_pixel_m,
               float(np.median(np.diff(x_m))) if x_m.size > 1 else rig.object_pixel_m)
    f_src = exp.source.frequency_hz
    lam_expected = medium.speed_of_sound / f_src if f_src else None
    line = _profile_line(exp, pres.pressure, y_m, x_m, spacing)
    vars_ = {"pressure_real": _field(pres.pressure.real, "Pa", "x"),
             "pressure_imag": _field(pres.pressure.imag, "Pa", "x"),
             "sound_pressure_level": _field(pres.spl_db, "dB", "x"),
             "pressure_sigma": _field(np.hypot(pres.sigma_real, pres.sigma_imag) / math.sqrt(2.0), "Pa", "x")}
    run_re = stages.RunResult(displacement=disp_re, eps_y=eps_y, eps_x=eps_x, density=dens_re, y_m=y_m, x_m=x_m,
                              summary={}, warnings=[], attrs={}, inputs=first)
    grid = {"y": {"dims": ("y",), "data": np.asarray(y_m, float), "attrs": {"units": "m", "long_name": "y (down)"}},
            "x": {"dims": ("x",), "data": np.asarray(x_m, float), "attrs": {"units": "m", "long_name": "x"}}}
    samples = _sample(grid, vars_, line, tuple(vars_))
    p_line = samples["pressure_real"] + 1j * samples["pressure_imag"]
    wave = acoustics.standing_wave_profile(samples["s_m"], p_line, sigma=samples["pressure_sigma"],
                                           wavelength_m=lam_expected)
    lam = lam_expected or wave.wavelength_m
    swr, refl = acoustics.standing_wave_ratio_map(pres.pressure, spacing_m=spacing,
                                                  window_m=lam if np.isfinite(lam) else 8 * max(spacing),
                                                  sigma_real=pres.sigma_real, sigma_imag=pres.sigma_imag)
    (x0, y0), (x1, y1) = line
    length = math.hypot(x1 - x0, y1 - y0) or 1.0
    ux, uy = (x1 - x0) / length, (y1 - y0) / length

    def where(s):
        x, y = x0 + float(s) * ux, y0 + float(s) * uy
        return {"s_m": float(s), "x_m": x, "y_m": y, "row_px": float(np.interp(y, y_m, disp_re.rows)),
                "col_px": float(np.interp(x, x_m, disp_re.cols))}

    nodes = [where(s) for s in wave.nodes_m]
    antinodes = []
    for s in wave.antinodes_m:
        p_abs = acoustics.crest_amplitude(samples["s_m"], p_line, s)
        sig = float(np.interp(s, samples["s_m"], samples["pressure_sigma"]))
        spl, s_spl = acoustics.spl_from_amplitude(p_abs, sig)
        antinodes.append(where(s) | {"spl_db": _finite(spl), "spl_uncertainty_db": _finite(s_spl),
                                     "pressure_amplitude_pa": _finite(p_abs)})
    beam = np.isfinite(pres.amplitude) & (pres.amplitude >= 0.3 * np.nanmax(pres.amplitude))
    snr = np.nanmedian(pres.amplitude[beam] / pres.sigma_amplitude[beam]) if beam.any() else float("nan")
    if np.isfinite(snr) and snr < 3.0:
        warnings.append(f"the first harmonic is weak: median amplitude / uncertainty {snr:.2f} in the beam; "
                        "average more frames or raise the sensitivity (bos strobe, bos plan)")
    if lam_expected and np.isfinite(wave.wavelength_m) and abs(wave.wavelength_m / lam_expected - 1.0) > 0.1:
        warnings.append(f"measured wavelength {wave.wavelength_m * 1e3:.3g} mm differs from c/f = "
                        f"{lam_expected * 1e3:.3g} mm by more than 10 % (frequency, temperature or scale?)")
    warnings += list(frames.warnings)
    # correlation windows average the field: a sinusoid of wavelength lambda keeps sinc(L / lambda)
    window_m = exp.processing.final_window_px * rig.object_pixel_m
    window_db = 20 * math.log10(abs(np.sinc(window_m / lam))) if np.isfinite(lam) and window_m < lam else None
    if window_db is not None and window_db < -0.5:
        warnings.append(f"the {exp.processing.final_window_px} px final window spans {window_m / lam:.2f} wavelength: "
                        f"crests come out about {-window_db:.1f} dB low; use a smaller final_window_px")
    mean_mag = np.hypot(fit_y.mean, fit_x.mean)
    amp_mag = np.sqrt(np.abs(a_y) ** 2 + np.abs(a_x) ** 2)
    summary: dict[str, Any] = {
        "frames": len(frames), "distinct_phases": n_distinct, "phase_origin": frames.origin,
        "harmonics_fitted": int(harmonics), "uncertainty_from": fit_y.uncertainty_source,
        "pressure_uncertainty_from": pressure_sigma_from,
        "reconstruction_weights": "uniform (one linear operator for both parts and their uncertainty)",
        "uncertainty_note": "1-sigma values cover the random frame-to-frame error only; the smoothing of the "
                            "correlation windows (window_attenuation_db) and errors repeated in every frame are "
                            "not included",
        "grid_shape": [int(v) for v in a_y.shape],
        "valid_fraction": float((~masked & ~invalid).sum() / max(1, (~masked).sum())),
        "peak_displacement_amplitude_px": _finite(np.nanmax(amp_mag)),
        "peak_mean_displacement_px": _finite(np.nanmax(mean_mag)),
        "median_displacement_amplitude_uncertainty_px": _finite(np.nanmedian(np.hypot(fit_y.sigma_real[0], fit_x.sigma_real[0]))),
        "peak_pressure_amplitude_pa": _finite(np.nanmax(pres.amplitude)),
        "peak_sound_pressure_level_db": _finite(np.nanmax(pres.spl_db)),
        "median_spl_uncertainty_db_in_beam": _finite(np.nanmedian(pres.sigma_spl_db[beam])) if beam.any() else None,
        "source_frequency_hz": f_src,
        "wavelength_expected_m": lam_expected,
        "wavelength_measured_m": _finite(wave.wavelength_m),
        "window_attenuation_db": window_db,
        "speed_of_sound_m_s": float(medium.speed_of_sound),
        "profile_m": line,
        "standing_wave_ratio": float(wave.standing_wave_ratio),
        "reflection_coefficient": float(wave.reflection),
        "wave_kind": wave.kind,
        "travel_direction": None if wave.direction == 0 else [ux * wave.direction, uy * wave.direction],
        "nodes": nodes,
        "antinodes": antinodes,
        "node_spacing_m": _finite(np.mean(np.diff(wave.nodes_m))) if len(nodes) > 1 else None,
        "phase_notes": list(frames.notes),
    }
    if harmonics > 1:
        h2 = np.sqrt(np.abs(fit_y.amplitude[1]) ** 2 + np.abs(fit_x.amplitude[1]) ** 2)
        summary["second_to_first_harmonic_displacement"] = _finite(np.nanmedian((h2 / amp_mag)[beam])) if beam.any() else None
    warnings = list(dict.fromkeys(warnings + [str(w) for w in (getattr(dens_re, "warnings", None) or [])]))
    summary["warnings"] = warnings
    import bos

    run_re.attrs = {
        "software": "bos-toolkit", "software_version": bos.__version__,
        "experiment_file": str(exp.source_file) if exp.source_file else None,
        "rig": _rig_dict(rig), "medium": _medium_dict(medium),
        "camera": _section_dict(exp.camera), "geometry": _section_dict(exp.geometry),
        "processing": _section_dict(exp.processing), "reconstruction": _section_dict(exp.reconstruction),
        "flow_source": _section_dict(exp.source),
        "periodic": {"frames": [f"{p}" + ("" if i is None else f"#{i}") for p, i in zip(frames.paths, frames.indices)],
                     "phases_deg": np.rad2deg(frames.phases_rad).tolist(), "phase_origin": frames.origin,
                     "phase_table": None if frames.table is None else str(frames.table)},
        "input_sha256": sha, "cautions": cautions(exp), "summary": jsonable(summary),
    }
    run_re.summary, run_re.warnings = summary, warnings
    profile = {"line_m": line, **samples, "pressure": p_line}
    return PeriodicResult(frames=frames, lockin_y=fit_y, lockin_x=fit_x, reference_run=run_re, density_imag=dens_im,
                          pressure=pres, swr=swr, reflection=refl, profile=profile, wave=wave, summary=summary,
                          warnings=warnings)


def _pixels(data, px_attrs: dict, long_name: str) -> dict[str, Any]:
    """A pixel quantity with the same unit attributes as the run file's displacement."""
    return {"dims": ("y", "x"), "data": np.asarray(data, float), "attrs": {**px_attrs, "long_name": long_name}}


#: above this many frames the residual propagation uses random sign combinations instead of every frame
_EXACT_FRAMES = 48
_RANDOM_COMBINATIONS = 24


def _residual_density_sigma(exp: Experiment, frames: FrameSet, fits, stack: dict[str, np.ndarray], d0, bad,
                            *, shape, rig, medium):
    """1-sigma of the real and imaginary density amplitude from the frames' own noise.

    The complex amplitude is a linear combination of the frames, A = sum_k w_k d_k (w_k from the
    least-squares pseudo-inverse), so its random error is sum_k w_k n_k with n_k the noise field of
    frame k.  The fit residuals r_k = d_k - model_k are realisations of n_k with their true spatial
    correlation (overlapping windows, shared texture); each is reconstructed with the same linear
    chain (unweighted), and Var(Re rho) = n/(n-p) sum_k (Re w_k)^2 R(r_k)^2 (likewise Im).  For many
    frames random sign combinations of the residuals are used (wild bootstrap).  Returns None when
    fewer than 2 residual degrees of freedom remain.

    References
    ----------
    Wu, C. F. J. (1986). Jackknife, bootstrap and other resampling methods in regression analysis.
    Ann. Statist. 14:1261-1295 (residual resampling with random signs).
    """
    from . import periodic, stages

    phi = frames.phases_rad
    fit_y, fit_x = fits
    h = fit_y.amplitude.shape[0]
    n, p = phi.size, 2 * h + 1
    if n - p < 2:
        return None
    design = periodic._design(phi, h)
    weights = np.linalg.pinv(design)          # (p, n): coef = weights @ d
    w_re, w_im = weights[1], weights[2]
    residual = {}
    for comp, fit in (("dy", fit_y), ("dx", fit_x)):
        model = fit.mean[None] + sum((fit.amplitude[j][None] * np.exp(1j * (j + 1) * phi)[:, None, None]).real
                                     for j in range(h))
        r = stack[comp] - model
        residual[comp] = np.where(np.isfinite(r), r, 0.0)
    count = np.maximum(fit_y.n_frames, p + 1)
    scale = count / (count - p)
    zeros = np.where(bad, np.nan, 0.0)
    rho0 = float(medium.ambient_density)

    def density(dy, dx):
        disp = dataclasses.replace(d0, dy=np.where(bad, np.nan, dy), dx=np.where(bad, np.nan, dx), sigma_dy=zeros,
                                   sigma_dx=zeros, invalid=bad & ~np.asarray(d0.masked, bool), camera_shift=(0.0, 0.0))
        dens = stages.reconstruct(disp, exp, image_shape=shape, rig=rig, medium=medium)[4]
        return np.asarray(dens.density, float) - rho0

    var_re = np.zeros(bad.shape)
    var_im = np.zeros(bad.shape)
    if n <= _EXACT_FRAMES:
        for k in range(n):
            rk = density(residual["dy"][k], residual["dx"][k]) ** 2
            var_re += w_re[k] ** 2 * rk
            var_im += w_im[k] ** 2 * rk
    else:
        rng = np.random.default_rng(0)
        for _ in range(_RANDOM_COMBINATIONS):
            for var, w in ((var_re, w_re), (var_im, w_im)):
                c = w * rng.choice((-1.0, 1.0), size=n)
                var += density(np.tensordot(c, residual["dy"], 1), np.tensordot(c, residual["dx"], 1)) ** 2
        var_re /= _RANDOM_COMBINATIONS
        var_im /= _RANDOM_COMBINATIONS
    return np.sqrt(scale * var_re), np.sqrt(scale * var_im)


def _field(data, units: str, long_name: str, **extra) -> dict[str, Any]:
    return {"dims": ("y", "x"), "data": np.asarray(data, float), "attrs": {"units": units, "long_name": long_name, **extra}}


# ---------------------------------------------------------------------------
# Output
# ---------------------------------------------------------------------------


def periodic_paths(exp: Experiment) -> dict[str, Path]:
    """Where :func:`save_periodic` writes each file (base name ``<output.name>-periodic``)."""
    d = exp.resolve(exp.output.directory)
    base = f"{exp.output.name}-periodic"
    return {
        "result": d / f"{base}.nc",
        "profile_csv": d / f"{base}-profile.csv",
        "fig_spl": d / f"{base}-spl.png",
        "fig_phase": d / f"{base}-phase.png",
        "fig_profile": d / f"{base}-profile.png",
        "gif_cycle": d / f"{base}-cycle.gif",
    }


def periodic_variables(result: PeriodicResult, *, gas: str = "air") -> tuple[dict[str, Any], dict[str, Any]]:
    """Coordinates and variables of ``<name>-periodic.nc`` (convention of :func:`bos.output.result_variables`)."""
    from .output import result_variables

    coords, base = result_variables(result.reference_run, gas=gas)
    # follow the run file's conventions: the orientation of y (file y may point up: y components
    # then flip sign) and the attributes of pixel quantities
    y_file = np.asarray(coords["y"]["data"], float)
    flip = y_file.size > 1 and np.allclose(y_file, -np.asarray(result.y_m, float))
    px_attrs = {k: v for k, v in base["displacement_x"]["attrs"].items() if k in ("units", "display_units", "comment")}
    pr = result.pressure
    fy, fx = result.lockin_y, result.lockin_x
    v: dict[str, Any] = {k: base[k] for k in ("masked", "invalid")}
    harmonic = "first harmonic, p(t) = Re(P exp(i phi(t)))"
    v["pressure_amplitude"] = _field(pr.amplitude, "Pa", f"acoustic pressure amplitude |P| (peak, {harmonic})")
    v["pressure_amplitude_uncertainty"] = _field(pr.sigma_amplitude, "Pa", "1-sigma uncertainty of pressure_amplitude")
    v["pressure_phase"] = _field(pr.phase, "rad", "phase arg P of the acoustic pressure relative to source phase 0")
    v["pressure_phase_uncertainty"] = _field(pr.sigma_phase, "rad", "1-sigma uncertainty of pressure_phase")
    v["sound_pressure_level"] = _field(pr.spl_db, "dB", "sound pressure level of the first harmonic "
                                       "(rms, re 20 uPa)", reference_pressure_pa=20e-6)
    v["sound_pressure_level_uncertainty"] = _field(pr.sigma_spl_db, "dB", "1-sigma uncertainty of sound_pressure_level")
    v["pressure_real"] = _field(pr.pressure.real, "Pa", "real part of the complex pressure amplitude P")
    v["pressure_imag"] = _field(pr.pressure.imag, "Pa", "imaginary part of the complex pressure amplitude P")
    v["pressure_real_uncertainty"] = _field(pr.sigma_real, "Pa", "1-sigma uncertainty of pressure_real")
    v["pressure_imag_uncertainty"] = _field(pr.sigma_imag, "Pa", "1-sigma uncertainty of pressure_imag")
    v["density_amplitude"] = _field(np.abs(pr.pressure) / float(result.summary["speed_of_sound_m_s"]) ** 2, "kg m-3",
                                    "density amplitude |rho'| of the first harmonic (|P| / c^2)")
    from .periodic import amplitude_phase

    for comp, fit in (("y", fy), ("x", fx)):
        sign = -1.0 if (comp == "y" and flip) else 1.0
        mag, s_mag, ph, s_ph = amplitude_phase(sign * fit.first, fit.sigma_real[0], fit.sigma_imag[0])
        direction = " (positive along the file's y axis)" if comp == "y" else ""
        v[f"displacement_amplitude_{comp}"] = _pixels(mag, px_attrs, f"first-harmonic amplitude of the displacement "
                                                      f"{comp} component (peak)")
        v[f"displacement_amplitude_{comp}_uncertainty"] = _pixels(s_mag, px_attrs, f"1-sigma uncertainty of "
                                                                  f"displacement_amplitude_{comp}")
        v[f"displacement_phase_{comp}"] = _field(ph, "rad", f"first-harmonic phase of the displacement {comp} "
                                                 f"component{direction}")
        v[f"displacement_phase_{comp}_uncertainty"] = _field(s_ph, "rad", f"1-sigma uncertainty of "
                                                             f"displacement_phase_{comp}")
        v[f"displacement_mean_{comp}"] = _pixels(sign * fit.mean, px_attrs, f"cycle-mean displacement {comp} "
                                                 f"component{direction}")
        v[f"displacement_residual_{comp}"] = _pixels(fit.residual_rms, px_attrs, f"rms residual of the lock-in "
                                                     f"fit, {comp} component")
    v["standing_wave_ratio"] = _field(result.swr, "1", "local standing-wave ratio |P|max/|P|min over one wavelength "
                                      "(1 = travelling wave, large = standing wave; capped at 1000)")
    v["reflection_coefficient"] = _field(result.reflection, "1", "(SWR - 1)/(SWR + 1): 0 travelling, 1 standing")
    v["frames_used"] = {"dims": ("y", "x"), "data": np.asarray(fy.n_frames, np.int32),
                        "attrs": {"units": "1", "long_name": "frames used by the lock-in fit at each point"}}
    return coords, v


def _save_fig(fig, path: Path) -> Path:
    fig.savefig(path, dpi=110, format="png")
    return path


def _mark(ax, summary: dict[str, Any], line) -> None:
    (x0, y0), (x1, y1) = line
    ax.plot([x0 * 1e3, x1 * 1e3], [y0 * 1e3, y1 * 1e3], "k--", lw=0.8)
    for pts, marker, label in ((summary["nodes"], "o", "nodes"), (summary["antinodes"], "^", "antinodes")):
        if pts:
            ax.plot([p["x_m"] * 1e3 for p in pts], [p["y_m"] * 1e3 for p in pts], marker, ms=5, mfc="none",
                    color="cyan" if marker == "o" else "white", label=label)


def _swr_text(summary: dict[str, Any]) -> str:
    from .acoustics import SWR_CAP

    v = float(summary["standing_wave_ratio"])
    return f"≥ {SWR_CAP:.0f}" if v >= SWR_CAP else f"{v:.3g}"


def _figures(result: PeriodicResult, paths: dict[str, Path]) -> None:
    from . import plots
    from .plots import Panel

    pr, s = result.pressure, result.summary
    x_m, y_m = result.x_m, result.y_m
    line = result.profile["line_m"]
    disp = result.reference_run.displacement
    flags = {"masked": np.asarray(disp.masked, bool), "invalid": np.asarray(disp.invalid, bool)}
    fig = plots.build_fields_figure([Panel(pr.spl_db, "SPL (1st harmonic, rms)", "dB re 20 µPa", "magma"),
                                     Panel(pr.sigma_spl_db, "SPL uncertainty (1σ)", "dB", "viridis"),
                                     Panel(result.reflection, "|R| (0 travelling, 1 standing)", "1", "cividis")],
                                    x_m=x_m, y_m=y_m, suptitle=f"sound pressure level: {s['wave_kind']} wave, "
                                                              f"SWR {_swr_text(s)} along the beam",
                                    **flags)
    for ax in fig.axes[:1]:
        _mark(ax, s, line)
    _save_fig(fig, paths["fig_spl"])
    fig = plots.build_fields_figure([Panel(pr.phase, "pressure phase", "rad", "twilight_shifted", True),
                                     Panel(pr.pressure.real, "pressure at source phase 0", "Pa", "RdBu_r", True)],
                                    x_m=x_m, y_m=y_m, suptitle="phase of the first harmonic", **flags)
    for ax in fig.axes[:2]:
        _mark(ax, s, line)
    _save_fig(fig, paths["fig_phase"])
    _profile_figure(result, paths["fig_profile"])
    cycle_gif(result, paths["gif_cycle"])


def _profile_figure(result: PeriodicResult, path: Path) -> None:
    from .plots import ProfileCurve, build_profile_figure

    prof, s = result.profile, result.summary
    p = prof["pressure"]
    phase = np.where(np.isfinite(p), np.unwrap(np.angle(np.where(np.isfinite(p), p, 0))), np.nan)
    curves = [ProfileCurve(np.abs(p), "|P|", "Pa", prof["pressure_sigma"]),
              ProfileCurve(prof["sound_pressure_level"], "SPL", "dB"),
              ProfileCurve(phase, "phase (unwrapped)", "rad")]
    fig = build_profile_figure(prof["s_m"], curves,
                               title=f"along the beam: {s['wave_kind']} wave, SWR {_swr_text(s)}\n"
                                     "dotted: nodes (blue), antinodes (red)")
    for ax in fig.axes:
        for n in s["nodes"]:
            ax.axvline(n["s_m"] * 1e3, color="tab:blue", ls=":", lw=0.8)
        for n in s["antinodes"]:
            ax.axvline(n["s_m"] * 1e3, color="tab:red", ls=":", lw=0.8)
    _save_fig(fig, path)


def cycle_gif(result: PeriodicResult, path: Path, *, n: int = CYCLE_FRAMES) -> Path:
    """Animated GIF of one reconstructed cycle p(phi) = Re(P exp(i phi)), phi over 0..2 pi.

    The axes, colour bar and labels are drawn once with matplotlib; each
    frame pastes the colour-mapped field into the image area and advances a
    phase bar under it (fast: no redraw per frame).
    """
    import imageio.v3 as iio
    from matplotlib import colormaps
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    p = result.pressure.pressure
    vmax = float(np.nanpercentile(np.abs(p), 99.5)) if np.isfinite(p).any() else 1.0
    vmax = vmax or 1.0
    fig = Figure(figsize=(5.0, 4.2), dpi=80)
    canvas = FigureCanvasAgg(fig)
    ax = fig.add_subplot(1, 1, 1)
    x_mm, y_mm = np.asarray(result.x_m) * 1e3, np.asarray(result.y_m) * 1e3
    hx = (x_mm[-1] - x_mm[0]) / max(x_mm.size - 1, 1) / 2
    hy = (y_mm[-1] - y_mm[0]) / max(y_mm.size - 1, 1) / 2
    extent = (x_mm[0] - hx, x_mm[-1] + hx, y_mm[-1] + hy, y_mm[0] - hy)  # y grows downward
    im = ax.imshow(np.ma.masked_invalid(p.real), extent=extent, origin="upper",
                   cmap="RdBu_r", vmin=-vmax, vmax=vmax, interpolation="nearest")
    fig.colorbar(im, ax=ax, shrink=0.85).set_label("acoustic pressure [Pa]")
    ax.set_xlabel("x [mm]")
    ax.set_ylabel("y [mm] (down)")
    ax.set_title("one cycle of the first harmonic (bar: source phase)", fontsize=9)
    fig.tight_layout()
    canvas.draw()
    base = np.asarray(canvas.buffer_rgba())[..., :3].copy()
    h = base.shape[0]
    x0, y0, x1, y1 = (int(round(v)) for v in im.get_window_extent().extents)
    r0, r1, c0, c1 = h - y1, h - y0, x0, x1  # display y runs up, image rows down
    rows = np.clip(((np.arange(r1 - r0) + 0.5) * p.shape[0] / (r1 - r0)).astype(int), 0, p.shape[0] - 1)
    cols = np.clip(((np.arange(c1 - c0) + 0.5) * p.shape[1] / (c1 - c0)).astype(int), 0, p.shape[1] - 1)
    big = p[np.ix_(rows, cols)]
    cmap = colormaps["RdBu_r"]
    frames = []
    bar_row = min(h - 4, r1 + 2)
    for k in range(n):
        phi = 2 * np.pi * k / n
        val = (big * np.exp(1j * phi)).real
        rgb = (cmap(np.clip(0.5 + 0.5 * val / vmax, 0, 1))[..., :3] * 255).astype(np.uint8)
        rgb[~np.isfinite(val)] = 255
        frame = base.copy()
        frame[r0:r1, c0:c1] = rgb
        frame[bar_row:bar_row + 3, c0:c0 + int(round((c1 - c0) * (k + 1) / n))] = (40, 40, 40)
        frames.append(frame)
    iio.imwrite(path, np.stack(frames), extension=".gif", duration=80, loop=0)
    return Path(path)


def write_periodic_profile_csv(result: PeriodicResult, path: Path) -> Path:
    """Profile along the beam, one header line ``name [units]``: s, x, y [m] (the result file's coordinates:
    y up), Re P, Im P, |P| [Pa], phase [rad], SPL [dB], sigma [Pa]."""
    from .output import file_y
    from .store import csv_label, write_table

    prof = result.profile
    p = prof["pressure"]
    cols = {("s_m", "m"): prof["s_m"], ("x_m", "m"): prof["x_m"], ("y_m", "m"): file_y(prof["y_m"]),
            ("pressure_real", "Pa"): p.real, ("pressure_imag", "Pa"): p.imag, ("pressure_amplitude", "Pa"): np.abs(p),
            ("pressure_phase", "rad"): np.angle(p), ("sound_pressure_level", "dB"): prof["sound_pressure_level"],
            ("pressure_sigma", "Pa"): prof["pressure_sigma"]}
    return Path(write_table(path, [csv_label(n, u) for n, u in cols], list(cols.values()), fmt="%.9g"))


#: Published methods of the phase-resolved processing (added to the run's ``references``, one per line).
PERIODIC_REFERENCES = (
    "IEEE Std 1057-2017. IEEE Standard for Digitizing Waveform Recorders (three-parameter least-squares sine fit, "
    "used per pixel as the lock-in fit).",
    "Kinsler, L. E., Frey, A. R., Coppens, A. B. and Sanders, J. V. (2000). Fundamentals of Acoustics, 4th ed. "
    "Wiley (linear acoustics p' = c^2 rho', complex amplitudes, standing-wave ratio).",
    "ISO 1683:2015. Acoustics - Preferred reference values for acoustical and vibratory levels (20 uPa).",
)


def save_periodic(result: PeriodicResult, exp: Experiment) -> list[Path]:
    """Write the periodic result file, profile CSV, figures and GIF as one output set.

    The files are staged and swapped in together (:class:`bos._io.OutputSet`,
    manifest ``<name>-periodic-run.json``); a failure leaves an earlier set
    of the same name as it was.  Figures and the GIF are skipped when
    ``output.figures = false``.

    Returns
    -------
    list of Path
        The written files, result file first.
    """
    from . import output, store
    from ._io import OutputSet
    from .output import prepare_output_dir

    paths = periodic_paths(exp)
    prepare_output_dir(paths["result"].parent)
    gas = exp.medium.gas if not exp.medium.composition else "mixture"
    coords, variables = periodic_variables(result, gas=gas)
    line_file = [[float(x), float(output.file_y(y))] for x, y in result.profile["line_m"]]
    attrs = output.file_attributes(result.reference_run, exp, line_file_m=line_file)
    import bos

    attrs.update(title=f"BOS phase-resolved sound field {exp.output.name}",
                 source=(f"phase-resolved background-oriented schlieren of a periodic sound source, processed with "
                         f"bos-toolkit {bos.__version__} (bos periodic: {len(result.frames)} frames, per-pixel lock-in "
                         f"fit of {result.summary.get('harmonics_fitted', 1)} harmonic(s), real and imaginary parts "
                         f"reconstructed separately: {(attrs.get('reconstruction') or {}).get('kind', 'planar')})"),
                 references=attrs["references"] + "\n" + "\n".join(PERIODIC_REFERENCES),
                 summary_coordinates="positions in the summary (nodes, antinodes, profile_m, travel_direction) are "
                                     "object-plane metres with y DOWN (growing with the image row), as in the "
                                     "experiment file and the --json output; profile_line_m is the same line in "
                                     "the file's coordinates (y up)")
    with OutputSet(paths["result"].parent, f"{exp.output.name}-periodic") as out:
        attrs["run_id"] = out.run_id
        store.write_result(out.path(paths["result"]), coords=coords, variables=variables, attrs=attrs,
                           history=f"bos periodic from {exp.source_file or 'command-line options'}")
        write_periodic_profile_csv(result, out.path(paths["profile_csv"]))
        if exp.output.figures:
            staged = {k: out.path(v) for k, v in paths.items() if k.startswith(("fig_", "gif_"))}
            _figures(result, staged)
        return out.commit()
