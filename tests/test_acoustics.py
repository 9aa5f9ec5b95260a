"""Acoustic conversion of a reconstructed density field.

Outside source: acoustic amplitude check values computed outside the project
with numpy/CoolProp 8.0.0 from linear acoustics (textbook relations, from
memory) (20 degC dry air,
rho0 = 1.20458 kg/m^3): 140 dB -> p_pk 283 Pa, rho'_pk 2.40e-3 kg/m^3,
T'_pk 0.234 K; 120 dB -> 28.3 Pa, 2.40e-4 kg/m^3, 0.0234 K.
"""

import numpy as np
import pytest

from bos.acoustics import acoustic_field
from bos.errors import InputError
from bos.media import Medium

AIR = Medium(temperature_k=293.15, pressure_pa=101325.0, wavelength_m=632.8e-9)


@pytest.mark.parametrize("spl, p_pk, rho_pk, t_pk", [(140, 283.0, 2.40e-3, 0.234), (120, 28.3, 2.40e-4, 0.0234)])
def test_plane_wave_amplitudes_match_the_reference_table(spl, p_pk, rho_pk, t_pk):
    x = np.linspace(0, 2 * np.pi, 400)
    rho = AIR.ambient_density + rho_pk * np.sin(x)
    out = acoustic_field(rho[None, :], medium=AIR)
    # table values are printed to 3 significant figures
    assert out.peak_pressure_pa == pytest.approx(p_pk, rel=5e-3)
    assert out.peak_spl_db == pytest.approx(spl, abs=0.05)
    assert np.nanmax(out.temperature_k) - AIR.temperature_k == pytest.approx(t_pk, rel=5e-3)
    # isentropic: temperature rises where density does (unlike a hot plume)
    assert np.corrcoef(out.temperature_k.ravel(), rho)[0, 1] > 0.999


def test_uncertainty_is_linear_and_nan_passes_through():
    rho = np.array([[AIR.ambient_density, np.nan]])
    sig = np.array([[1e-4, 1e-4]])
    out = acoustic_field(rho, medium=AIR, sigma_density=sig)
    # p' = c^2 rho' (linear acoustics, from memory): the same factor applies to sigma
    assert out.sigma_pressure_pa[0, 0] == pytest.approx(AIR.speed_of_sound**2 * 1e-4, rel=1e-12)
    assert out.pressure_pa[0, 0] == pytest.approx(0.0, abs=1e-9)
    assert np.isnan(out.pressure_pa[0, 1])


def test_all_nan_density_is_an_error():
    with pytest.raises(InputError, match="no finite value"):
        acoustic_field(np.full((2, 2), np.nan), medium=AIR)
