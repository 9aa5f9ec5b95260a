"""BOS rig optics: magnification, sensitivity, blur, planning and inverse design.

A rig is a thin-lens camera focused on the background, the object (flow)
between them.  Distances: Z_A lens -> object mid-plane, Z_D object ->
background, Z_B = Z_A + Z_D lens -> background; f focal length, N f-number.

Key relations (thin-lens BOS geometry of Raffel 2015 [1] and Exp. Fluids 2019,
Eq. 1 [2]; the blur terms are our own aperture-cone derivation written in
Raffel's symbols, the diffraction spot is the usual PIV expression [3]):

- background magnification M = f / (Z_B - f) = z_i / Z_B, image distance
  z_i = f Z_B / (Z_B - f);
- sensor displacement  d = M Z_D eps  (metres on the sensor);
- object-plane pixel  pitch * Z_A / z_i;
- object-plane blur of the aperture cone  delta_obj = d_A Z_D / Z_B with
  d_A = f / N; on the sensor d_i = M d_A Z_D / Z_A;
- diffraction spot  d_d = 2.44 N (1 + M) lambda;  total blur = RSS.

Planning turns a displacement noise floor into the smallest detectable
deflection, density gradient, density difference, temperature difference
and sound pressure (plane-wave linear acoustics for the acoustic chain [4]).

References
----------
.. [1] Raffel, M. (2015). Background-oriented schlieren (BOS) techniques.
   Exp. Fluids 56:60 (symbols M, Z_A, Z_D, z_i, d_A, d_i, d_d).
.. [2] Displacement equation in the form of Exp. Fluids (2019)
   doi:10.1007/s00348-019-2865-4, Eq. (1).
.. [3] Raffel, Willert, Scarano, Kähler, Wereley & Kompenhans (2018).
   Particle Image Velocimetry -- A Practical Guide, 3rd ed., Springer
   (diffraction spot d_d = 2.44 N (1 + M) lambda, dot images of 2-3 px;
   from memory).
.. [4] Linear acoustics: p' = c^2 rho', SPL re 20 uPa, n' = K p' / c^2
   (textbook relations, from memory; no specific source).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .errors import GeometryError, InputError
from .media import pressure_to_spl, spl_to_pressure_amplitude

__all__ = [
    "Rig",
    "Plan",
    "Design",
    "plan",
    "design_for_target",
    "target_deflection",
    "z_d_sweep",
    "deflection_from_temperature_difference",
    "temperature_difference_from_deflection",
    "deflection_from_sound_level",
    "sound_level_from_deflection",
]

AIRY_FACTOR = 2.44  # first dark ring of the Airy pattern, diameter = 2.44 N lambda (image side)
DOT_PX_RANGE = (2.0, 3.0)  # dot images of 2-3 px avoid peak locking (PIV practice, Raffel et al. 2018; from memory)
PRINT_DOT_MIN_M = 0.1e-3  # ~ one printer dot at 300 dpi (0.085 mm), rounded up (common practice)
WAVELENGTH_RANGE_M = (300e-9, 1700e-9)
MIN_F_NUMBER = 0.5  # thin-lens limit in air (N = 1 / (2 NA), NA <= 1)


def _check_length(name: str, value: Any) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise GeometryError(f"{name} must be a number, got {value!r}") from None
    if not math.isfinite(v) or v <= 0:
        raise GeometryError(f"{name} must be a positive length, got {value!r}")
    return v


def _fmt_m(x: float) -> str:
    return f"{x:.4g} m"


@dataclass(frozen=True)
class Rig:
    """Camera and distances of a BOS rig (SI units).

    Exactly two of ``z_a_m`` (lens to object mid-plane), ``z_b_m`` (lens to
    background) and ``z_d_m`` (object to background) are given; the third
    follows from Z_B = Z_A + Z_D.  The camera is focused on the background.

    Parameters
    ----------
    focal_length_m : float
        Lens focal length f [m].
    pixel_pitch_m : float
        Sensor pixel pitch [m] (at most 1 mm, to catch unit mistakes).
    f_number : float
        Lens f-number N (>= 0.5).
    z_b_m, z_d_m, z_a_m : float, optional
        Distances [m]; two of them.
    sensor_px : (rows, cols), optional
        Sensor size in pixels (for the field of view).
    wavelength_m : float
        Effective wavelength of the light [m], 300-1700 nm.

    Raises
    ------
    GeometryError
        Wrong number of distances, non-positive lengths, Z_D >= Z_B, the
        object not beyond the focal length (Z_A <= f), N < 0.5, or the
        wavelength outside 300-1700 nm.
    """

    focal_length_m: float
    pixel_pitch_m: float
    f_number: float
    z_b_m: float | None = None
    z_d_m: float | None = None
    z_a_m: float | None = None
    sensor_px: tuple[int, int] | None = None
    wavelength_m: float = 550e-9

    def __post_init__(self) -> None:
        f = _check_length("focal length", self.focal_length_m)
        pitch = _check_length("pixel pitch", self.pixel_pitch_m)
        if pitch > 1e-3:
            raise GeometryError(f"pixel pitch {pitch:g} m is implausible (> 1 mm); give it in metres, e.g. 5e-6")
        try:
            n = float(self.f_number)
        except (TypeError, ValueError):
            raise GeometryError(f"f-number must be a number, got {self.f_number!r}") from None
        if not math.isfinite(n) or n < MIN_F_NUMBER:
            raise GeometryError(f"f-number must be >= {MIN_F_NUMBER}, got {self.f_number!r}")
        try:
            lam = float(self.wavelength_m)
        except (TypeError, ValueError):
            raise GeometryError(f"wavelength must be a number, got {self.wavelength_m!r}") from None
        if not (WAVELENGTH_RANGE_M[0] <= lam <= WAVELENGTH_RANGE_M[1]):
            raise GeometryError(f"wavelength {lam * 1e9:g} nm is outside 300-1700 nm")
        given = {k: v for k, v in (("z_a", self.z_a_m), ("z_b", self.z_b_m), ("z_d", self.z_d_m)) if v is not None}
        if len(given) != 2:
            raise GeometryError(
                f"give exactly two of Z_A (camera-object), Z_B (camera-background), "
                f"Z_D (object-background); got {len(given)}"
            )
        names = {"z_a": "camera-to-object distance Z_A", "z_b": "camera-to-background distance Z_B",
                 "z_d": "object-to-background distance Z_D"}
        vals = {k: _check_length(names[k], v) for k, v in given.items()}
        if "z_b" in vals and "z_d" in vals and vals["z_d"] >= vals["z_b"]:
            raise GeometryError(
                f"object-to-background distance Z_D = {_fmt_m(vals['z_d'])} must be less than "
                f"camera-to-background distance Z_B = {_fmt_m(vals['z_b'])}"
            )
        if "z_b" in vals and "z_a" in vals and vals["z_a"] >= vals["z_b"]:
            raise GeometryError(
                f"camera-to-object distance Z_A = {_fmt_m(vals['z_a'])} must be less than "
                f"camera-to-background distance Z_B = {_fmt_m(vals['z_b'])} (object between camera and background)"
            )
        for key, v in vals.items():
            object.__setattr__(self, f"{key}_m", v)
        object.__setattr__(self, "focal_length_m", f)
        object.__setattr__(self, "pixel_pitch_m", pitch)
        object.__setattr__(self, "f_number", n)
        object.__setattr__(self, "wavelength_m", lam)
        if self.z_a <= f:
            raise GeometryError(
                f"camera-to-object distance Z_A = {_fmt_m(self.z_a)} must exceed the focal length "
                f"f = {_fmt_m(f)} (the camera focuses on the background beyond f)"
            )
        if self.sensor_px is not None:
            sp = self.sensor_px
            try:
                rows, cols = (int(v) for v in sp)
                ok = rows > 0 and cols > 0 and all(float(v) == int(v) for v in sp)
            except (TypeError, ValueError):
                ok = False
            if not ok:
                raise GeometryError(f"sensor size must be (rows, cols) positive integers, got {sp!r}")
            object.__setattr__(self, "sensor_px", (rows, cols))

    # -- distances ---------------------------------------------------------
    @property
    def z_a(self) -> float:
        """Lens to object mid-plane distance Z_A [m]."""
        return self.z_a_m if self.z_a_m is not None else self.z_b_m - self.z_d_m

    @property
    def z_b(self) -> float:
        """Lens to background distance Z_B [m]."""
        return self.z_b_m if self.z_b_m is not None else self.z_a_m + self.z_d_m

    @property
    def z_d(self) -> float:
        """Object mid-plane to background distance Z_D [m]."""
        return self.z_d_m if self.z_d_m is not None else self.z_b_m - self.z_a_m

    def with_z_d(self, z_d_m: float) -> "Rig":
        """The same rig with another Z_D, keeping Z_A if it was given, else Z_B."""
        if self.z_a_m is not None:
            return dataclasses.replace(self, z_a_m=self.z_a, z_b_m=None, z_d_m=z_d_m)
        return dataclasses.replace(self, z_b_m=self.z_b, z_a_m=None, z_d_m=z_d_m)

    # -- imaging -----------------------------------------------------------
    @property
    def magnification(self) -> float:
        """Background magnification M = f / (Z_B - f) = z_i / Z_B."""
        return self.focal_length_m / (self.z_b - self.focal_length_m)

    @property
    def image_distance_m(self) -> float:
        """Lens to sensor distance z_i = f Z_B / (Z_B - f) [m] (focused on the background)."""
        return self.focal_length_m * self.z_b / (self.z_b - self.focal_length_m)

    @property
    def object_magnification(self) -> float:
        """Scale from the object mid-plane to the sensor, z_i / Z_A."""
        return self.image_distance_m / self.z_a

    @property
    def object_pixel_m(self) -> float:
        """Size of one sensor pixel in the object plane, pitch * Z_A / z_i [m]."""
        return self.pixel_pitch_m / self.object_magnification

    @property
    def background_pixel_m(self) -> float:
        """Size of one sensor pixel projected on the background, pitch / M [m]."""
        return self.pixel_pitch_m / self.magnification

    @property
    def field_of_view_m(self) -> tuple[float, float] | None:
        """Object-plane field of view (height, width) [m]; ``None`` without ``sensor_px``."""
        if self.sensor_px is None:
            return None
        return (self.sensor_px[0] * self.object_pixel_m, self.sensor_px[1] * self.object_pixel_m)

    # -- sensitivity -------------------------------------------------------
    @property
    def sensitivity_m_per_rad(self) -> float:
        """Sensor displacement per unit deflection, M Z_D [m/rad]."""
        return self.magnification * self.z_d

    @property
    def sensitivity_px_per_rad(self) -> float:
        """Sensor displacement per unit deflection, M Z_D / pitch [px/rad]."""
        return self.sensitivity_m_per_rad / self.pixel_pitch_m

    # -- blur --------------------------------------------------------------
    @property
    def aperture_diameter_m(self) -> float:
        """Entrance-pupil diameter d_A = f / N [m]."""
        return self.focal_length_m / self.f_number

    @property
    def object_blur_m(self) -> float:
        """Diameter of the aperture cone where it crosses the object plane, d_A Z_D / Z_B [m]."""
        return self.aperture_diameter_m * self.z_d / self.z_b

    @property
    def geometric_blur_px(self) -> float:
        """Object-plane cone imaged on the sensor, d_i = M d_A Z_D / Z_A, in pixels."""
        return self.magnification * self.aperture_diameter_m * self.z_d / self.z_a / self.pixel_pitch_m

    @property
    def diffraction_blur_px(self) -> float:
        """Airy-disc diameter 2.44 N (1 + M) lambda on the sensor, in pixels."""
        return AIRY_FACTOR * self.f_number * (1.0 + self.magnification) * self.wavelength_m / self.pixel_pitch_m

    @property
    def total_blur_px(self) -> float:
        """Root-sum-square of geometric and diffraction blur [px]."""
        return math.hypot(self.geometric_blur_px, self.diffraction_blur_px)

    @property
    def blur_px(self) -> float:
        """Alias of :attr:`total_blur_px` (geometric and diffraction, root-sum-square)."""
        return self.total_blur_px

    @property
    def total_object_blur_m(self) -> float:
        """Total blur (aperture cone + diffraction) expressed in the object plane [m]."""
        return self.total_blur_px * self.object_pixel_m


def object_plane_coordinates(rows_px, cols_px, *, shape, object_pixel_m: float):
    """Object-plane coordinates (y_m, x_m) [m] of pixel positions.

    ``x = (col - (N_cols - 1)/2) * object_pixel_m`` and likewise y, with y
    pointing down (growing with the row index); ``object_pixel_m`` is
    :attr:`Rig.object_pixel_m` (= pitch * Z_A / z_i).  The single home of
    this convention (docs/architecture.md); rows and cols are broadcast as given.
    """
    try:
        n_rows, n_cols = (int(v) for v in shape)
    except (TypeError, ValueError):
        raise InputError(f"shape must be (rows, cols), got {shape!r}") from None
    if n_rows <= 0 or n_cols <= 0:
        raise InputError(f"shape must be positive, got {shape!r}")
    size = float(object_pixel_m)
    if not math.isfinite(size) or size <= 0:
        raise InputError(f"object pixel size must be positive and finite, got {size!r}")
    y = (np.asarray(rows_px, dtype=float) - (n_rows - 1) / 2.0) * size
    x = (np.asarray(cols_px, dtype=float) - (n_cols - 1) / 2.0) * size
    return y, x


def z_d_sweep(rig: Rig, *, n: int = 200) -> dict[str, np.ndarray]:
    """Sensitivity and blur of ``rig`` as Z_D varies (Z_A kept if given, else Z_B).

    The range runs from 2 % of the current Z_D up to 3 Z_D (at most to
    Z_B - f when Z_B is held fixed), always including the current Z_D.

    Returns
    -------
    dict of ndarray
        ``z_d_m``, ``sensitivity_m_per_rad``, ``sensitivity_px_per_rad``,
        ``object_blur_m`` (total, object plane), ``geometric_blur_px``,
        ``diffraction_blur_px``, ``total_blur_px``.
    """
    hi = 3.0 * rig.z_d
    if rig.z_a_m is None:
        hi = min(hi, (rig.z_b - rig.focal_length_m) * (1 - 1e-6))
    z = np.union1d(np.linspace(0.02 * rig.z_d, hi, n), [rig.z_d])
    rigs = [rig.with_z_d(float(v)) for v in z]
    names = ("sensitivity_m_per_rad", "sensitivity_px_per_rad", "total_object_blur_m", "geometric_blur_px",
             "diffraction_blur_px", "total_blur_px")
    out = {"z_d_m": z}
    for name in names:
        out["object_blur_m" if name == "total_object_blur_m" else name] = np.array([getattr(r, name) for r in rigs])
    return out


# ---------------------------------------------------------------------------
# Target quantities <-> deflection
# ---------------------------------------------------------------------------


def deflection_from_temperature_difference(dt_k: float, *, medium) -> float:
    """Deflection scale of a region heated by ``dt_k`` whose in-plane size equals its width.

    The heated gas at the ambient pressure has density
    ``medium.density_from_temperature(T0 + dT)`` (ideal gas, with the
    medium's compressibility), a deficit drho; across an in-plane length
    equal to the path length W the deflection is eps = K drho / n0 (W
    cancels; 2-D object relation d rho/dy = n0 eps / (K W), from
    eps = (1/n0) int dn/dy dz, Exp. Fluids 2019 Eq. 1, and n - 1 = K rho).
    """
    t0 = medium.temperature_k
    drho = float(medium.density_from_temperature(t0)) - float(medium.density_from_temperature(t0 + dt_k))
    return medium.gladstone_dale * drho / medium.ambient_index


def temperature_difference_from_deflection(eps_rad: float, *, medium) -> float:
    """Inverse of :func:`deflection_from_temperature_difference` [K] (inf if beyond the ambient density)."""
    drho = eps_rad * medium.ambient_index / medium.gladstone_dale
    rho0 = float(medium.density_from_temperature(medium.temperature_k))
    if drho >= rho0:
        return math.inf
    return float(medium.temperature_from_density(rho0 - drho)) - medium.temperature_k


def deflection_from_sound_level(spl_db: float, *, medium, frequency_hz: float, path_m: float) -> float:
    """Peak deflection of a plane sound wave travelling across the line of sight.

    eps = L k n' / n0 with n' = K p' / c^2 and k = 2 pi f / c
    (linear acoustics, from memory; module reference [4]).
    """
    c = medium.speed_of_sound
    n_prime = medium.gladstone_dale * float(spl_to_pressure_amplitude(spl_db)) / c**2
    return path_m * (2.0 * math.pi * frequency_hz / c) * n_prime / medium.ambient_index


def sound_level_from_deflection(eps_rad: float, *, medium, frequency_hz: float, path_m: float) -> float:
    """Inverse of :func:`deflection_from_sound_level`: SPL [dB] giving peak deflection ``eps_rad``."""
    c = medium.speed_of_sound
    n_prime = eps_rad * medium.ambient_index / (path_m * 2.0 * math.pi * frequency_hz / c)
    return float(pressure_to_spl(n_prime * c**2 / medium.gladstone_dale / math.sqrt(2.0)))


def target_deflection(*, medium=None, object_width_m: float | None = None, target_dt_k: float | None = None,
                      target_spl_db: float | None = None, target_deflection_rad: float | None = None,
                      source_frequency_hz: float | None = None) -> float:
    """Deflection [rad] that one target (dT, SPL or deflection) produces.

    Raises
    ------
    InputError
        Not exactly one target, or a missing medium / width / frequency.
    """
    targets = [t for t in (target_dt_k, target_spl_db, target_deflection_rad) if t is not None]
    if len(targets) != 1:
        raise InputError(f"give exactly one target (temperature difference, sound level or deflection); got {len(targets)}")
    if target_deflection_rad is not None:
        if not target_deflection_rad > 0:
            raise InputError(f"target deflection must be > 0, got {target_deflection_rad!r}")
        return float(target_deflection_rad)
    if medium is None:
        raise InputError("a medium is needed to turn the target into a deflection")
    if target_dt_k is not None:
        if not (math.isfinite(target_dt_k) and target_dt_k > 0):
            raise InputError(f"target temperature difference must be > 0 K, got {target_dt_k!r}")
        return deflection_from_temperature_difference(target_dt_k, medium=medium)
    if source_frequency_hz is None or not source_frequency_hz > 0:
        raise InputError("a sound-level target needs the source frequency (--frequency-hz)")
    if object_width_m is None or not object_width_m > 0:
        raise InputError("a sound-level target needs the object width (acoustic path length)")
    return deflection_from_sound_level(target_spl_db, medium=medium, frequency_hz=source_frequency_hz,
                                       path_m=object_width_m)


# ---------------------------------------------------------------------------
# Planning
# ---------------------------------------------------------------------------


@dataclass
class Plan:
    """Derived figures of a rig (SI units unless the name says otherwise).

    The smallest detectable quantities correspond to a displacement equal to
    the noise floor ``noise_px`` (signal-to-noise 1).  Density and
    temperature differences are taken across an in-plane length equal to the
    object width (a round plume or jet of diameter W); the sound pressure is
    the peak of a plane wave crossing the width W at ``source_frequency_hz``.
    """

    # inputs
    focal_length_m: float
    pixel_pitch_m: float
    f_number: float
    wavelength_m: float
    z_a_m: float
    z_b_m: float
    z_d_m: float
    sensor_px: tuple[int, int] | None
    object_width_m: float
    noise_px: float
    window_px: int
    gas: str
    # imaging
    magnification: float
    object_magnification: float
    image_distance_m: float
    object_pixel_m: float
    background_pixel_m: float
    field_of_view_m: tuple[float, float] | None
    window_object_m: float
    # sensitivity
    sensitivity_m_per_rad: float
    sensitivity_mm_per_rad: float
    sensitivity_px_per_rad: float
    px_per_density_gradient: float  # px per (kg/m^4)
    # medium
    gladstone_dale_m3_kg: float
    ambient_density_kg_m3: float
    ambient_index: float
    temperature_k: float
    pressure_pa: float
    speed_of_sound_m_s: float
    # detection limits
    min_deflection_rad: float
    min_density_gradient_kg_m4: float
    min_density_difference_kg_m3: float
    min_temperature_difference_k: float
    source_frequency_hz: float | None
    min_sound_pressure_pa: float | None  # peak
    min_spl_db: float | None
    # blur
    aperture_diameter_m: float
    geometric_blur_px: float
    diffraction_blur_px: float
    total_blur_px: float
    object_blur_geometric_m: float
    object_blur_m: float
    # background
    dot_diameter_m: float
    dot_diameter_range_m: tuple[float, float]
    # expected signal
    expected_deflection_rad: float | None
    expected_displacement_px: float | None
    warnings: list[str] = field(default_factory=list)

    def as_dict(self) -> dict[str, Any]:
        """Plain dict (JSON-ready: tuples become lists)."""
        d = dataclasses.asdict(self)
        return {k: (list(v) if isinstance(v, tuple) else v) for k, v in d.items()}


def _check_plan_inputs(object_width_m, noise_px, window_px) -> None:
    if object_width_m is None or not (math.isfinite(object_width_m) and object_width_m > 0):
        raise GeometryError(f"object width must be a positive length, got {object_width_m!r}")
    if not (math.isfinite(noise_px) and noise_px > 0):
        raise InputError(f"displacement noise floor must be > 0 px, got {noise_px!r}")
    if not (window_px >= 4):
        raise InputError(f"interrogation window must be >= 4 px, got {window_px!r}")


def plan(rig: Rig, *, medium, object_width_m: float, noise_px: float = 0.05, window_px: int = 32,
         expected_deflection_rad: float | None = None, source_frequency_hz: float | None = None,
         target_dt_k: float | None = None, target_spl_db: float | None = None,
         smallest_feature_m: float | None = None) -> Plan:
    """Evaluate a BOS rig: sensitivity, detection limits, blur, dot size, warnings.

    Parameters
    ----------
    rig : Rig
        Camera and distances.
    medium : bos.media.Medium
        Gas and ambient state (K, n0, rho0, T0, p0, c).
    object_width_m : float
        Width of the object along the line of sight (planar) or its diameter [m].
    noise_px : float
        Displacement noise floor [px] (0.02-0.1 px is typical for correlation).
    window_px : int
        Final interrogation window [px] (for the quarter-window rule).
    expected_deflection_rad : float, optional
        Largest expected deflection; checked against the window and noise.
    source_frequency_hz : float, optional
        Frequency of a sound source (enables the sound-pressure limit).
    target_dt_k, target_spl_db : float, optional
        A target to resolve; its displacement is reported and checked
        against the noise floor (used when no ``expected_deflection_rad``).

    Returns
    -------
    Plan

    References
    ----------
    Raffel (2015) Exp. Fluids 56:60; Exp. Fluids (2019)
    doi:10.1007/s00348-019-2865-4, Eq. (1); Raffel et al. (2018), Particle
    Image Velocimetry -- A Practical Guide, 3rd ed. (dot size, quarter-window
    rule) and Keane & Adrian (1990), Meas. Sci. Technol. 1:1202 (quarter-window
    rule), both from memory; linear acoustics, from memory.
    """
    _check_plan_inputs(object_width_m, noise_px, window_px)
    if source_frequency_hz is not None and not (math.isfinite(source_frequency_hz) and source_frequency_hz > 0):
        raise InputError(f"source frequency must be > 0 Hz, got {source_frequency_hz!r}")
    K = medium.gladstone_dale
    n0 = medium.ambient_index
    s_px = rig.sensitivity_px_per_rad
    eps_min = noise_px / s_px
    W = object_width_m
    drho_min = eps_min * n0 / K
    p_min = spl_min = None
    if source_frequency_hz is not None:
        spl_min = sound_level_from_deflection(eps_min, medium=medium, frequency_hz=source_frequency_hz, path_m=W)
        p_min = float(spl_to_pressure_amplitude(spl_min))
    expected = expected_deflection_rad
    if expected is None and (target_dt_k is not None or target_spl_db is not None):
        expected = target_deflection(medium=medium, object_width_m=W, target_dt_k=target_dt_k,
                                     target_spl_db=target_spl_db, source_frequency_hz=source_frequency_hz)
    bg_px = rig.background_pixel_m
    p = Plan(
        focal_length_m=rig.focal_length_m, pixel_pitch_m=rig.pixel_pitch_m, f_number=rig.f_number,
        wavelength_m=rig.wavelength_m, z_a_m=rig.z_a, z_b_m=rig.z_b, z_d_m=rig.z_d, sensor_px=rig.sensor_px,
        object_width_m=W, noise_px=float(noise_px), window_px=int(window_px),
        gas=str(getattr(medium, "composition", None) or getattr(medium, "gas", "?")),
        magnification=rig.magnification, object_magnification=rig.object_magnification,
        image_distance_m=rig.image_distance_m, object_pixel_m=rig.object_pixel_m,
        background_pixel_m=bg_px, field_of_view_m=rig.field_of_view_m,
        window_object_m=window_px * rig.object_pixel_m,
        sensitivity_m_per_rad=rig.sensitivity_m_per_rad, sensitivity_mm_per_rad=rig.sensitivity_m_per_rad * 1e3,
        sensitivity_px_per_rad=s_px, px_per_density_gradient=s_px * K * W / n0,
        gladstone_dale_m3_kg=K, ambient_density_kg_m3=medium.ambient_density, ambient_index=n0,
        temperature_k=medium.temperature_k, pressure_pa=medium.pressure_pa,
        speed_of_sound_m_s=medium.speed_of_sound,
        min_deflection_rad=eps_min, min_density_gradient_kg_m4=eps_min * n0 / (K * W),
        min_density_difference_kg_m3=drho_min,
        min_temperature_difference_k=temperature_difference_from_deflection(eps_min, medium=medium),
        source_frequency_hz=source_frequency_hz, min_sound_pressure_pa=p_min, min_spl_db=spl_min,
        aperture_diameter_m=rig.aperture_diameter_m, geometric_blur_px=rig.geometric_blur_px,
        diffraction_blur_px=rig.diffraction_blur_px, total_blur_px=rig.total_blur_px,
        object_blur_geometric_m=rig.object_blur_m, object_blur_m=rig.total_object_blur_m,
        dot_diameter_m=0.5 * sum(DOT_PX_RANGE) * bg_px,
        dot_diameter_range_m=(DOT_PX_RANGE[0] * bg_px, DOT_PX_RANGE[1] * bg_px),
        expected_deflection_rad=expected,
        expected_displacement_px=None if expected is None else expected * s_px,
    )
    p.warnings = (_warnings(p, rig) + _feature_warnings(p, smallest_feature_m)
                  + list(getattr(medium, "warnings", ())))
    return p


#: Largest object-plane blur, as a fraction of the acoustic wavelength, before a sound field's
#: amplitude is visibly reduced (common practice; a Gaussian blur of FWHM lambda/4 keeps 80 %).
SOUND_BLUR_FRACTION = 0.25


def gaussian_blur_transfer(blur_fwhm_m: float, wavelength_m: float) -> float:
    """Amplitude kept by a Gaussian blur of full width at half maximum ``blur_fwhm_m`` for a
    sinusoid of period ``wavelength_m``: exp(-(2 pi sigma / lambda)^2 / 2), sigma = FWHM / (2 sqrt(2 ln 2)).

    References
    ----------
    Goodman, J. W. (2005). Introduction to Fourier Optics, 3rd ed., Roberts & Co.,
    section 2.1 (Fourier transform of a Gaussian) -- from memory.
    """
    sigma = blur_fwhm_m / (2.0 * math.sqrt(2.0 * math.log(2.0)))
    return math.exp(-0.5 * (2.0 * math.pi * sigma / wavelength_m) ** 2)


def _feature_warnings(p: Plan, smallest_feature_m: float | None) -> list[str]:
    """Blur against the smallest feature the user wants, and against the acoustic wavelength."""
    out: list[str] = []
    blur = p.object_blur_m
    if smallest_feature_m is not None and blur > smallest_feature_m:
        out.append(f"object-plane blur {blur * 1e3:.3g} mm exceeds the smallest feature to resolve "
                   f"({smallest_feature_m * 1e3:.3g} mm): stop down (larger N), shorten Z_D or bring the object "
                   "closer to the background")
    f = p.source_frequency_hz
    if f:
        lam = p.speed_of_sound_m_s / f
        if blur > SOUND_BLUR_FRACTION * lam:
            kept = gaussian_blur_transfer(blur, lam)
            out.append(f"object-plane blur {blur * 1e3:.3g} mm is more than a quarter of the acoustic wavelength "
                       f"({lam * 1e3:.3g} mm at {f / 1e3:.3g} kHz): the sound field's amplitude is reduced to about "
                       f"{100 * kept:.0f} %; stop down, shorten Z_D or move the object toward the background")
    return out


def _warnings(p: Plan, rig: Rig) -> list[str]:
    out: list[str] = []
    if p.object_blur_m > p.object_width_m:
        out.append(
            f"object-plane blur {p.object_blur_m * 1e3:.3g} mm is larger than the object ({p.object_width_m * 1e3:.3g} mm): "
            "the flow is smeared out; stop down (larger N), shorten Z_D or use a longer focal length at larger Z_A"
        )
    elif p.object_blur_m > p.window_object_m:
        out.append(
            f"object-plane blur {p.object_blur_m * 1e3:.3g} mm exceeds the interrogation-window footprint "
            f"{p.window_object_m * 1e3:.3g} mm: blur, not the window, limits the spatial resolution"
        )
    if p.dot_diameter_m < PRINT_DOT_MIN_M:
        out.append(
            f"background dots of {p.dot_diameter_m * 1e3:.3g} mm are too small to print: below 0.1 mm, about one "
            "printer dot at 300 dpi (0.085 mm); print at higher resolution, use a screen, or move the background further away"
        )
    if p.diffraction_blur_px > DOT_PX_RANGE[1]:
        out.append(
            f"diffraction spot {p.diffraction_blur_px:.2g} px is larger than the 2-3 px dot image: dots will look "
            "larger and correlation noise grows; open the aperture (smaller N) if the object blur allows"
        )
    if p.field_of_view_m is not None and max(p.field_of_view_m) < p.object_width_m:
        out.append(
            f"the field of view ({p.field_of_view_m[1] * 1e3:.3g} x {p.field_of_view_m[0] * 1e3:.3g} mm) is smaller "
            f"than the object ({p.object_width_m * 1e3:.3g} mm)"
        )
    d = p.expected_displacement_px
    if d is not None:
        if abs(d) > p.window_px / 4:
            out.append(
                f"expected displacement {abs(d):.3g} px exceeds a quarter of the {p.window_px} px window "
                "(one-quarter rule): use larger windows, multi-pass deformation, or shorten Z_D"
            )
        if abs(d) < p.noise_px:
            hint = ""
            try:
                need = design_for_target(solve_for="z_d", target_deflection_rad=abs(p.expected_deflection_rad),
                                         noise_px=p.noise_px, **_fixed_geometry(rig, "z_d"))
                hint = f" (Z_D = {need.rig.z_d:.3g} m would reach it)"
            except InputError:
                hint = " (no Z_D at this focal length reaches it)"
            out.append(
                f"Z_D = {p.z_d_m:.3g} m is too small for the noise floor: the expected displacement {abs(d):.3g} px "
                f"is below {p.noise_px:g} px; increase Z_D or the focal length{hint}, or average more frames"
            )
    return out


# ---------------------------------------------------------------------------
# Inverse design
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class Design:
    """Result of :func:`design_for_target`.

    Attributes
    ----------
    rig : Rig
        The completed rig.
    solve_for : str
        "z_d", "focal_length" or "f_number".
    value : float
        The solved quantity (SI: metres, or the f-number).
    target_deflection_rad : float or None
        Deflection the target produces (None when solving N for blur only).
    min_deflection_rad : float
        Smallest detectable deflection of the completed rig (noise_px / S_px).
    """

    rig: Rig
    solve_for: str
    value: float
    target_deflection_rad: float | None
    min_deflection_rad: float


def _fixed_geometry(rig: Rig, solve_for: str) -> dict[str, Any]:
    """Keyword arguments of ``rig`` for :func:`design_for_target` without the unknown."""
    kw = dict(focal_length_m=rig.focal_length_m, pixel_pitch_m=rig.pixel_pitch_m, f_number=rig.f_number,
              sensor_px=rig.sensor_px, wavelength_m=rig.wavelength_m)
    if solve_for == "z_d":
        kw["z_a_m" if rig.z_a_m is not None else "z_b_m"] = rig.z_a if rig.z_a_m is not None else rig.z_b
    else:
        kw.update(z_a_m=rig.z_a, z_d_m=rig.z_d)
        kw.pop("focal_length_m" if solve_for == "focal_length" else "f_number")
    return kw


def _root(func, lo: float, hi: float) -> float:
    from scipy.optimize import brentq  # imported here: scipy.optimize costs ~0.4 s to import and
    # only the planning solvers need it (a `bos run` does not)

    return brentq(func, lo, hi, xtol=1e-12 * hi, rtol=1e-12, maxiter=200)


def design_for_target(*, solve_for: str, target_dt_k: float | None = None, target_spl_db: float | None = None,
                      target_deflection_rad: float | None = None, source_frequency_hz: float | None = None,
                      focal_length_m: float | None = None, pixel_pitch_m: float, f_number: float | None = None,
                      z_a_m: float | None = None, z_b_m: float | None = None, z_d_m: float | None = None,
                      sensor_px: tuple[int, int] | None = None, wavelength_m: float = 550e-9,
                      medium=None, object_width_m: float | None = None, noise_px: float = 0.05,
                      max_blur_m: float | None = None) -> Design:
    """Solve for the missing Z_D, focal length or f-number.

    ``solve_for="z_d"`` and ``"focal_length"`` make the smallest detectable
    deflection (``noise_px`` / S_px) equal to the deflection of the target.
    For ``"z_d"`` give one of ``z_a_m`` (kept fixed) or ``z_b_m``.
    ``solve_for="f_number"`` picks the brightest N (smallest) whose total
    object-plane blur stays within ``max_blur_m`` (or, without it, the N of
    least blur); a target, if given, must already be resolved.

    Returns
    -------
    Design

    Raises
    ------
    InputError
        Unreachable target (needed Z_D >= Z_B - f, a sensitivity beyond any
        lens, blur above ``max_blur_m`` at every f-number), the unknown given
        as well, or a missing parameter.
    """
    allowed = ("z_d", "focal_length", "f_number")
    if solve_for not in allowed:
        raise InputError(f"solve_for must be one of {', '.join(allowed)}; got {solve_for!r}")
    has_target = any(t is not None for t in (target_dt_k, target_spl_db, target_deflection_rad))
    eps_t = None
    if has_target or solve_for != "f_number":
        eps_t = target_deflection(medium=medium, object_width_m=object_width_m, target_dt_k=target_dt_k,
                                  target_spl_db=target_spl_db, target_deflection_rad=target_deflection_rad,
                                  source_frequency_hz=source_frequency_hz)
    if not (math.isfinite(noise_px) and noise_px > 0):
        raise InputError(f"displacement noise floor must be > 0 px, got {noise_px!r}")
    if max_blur_m is not None and not max_blur_m > 0:
        raise InputError(f"max blur must be > 0, got {max_blur_m!r}")
    common = dict(pixel_pitch_m=pixel_pitch_m, sensor_px=sensor_px, wavelength_m=wavelength_m)
    pitch = _check_length("pixel pitch", pixel_pitch_m)

    def need(name: str, value):
        if value is None:
            raise InputError(f"solving for {solve_for} needs {name}")
        return value

    if solve_for == "z_d":
        if z_d_m is not None:
            raise InputError("Z_D is the unknown when solving for z_d; do not give it")
        if (z_a_m is None) == (z_b_m is None):
            raise InputError("solving for z_d needs exactly one of Z_A (camera-object) or Z_B (camera-background)")
        f = _check_length("focal length", need("the focal length", focal_length_m))
        s_need = noise_px * pitch / eps_t  # required M * Z_D [m/rad]
        base = dict(common, focal_length_m=f, f_number=need("the f-number", f_number))
        if z_a_m is not None:
            za = _check_length("camera-to-object distance Z_A", z_a_m)
            # S = f Z_D / (Z_A + Z_D - f) rises towards f as Z_D -> infinity.
            if s_need >= f * (1 - 1e-9):
                raise InputError(
                    f"target needs a sensitivity of {s_need * 1e3:.4g} mm/rad; with f = {f * 1e3:.4g} mm no Z_D "
                    f"gets there (S < f = {f * 1e3:.4g} mm/rad); use a longer focal length or lower noise"
                )
            make = lambda zd: Rig(z_a_m=za, z_d_m=zd, **base)  # noqa: E731
            hi = max(za, 1.0)
            while make(hi).sensitivity_m_per_rad < s_need:
                hi *= 10.0
                if hi > 1e5:
                    raise InputError(f"target needs Z_D beyond 100 km (S -> f = {f * 1e3:.4g} mm/rad); use a longer lens")
            zd = _root(lambda z: make(z).sensitivity_m_per_rad - s_need, 1e-9 * hi, hi)
        else:
            zb = _check_length("camera-to-background distance Z_B", z_b_m)
            zd_max = zb - f  # keeps Z_A > f
            zd = s_need * (zb - f) / f if zb > f else math.inf
            if zd >= zd_max:
                raise InputError(
                    f"target needs Z_D = {zd:.4g} m but Z_D must stay below Z_B - f = {zd_max:.4g} m; "
                    "move the camera back or use a longer focal length"
                )
            make = lambda z: Rig(z_b_m=zb, z_d_m=z, **base)  # noqa: E731
            zd = _root(lambda z: make(z).sensitivity_m_per_rad - s_need, 1e-12 * zd_max, zd_max * (1 - 1e-12))
        rig, value = make(zd), zd
    elif solve_for == "focal_length":
        if focal_length_m is not None:
            raise InputError("the focal length is the unknown when solving for focal_length; do not give it")
        probe = Rig(focal_length_m=1e-6, f_number=need("the f-number", f_number), z_a_m=z_a_m, z_b_m=z_b_m,
                    z_d_m=z_d_m, **common)
        za, zd = probe.z_a, probe.z_d
        s_need = noise_px * pitch / eps_t
        make = lambda f: Rig(focal_length_m=f, f_number=f_number, z_a_m=za, z_d_m=zd, **common)  # noqa: E731
        f_hi = za * (1 - 1e-9)
        # S = f Z_D / (Z_B - f) rises with f; f < Z_A caps it at Z_A.
        if make(f_hi).sensitivity_m_per_rad <= s_need:
            raise InputError(
                f"target needs a sensitivity of {s_need * 1e3:.4g} mm/rad, more than any lens focused beyond the "
                f"object can give at Z_A = {za:.4g} m, Z_D = {zd:.4g} m; increase Z_D"
            )
        f = _root(lambda f: make(f).sensitivity_m_per_rad - s_need, 1e-9 * za, f_hi)
        rig, value = make(f), f
    else:
        if f_number is not None:
            raise InputError("the f-number is the unknown when solving for f_number; do not give it")
        f = need("the focal length", focal_length_m)
        make = lambda n: Rig(focal_length_m=f, f_number=n, z_a_m=z_a_m, z_b_m=z_b_m, z_d_m=z_d_m, **common)  # noqa: E731
        r1 = make(1.0)
        # total object blur^2 = (a/N)^2 + (b N)^2: least at N = sqrt(a/b)
        a = r1.object_blur_m
        b = AIRY_FACTOR * (1 + r1.magnification) * r1.wavelength_m / r1.object_magnification
        n_best = max(MIN_F_NUMBER, math.sqrt(a / b))
        if max_blur_m is None:
            n = n_best
        else:
            blur_best = make(n_best).total_object_blur_m
            if blur_best > max_blur_m:
                raise InputError(
                    f"no f-number keeps the object blur within {max_blur_m * 1e3:.3g} mm: the least blur is "
                    f"{blur_best * 1e3:.3g} mm at N = {n_best:.3g}; shorten Z_D or move the camera closer"
                )
            if make(MIN_F_NUMBER).total_object_blur_m <= max_blur_m:
                n = MIN_F_NUMBER
            else:
                n = _root(lambda n: make(n).total_object_blur_m - max_blur_m, MIN_F_NUMBER, n_best)
        rig, value = make(n), n
        if eps_t is not None and noise_px / rig.sensitivity_px_per_rad > eps_t * (1 + 1e-9):
            raise InputError(
                f"the f-number does not change sensitivity: the target needs {noise_px * pitch / eps_t * 1e3:.4g} mm/rad "
                f"but this geometry gives {rig.sensitivity_m_per_rad * 1e3:.4g} mm/rad; solve for z_d or focal_length"
            )
    if max_blur_m is not None and solve_for != "f_number" and rig.total_object_blur_m > max_blur_m * (1 + 1e-9):
        raise InputError(
            f"the solved rig blurs the object over {rig.total_object_blur_m * 1e3:.3g} mm, more than the allowed "
            f"{max_blur_m * 1e3:.3g} mm; stop down (solve for f_number) or relax the target"
        )
    return Design(rig=rig, solve_for=solve_for, value=float(value), target_deflection_rad=eps_t,
                  min_deflection_rad=noise_px / rig.sensitivity_px_per_rad)
