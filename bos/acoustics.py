"""Sound fields: reconstructed density -> acoustic pressure and temperature.

For a sound wave the density fluctuation is isentropic, so the isobaric
ideal-gas temperature used for hot-gas flows does not apply.  This module
turns the reconstructed density of an acoustic source into the acoustic
pressure p' = c^2 rho' and the isentropic temperature fluctuation
T' = ((gamma - 1)/gamma) T0 p'/p0, with their 1-sigma uncertainties.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import InputError


@dataclass
class AcousticField:
    """Acoustic quantities on the reconstruction grid.

    Attributes
    ----------
    pressure_pa : ndarray
        Acoustic pressure p' [Pa] (NaN where the density is NaN).
    sigma_pressure_pa : ndarray
        1-sigma uncertainty of p' [Pa].
    temperature_k : ndarray
        Absolute temperature T0 + T' [K] with T' isentropic.
    sigma_temperature_k : ndarray
        1-sigma uncertainty of the temperature [K].
    peak_pressure_pa : float
        Largest |p'| [Pa] over finite points (NaN if none).
    peak_spl_db : float
        Sound pressure level [dB re 20 uPa] of a sine of that peak amplitude
        (p_rms = p_peak / sqrt 2); NaN if the peak is zero or undefined.
    """

    pressure_pa: np.ndarray
    sigma_pressure_pa: np.ndarray
    temperature_k: np.ndarray
    sigma_temperature_k: np.ndarray
    peak_pressure_pa: float
    peak_spl_db: float


def acoustic_field(density, *, medium, sigma_density=None) -> AcousticField:
    """Acoustic pressure and isentropic temperature from a density field.

    Parameters
    ----------
    density : ndarray
        Reconstructed density [kg/m^3]; NaN marks masked/invalid points.
    medium : bos.media.Medium
        Ambient state: ``ambient_density``, ``speed_of_sound``, ``gamma``,
        ``temperature_k``, ``pressure_pa``.
    sigma_density : ndarray, optional
        1-sigma density uncertainty [kg/m^3] (linear propagation).

    Returns
    -------
    AcousticField

    Raises
    ------
    InputError
        If ``density`` has no finite value.

    References
    ----------
    Linear acoustics, p' = c^2 rho' and T' = ((gamma-1)/gamma) T p'/p0
    (textbook relations, from memory; no specific source).
    """
    from .media import pressure_to_spl

    rho = np.asarray(density, dtype=float)
    if not np.isfinite(rho).any():
        raise InputError("density field has no finite value: nothing to convert to acoustic pressure")
    c2 = float(medium.speed_of_sound) ** 2
    factor_t = (medium.gamma - 1.0) / medium.gamma * medium.temperature_k / medium.pressure_pa
    p = c2 * (rho - float(medium.ambient_density))
    sig_rho = np.zeros_like(rho) if sigma_density is None else np.asarray(sigma_density, dtype=float)
    sig_p = c2 * np.abs(sig_rho)
    temperature = medium.temperature_k + factor_t * p
    peak = float(np.nanmax(np.abs(p)))
    spl = float(pressure_to_spl(peak / np.sqrt(2.0))) if peak > 0 else float("nan")
    return AcousticField(pressure_pa=p, sigma_pressure_pa=sig_p, temperature_k=temperature,
                         sigma_temperature_k=factor_t * sig_p, peak_pressure_pa=peak, peak_spl_db=spl)


# ---------------------------------------------------------------------------
# Phase-resolved (complex) sound fields: first-harmonic pressure, SPL,
# standing-wave ratio, nodes and antinodes
# ---------------------------------------------------------------------------

#: standing-wave ratios above this are reported as this value (a standing wave within the noise)
SWR_CAP = 1000.0


@dataclass
class ComplexPressure:
    """First-harmonic acoustic pressure p(t) = Re(P exp(i phi(t))) on a grid.

    Attributes
    ----------
    pressure : ndarray of complex
        Complex peak amplitude P [Pa] (NaN where not reconstructed).
    sigma_real, sigma_imag : ndarray
        1-sigma uncertainties of Re P and Im P [Pa].
    amplitude, sigma_amplitude : ndarray
        |P| (peak) and its 1-sigma uncertainty [Pa].
    phase, sigma_phase : ndarray
        arg P [rad] in (-pi, pi] and its 1-sigma uncertainty [rad].
    spl_db, sigma_spl_db : ndarray
        Sound pressure level of the first harmonic, 20 log10(|P| / (sqrt 2 * 20 uPa))
        [dB re 20 uPa] (NaN where |P| = 0), and its 1-sigma uncertainty [dB].
    """

    pressure: np.ndarray
    sigma_real: np.ndarray
    sigma_imag: np.ndarray
    amplitude: np.ndarray
    sigma_amplitude: np.ndarray
    phase: np.ndarray
    sigma_phase: np.ndarray
    spl_db: np.ndarray
    sigma_spl_db: np.ndarray


def spl_from_amplitude(amplitude_pa, sigma_amplitude_pa=None):
    """SPL [dB re 20 uPa] of a sine of peak amplitude ``amplitude_pa`` and its 1-sigma [dB].

    L = 20 log10(p_pk / (sqrt 2 p_ref)), p_ref = 20 uPa; sigma_L = (20 / ln 10) sigma_p / p.
    NaN where the amplitude is not positive.

    References
    ----------
    ISO 1683:2015, reference value 20 uPa for sound pressure in air.
    """
    from .media import REFERENCE_SOUND_PRESSURE_PA

    a = np.asarray(amplitude_pa, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        spl = np.where(a > 0, 20.0 * np.log10(a / (np.sqrt(2.0) * REFERENCE_SOUND_PRESSURE_PA)), np.nan)
        if sigma_amplitude_pa is None:
            return spl, None
        sig = np.where(a > 0, 20.0 / np.log(10.0) * np.asarray(sigma_amplitude_pa, float) / a, np.nan)
    return spl, sig


def complex_pressure(density_real, density_imag, *, medium, sigma_real=None, sigma_imag=None) -> ComplexPressure:
    """First-harmonic pressure P = c^2 (rho'_re + i rho'_im) from the two reconstructed parts.

    The reconstruction (deflection -> index -> density) is linear, so the
    real and imaginary parts of the complex displacement amplitude are
    reconstructed separately, each as a density field around the ambient
    density; :func:`acoustic_field` turns each into pressure.

    Parameters
    ----------
    density_real, density_imag : ndarray
        Reconstructed density [kg/m^3] of the real and imaginary parts (ambient
        density plus the amplitude part).
    medium : bos.media.Medium
    sigma_real, sigma_imag : ndarray, optional
        1-sigma density uncertainties [kg/m^3].

    Returns
    -------
    ComplexPressure

    References
    ----------
    Kinsler, Frey, Coppens & Sanders (2000), *Fundamentals of Acoustics*, 4th
    ed., Wiley: linear acoustics p' = c^2 rho' and complex (phasor) amplitudes.
    """
    from .periodic import amplitude_phase

    re = acoustic_field(density_real, medium=medium, sigma_density=sigma_real)
    im = acoustic_field(density_imag, medium=medium, sigma_density=sigma_imag)
    p = re.pressure_pa + 1j * im.pressure_pa
    mag, s_mag, phase, s_phase = amplitude_phase(p, re.sigma_pressure_pa, im.sigma_pressure_pa)
    spl, s_spl = spl_from_amplitude(mag, s_mag)
    return ComplexPressure(pressure=p, sigma_real=re.sigma_pressure_pa, sigma_imag=im.sigma_pressure_pa,
                           amplitude=mag, sigma_amplitude=s_mag, phase=phase, sigma_phase=s_phase,
                           spl_db=spl, sigma_spl_db=s_spl)


def _ellipse_axes(suu, svv, suv, noise_var):
    """Principal second moments (major, minor) and major-axis angle of complex samples."""
    tr = 0.5 * (suu + svv)
    det = np.sqrt(0.25 * (suu - svv) ** 2 + suv**2)
    major = tr + det - noise_var
    minor = tr - det - noise_var
    angle = 0.5 * np.arctan2(2.0 * suv, suu - svv)
    return major, minor, angle


def _swr(major, minor):
    with np.errstate(divide="ignore", invalid="ignore"):
        swr = np.where(minor > 0, np.sqrt(np.maximum(major, 0.0) / minor), SWR_CAP)
    swr = np.where(major > 0, swr, np.nan)
    return np.clip(swr, 1.0, SWR_CAP)


def standing_wave_ratio_map(pressure, *, spacing_m, window_m: float, sigma_real=None, sigma_imag=None):
    """Local standing-wave ratio of a complex pressure field.

    Along a line, a sum of two counter-propagating waves
    P = A+ exp(-iks) + A- exp(iks) traces an ellipse in the complex plane
    with semi-axes |A+| + |A-| and ||A+| - |A-||, so the ratio of its
    principal axes is the standing-wave ratio SWR = (1 + R)/(1 - R),
    R = |A-|/|A+|.  Here the second moments of (Re P, Im P) are taken over a
    square window of one wavelength around each point (independent of the
    propagation direction), the noise variance is subtracted, and
    SWR = sqrt(major / minor) (1 = travelling, large = standing; capped at
    :data:`SWR_CAP`).

    Parameters
    ----------
    pressure : ndarray of complex
        P on the grid (NaN = no data).
    spacing_m : float or (float, float)
        Grid step (dy, dx) [m].
    window_m : float
        Window size [m], normally one wavelength.
    sigma_real, sigma_imag : ndarray, optional
        1-sigma noise of Re P and Im P (subtracted as a variance).

    Returns
    -------
    (swr, reflection) : ndarray, ndarray
        SWR [1] and R = (SWR - 1)/(SWR + 1) in [0, 1]; NaN where the local
        rms amplitude does not exceed 3 sigma of the noise.

    References
    ----------
    Kinsler et al. (2000), standing-wave ratio of a reflected plane wave;
    ISO 10534-1:1996 (standing-wave ratio method).
    """
    from scipy.ndimage import uniform_filter

    p = np.asarray(pressure, complex)
    dy, dx = (spacing_m, spacing_m) if np.ndim(spacing_m) == 0 else spacing_m
    size = (max(3, int(round(window_m / dy)) | 1), max(3, int(round(window_m / dx)) | 1))
    ok = np.isfinite(p)
    w = uniform_filter(ok.astype(float), size=size, mode="constant")
    pz = np.where(ok, p, 0.0)

    def mean(a):
        with np.errstate(invalid="ignore", divide="ignore"):
            return uniform_filter(a, size=size, mode="constant") / w

    noise = 0.0
    if sigma_real is not None and sigma_imag is not None:
        nv = 0.5 * (np.asarray(sigma_real, float) ** 2 + np.asarray(sigma_imag, float) ** 2)
        noise = mean(np.where(ok & np.isfinite(nv), nv, 0.0))
    major, minor, _ = _ellipse_axes(mean(pz.real**2), mean(pz.imag**2), mean(pz.real * pz.imag), noise)
    # only where the wave stands out of the noise (rms along the major axis > 3 sigma)
    significant = major > 9.0 * noise if np.ndim(noise) or noise else np.ones_like(major, bool)
    swr = np.where(ok & (w > 0.25) & significant, _swr(major, minor), np.nan)
    return swr, (swr - 1.0) / (swr + 1.0)


def propagation_axis(pressure, *, spacing_m) -> tuple[float, float]:
    """Unit vector (uy, ux) of the direction along which a complex field varies most.

    Principal eigenvector of the structure tensor sum(grad P grad P^H) (real
    part); for a sound beam this is its axis (standing or travelling).  The
    sign is arbitrary (ux >= 0, or uy > 0 when ux = 0).
    """
    p = np.asarray(pressure, complex)
    dy, dx = (spacing_m, spacing_m) if np.ndim(spacing_m) == 0 else spacing_m
    if p.shape[0] < 2 or p.shape[1] < 2:
        raise InputError("the field needs at least 2 x 2 points to find a propagation direction")
    gy, gx = np.gradient(p, dy, dx)
    ok = np.isfinite(gy) & np.isfinite(gx)
    if not ok.any():
        raise InputError("the pressure field has no finite gradient: no propagation direction")
    gy, gx = gy[ok], gx[ok]
    t = np.array([[np.sum(np.abs(gy) ** 2), np.sum((gy * np.conj(gx)).real)],
                  [np.sum((gy * np.conj(gx)).real), np.sum(np.abs(gx) ** 2)]])
    _, vecs = np.linalg.eigh(t)
    uy, ux = vecs[:, -1]
    if ux < 0 or (ux == 0 and uy < 0):
        uy, ux = -uy, -ux
    return float(uy), float(ux)


def dominant_wavelength(s_m, samples) -> float:
    """Wavelength [m] of the strongest spatial component of complex samples along a line.

    Peak of the zero-padded discrete Fourier transform of the samples (NaN
    as 0), refined by a parabola through the three highest bins; NaN if the
    line is shorter than about one wavelength's worth of samples.
    """
    s = np.asarray(s_m, float)
    z = np.where(np.isfinite(samples), samples, 0.0)
    if s.size < 4:
        return float("nan")
    ds = float(np.median(np.diff(s)))
    n = 1 << int(np.ceil(np.log2(16 * s.size)))
    spec = np.abs(np.fft.fft(z - 0.0, n))
    freqs = np.fft.fftfreq(n, ds)
    spec[0] = 0.0
    i = int(np.argmax(spec))
    if 0 < i < n - 1:
        a, b, c = spec[i - 1], spec[i], spec[i + 1]
        den = a - 2 * b + c
        shift = 0.5 * (a - c) / den if den != 0 else 0.0
        f = freqs[i] + shift * (freqs[1] - freqs[0])
    else:
        f = freqs[i]
    return float(1.0 / abs(f)) if f != 0 else float("nan")


@dataclass
class StandingWave:
    """Standing-wave analysis of complex pressure samples along a line.

    Attributes
    ----------
    standing_wave_ratio : float
        SWR = |P|max/|P|min of the two-wave model (principal axes of the
        samples in the complex plane, noise subtracted; capped at :data:`SWR_CAP`).
    reflection : float
        R = (SWR - 1)/(SWR + 1): 0 for a travelling wave, 1 for a standing one.
    kind : str
        ``"standing"`` (SWR >= 10), ``"travelling"`` (SWR <= 2) or ``"partially standing"``.
    wavelength_m : float
        Measured wavelength (dominant spatial frequency of the samples).
    nodes_m, antinodes_m : ndarray
        Positions along the line [m] of pressure minima and maxima (empty
        for a travelling wave, SWR < 2).
    direction : int
        For a travelling wave: +1 if it runs toward increasing s, -1 if
        toward decreasing s (from the phase slope, p = Re(P exp(i phi))),
        0 when standing.
    """

    standing_wave_ratio: float
    reflection: float
    kind: str
    wavelength_m: float
    nodes_m: np.ndarray
    antinodes_m: np.ndarray
    direction: int


def _crossings(s, u, keep):
    """Linear-interpolated zero crossings of u where ``keep`` holds at both samples."""
    out = []
    for i in range(len(u) - 1):
        a, b = u[i], u[i + 1]
        if not (np.isfinite(a) and np.isfinite(b) and keep[i] and keep[i + 1]):
            continue
        if a == 0.0:
            out.append(s[i])
        elif a * b < 0:
            out.append(s[i] + (s[i + 1] - s[i]) * a / (a - b))
    return np.asarray(out, float)


def _merge(points, min_gap):
    if points.size == 0:
        return points
    groups = [[points[0]]]
    for p in points[1:]:
        if p - groups[-1][-1] < min_gap:
            groups[-1].append(p)
        else:
            groups.append([p])
    return np.array([np.mean(g) for g in groups])


def _moving_mean(a, n):
    from scipy.ndimage import uniform_filter1d

    ok = np.isfinite(a)
    num = uniform_filter1d(np.where(ok, a, 0.0), n, mode="constant")
    den = uniform_filter1d(ok.astype(float), n, mode="constant")
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(den > 0.3, num / den, np.nan)


def standing_wave_profile(s_m, samples, *, sigma=None, wavelength_m: float | None = None,
                          min_level: float = 0.3) -> StandingWave:
    """Standing-wave ratio, nodes and antinodes of complex pressure samples along a line.

    The samples trace an ellipse in the complex plane (see
    :func:`standing_wave_ratio_map`).  With u = Re(P exp(-i psi)) the
    projection on the major axis, pressure minima (nodes) lie where u = 0
    and maxima (antinodes) where u is extreme, for any reflection
    coefficient; u = 0 crossings are found by linear interpolation (the
    envelope of a beam does not move them).  Only points where the local rms
    amplitude exceeds ``min_level`` times its maximum count.

    Parameters
    ----------
    s_m : ndarray
        Distance along the line [m], increasing, evenly spaced.
    samples : ndarray of complex
        P at ``s_m`` (NaN = no data).
    sigma : float or ndarray, optional
        1-sigma noise of Re P and Im P (variance subtracted from the moments).
    wavelength_m : float, optional
        Wavelength used for the smoothing windows; default: measured.
    min_level : float
        Fraction of the largest local rms amplitude below which the line is
        ignored (outside the beam).

    Returns
    -------
    StandingWave

    References
    ----------
    Kinsler et al. (2000); ISO 10534-1:1996.
    """
    s = np.asarray(s_m, float)
    p = np.asarray(samples, complex)
    ok = np.isfinite(p)
    if ok.sum() < 4:
        raise InputError("fewer than 4 finite samples along the profile: no standing-wave analysis")
    lam_meas = dominant_wavelength(s, p)
    lam = float(wavelength_m) if wavelength_m else lam_meas
    ds = float(np.median(np.diff(s)))
    n_half = max(3, int(round(0.5 * lam / ds)) | 1) if np.isfinite(lam) else 3
    env = np.sqrt(_moving_mean(np.abs(p) ** 2, n_half))
    keep = np.isfinite(env) & (env >= min_level * np.nanmax(env))
    w = keep & ok
    noise = 0.0 if sigma is None else float(np.nanmean(np.broadcast_to(np.asarray(sigma, float) ** 2, p.shape)[w]))
    pz = p[w]
    major, minor, angle = _ellipse_axes(np.mean(pz.real**2), np.mean(pz.imag**2), np.mean(pz.real * pz.imag), noise)
    swr = float(_swr(major, minor))
    refl = (swr - 1.0) / (swr + 1.0)
    kind = "standing" if swr >= 10.0 else ("travelling" if swr <= 2.0 else "partially standing")
    nodes = antinodes = np.zeros(0)
    direction = 0
    if swr > 2.0:
        u = (p * np.exp(-1j * angle)).real
        gap = lam / 8.0 if np.isfinite(lam) else 0.0
        nodes = _merge(_crossings(s, u, keep), gap)
        du = np.gradient(_moving_mean(u, max(3, n_half // 4 | 1)), s)
        big = keep & (np.abs(u) >= 0.5 * np.nanmax(np.abs(np.where(keep, u, np.nan))))
        antinodes = _merge(_crossings(s, du, big), gap)
    else:
        phase = np.unwrap(np.angle(pz))
        slope = np.polyfit(s[w], phase, 1)[0]
        direction = -1 if slope > 0 else 1  # p = Re(P e^{i phi}): phase falls along the travel
    return StandingWave(standing_wave_ratio=swr, reflection=refl, kind=kind, wavelength_m=lam_meas,
                        nodes_m=nodes, antinodes_m=antinodes, direction=direction)


def crest_amplitude(s_m, samples, s0: float) -> float:
    """|P| at a crest near ``s0``: vertex of the parabola through the three samples around the local maximum.

    Linear interpolation between samples cuts a crest (by 1 - cos(k h / 2),
    about 4 % at 11 samples per wavelength); the parabola is exact to
    O((k h)^4).  Falls back to the largest nearby sample at the ends.
    """
    s = np.asarray(s_m, float)
    a = np.abs(np.asarray(samples, complex))
    i = int(np.clip(np.searchsorted(s, s0), 0, s.size - 1))
    lo, hi = max(0, i - 2), min(s.size, i + 2)
    window = np.where(np.isfinite(a[lo:hi]), a[lo:hi], -np.inf)
    j = lo + int(np.argmax(window))
    if not np.isfinite(a[j]):
        return float("nan")
    if 0 < j < s.size - 1 and np.isfinite(a[j - 1]) and np.isfinite(a[j + 1]):
        y0, y1, y2 = a[j - 1], a[j], a[j + 1]
        den = y0 - 2 * y1 + y2
        if den < 0:
            t = 0.5 * (y0 - y2) / den
            if abs(t) <= 1:
                return float(y1 - 0.25 * (y0 - y2) * t)
    return float(a[j])
