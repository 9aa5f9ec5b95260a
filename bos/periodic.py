"""Periodic sources: strobe planning, phase assignment and per-pixel lock-in fits.

Three groups of pure functions (arrays in, arrays or small dataclasses out):

* **Strobe planning** - what a finite light pulse or exposure does to the
  contrast of a periodic pattern (sinc(pi f tau)), the longest pulse for a
  contrast, the smear of a travelling wave during the pulse, the apparent
  ("rolling") frequency and phase advance when a frame or strobe rate samples
  the source, the delay schedule for N phase steps, and the number of
  phase-averaged frames needed to resolve a sound level (:func:`plan_strobe`).
* **Phase assignment** - the phase of every frame from a phase list, from a
  frame rate and the source frequency (aliasing), or from time stamps, with
  the checks that make a phase-resolved fit possible (:func:`phases_from_list`,
  :func:`phases_from_frame_rate`, :func:`phases_from_timestamps`,
  :func:`check_phases`).
* **Lock-in fit** - per-pixel least-squares fit of a mean plus the first (and
  optionally higher) harmonics over the phases, giving complex amplitudes with
  1-sigma uncertainties from the fit residuals (:func:`lockin_fit`).

Conventions: phases in radians inside the library; a harmonic h of a frame
at phase phi is ``Re(A_h exp(i h phi))``, so ``|A_h|`` is the peak amplitude
and ``arg(A_h)`` its phase.

References
----------
- Bracewell, R. N. (2000). *The Fourier Transform and Its Applications*, 3rd
  ed., McGraw-Hill: the rectangle function and its transform sinc (averaging
  a sinusoid over a rectangular window of length tau scales it by
  sin(pi f tau)/(pi f tau)).
- Shannon, C. E. (1949). Communication in the presence of noise. *Proc. IRE*
  37:10-21 (sampling, aliasing about multiples of the sampling rate).
- IEEE Std 1057-2017, *Standard for Digitizing Waveform Recorders*, the
  three-parameter (known-frequency) least-squares sine fit used here per pixel.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np

from .errors import InputError

__all__ = [
    "CONTRAST_LEVELS",
    "Aliasing",
    "LockinResult",
    "StrobePlan",
    "aliasing",
    "amplitude_phase",
    "check_phases",
    "delay_schedule",
    "displacement_amplitude_px",
    "distinct_phases",
    "frames_for_spl",
    "lockin_fit",
    "longest_pulse_for_contrast",
    "phases_from_frame_rate",
    "phases_from_list",
    "phases_from_timestamps",
    "plan_strobe",
    "pulse_contrast",
    "pulse_smear",
]

#: contrast levels reported by the strobe planning (fractions of the full amplitude)
CONTRAST_LEVELS = (0.99, 0.95, 0.90, 0.50)
#: phases closer than this [rad] (about 0.006 deg) count as the same phase
PHASE_TOLERANCE_RAD = 1e-4


def _positive(name: str, value: Any) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be a number, got {value!r}") from None
    if not (math.isfinite(v) and v > 0):
        raise InputError(f"{name} must be a positive finite number, got {value!r}")
    return v


# ---------------------------------------------------------------------------
# Strobe planning
# ---------------------------------------------------------------------------


def pulse_contrast(frequency_hz, pulse_width_s):
    """Fraction of a sinusoid's amplitude kept by a rectangular pulse or exposure.

    Averaging ``cos(2 pi f t)`` over a window of length tau scales its
    amplitude by ``sinc(pi f tau) = sin(pi f tau) / (pi f tau)``.  The value
    is signed: between f tau = 1 and 2 the pattern comes out inverted.

    Parameters
    ----------
    frequency_hz : float or array
        Source frequency f [Hz], > 0.
    pulse_width_s : float or array
        Pulse width or exposure tau [s], >= 0.

    Returns
    -------
    float or ndarray
        sinc(pi f tau) (1 for tau = 0).

    References
    ----------
    Bracewell (2000), the rectangle function and sinc.
    """
    f = np.asarray(frequency_hz, float)
    tau = np.asarray(pulse_width_s, float)
    if not (np.all(np.isfinite(f)) and np.all(f > 0)):
        raise InputError(f"frequency must be positive, got {frequency_hz!r}")
    if not (np.all(np.isfinite(tau)) and np.all(tau >= 0)):
        raise InputError(f"pulse width must be >= 0, got {pulse_width_s!r}")
    out = np.sinc(f * tau)  # numpy sinc(x) = sin(pi x)/(pi x)
    return float(out) if out.ndim == 0 else out


def longest_pulse_for_contrast(frequency_hz: float, contrast: float) -> float:
    """Longest rectangular pulse [s] that keeps at least ``contrast`` of the amplitude.

    Solves sin(x)/x = contrast for x in (0, pi) and returns tau = x / (pi f).

    Parameters
    ----------
    frequency_hz : float
        Source frequency [Hz].
    contrast : float
        Wanted fraction of the amplitude, 0 < contrast < 1.

    References
    ----------
    Bracewell (2000), sinc.
    """
    from scipy.optimize import brentq

    f = _positive("frequency", frequency_hz)
    c = float(contrast)
    if not 0.0 < c < 1.0:
        raise InputError(f"contrast must lie between 0 and 1 (exclusive), got {contrast!r}")
    x = brentq(lambda v: np.sinc(v / np.pi) - c, 1e-12, np.pi, xtol=1e-15, rtol=1e-15)
    return float(x / (np.pi * f))


def pulse_smear(frequency_hz: float, pulse_width_s: float, *, speed_of_sound_m_s: float) -> dict[str, float]:
    """How far a travelling wave moves during the pulse, against its wavelength.

    Returns
    -------
    dict
        ``smear_m`` = c tau, ``wavelength_m`` = c / f, ``smear_fraction`` =
        f tau (smear over wavelength).
    """
    f = _positive("frequency", frequency_hz)
    c = _positive("speed of sound", speed_of_sound_m_s)
    tau = float(pulse_width_s)
    if not (math.isfinite(tau) and tau >= 0):
        raise InputError(f"pulse width must be >= 0, got {pulse_width_s!r}")
    return {"smear_m": c * tau, "wavelength_m": c / f, "smear_fraction": f * tau}


@dataclass(frozen=True)
class Aliasing:
    """A periodic source of frequency f_s sampled at a frame (or strobe) rate f_r.

    Attributes
    ----------
    ratio : float
        f_s / f_r.
    harmonic : int
        k = round(f_s / f_r).
    apparent_frequency_hz : float
        f_s - k f_r (signed: negative = the pattern appears to run backwards).
    phase_step_deg : float
        Phase advance per frame, 360 * (f_s/f_r - k), in (-180, 180] deg.
    frames_per_apparent_cycle : float
        360 / |phase step| (inf when frozen).
    frozen : bool
        The rate locks to the source: every frame shows the same phase.
    direction_ambiguous : bool
        The apparent frequency sits at +-f_r/2 (phase step 180 deg): the
        direction of travel cannot be told.
    near_half_rate : bool
        |phase step| >= 162 deg (fewer than ~2.2 frames per apparent cycle):
        the direction is hard to tell with noise or rate jitter.
    """

    ratio: float
    harmonic: int
    apparent_frequency_hz: float
    phase_step_deg: float
    frames_per_apparent_cycle: float
    frozen: bool
    direction_ambiguous: bool
    near_half_rate: bool


def _fraction(frequency_hz: float, rate_hz: float) -> tuple[int, float]:
    """(k, f_s/f_r - k) with k = round(f_s/f_r), the fraction computed as (f_s - k f_r)/f_r."""
    k = int(math.floor(frequency_hz / rate_hz + 0.5))
    return k, (frequency_hz - k * rate_hz) / rate_hz


def aliasing(frequency_hz: float, rate_hz: float, *, tolerance: float = 1e-9) -> Aliasing:
    """Apparent frequency and phase advance per frame of a sampled periodic source.

    f_app = f_s - k f_r with k = round(f_s / f_r); each frame advances the
    phase by 2 pi (f_s/f_r - k).  At f_s/f_r = k + 1/2 the apparent frequency
    is +-f_r/2 and the direction is ambiguous (flagged).

    Parameters
    ----------
    frequency_hz : float
        Source frequency f_s [Hz].
    rate_hz : float
        Frame or strobe rate f_r [Hz].
    tolerance : float
        |f_s/f_r - k| below this counts as locked (frozen); within this of
        1/2 as ambiguous.

    References
    ----------
    Shannon (1949), sampling and aliasing.
    """
    fs = _positive("source frequency", frequency_hz)
    fr = _positive("frame rate", rate_hz)
    k, frac = _fraction(fs, fr)
    frozen = abs(frac) < tolerance
    ambiguous = abs(abs(frac) - 0.5) < tolerance
    step = 360.0 * frac
    if ambiguous:
        step = 180.0
    return Aliasing(ratio=fs / fr, harmonic=k, apparent_frequency_hz=fs - k * fr, phase_step_deg=step,
                    frames_per_apparent_cycle=math.inf if frozen else 360.0 / abs(step), frozen=frozen,
                    direction_ambiguous=ambiguous, near_half_rate=abs(step) >= 162.0)


def delay_schedule(frequency_hz: float, steps: int) -> dict[str, Any]:
    """Trigger delays for N equally spaced phase steps over one source period.

    Returns
    -------
    dict
        ``delay_step_s`` = 1 / (N f), ``delays_s`` (N values from 0),
        ``phases_deg`` (N values 0, 360/N, ...), ``period_s``.
    """
    f = _positive("source frequency", frequency_hz)
    n = int(steps)
    if n != steps or n < 3:
        raise InputError(f"phase steps must be an integer >= 3 (a first-harmonic fit needs 3 phases), got {steps!r}")
    dt = 1.0 / (n * f)
    i = np.arange(n)
    return {"steps": n, "period_s": 1.0 / f, "delay_step_s": dt, "delays_s": i * dt, "phases_deg": i * 360.0 / n}


def displacement_amplitude_px(spl_db: float, *, rig, medium, frequency_hz: float, path_m: float,
                              contrast: float = 1.0) -> float:
    """Peak background displacement [px] of a plane sound wave across the line of sight.

    d = S_px * eps with eps = L k n' / n0, n' = K p'/c^2, k = 2 pi f / c
    (:func:`bos.optics.deflection_from_sound_level`), times the pulse
    ``contrast`` (sinc factor).
    """
    from .optics import deflection_from_sound_level

    eps = deflection_from_sound_level(spl_db, medium=medium, frequency_hz=_positive("source frequency", frequency_hz),
                                      path_m=_positive("path length", path_m))
    return abs(float(contrast)) * eps * rig.sensitivity_px_per_rad


def frames_for_spl(amplitude_px: float, *, noise_px: float, snr: float = 1.0) -> int:
    """Phase-averaged frames needed so a first-harmonic amplitude reaches ``snr``.

    A least-squares fit of mean + first harmonic over N frames with phases
    spread evenly over the cycle and per-frame noise sigma gives each
    quadrature component an uncertainty sigma sqrt(2/N); the amplitude is
    resolved (``snr`` = amplitude / that uncertainty) for
    N >= 2 (snr sigma / amplitude)^2, and never fewer than 3 frames.

    References
    ----------
    IEEE Std 1057-2017, three-parameter sine fit (least squares).
    """
    a = _positive("displacement amplitude", amplitude_px)
    s = _positive("noise", noise_px)
    return max(3, int(math.ceil(2.0 * (float(snr) * s / a) ** 2 - 1e-9)))


@dataclass
class StrobePlan:
    """Numbers of ``bos strobe`` (SI units unless the name says otherwise)."""

    frequency_hz: float
    pulse_width_s: float
    speed_of_sound_m_s: float
    wavelength_m: float
    pulse_contrast: float
    pulse_contrast_abs: float
    longest_pulse_s_for_contrast: dict[str, float]
    smear_m: float
    smear_fraction_of_wavelength: float
    aliasing: dict[str, Any] | None = None
    phase_steps: dict[str, Any] | None = None
    signal: dict[str, Any] | None = None
    warnings: list[str] = field(default_factory=list)

    def as_dict(self) -> dict[str, Any]:
        """JSON-ready dict (arrays become lists, inf becomes None)."""
        def clean(v):
            if isinstance(v, dict):
                return {k: clean(x) for k, x in v.items()}
            if isinstance(v, (list, tuple, np.ndarray)):
                return [clean(x) for x in np.asarray(v).tolist()] if isinstance(v, np.ndarray) else [clean(x) for x in v]
            if isinstance(v, (float, np.floating)) and not math.isfinite(float(v)):
                return None
            if isinstance(v, np.generic):
                return v.item()
            return v
        return clean(asdict(self))


def plan_strobe(*, frequency_hz: float, pulse_width_s: float, medium=None, frame_rate_hz: float | None = None,
                phase_steps: int | None = None, rig=None, path_m: float | None = None, spl_db: float | None = None,
                target_spl_db: float | None = None, spl_resolution_db: float | None = None,
                noise_px: float = 0.05) -> StrobePlan:
    """Plan a stroboscopic or phase-locked acquisition of a periodic source.

    Parameters
    ----------
    frequency_hz : float
        Source frequency [Hz].
    pulse_width_s : float
        Strobe pulse width or camera exposure [s].
    medium : bos.media.Medium, optional
        Gas (speed of sound, Gladstone-Dale constant); default air at 20 degC.
    frame_rate_hz : float, optional
        Camera or strobe rate: apparent frequency, phase advance, ambiguity.
    phase_steps : int, optional
        N phase steps per period: the delay schedule.
    rig : bos.optics.Rig, optional
        With ``path_m`` (acoustic path along the line of sight): the expected
        displacement for ``spl_db`` and the frames needed for ``target_spl_db``.
    spl_db, target_spl_db : float, optional
        Expected sound level, and the smallest level to resolve [dB re 20 uPa].
    spl_resolution_db : float, optional
        Wanted 1-sigma uncertainty of the level at ``spl_db`` [dB]: the frames
        needed are N >= 2 (20/ln 10 * noise / (amplitude * resolution))^2.
    noise_px : float
        Per-frame displacement noise [px].

    Returns
    -------
    StrobePlan

    References
    ----------
    Bracewell (2000); Shannon (1949); IEEE Std 1057-2017 (see module docstring).
    """
    from .media import Medium

    medium = medium or Medium()
    f = _positive("source frequency", frequency_hz)
    tau = float(pulse_width_s)
    contrast = pulse_contrast(f, tau)
    c = float(medium.speed_of_sound)
    smear = pulse_smear(f, tau, speed_of_sound_m_s=c)
    longest = {f"{int(round(level * 100))}%": longest_pulse_for_contrast(f, level) for level in CONTRAST_LEVELS}
    warnings: list[str] = []
    if contrast < 0:
        warnings.append(f"the pulse spans {f * tau:.2f} periods: the pattern comes out inverted "
                        f"(contrast {contrast:+.3f}); shorten the pulse")
    elif contrast < 0.5:
        warnings.append(f"the pulse keeps only {100 * contrast:.0f} % of the amplitude; "
                        f"pulses up to {longest['90%'] * 1e6:.3g} us keep 90 %")
    plan = StrobePlan(frequency_hz=f, pulse_width_s=tau, speed_of_sound_m_s=c, wavelength_m=smear["wavelength_m"],
                      pulse_contrast=contrast, pulse_contrast_abs=abs(contrast), longest_pulse_s_for_contrast=longest,
                      smear_m=smear["smear_m"], smear_fraction_of_wavelength=smear["smear_fraction"],
                      warnings=warnings)
    if frame_rate_hz is not None:
        a = aliasing(f, frame_rate_hz)
        plan.aliasing = asdict(a) | {"frame_rate_hz": float(frame_rate_hz)}
        if a.frozen:
            warnings.append(f"{frame_rate_hz:g} fps locks to the source ({f:g} Hz = {a.harmonic} x the rate): every "
                            "frame shows the same phase; step the trigger delay for phase information")
        elif a.direction_ambiguous:
            warnings.append("the apparent frequency sits at half the frame rate: the direction of travel is "
                            "ambiguous; change the rate")
        elif a.near_half_rate:
            warnings.append(f"phase step {a.phase_step_deg:.1f} deg per frame is close to 180 deg: the apparent "
                            "direction is unreliable; move the rate closer to a subharmonic")
    if phase_steps is not None:
        plan.phase_steps = delay_schedule(f, phase_steps)
    if rig is not None and path_m is not None:
        signal: dict[str, Any] = {"noise_px": float(noise_px), "path_m": float(path_m),
                                  "sensitivity_px_per_rad": rig.sensitivity_px_per_rad}
        n_frames = plan.phase_steps["steps"] if plan.phase_steps else None
        if spl_db is not None:
            amp = displacement_amplitude_px(spl_db, rig=rig, medium=medium, frequency_hz=f, path_m=path_m,
                                            contrast=contrast)
            signal.update(spl_db=float(spl_db), displacement_amplitude_px=amp,
                          frames_for_snr_1=frames_for_spl(amp, noise_px=noise_px) if amp > 0 else None)
            if spl_resolution_db is not None and amp > 0:
                res_db = _positive("SPL resolution", spl_resolution_db)
                signal.update(spl_resolution_db=res_db, frames_for_spl_resolution=frames_for_spl(
                    amp, noise_px=noise_px, snr=20.0 / math.log(10.0) / res_db))
            if n_frames and amp > 0:
                sig_amp = noise_px * math.sqrt(2.0 / n_frames)
                signal.update(frames=n_frames, amplitude_uncertainty_px=sig_amp,
                              spl_uncertainty_db=20.0 / math.log(10.0) * sig_amp / amp)
        if target_spl_db is not None:
            amp_t = displacement_amplitude_px(target_spl_db, rig=rig, medium=medium, frequency_hz=f, path_m=path_m,
                                              contrast=contrast)
            signal.update(target_spl_db=float(target_spl_db), target_displacement_amplitude_px=amp_t,
                          frames_for_target=frames_for_spl(amp_t, noise_px=noise_px) if amp_t > 0 else None)
        plan.signal = signal
    return plan


# ---------------------------------------------------------------------------
# Phase assignment
# ---------------------------------------------------------------------------


def phases_from_list(phase_deg: Sequence[float]) -> np.ndarray:
    """Phases [rad] from a list of phases in degrees (wrapped to [0, 2 pi))."""
    p = np.asarray(phase_deg, float).ravel()
    if p.size == 0:
        raise InputError("the phase list is empty")
    if not np.all(np.isfinite(p)):
        raise InputError("the phase list contains a value that is not a finite number")
    return np.mod(np.deg2rad(p), 2.0 * np.pi)


def phases_from_frame_rate(n_frames: int, *, frequency_hz: float, frame_rate_hz: float,
                           first_frame: int = 0) -> np.ndarray:
    """Phases [rad] of consecutive frames at a frame rate (aliasing relation).

    Frame j (counted from ``first_frame``) is taken at t = j / f_r, so its
    phase is 2 pi frac(j f_s / f_r), computed exactly as
    2 pi ((j f_s) mod f_r) / f_r.

    Raises
    ------
    InputError
        The rate locks to the source (every frame at the same phase).
    """
    a = aliasing(frequency_hz, frame_rate_hz)
    if a.frozen:
        raise InputError(f"frame rate {frame_rate_hz:g} Hz locks to the source frequency {frequency_hz:g} Hz "
                         f"(ratio {a.ratio:g}): every frame shows the same phase, no phase information")
    j = np.arange(int(n_frames), dtype=float) + int(first_frame)
    return 2.0 * np.pi * np.mod(j * float(frequency_hz), float(frame_rate_hz)) / float(frame_rate_hz)


def phases_from_timestamps(times_s: Sequence[float], *, frequency_hz: float) -> np.ndarray:
    """Phases [rad] of frames taken at times ``times_s`` [s]: 2 pi frac(f_s t)."""
    f = _positive("source frequency", frequency_hz)
    t = np.asarray(times_s, float).ravel()
    if t.size == 0 or not np.all(np.isfinite(t)):
        raise InputError("time stamps must be finite numbers")
    cycles = np.mod(t * f, 1.0)
    return 2.0 * np.pi * cycles


def distinct_phases(phases_rad: np.ndarray, *, tolerance: float = PHASE_TOLERANCE_RAD) -> tuple[np.ndarray, np.ndarray]:
    """Group phases that coincide (within ``tolerance``, across the 0/2 pi wrap).

    Returns
    -------
    (centres, labels)
        The distinct phases [rad] (circular means) and, per input phase, the
        index of its group.
    """
    p = np.mod(np.asarray(phases_rad, float).ravel(), 2.0 * np.pi)
    order = np.argsort(p)
    labels = np.empty(p.size, int)
    group = 0
    for n, idx in enumerate(order):
        if n > 0 and p[idx] - p[order[n - 1]] > tolerance:
            group += 1
        labels[idx] = group
    if group > 0 and (p[order[0]] + 2.0 * np.pi - p[order[-1]]) <= tolerance:
        labels[labels == group] = 0
        group -= 1
    centres = np.array([np.angle(np.mean(np.exp(1j * p[labels == g]))) % (2.0 * np.pi) for g in range(group + 1)])
    return centres, labels


def check_phases(phases_rad: np.ndarray, *, harmonics: int = 1) -> int:
    """Check that the phases allow a fit of a mean and ``harmonics`` harmonics.

    Returns the number of distinct phases.

    Raises
    ------
    InputError
        Fewer than 3 distinct phases (2 h + 1 for h harmonics), or phases
        that are aliases for a harmonic (e.g. 0 and 180 deg only).
    """
    h = int(harmonics)
    if h < 1:
        raise InputError(f"harmonics must be >= 1, got {harmonics!r}")
    centres, _ = distinct_phases(phases_rad)
    need = 2 * h + 1
    if centres.size < need:
        raise InputError(f"only {centres.size} distinct phase(s) among {np.size(phases_rad)} frames: a fit of the mean "
                         f"and {h} harmonic(s) needs at least {need} distinct phases")
    design = _design(centres, h)
    if np.linalg.matrix_rank(design) < design.shape[1]:
        raise InputError(f"the {centres.size} distinct phases cannot separate {h} harmonic(s) "
                         "(they alias onto each other); use more evenly spread phases")
    return int(centres.size)


# ---------------------------------------------------------------------------
# Lock-in fit
# ---------------------------------------------------------------------------


def _design(phases: np.ndarray, harmonics: int) -> np.ndarray:
    cols = [np.ones_like(phases)]
    for h in range(1, harmonics + 1):
        cols += [np.cos(h * phases), -np.sin(h * phases)]
    return np.column_stack(cols)


@dataclass
class LockinResult:
    """Per-pixel fit of ``x(phi) = mean + sum_h Re(A_h exp(i h phi))``.

    Attributes
    ----------
    mean : ndarray
        Fitted mean over the cycle (shape of one frame).
    amplitude : ndarray of complex, shape (harmonics, ...)
        Complex amplitudes A_h (peak; ``A_h = a_h + i b_h`` with
        x = a cos(h phi) - b sin(h phi)).
    sigma_mean : ndarray
        1-sigma uncertainty of the mean.
    sigma_real, sigma_imag : ndarray, shape (harmonics, ...)
        1-sigma uncertainties of Re A_h and Im A_h.
    residual_rms : ndarray
        Rms of the fit residuals per pixel (NaN where no dof).
    n_frames : ndarray of int
        Frames used per pixel (finite values).
    uncertainty_source : str
        ``"residuals"`` (enough frames) or ``"frame sigma"`` (propagated
        per-frame uncertainties) or ``"mixed"``.
    """

    mean: np.ndarray
    amplitude: np.ndarray
    sigma_mean: np.ndarray
    sigma_real: np.ndarray
    sigma_imag: np.ndarray
    residual_rms: np.ndarray
    n_frames: np.ndarray
    uncertainty_source: str

    @property
    def first(self) -> np.ndarray:
        """Complex first-harmonic amplitude A_1."""
        return self.amplitude[0]


def _solve_group(x: np.ndarray, design: np.ndarray, frame_sigma: np.ndarray | None, min_dof: int):
    """Fit one set of pixels that share the same valid frames. x: (frames, pixels)."""
    n, p = design.shape
    xtx_inv = np.linalg.inv(design.T @ design)
    coef = xtx_inv @ design.T @ x
    resid = x - design @ coef
    dof = n - p
    diag = np.diag(xtx_inv)[:, None]
    rms = np.sqrt(np.mean(resid**2, axis=0)) if n else np.full(x.shape[1], np.nan)
    if dof >= min_dof:
        s2 = np.sum(resid**2, axis=0) / dof
        sig = np.sqrt(diag * s2[None, :])
        src = "residuals"
    else:
        sig = np.full(coef.shape, np.nan)
        src = "none"
    if frame_sigma is not None:
        # propagated per-frame sigma: var(coef) = (X^T X)^-1 X^T diag(s^2) X (X^T X)^-1
        m = xtx_inv @ design.T
        prop = np.sqrt((m**2) @ (frame_sigma**2))
        if dof < min_dof:
            sig, src = prop, "frame sigma"
        else:
            sig = np.where(np.isfinite(sig), np.maximum(sig, 0.0), prop)
    return coef, sig, rms if dof > 0 else np.full(x.shape[1], np.nan), src


def lockin_fit(frames, phases_rad, *, harmonics: int = 1, frame_sigma=None, min_dof: int = 2) -> LockinResult:
    """Per-pixel least-squares fit of a mean and harmonics over the phases.

    Parameters
    ----------
    frames : ndarray, shape (n_frames, ...)
        One value per frame and pixel (e.g. a displacement component [px]);
        NaN marks a missing value (the pixel is then fitted on its remaining
        frames, or left NaN when fewer than 2 h + 1 remain).
    phases_rad : ndarray, shape (n_frames,)
        Source phase of each frame [rad].  Repeated phases are averaged by
        the least-squares fit (equivalent to fitting their means with the
        counts as weights).
    harmonics : int
        Number of harmonics fitted (1 = first harmonic only).
    frame_sigma : ndarray, shape like ``frames``, optional
        Per-frame 1-sigma uncertainties; propagated when the fit has fewer
        than ``min_dof`` degrees of freedom for residual-based uncertainties.
    min_dof : int
        Smallest number of residual degrees of freedom for residual-based
        uncertainties (s^2 = RSS / (n - p), cov = s^2 (X^T X)^-1).

    Returns
    -------
    LockinResult

    References
    ----------
    IEEE Std 1057-2017, least-squares sine fit with known frequency.
    """
    x = np.asarray(frames, float)
    phi = np.asarray(phases_rad, float).ravel()
    if x.ndim < 1 or x.shape[0] != phi.size:
        raise InputError(f"{phi.size} phases for {x.shape[0] if x.ndim else 0} frames: the counts must match")
    check_phases(phi, harmonics=harmonics)
    h = int(harmonics)
    shape = x.shape[1:]
    flat = x.reshape(phi.size, -1)
    sig_flat = None
    if frame_sigma is not None:
        sig_flat = np.asarray(frame_sigma, float).reshape(phi.size, -1)
    n_par = 2 * h + 1
    coef = np.full((n_par, flat.shape[1]), np.nan)
    sig = np.full_like(coef, np.nan)
    rms = np.full(flat.shape[1], np.nan)
    valid = np.isfinite(flat)
    if sig_flat is not None:
        valid &= np.isfinite(sig_flat)
    counts = valid.sum(axis=0)
    sources: set[str] = set()
    # pixels sharing the same set of valid frames are solved together
    keys, inverse = np.unique(np.packbits(valid, axis=0), axis=1, return_inverse=True)
    inverse = np.asarray(inverse).ravel()
    for g in range(keys.shape[1]):
        cols = np.nonzero(inverse == g)[0]
        rows = valid[:, cols[0]]
        if rows.sum() < n_par:
            continue
        ph = phi[rows]
        try:
            check_phases(ph, harmonics=h)
        except InputError:
            continue
        d = _design(ph, h)
        fs = None if sig_flat is None else sig_flat[np.ix_(rows, cols)]
        c, s, r, src = _solve_group(flat[np.ix_(rows, cols)], d, fs, min_dof)
        coef[:, cols], sig[:, cols], rms[cols] = c, s, r
        sources.add(src)
    amp = np.stack([coef[1 + 2 * k] + 1j * coef[2 + 2 * k] for k in range(h)]).reshape((h,) + shape)
    sig_re = np.stack([sig[1 + 2 * k] for k in range(h)]).reshape((h,) + shape)
    sig_im = np.stack([sig[2 + 2 * k] for k in range(h)]).reshape((h,) + shape)
    src = sources.pop() if len(sources) == 1 else ("mixed" if sources else "none")
    return LockinResult(mean=coef[0].reshape(shape), amplitude=amp, sigma_mean=sig[0].reshape(shape),
                        sigma_real=sig_re, sigma_imag=sig_im, residual_rms=rms.reshape(shape),
                        n_frames=counts.reshape(shape), uncertainty_source=src)


def amplitude_phase(value, sigma_real, sigma_imag) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Magnitude and phase of complex amplitudes with first-order 1-sigma uncertainties.

    Real and imaginary parts are taken as uncorrelated (true for phases spread
    evenly over the cycle).

    Returns
    -------
    (magnitude, sigma_magnitude, phase_rad, sigma_phase_rad)
    """
    z = np.asarray(value, complex)
    sr = np.asarray(sigma_real, float)
    si = np.asarray(sigma_imag, float)
    mag = np.abs(z)
    with np.errstate(invalid="ignore", divide="ignore"):
        s_mag = np.sqrt((z.real * sr) ** 2 + (z.imag * si) ** 2) / mag
        s_phase = np.sqrt((z.imag * sr) ** 2 + (z.real * si) ** 2) / mag**2
    small = mag == 0
    s_mag = np.where(small, np.hypot(sr, si) / np.sqrt(2.0), s_mag)
    s_phase = np.where(small, np.pi, np.minimum(s_phase, np.pi))
    return mag, s_mag, np.angle(z), s_phase
