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
    (references.md section 7).
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
