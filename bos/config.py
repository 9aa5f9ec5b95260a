"""Experiment description: the TOML file schema, validation and overrides.

An experiment file describes the camera, the geometry, the medium, the
source (for safety cautions and planning), the images, the processing, the
reconstruction and the outputs.  Every key carries its unit in its name
(``focal_length_mm``, ``camera_to_background_m`` ...); inside the library
everything is converted to SI.  Unknown keys, wrong types, missing values and
out-of-range numbers raise :class:`bos.errors.ConfigError` with a one-line
message naming the key.

The full key list is in ``docs/experiment-file.md``; :data:`SCHEMA` below is
the single source of truth for it.
"""

from __future__ import annotations

import dataclasses
import difflib
import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Mapping

from .errors import ConfigError, DataFileError
from .safety import ILLUMINATION_KINDS, SOURCE_KINDS  # one list: the kinds that have cautions

# ---------------------------------------------------------------------------
# Schema: section -> key -> Spec
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class Spec:
    """One key of the experiment file.

    Attributes
    ----------
    kind : str
        "float", "int", "str", "bool", "path", "list", "table" or "any".
    default : object
        Value used when the key is absent (``None`` = not set).
    lo, hi : float, optional
        Inclusive numeric range (checked for numbers, in file units).
    positive : bool
        Require a value > 0.
    choices : tuple of str, optional
        Allowed string values.
    scale : float
        Multiplier from the file unit to SI (e.g. 1e-3 for ``_mm`` keys).
    target : str, optional
        Name of the SI attribute in the section dataclass (defaults to key).
    help : str
        One-line description (used in the docs, the template and ``--help``).
    option : str, optional
        Command-line option that sets the key (default ``--key-with-dashes``;
        ``""`` = no option).  Error messages name it beside the file key.
    example : object, optional
        Value written (uncommented) by ``bos init`` for keys a run needs.
    """

    kind: str
    default: Any = None
    lo: float | None = None
    hi: float | None = None
    positive: bool = False
    choices: tuple[str, ...] | None = None
    scale: float = 1.0
    target: str | None = None
    help: str = ""
    option: str | None = None
    example: Any = None


# Sane ranges (issue: absurd but in-range values such as a 1e308 m distance or a
# focal length typed in metres must not silently change a result).  The limits
# are common practice for camera-based BOS, wide enough for phone cameras
# (f ~ 2 mm, 0.6 um pixels), long telephoto lenses (5 m) and outdoor scenes
# with a background up to 1 km away.
SCHEMA: dict[str, dict[str, Spec]] = {
    "camera": {
        "focal_length_mm": Spec("float", lo=1.0, hi=5000.0, scale=1e-3, target="focal_length_m",
                                help="lens focal length [mm]", example=50),
        "pixel_pitch_um": Spec("float", lo=0.5, hi=50.0, scale=1e-6, target="pixel_pitch_m",
                               help="sensor pixel pitch [um]", example=5.0),
        "f_number": Spec("float", 8.0, lo=0.5, hi=128.0, help="lens f-number N"),
        "sensor_px": Spec("list", help="sensor size [rows, cols] in pixels"),
        "wavelength_nm": Spec("float", 550.0, lo=300.0, hi=1700.0, scale=1e-9, target="wavelength_m",
                              help="effective (vacuum) wavelength of the light [nm]"),
        "model": Spec("str", help="camera model (free text)", option=""),
    },
    "geometry": {
        "camera_to_background_m": Spec("float", lo=0.01, hi=1000.0, target="z_b_m",
                                       help="Z_B: lens to background distance [m]"),
        "object_to_background_m": Spec("float", lo=0.001, hi=1000.0, target="z_d_m",
                                       help="Z_D: object (mid-plane) to background distance [m]", example=0.5),
        "camera_to_object_m": Spec("float", lo=0.01, hi=1000.0, target="z_a_m",
                                   help="Z_A: lens to object distance [m]", example=1.0),
        "object_width_mm": Spec("float", lo=0.01, hi=1.0e5, scale=1e-3, target="object_width_m",
                                help="object width along the line of sight (planar) or diameter [mm]",
                                example=100),
    },
    "medium": {
        "gas": Spec("str", "air", help="gas name (air, n2, o2, co2, ar, he, h2, h2o, ch4, sf6, c3h8)"),
        "composition": Spec("table", help="mole fractions of a mixture, e.g. {he = 0.5, air = 0.5}"),
        "pressure_pa": Spec("float", 101325.0, lo=1.0e3, hi=1.0e7, help="static pressure [Pa]"),
        "temperature_c": Spec("float", lo=-100.0, hi=2000.0, help="ambient temperature [degC]"),
        "temperature_k": Spec("float", lo=173.15, hi=2273.15, help="ambient temperature [K]"),
        "relative_humidity": Spec("float", 0.0, lo=0.0, hi=100.0, help="relative humidity [%]",
                                  option="--humidity-pct"),
        "co2_ppm": Spec("float", 450.0, lo=0.0, hi=2000.0, help="CO2 content [umol/mol]"),
    },
    "source": {
        "kind": Spec("str", "none", choices=SOURCE_KINDS, help="what makes the flow", option="--source"),
        "illumination": Spec("str", "ambient", choices=ILLUMINATION_KINDS, help="how the background is lit"),
        "frequency_hz": Spec("float", positive=True, hi=1.0e8,
                             help="source frequency for periodic sources [Hz]"),
        "description": Spec("str", help="free text", option=""),
    },
    "plan": {
        "noise_px": Spec("float", 0.05, positive=True, hi=5.0, help="displacement noise floor [px]"),
        "window_px": Spec("int", 32, lo=4, hi=1024, help="final interrogation window [px]"),
        "expected_deflection_rad": Spec("float", positive=True, hi=0.5,
                                        help="largest expected deflection [rad]"),
        "target_dt_k": Spec("float", positive=True, hi=3000.0,
                            help="smallest temperature difference to resolve [K]"),
        "target_spl_db": Spec("float", lo=0.0, hi=200.0, help="smallest sound level to resolve [dB re 20 uPa]"),
        "solve_for": Spec("str", choices=("z_d", "focal_length", "f_number"),
                          help="quantity to solve for in inverse design"),
        "max_blur_mm": Spec("float", positive=True, hi=1000.0, scale=1e-3, target="max_blur_m",
                            help="largest acceptable object-plane blur in inverse design [mm]"),
        "smallest_feature_mm": Spec("float", positive=True, hi=10000.0, scale=1e-3, target="smallest_feature_m",
                                    help="smallest flow feature to resolve [mm] (warns when the blur is larger)"),
    },
    "images": {
        "reference": Spec("path", help="reference image (no flow)", example="reference.png"),
        "measurement": Spec("path", help="measurement image (with flow)", example="measurement.png"),
        "mask": Spec("path", help="mask image: nonzero = no data"),
        "mask_polygons": Spec("list", help="polygons [[[col, row], ...], ...] in pixels marking no-data areas",
                              option="--mask-polygon"),
        "frame": Spec("int", lo=0, help="frame index for multi-page TIFF or video"),
        "reference_frame": Spec("int", lo=0, help="frame index of the reference in a video"),
        "measurement_frame": Spec("int", lo=0, help="frame index of the measurement in a video"),
    },
    "processing": {
        "method": Spec("str", "correlation", choices=("correlation", "flow"),
                       help="displacement estimator"),
        "window_px": Spec("int", 64, lo=4, hi=1024, help="first-pass interrogation window [px]"),
        "final_window_px": Spec("int", 16, lo=4, hi=1024, help="final interrogation window [px]"),
        "passes": Spec("int", 3, lo=1, hi=10, help="number of correlation passes"),
        "overlap": Spec("float", 0.5, lo=0.0, hi=0.9, help="window overlap fraction"),
        "camera_motion": Spec("str", "auto", choices=("auto", "none", "border", "mask"),
                              help="global camera-motion removal: 'auto' = from the reference region (planar) or "
                                   "the image border (otherwise), using only vectors the data show to be flow-free; "
                                   "'border' = the border band; 'mask' = the reconstruction reference region; "
                                   "'none'"),
        "outlier_threshold": Spec("float", 2.0, positive=True, hi=100.0, help="normalised median test threshold"),
        "outlier_eps_px": Spec("float", 0.1, positive=True, hi=10.0, help="normalised median test epsilon [px]"),
    },
    "reconstruction": {
        "kind": Spec("str", "planar", choices=("planar", "axisymmetric", "none"),
                     help="object model"),
        "axis": Spec("str", "vertical", choices=("vertical", "horizontal"),
                     help="orientation of the symmetry axis (axisymmetric)"),
        "axis_px": Spec("float", help="symmetry-axis position in pixels (column for a vertical axis); omit to fit"),
        "abel_method": Spec("str", "three_point", choices=("three_point", "onion_peeling"),
                            help="Abel inversion method"),
        "boundary": Spec("str", "neumann", choices=("neumann", "dirichlet", "mixed"),
                         help="boundary condition of the Poisson integration"),
        "reference_region": Spec("any", "edges",
                                 help="where the gas is ambient: 'edges', 'left', 'right', 'top', 'bottom' "
                                      "or [row0, row1, col0, col1] in pixels"),
        "weighted": Spec("bool", True, help="weight the least-squares integration by 1/sigma^2"),
        "solver": Spec("str", "auto", choices=("auto", "dct", "sparse", "direct", "multigrid", "pcg"),
                       help="Poisson solver"),
    },
    "output": {
        "directory": Spec("path", "bos-output", help="output directory", option="--out"),
        "name": Spec("str", "result", help="base name of the result files"),
        "figures": Spec("bool", True, help="write figures"),
        "profile": Spec("list", help="profile line [[x0_mm, y0_mm], [x1_mm, y1_mm]] in object-plane mm"),
    },
}

REFERENCE_REGIONS = ("edges", "left", "right", "top", "bottom")


def option_name(dotted: str) -> str:
    """Command-line option that sets the file key ``section.key`` (``""`` if none)."""
    section, key = dotted.split(".", 1)
    spec = SCHEMA[section][key]
    return ("--" + key.replace("_", "-")) if spec.option is None else spec.option


def key_label(dotted: str) -> str:
    """``--option (section.key)`` for messages (just the key when it has no option)."""
    try:
        opt = option_name(dotted)
    except (KeyError, ValueError):
        return dotted
    return f"{opt} ({dotted})" if opt else dotted


# ---------------------------------------------------------------------------
# Section dataclasses (SI)
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class CameraConfig:
    focal_length_m: float | None = None
    pixel_pitch_m: float | None = None
    f_number: float = 8.0
    sensor_px: tuple[int, int] | None = None
    wavelength_m: float = 550e-9
    model: str | None = None


@dataclass(frozen=True)
class GeometryConfig:
    z_b_m: float | None = None
    z_d_m: float | None = None
    z_a_m: float | None = None
    object_width_m: float | None = None


@dataclass(frozen=True)
class MediumConfig:
    gas: str = "air"
    composition: dict[str, float] | None = None
    pressure_pa: float = 101325.0
    temperature_k: float = 293.15
    relative_humidity: float = 0.0
    co2_ppm: float = 450.0


@dataclass(frozen=True)
class SourceConfig:
    kind: str = "none"
    illumination: str = "ambient"
    frequency_hz: float | None = None
    description: str | None = None


@dataclass(frozen=True)
class PlanConfig:
    noise_px: float = 0.05
    window_px: int = 32
    expected_deflection_rad: float | None = None
    target_dt_k: float | None = None
    target_spl_db: float | None = None
    solve_for: str | None = None
    max_blur_m: float | None = None
    smallest_feature_m: float | None = None


@dataclass(frozen=True)
class ImagesConfig:
    reference: Path | None = None
    measurement: Path | None = None
    mask: Path | None = None
    mask_polygons: list | None = None
    frame: int | None = None
    reference_frame: int | None = None
    measurement_frame: int | None = None


@dataclass(frozen=True)
class ProcessingConfig:
    method: str = "correlation"
    window_px: int = 64
    final_window_px: int = 16
    passes: int = 3
    overlap: float = 0.5
    camera_motion: str = "auto"
    outlier_threshold: float = 2.0
    outlier_eps_px: float = 0.1


@dataclass(frozen=True)
class ReconstructionConfig:
    kind: str = "planar"
    axis: str = "vertical"
    axis_px: float | None = None
    abel_method: str = "three_point"
    boundary: str = "neumann"
    reference_region: Any = "edges"
    weighted: bool = True
    solver: str = "auto"


@dataclass(frozen=True)
class OutputConfig:
    directory: Path = Path("bos-output")
    name: str = "result"
    figures: bool = True
    profile: list | None = None  # [[x0_m, y0_m], [x1_m, y1_m]] (SI after loading)


_SECTION_CLASSES: dict[str, type] = {
    "camera": CameraConfig,
    "geometry": GeometryConfig,
    "medium": MediumConfig,
    "source": SourceConfig,
    "plan": PlanConfig,
    "images": ImagesConfig,
    "processing": ProcessingConfig,
    "reconstruction": ReconstructionConfig,
    "output": OutputConfig,
}


@dataclass(frozen=True)
class Experiment:
    """A validated experiment description (SI units).

    Build it with :func:`load_experiment` or :func:`experiment_from_dict`.
    """

    camera: CameraConfig = field(default_factory=CameraConfig)
    geometry: GeometryConfig = field(default_factory=GeometryConfig)
    medium: MediumConfig = field(default_factory=MediumConfig)
    source: SourceConfig = field(default_factory=SourceConfig)
    plan: PlanConfig = field(default_factory=PlanConfig)
    images: ImagesConfig = field(default_factory=ImagesConfig)
    processing: ProcessingConfig = field(default_factory=ProcessingConfig)
    reconstruction: ReconstructionConfig = field(default_factory=ReconstructionConfig)
    output: OutputConfig = field(default_factory=OutputConfig)
    base_dir: Path = Path(".")
    source_file: Path | None = None

    def rig(self):
        """The :class:`bos.optics.Rig` described by the camera and geometry sections."""
        cam, geo = self.camera, self.geometry
        problems = [f"missing {key_label(k)}" for k, v in (("camera.focal_length_mm", cam.focal_length_m),
                                                            ("camera.pixel_pitch_um", cam.pixel_pitch_m))
                    if v is None]
        problems += _geometry_problems(geo)
        if problems:
            raise _config_error(problems)
        from .optics import Rig

        return Rig(
            focal_length_m=cam.focal_length_m,
            pixel_pitch_m=cam.pixel_pitch_m,
            f_number=cam.f_number,
            z_b_m=geo.z_b_m,
            z_d_m=geo.z_d_m,
            z_a_m=geo.z_a_m,
            sensor_px=cam.sensor_px,
            wavelength_m=cam.wavelength_m,
        )

    def medium_model(self):
        """The :class:`bos.media.Medium` described by the medium section."""
        from .media import Medium

        med = self.medium
        return Medium(
            gas=med.gas,
            wavelength_m=self.camera.wavelength_m,
            pressure_pa=med.pressure_pa,
            temperature_k=med.temperature_k,
            relative_humidity=med.relative_humidity / 100.0,
            co2_ppm=med.co2_ppm,
            composition=dict(med.composition) if med.composition else None,
        )

    def resolve(self, path: Path | None) -> Path | None:
        """Resolve a path from the file relative to the file's directory."""
        if path is None:
            return None
        p = Path(path).expanduser()
        return p if p.is_absolute() else (self.base_dir / p)


# ---------------------------------------------------------------------------
# Validation
# ---------------------------------------------------------------------------


def _type_name(value: Any) -> str:
    return type(value).__name__


def _config_error(problems: list[str]) -> ConfigError:
    """One ConfigError carrying every problem (one line; ``.problems`` keeps the list)."""
    if len(problems) == 1:
        err = ConfigError(problems[0])
    else:
        err = ConfigError(f"{len(problems)} problems in the experiment settings: " + "; ".join(problems))
    err.problems = list(problems)
    return err


def range_text(spec: Spec) -> str:
    """Allowed numeric range of a key in words ("between 1 and 5000", "> 0" ...)."""
    lo = spec.lo
    if lo is not None and spec.hi is not None:
        return f"between {lo:g} and {spec.hi:g}"
    if lo is not None:
        return f">= {lo:g}"
    if spec.positive and spec.hi is not None:
        return f"> 0 and <= {spec.hi:g}"
    return "> 0" if spec.positive else f"<= {spec.hi:g}"


def _convert(section: str, key: str, spec: Spec, value: Any) -> Any:
    where = key_label(f"{section}.{key}")
    if spec.kind in ("float", "int"):
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ConfigError(f"{where} must be a number, got {_type_name(value)} {value!r}")
        if spec.kind == "int":
            if isinstance(value, float) and not value.is_integer():
                raise ConfigError(f"{where} must be a whole number, got {value!r}")
            value = int(value)
        else:
            value = float(value)
        if not math.isfinite(value):
            raise ConfigError(f"{where} must be finite, got {value!r}")
        if ((spec.positive and value <= 0) or (spec.lo is not None and value < spec.lo)
                or (spec.hi is not None and value > spec.hi)):
            raise ConfigError(f"{where} must be {range_text(spec)}, got {value!r}")
        return value * spec.scale if spec.kind == "float" else value
    if spec.kind == "str":
        if not isinstance(value, str):
            raise ConfigError(f"{where} must be a string, got {_type_name(value)} {value!r}")
        if spec.choices is not None and value not in spec.choices:
            raise ConfigError(f"{where} must be one of {', '.join(spec.choices)}; got {value!r}"
                              + _did_you_mean(value, spec.choices))
        return value
    if spec.kind == "path":
        if not isinstance(value, str) or not value:
            raise ConfigError(f"{where} must be a file path string, got {value!r}")
        return Path(value)
    if spec.kind == "bool":
        if not isinstance(value, bool):
            raise ConfigError(f"{where} must be true or false, got {value!r}")
        return value
    if spec.kind == "list":
        if not isinstance(value, (list, tuple)):
            raise ConfigError(f"{where} must be a list, got {_type_name(value)} {value!r}")
        return list(value)
    if spec.kind == "table":
        if not isinstance(value, Mapping):
            raise ConfigError(f"{where} must be a table, got {_type_name(value)} {value!r}")
        return dict(value)
    return value


def _did_you_mean(word: str, candidates: Any) -> str:
    close = difflib.get_close_matches(str(word), list(candidates), n=1, cutoff=0.6)
    return f" (did you mean {close[0]!r}?)" if close else ""


def _unknown_key(section: str, key: str) -> str:
    """Message for an unknown key: a close spelling in the section, or the section it belongs to."""
    msg = f"unknown key in [{section}]: {key}"
    close = difflib.get_close_matches(key, list(SCHEMA[section]), n=1, cutoff=0.6)
    if close:
        return f"{msg} (did you mean {close[0]}?)"
    homes = [name for name, specs in SCHEMA.items() if key in specs]
    if homes:
        return f"{msg} (it belongs in [{homes[0]}])"
    return f"{msg} (known: {', '.join(SCHEMA[section])})"


def _check_sensor(value: list) -> tuple[int, int]:
    if len(value) != 2 or not all(isinstance(v, int) and not isinstance(v, bool) and v > 0 for v in value):
        raise ConfigError(f"{key_label('camera.sensor_px')} must be [rows, cols] positive integers, got {value!r}")
    return int(value[0]), int(value[1])


def _check_composition(value: dict) -> dict[str, float]:
    out: dict[str, float] = {}
    for gas, frac in value.items():
        if isinstance(frac, bool) or not isinstance(frac, (int, float)) or not (0.0 <= frac <= 1.0):
            raise ConfigError(f"medium.composition.{gas} must be a mole fraction in [0, 1], got {frac!r}")
        out[str(gas)] = float(frac)
    total = sum(out.values())
    if not out or abs(total - 1.0) > 1e-6:
        raise ConfigError(f"{key_label('medium.composition')} mole fractions must sum to 1, got {total:g}")
    return out


def _check_profile(value: list) -> list:
    try:
        (x0, y0), (x1, y1) = value
        pts = [[float(x0) * 1e-3, float(y0) * 1e-3], [float(x1) * 1e-3, float(y1) * 1e-3]]
    except (TypeError, ValueError):
        raise ConfigError(f"{key_label('output.profile')} must be [[x0_mm, y0_mm], [x1_mm, y1_mm]], "
                          f"got {value!r}") from None
    if not all(math.isfinite(v) for pt in pts for v in pt):
        raise ConfigError(f"{key_label('output.profile')} must hold finite numbers, got {value!r}")
    if pts[0] == pts[1]:
        raise ConfigError(f"{key_label('output.profile')} start and end points are the same")
    return pts


#: Characters a result name may hold: letters, digits, spaces, '-', '_', '.', '+' (no path separators).
_NAME_OK = set("abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789-_.+ ")


def check_output_name(value: str) -> str:
    """A result base name must be a plain, visible file name (no folders, not hidden, not empty)."""
    label = key_label("output.name")
    name = str(value)
    if not name.strip():
        raise ConfigError(f"{label} is empty: give a base name for the result files")
    if name != name.strip():
        raise ConfigError(f"{label} = {name!r} starts or ends with a space")
    if name.startswith(".") or "/" in name or "\\" in name or name in (".", ".."):
        raise ConfigError(f"{label} = {name!r} must be a plain file name (no folders, not starting with '.'); "
                          "use output.directory for the folder")
    bad = sorted(set(name) - _NAME_OK)
    if bad:
        raise ConfigError(f"{label} = {name!r} holds characters not allowed in a result name: {''.join(bad)!r} "
                          "(use letters, digits, spaces, '-', '_', '.', '+')")
    if len(name) > 120:
        raise ConfigError(f"{label} is longer than 120 characters")
    return name


def _check_polygons(value: list) -> list:
    polys = []
    label = key_label("images.mask_polygons")
    for i, poly in enumerate(value):
        try:
            pts = [(float(c), float(r)) for c, r in poly]
        except (TypeError, ValueError):
            raise ConfigError(f"{label} polygon {i} must be a list of [col, row] points") from None
        if len(pts) < 3:
            raise ConfigError(f"{label} polygon {i} needs at least 3 points, got {len(pts)}")
        polys.append(pts)
    return polys


def _check_reference_region(value: Any) -> Any:
    label = key_label("reconstruction.reference_region")
    if isinstance(value, str):
        if value not in REFERENCE_REGIONS:
            raise ConfigError(f"{label} must be one of {', '.join(REFERENCE_REGIONS)} "
                              f"or [row0, row1, col0, col1]; got {value!r}" + _did_you_mean(value, REFERENCE_REGIONS))
        return value
    if (isinstance(value, list) and len(value) == 4
            and all(isinstance(v, int) and not isinstance(v, bool) and v >= 0 for v in value)):
        r0, r1, c0, c1 = value
        if r1 <= r0 or c1 <= c0:
            raise ConfigError(f"{label} is empty: {value!r}")
        return tuple(value)
    raise ConfigError(f"{label} must be a name or [row0, row1, col0, col1], got {value!r}")


_POST: dict[tuple[str, str], Callable[[Any], Any]] = {
    ("camera", "sensor_px"): _check_sensor,
    ("medium", "composition"): _check_composition,
    ("output", "profile"): _check_profile,
    ("output", "name"): check_output_name,
    ("images", "mask_polygons"): _check_polygons,
    ("reconstruction", "reference_region"): _check_reference_region,
}


def _build_section(name: str, table: Mapping[str, Any], problems: list[str]) -> Any:
    """The section dataclass; every problem found is appended to ``problems``."""
    specs = SCHEMA[name]
    cls = _SECTION_CLASSES[name]
    if not isinstance(table, Mapping):
        problems.append(f"[{name}] must be a table, got {_type_name(table)} {table!r}")
        return cls()
    problems.extend(_unknown_key(name, k) for k in table if k not in specs)
    kwargs: dict[str, Any] = {}
    for key, spec in specs.items():
        if key not in table:
            continue
        try:
            value = _convert(name, key, spec, table[key])
            post = _POST.get((name, key))
            kwargs[spec.target or key] = value if post is None else post(value)
        except ConfigError as exc:
            problems.append(str(exc))
    if name == "medium":
        if "temperature_c" in table and "temperature_k" in table:
            problems.append("[medium] give temperature_c or temperature_k (--temperature-c or "
                            "--temperature-k), not both")
        if "temperature_c" in kwargs:
            kwargs["temperature_k"] = kwargs.pop("temperature_c") + 273.15
        if "composition" in table and "gas" in table:
            problems.append("[medium] give gas or composition (--gas or --composition), not both")
    fields = {f.name for f in dataclasses.fields(cls)}
    return cls(**{k: v for k, v in kwargs.items() if k in fields})


def _geometry_problems(geo: "GeometryConfig") -> list[str]:
    given = sum(v is not None for v in (geo.z_a_m, geo.z_b_m, geo.z_d_m))
    if given == 2:
        return []
    keys = ", ".join(key_label(f"geometry.{k}") for k in
                     ("camera_to_background_m", "object_to_background_m", "camera_to_object_m"))
    return [f"geometry needs exactly two of {keys} (got {given})"]


def experiment_from_dict(data: Mapping[str, Any], *, base_dir: str | Path = ".",
                         source_file: str | Path | None = None) -> Experiment:
    """Validate a parsed experiment mapping and return an :class:`Experiment`.

    Every problem is collected and reported at once in one :class:`ConfigError`
    (one line; the list is also in its ``problems`` attribute).

    Raises
    ------
    ConfigError
        Unknown section or key (with a "did you mean" for close spellings),
        wrong type, out-of-range value.
    """
    problems: list[str] = []
    for name in data:
        if name not in SCHEMA:
            homes = [s for s, specs in SCHEMA.items() if name in specs]
            hint = (f" (it is a key of [{homes[0]}])" if homes
                    else _did_you_mean(name, SCHEMA) or f" (known: {', '.join(SCHEMA)})")
            problems.append(f"unknown section: {name}{hint}")
    sections = {name: _build_section(name, data.get(name, {}), problems) for name in SCHEMA}
    if problems:
        raise _config_error(problems)
    return Experiment(**sections, base_dir=Path(base_dir),
                      source_file=Path(source_file) if source_file else None)


def missing_for_run(exp: Experiment, *, focal_length_from_exif: bool = True) -> list[str]:
    """Settings a ``bos run`` needs that ``exp`` lacks, as ``missing --option (key)`` lines.

    The focal length may come from the image EXIF, so it is only listed when
    ``focal_length_from_exif`` is false.
    """
    needed = [("images.reference", exp.images.reference), ("images.measurement", exp.images.measurement),
              ("camera.pixel_pitch_um", exp.camera.pixel_pitch_m)]
    if not focal_length_from_exif:
        needed.insert(2, ("camera.focal_length_mm", exp.camera.focal_length_m))
    if exp.reconstruction.kind == "planar":
        needed.append(("geometry.object_width_mm", exp.geometry.object_width_m))
    problems = [f"missing {key_label(k)}" for k, v in needed if v is None]
    return problems + _geometry_problems(exp.geometry)


def check_run_settings(exp: Experiment) -> None:
    """Raise one :class:`ConfigError` listing everything :func:`missing_for_run` finds."""
    problems = missing_for_run(exp)
    if problems:
        raise _config_error(problems)


def _set_dotted(data: dict, dotted: str, value: Any) -> None:
    try:
        section, key = dotted.split(".", 1)
    except ValueError:
        raise ConfigError(f"override must be 'section.key', got {dotted!r}") from None
    data.setdefault(section, {})
    if not isinstance(data[section], dict):
        raise ConfigError(f"[{section}] must be a table")
    data[section][key] = value


def load_experiment(path: str | Path | None = None, *,
                    overrides: Mapping[str, Any] | None = None,
                    base_dir: str | Path | None = None) -> Experiment:
    """Read, merge and validate an experiment TOML file.

    Parameters
    ----------
    path : path-like, optional
        TOML file. ``None`` starts from defaults (all values from ``overrides``).
    overrides : mapping, optional
        ``{"section.key": value}`` in file units (e.g. ``"camera.focal_length_mm": 85``);
        ``None`` values are ignored. Command-line options use this, so they win.
    base_dir : path-like, optional
        Directory for relative paths (default: the file's directory, or the
        current directory without a file).

    Raises
    ------
    DataFileError
        The file is missing or unreadable.
    ConfigError
        TOML syntax error, unknown key, wrong type or range.
    """
    data: dict[str, Any] = {}
    if path is not None:
        p = Path(path)
        if not p.is_file():
            raise DataFileError(f"experiment file not found: {p}")
        try:
            text = p.read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as exc:
            raise DataFileError(f"cannot read experiment file {p}: {exc}") from None
        try:
            data = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            raise ConfigError(f"experiment file {p} is not valid TOML: {exc}") from None
        if base_dir is None:
            base_dir = p.parent
    for dotted, value in (overrides or {}).items():
        if value is not None:
            _set_dotted(data, dotted, value)
    return experiment_from_dict(data, base_dir=base_dir or ".", source_file=path)


def schema_markdown() -> str:
    """Render the schema as Markdown tables (used to write docs/experiment-file.md)."""
    lines: list[str] = []
    for name, specs in SCHEMA.items():
        lines += [f"### [{name}]", "", "| key | option | type | default | allowed | meaning |",
                  "|---|---|---|---|---|---|"]
        for key, s in specs.items():
            allowed = []
            if s.choices:
                allowed.append(", ".join(s.choices))
            if s.kind in ("float", "int") and (s.positive or s.lo is not None or s.hi is not None):
                allowed.append(range_text(s))
            default = "" if s.default is None else f"`{s.default}`"
            opt = option_name(f"{name}.{key}")
            opt = f"`{opt}`" if opt else ""
            lines.append(f"| `{key}` | {opt} | {s.kind} | {default} | {'; '.join(allowed)} | {s.help} |")
        lines.append("")
    return "\n".join(lines)


# ---------------------------------------------------------------------------
# Published forms of the schema: JSON Schema (editors) and a commented template
# ---------------------------------------------------------------------------

_POINT = {"type": "array", "items": {"type": "number"}, "minItems": 2, "maxItems": 2}
_SPECIAL_JSON: dict[tuple[str, str], dict[str, Any]] = {
    ("camera", "sensor_px"): {"type": "array", "items": {"type": "integer", "exclusiveMinimum": 0},
                              "minItems": 2, "maxItems": 2},
    ("medium", "composition"): {"type": "object", "minProperties": 1,
                                "additionalProperties": {"type": "number", "minimum": 0, "maximum": 1}},
    ("images", "mask_polygons"): {"type": "array", "items": {"type": "array", "items": _POINT, "minItems": 3}},
    ("output", "profile"): {"type": "array", "items": _POINT, "minItems": 2, "maxItems": 2},
    ("reconstruction", "reference_region"): {
        "anyOf": [{"type": "string", "enum": list(REFERENCE_REGIONS)},
                  {"type": "array", "items": {"type": "integer", "minimum": 0}, "minItems": 4, "maxItems": 4}]},
}
_JSON_TYPES = {"float": "number", "int": "integer", "str": "string", "bool": "boolean", "path": "string",
               "list": "array", "table": "object"}


def _json_property(section: str, key: str, spec: Spec) -> dict[str, Any]:
    prop: dict[str, Any] = dict(_SPECIAL_JSON.get((section, key), {}))
    if not prop and spec.kind in _JSON_TYPES:
        prop["type"] = _JSON_TYPES[spec.kind]
    if spec.kind == "path":
        prop["minLength"] = 1
    if spec.choices:
        prop["enum"] = list(spec.choices)
    if spec.kind in ("float", "int"):
        if spec.lo is not None:
            prop["minimum"] = spec.lo
        if spec.positive and spec.lo is None:
            prop["exclusiveMinimum"] = 0
        if spec.hi is not None:
            prop["maximum"] = spec.hi
    desc = spec.help
    opt = option_name(f"{section}.{key}")
    if opt:
        desc += f" (command-line option {opt})"
    prop["description"] = desc
    if spec.default is not None:
        prop["default"] = spec.default
    return prop


def schema_json_text() -> str:
    """:func:`json_schema` as the exact text of the shipped ``bos/data/experiment.schema.json``."""
    import json

    return json.dumps(json_schema(), indent=2, ensure_ascii=False) + "\n"


def json_schema() -> dict[str, Any]:
    """The experiment-file schema as a JSON Schema (draft 2020-12) document.

    Generated from :data:`SCHEMA`; shipped as ``bos/data/experiment.schema.json``
    and written by ``bos init --schema`` so editors (e.g. Taplo-based TOML
    plugins) validate experiment files while they are typed.  Cross-key rules
    (two of three distances, temperature in C or K) are checked by
    :func:`load_experiment` only.
    """
    props = {}
    for name, specs in SCHEMA.items():
        props[name] = {
            "type": "object",
            "additionalProperties": False,
            "properties": {key: _json_property(name, key, spec) for key, spec in specs.items()},
        }
    props["medium"]["not"] = {"required": ["temperature_c", "temperature_k"]}
    return {
        "$schema": "https://json-schema.org/draft/2020-12/schema",
        "title": "bos experiment file",
        "description": "Experiment description read by `bos run` and `bos plan` (TOML). "
                       "Units are in the key names.",
        "type": "object",
        "additionalProperties": False,
        "properties": props,
    }


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float)):
        return repr(value)
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, Mapping):
        return "{" + ", ".join(f"{k} = {_toml_value(v)}" for k, v in value.items()) + "}"
    return '"' + str(value).replace("\\", "\\\\").replace('"', '\\"') + '"'


_TEMPLATE_EXAMPLES: dict[tuple[str, str], Any] = {
    ("camera", "sensor_px"): [4000, 6000],
    ("camera", "model"): "my camera",
    ("geometry", "camera_to_background_m"): 1.5,
    ("medium", "composition"): {"he": 0.5, "air": 0.5},
    ("medium", "temperature_c"): 20.0,
    ("medium", "temperature_k"): 293.15,
    ("source", "frequency_hz"): 40000.0,
    ("source", "description"): "what, where, how hot",
    ("plan", "expected_deflection_rad"): 1e-3,
    ("plan", "target_dt_k"): 1.0,
    ("plan", "target_spl_db"): 140.0,
    ("plan", "solve_for"): "z_d",
    ("plan", "max_blur_mm"): 1.0,
    ("plan", "smallest_feature_mm"): 2.0,
    ("images", "mask"): "mask.png",
    ("images", "mask_polygons"): [[[0, 0], [40, 0], [40, 300], [0, 300]]],
    ("images", "frame"): 0,
    ("images", "reference_frame"): 0,
    ("images", "measurement_frame"): 1,
    ("reconstruction", "axis_px"): 399.5,
    ("output", "profile"): [[-10.0, 0.0], [10.0, 0.0]],
}


def template_toml(*, header: str = "") -> str:
    """A commented experiment-file template generated from :data:`SCHEMA`.

    Keys a run needs are written with an example value (edit them); every
    other key is a comment showing its default or an example.  The template
    loads with :func:`load_experiment` as it is.
    """
    out = [
        "# bos experiment file (TOML).  Units are in the key names; relative paths are relative to this file.",
        "# Lines starting with '# key =' show a default or an example: remove the '#' to set them.",
        "# Every key can also be given on the command line (option named in each comment); options win.",
        "# Editor checking: `bos init --schema experiment.schema.json`, then make the first line of this file",
        "# '#:schema ./experiment.schema.json' (TOML editors built on Taplo validate against it).",
    ]
    if header:
        out.insert(0, f"# {header}")
    for name, specs in SCHEMA.items():
        out += ["", f"[{name}]"]
        for key, spec in specs.items():
            notes = [spec.help]
            if spec.choices:
                notes.append("one of " + ", ".join(spec.choices))
            elif spec.kind in ("float", "int") and (spec.positive or spec.lo is not None or spec.hi is not None):
                notes.append(range_text(spec))
            opt = option_name(f"{name}.{key}")
            if opt:
                notes.append(f"option {opt}" + (" of bos plan" if name == "plan" else ""))
            out.append("# " + "; ".join(notes))
            if spec.example is not None:
                out.append(f"{key} = {_toml_value(spec.example)}")
            elif spec.default is not None:
                out.append(f"# {key} = {_toml_value(spec.default)}")
            else:
                example = _TEMPLATE_EXAMPLES.get((name, key))
                out.append(f"# {key} = {_toml_value(example)}" if example is not None else f"# {key} =")
    return "\n".join(out) + "\n"


def dumps_toml(data: Mapping[str, Mapping[str, Any]], *, header: str = "") -> str:
    """TOML text of an experiment mapping ``{section: {key: value}}`` (file units).

    The mapping is validated first (:func:`experiment_from_dict`), so what is
    written always loads back.
    """
    experiment_from_dict(data)
    out = [f"# {line}" for line in header.splitlines()]
    for name, table in data.items():
        if out:
            out.append("")
        out.append(f"[{name}]")
        out += [f"{key} = {_toml_value(value)}" for key, value in table.items()]
    return "\n".join(out) + "\n"
