"""Gas optics: Gladstone-Dale constants, the refractive index of air, ideal gas, sound.

Everything a reconstruction needs to turn a refractive index into a density,
a temperature or an acoustic pressure, for air and for the common laboratory
gases and their mixtures.  SI units throughout: metres, kelvin, pascal,
kg/m^3, kg/mol.  Relative humidity is a *fraction* 0..1 (50 % -> 0.5).

Gladstone-Dale:  n - 1 = K * rho.  Each gas's K(lambda) is its published
dispersion formula (n - 1 at the formula's reference state) divided by the
real-gas density at that same state; see docs/media.md for the list.

References
----------
Ciddor, P. E. (1996). Refractive index of air: new equations for the visible
    and near infrared. Appl. Opt. 35, 1566-1573 (constants as in the NIST
    Engineering Metrology Toolbox documentation, section A-III).
Picard, A., Davis, R. S., Glaeser, M., Fujii, K. (2008). Revised formula for
    the density of moist air (CIPM-2007). Metrologia 45, 149-155.
Merzkirch, W. (1987). Flow Visualization, 2nd ed. (Gladstone-Dale mixing rule).
The dispersion formulas of the other gases are cited in ``GASES``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Callable, Mapping

import numpy as np

from .errors import InputError

__all__ = [
    "GAS_CONSTANT", "REFERENCE_SOUND_PRESSURE_PA", "GasData", "GASES", "ESTIMATE_WARNING",
    "gas_data", "gladstone_dale", "molar_mass", "heat_capacity_ratio",
    "mole_to_mass_fractions", "mixture_gladstone_dale", "mixture_molar_mass",
    "mixture_heat_capacity_ratio", "saturation_vapour_pressure", "water_vapour_mole_fraction",
    "air_refractive_index", "air_density", "ideal_gas_density", "ideal_gas_temperature",
    "speed_of_sound", "spl_to_pressure_amplitude", "pressure_to_spl",
    "isentropic_temperature_amplitude", "Medium",
]

GAS_CONSTANT = 8.314462618  # J/(mol K), CODATA 2018 (exact since the 2019 SI)
REFERENCE_SOUND_PRESSURE_PA = 20e-6  # SPL reference, 20 uPa (acoustics convention)
WAVELENGTH_RANGE_M = (300e-9, 1700e-9)
_ATM = 101325.0
_SUM_TOL = 1e-6

# --- Ciddor 1996 / CIPM density, NIST simplified form (NIST Engineering Metrology Toolbox
# documentation A-III, as coded in ref_index 1.0) ----------------------------------------
_R_CIPM = 8.314472          # J/(mol K): the value the CIPM/NIST equations were written with
_M_W = 0.018015             # kg/mol, water (CIPM)
_T_AXS, _P_AXS = 288.15, 101325.0   # standard dry air: 15 degC, 101 325 Pa
_Z_AXS = 0.9995922115       # CIPM compressibility at that state (NIST constant; equals the
                            # formula below to 4e-11, checked in the tests)
_RHO_WS = 0.00985938        # kg/m^3, pure water vapour at 20 degC, 1333 Pa (NIST constant)
_CIPM_Z = dict(a0=1.58123e-6, a1=-2.9331e-8, a2=1.1043e-10, b0=5.707e-6, b1=-2.051e-8,
               c0=1.9898e-4, c1=-2.376e-6, d=1.83e-11, e=-0.765e-8)
CIDDOR_RANGES = {  # NIST Engineering Metrology Toolbox notes, as quoted in ref_index 1.0
    "temperature_k": (233.15, 373.15),      # -40 .. 100 degC
    "pressure_pa": (10e3, 140e3),
    "relative_humidity": (0.0, 1.0),
    "co2_ppm": (0.0, 2000.0),
}


def _sigma2(wavelength_m):
    """Squared vacuum wavenumber sigma^2 in um^-2."""
    return (1e-6 / np.asarray(wavelength_m, dtype=float)) ** 2


def _air_standard(s2):
    """Ciddor standard dry air (15 degC, 101 325 Pa, 450 ppm CO2): n - 1."""
    return 1e-8 * (5792105.0 / (238.0185 - s2) + 167917.0 / (57.362 - s2))


def _water_standard(s2):
    """Ciddor standard water vapour (20 degC, 1333 Pa): n - 1."""
    return 1.022e-8 * (295.235 + 2.6422 * s2 - 0.032380 * s2**2 + 0.004028 * s2**3)


def _ch4(s2):
    """Loria 1909 methane (0 degC, 1 atm): n - 1."""
    return 4.2607e-4 + 6.1396687e-6 * s2


# Other dispersion formulas, n - 1 at each gas's reference state (refractiveindex.info
# database entries; each original paper is named in GASES):
def _n2(s2):  # Peck & Khanna 1966, 0 degC
    return 6.8552e-5 + 3.243157e-2 / (144.0 - s2)


def _o2(s2):  # Zhang, Lu & Wang 2008, 20 degC
    return 1.181494e-4 + 9.708931e-3 / (75.4 - s2)


def _co2(s2):  # Bideau-Mehu et al. 1973, 0 degC
    return (6.99100e-2 / (166.175 - s2) + 1.44720e-3 / (79.609 - s2) + 6.42941e-5 / (56.3064 - s2)
            + 5.21306e-5 / (46.0196 - s2) + 1.46847e-6 / (0.0584738 - s2))


def _ar(s2):  # Peck & Fisher 1964, 0 degC
    return 6.7867e-5 + 3.0182943e-2 / (144.0 - s2)


def _he(s2):  # Mansfield & Peck 1969, 0 degC
    return 0.01470091 / (423.98 - s2)


def _h2(s2):  # Peck & Hung 1977, 0 degC
    return 0.0148956 / (180.7 - s2) + 0.0049037 / (92.0 - s2)


def _sf6(s2):  # Vukovic et al. 1996 / Sneep & Ubachs 2005, 288 K
    return 7.1517e-4 + 4.996e-6 * s2


def _ciddor_air_molar_mass(co2_ppm):
    """CIPM molar mass of dry air with x_c ppm CO2 [kg/mol]."""
    return 0.0289635 + 1.2011e-8 * (np.asarray(co2_ppm, dtype=float) - 400.0)


def _dry_air_k(s2, co2_ppm):
    """Ciddor's K of dry air: (n_axs - 1) / rho_axs, both at the CO2 content given."""
    n_axs_m1 = _air_standard(s2) * (1.0 + 0.534e-6 * (np.asarray(co2_ppm, dtype=float) - 450.0))
    rho_axs = _P_AXS * _ciddor_air_molar_mass(co2_ppm) / (_Z_AXS * _R_CIPM * _T_AXS)
    return n_axs_m1 / rho_axs


# --- gas table ----------------------------------------------------------------------------
# Standard atomic weights (IUPAC, conventional/abridged values, from memory), kg/mol.
_ATOMIC = {"H": 1.008e-3, "He": 4.002602e-3, "C": 12.011e-3, "N": 14.007e-3, "O": 15.999e-3,
           "F": 18.998403e-3, "S": 32.06e-3, "Ar": 39.948e-3}


def _formula_mass(**atoms: int) -> float:
    return sum(_ATOMIC[a] * k for a, k in atoms.items())


@dataclass(frozen=True)
class GasData:
    """Optical and thermodynamic constants of one gas.

    Attributes
    ----------
    name : str
        Key used throughout the library ("n2", "air", ...).
    label : str
        Readable name.
    molar_mass : float
        kg/mol.  Sum of IUPAC standard atomic weights; air and water use the
        CIPM values (0.0289635 + 1.2011e-8 (x_c - 400) at 450 ppm CO2; 0.018015).
    gamma : float
        Ideal-gas heat-capacity ratio cp0/cv0 at 20 degC: 5/3 for the noble
        gases (kinetic theory), 1.4 for air (common practice), the others
        from CoolProp 8.0.0 ideal-gas cp0 (4 digits).
    reference_temperature_k, reference_pressure_pa : float
        State at which the dispersion formula gives n - 1.
    reference_density : float
        Real-gas density at that state [kg/m^3] (source in ``density_source``).
    dispersion_source, density_source : str
        Citations.
    fit_range_m : tuple of float or None
        Wavelength range of the original fit, where narrower than 300-1700 nm.
    is_estimate : bool
        True when K is not from a measured dispersion formula (propane).
    note : str
        Caveat to show the user ("" when there is none).
    """

    name: str
    label: str
    molar_mass: float
    gamma: float
    reference_temperature_k: float
    reference_pressure_pa: float
    reference_density: float
    dispersion_source: str
    density_source: str
    dispersion: Callable[[np.ndarray], np.ndarray] = field(repr=False, compare=False)
    fit_range_m: tuple[float, float] | None = None
    is_estimate: bool = False
    note: str = ""


_COOLPROP = "CoolProp 8.0.0 PropsSI('D') (real gas) at the formula's reference state"

# Propane: Lorentz-Lorenz bond-refraction additivity at the Na D line (Denbigh/Vogel-type
# bond refractions, from memory): C-H 1.676 and C-C 1.296 cm^3/mol; K = 1.5 R_LL / M.  Still to
# be checked against Gardiner, Hidaka & Tanzawa (1981), Combust. Flame 40:213.  The wavelength dependence
# is borrowed from methane (Loria 1909) -- our own assumption, far below the +-2 % uncertainty.
_M_C3H8 = _formula_mass(C=3, H=8)
_K_C3H8_589 = 1.5 * (8 * 1.676e-6 + 2 * 1.296e-6) / _M_C3H8
_RHO_C3H8 = 2.010498  # kg/m^3 at 0 degC, 1 atm, CoolProp 8.0.0 'n-Propane'
_S2_NA_D = (1 / 0.5893) ** 2
ESTIMATE_WARNING = (
    f"c3h8 (propane): Gladstone-Dale constant is an estimate (about {_K_C3H8_589:.2e} m^3/kg "
    "+-2 %, from bond refractions), not from a measured dispersion formula")


def _propane(s2):
    return _K_C3H8_589 * _RHO_C3H8 * _ch4(s2) / _ch4(_S2_NA_D)


def _gas(name, label, m, gamma, t_ref, p_ref, rho_ref, source, disp, density_source=_COOLPROP, **kw):
    return name, GasData(name, label, m, gamma, t_ref, p_ref, rho_ref, source, density_source, disp, **kw)


# Reference densities (7 digits): CoolProp 8.0.0 PropsSI('D', 'T', T_ref, 'P', p_ref, fluid), the
# computed once with CoolProp 8.0.0; the tests recompute them with CoolProp.
GASES: dict[str, GasData] = dict([
    _gas("air", "dry air, 450 ppm CO2", float(_ciddor_air_molar_mass(450.0)), 1.4, _T_AXS, _P_AXS,
         float(_P_AXS * _ciddor_air_molar_mass(450.0) / (_Z_AXS * _R_CIPM * _T_AXS)),
         "Ciddor 1996, Appl. Opt. 35:1566 (standard air)", _air_standard,
         density_source="CIPM equation inside Ciddor's model (rho_axs), Ciddor 1996 / NIST toolbox A-III"),
    _gas("n2", "nitrogen", _formula_mass(N=2), 1.400, 273.15, _ATM, 1.250386,
         "Peck & Khanna 1966, JOSA 56:1059", _n2),
    # O2: the stored density is CoolProp at 293.0 K (the database's 20 degC fit state).
    _gas("o2", "oxygen", _formula_mass(O=2), 1.395, 293.0, _ATM, 1.331868,
         "Zhang, Lu & Wang 2008, Appl. Opt. 47:3143", _o2),
    _gas("co2", "carbon dioxide", _formula_mass(C=1, O=2), 1.291, 273.15, _ATM, 1.976813,
         "Bideau-Mehu et al. 1973, Opt. Commun. 9:432", _co2),
    _gas("ar", "argon", _formula_mass(Ar=1), 5.0 / 3.0, 273.15, _ATM, 1.783956,
         "Peck & Fisher 1964, JOSA 54:1362", _ar),
    _gas("he", "helium", _formula_mass(He=1), 5.0 / 3.0, 273.15, _ATM, 0.1784812,
         "Mansfield & Peck 1969, JOSA 59:199", _he),
    _gas("h2", "hydrogen", _formula_mass(H=2), 1.406, 273.15, _ATM, 0.08988238,
         "Peck & Hung 1977, JOSA 67:1550", _h2),
    _gas("h2o", "water vapour", _M_W, 1.329, 293.15, 1333.0, _RHO_WS,
         "Ciddor 1996 water-vapour term", _water_standard,
         density_source="CIPM equation inside Ciddor's model (rho_ws), Ciddor 1996 / NIST toolbox A-III"),
    _gas("ch4", "methane", _formula_mass(C=1, H=4), 1.306, 273.15, _ATM, 0.7174588,
         "Loria 1909, Ann. Phys. 334:605", _ch4, fit_range_m=(529e-9, 659e-9),
         note="ch4: dispersion formula fitted over 529-659 nm only; extrapolated outside"),
    _gas("sf6", "sulphur hexafluoride", _formula_mass(S=1, F=6), 1.095, 288.0, _ATM, 6.259742,
         "Vukovic et al. 1996, J. Phys. D 29:634 (formula of Sneep & Ubachs 2005)",
         _sf6, fit_range_m=(600e-9, 1300e-9),
         note="sf6: dispersion formula fitted over 600-1300 nm only; extrapolated outside"),
    _gas("c3h8", "propane (estimate)", _M_C3H8, 1.130, 273.15, _ATM, _RHO_C3H8,
         "estimate: Lorentz-Lorenz bond refractions (Denbigh/Vogel-type values, from memory), methane dispersion shape",
         _propane, is_estimate=True, note=ESTIMATE_WARNING),
])


# --- validation helpers ---------------------------------------------------------------------
def _finite(name, value):
    try:
        a = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be a number or numeric array, got {type(value).__name__}") from None
    if not np.all(np.isfinite(a)):
        raise InputError(f"{name} must be finite, got {value!r}" if a.ndim == 0 else f"{name} contains NaN or inf")
    return a


def _in_range(name, value, lo, hi, what):
    a = _finite(name, value)
    slack = 1e-9 * max(abs(lo), abs(hi))  # so that -40 + 273.15 counts as inside
    if a.size and (a.min() < lo - slack or a.max() > hi + slack):
        bad = a.min() if a.min() < lo else a.max()
        raise InputError(f"{name}={bad:g} is outside {what}")
    return a


def _positive(name, value):
    a = _finite(name, value)
    if a.size and a.min() <= 0:
        raise InputError(f"{name} must be positive, got {a.min():g}")
    return a


def _wavelength(wavelength_m):
    return _in_range("wavelength_m", wavelength_m, *WAVELENGTH_RANGE_M, "300-1700 nm (3e-07..1.7e-06 m)")


def _out(a):
    """Return a Python float for 0-d results, the array otherwise."""
    a = np.asarray(a, dtype=float)
    return float(a) if a.ndim == 0 else a


# --- gases and mixtures ---------------------------------------------------------------------
def gas_data(gas: str) -> GasData:
    """Return the :class:`GasData` record of ``gas`` (case-insensitive key).

    Raises
    ------
    InputError
        Unknown gas.
    """
    key = str(gas).strip().lower()
    if key not in GASES:
        raise InputError(f"unknown gas {gas!r}; known: {', '.join(GASES)}")
    return GASES[key]


def gladstone_dale(gas: str, *, wavelength_m):
    """Gladstone-Dale constant K(lambda) of a pure gas, n - 1 = K rho.

    Parameters
    ----------
    gas : str
        One of ``GASES`` ("air", "n2", "o2", "co2", "ar", "he", "h2", "h2o",
        "ch4", "sf6", "c3h8").  "c3h8" is an estimate (see ``ESTIMATE_WARNING``).
    wavelength_m : float or array
        Vacuum wavelength, 300-1700 nm.

    Returns
    -------
    float or ndarray
        K in m^3/kg.

    References
    ----------
    Dispersion formula (source in ``gas_data(gas).dispersion_source``) divided
    by the real-gas density at its reference state (CoolProp 8.0.0; for air and
    water vapour the CIPM densities of Ciddor 1996, Appl. Opt. 35:1566).
    """
    g = gas_data(gas)
    s2 = _sigma2(_wavelength(wavelength_m))
    return _out(g.dispersion(s2) / g.reference_density)


def molar_mass(gas: str) -> float:
    """Molar mass of ``gas`` [kg/mol] (air: CIPM formula at 450 ppm CO2)."""
    return gas_data(gas).molar_mass


def heat_capacity_ratio(gas: str) -> float:
    """Ideal-gas heat-capacity ratio cp/cv of ``gas`` near 20 degC (see :class:`GasData`)."""
    return gas_data(gas).gamma


def _fractions(name, fractions) -> dict[str, float]:
    """Validate a {gas: fraction} mapping: known gases, 0..1, sum 1 within 1e-6."""
    if not isinstance(fractions, Mapping) or not fractions:
        raise InputError(f"{name} must be a non-empty dict {{gas: fraction}}, got {fractions!r}")
    out: dict[str, float] = {}
    for gas, frac in fractions.items():
        key = gas_data(gas).name
        f = float(_finite(f"{name}[{gas!r}]", frac))
        if f < 0 or f > 1:
            raise InputError(f"{name}[{gas!r}]={f:g} must lie in 0..1")
        out[key] = out.get(key, 0.0) + f
    total = sum(out.values())
    if abs(total - 1.0) > _SUM_TOL:
        raise InputError(f"{name} sum to {total:.9g}, not 1 (tolerance {_SUM_TOL:g})")
    return out


def _to_mass(mole: Mapping[str, float], masses: Mapping[str, float]) -> dict[str, float]:
    m_mix = sum(x * masses[g] for g, x in mole.items())
    return {g: x * masses[g] / m_mix for g, x in mole.items()}


def mole_to_mass_fractions(mole_fractions: Mapping[str, float]) -> dict[str, float]:
    """Convert mole fractions to mass fractions, Y_i = x_i M_i / sum_j x_j M_j.

    Parameters
    ----------
    mole_fractions : dict
        {gas: x_i}; known gases, each 0..1, summing to 1 within 1e-6.

    Returns
    -------
    dict
        {gas: Y_i}.
    """
    mole = _fractions("mole_fractions", mole_fractions)
    return _to_mass(mole, {g: GASES[g].molar_mass for g in mole})


def mixture_molar_mass(mole_fractions: Mapping[str, float]) -> float:
    """Molar mass of an ideal mixture, sum x_i M_i [kg/mol]."""
    mole = _fractions("mole_fractions", mole_fractions)
    return sum(x * GASES[g].molar_mass for g, x in mole.items())


def _mix_gamma(mole: Mapping[str, float]) -> float:
    # Ideal mixture: molar cp_i = gamma_i R / (gamma_i - 1) add by mole fraction; cv = cp - R.
    cp = sum(x * GASES[g].gamma / (GASES[g].gamma - 1.0) for g, x in mole.items())
    return cp / (cp - 1.0)


def mixture_heat_capacity_ratio(mole_fractions: Mapping[str, float]) -> float:
    """Heat-capacity ratio of an ideal mixture from mole-weighted molar heat capacities."""
    return _mix_gamma(_fractions("mole_fractions", mole_fractions))


def mixture_gladstone_dale(mass_fractions: Mapping[str, float], *, wavelength_m):
    """Gladstone-Dale constant of a mixture, K_mix = sum Y_i K_i.

    Parameters
    ----------
    mass_fractions : dict
        {gas: Y_i}, summing to 1 within 1e-6 (use :func:`mole_to_mass_fractions`).
    wavelength_m : float or array
        Vacuum wavelength, 300-1700 nm.

    Returns
    -------
    float or ndarray
        K_mix in m^3/kg.

    References
    ----------
    Merzkirch (1987), Flow Visualization, 2nd ed.; Settles (2001), Schlieren
    and Shadowgraph Techniques (mixing rule; both cited from memory, the rule
    is checked numerically against Ciddor's humid air in the tests).
    """
    mass = _fractions("mass_fractions", mass_fractions)
    return _out(sum(y * np.asarray(gladstone_dale(g, wavelength_m=wavelength_m)) for g, y in mass.items()))


# --- water vapour and Ciddor -----------------------------------------------------------------
def _svp(t_k):
    """Saturation vapour pressure [Pa]: over water (IAPWS-IF97) at >= 0 degC, over ice below.

    NIST Engineering Metrology Toolbox documentation section A-I (as in ref_index 1.0).
    """
    t_k = np.asarray(t_k, dtype=float)
    k = (1.16705214528e3, -7.24213167032e5, -1.70738469401e1, 1.20208247025e4, -3.23255503223e6,
         1.49151086135e1, -4.82326573616e3, 4.05113405421e5, -2.38555575678e-1, 6.50175348448e2)
    om = t_k + k[8] / (t_k - k[9])
    a = om**2 + k[0] * om + k[1]
    b = k[2] * om**2 + k[3] * om + k[4]
    c = k[5] * om**2 + k[6] * om + k[7]
    with np.errstate(invalid="ignore"):
        water = 1e6 * (2 * c / (-b + np.sqrt(b**2 - 4 * a * c))) ** 4
    theta = t_k / 273.16
    ice = 611.657 * np.exp(-13.928169 * (1 - theta**-1.5) + 34.7078238 * (1 - theta**-1.25))
    return np.where(t_k >= 273.15, water, ice)


def saturation_vapour_pressure(temperature_k):
    """Saturation vapour pressure of water [Pa] (over ice below 0 degC), 233-373 K.

    References
    ----------
    IAPWS-IF97 (water) and the ice formula as given in the NIST Engineering
    Metrology Toolbox documentation, section A-I.
    """
    return _out(_svp(_in_range("temperature_k", temperature_k, 233.15, 373.15, "233.15-373.15 K")))


def _xw(t_k, p, rh):
    t = t_k - 273.15
    enhancement = 1.00062 + 3.14e-8 * p + 5.6e-7 * t**2
    xw = enhancement * rh * _svp(t_k) / p
    if np.any(xw >= 1.0):
        raise InputError("water vapour pressure reaches the total pressure (boiling); lower relative_humidity")
    return xw


def water_vapour_mole_fraction(*, temperature_k, pressure_pa, relative_humidity):
    """Mole fraction of water vapour x_w = f(p, t) * RH * p_sv(t) / p.

    Parameters
    ----------
    temperature_k, pressure_pa : float or array
    relative_humidity : float or array
        Fraction 0..1.

    References
    ----------
    NIST Engineering Metrology Toolbox documentation A-II (enhancement factor
    f = 1.00062 + 3.14e-8 p + 5.6e-7 t^2), as coded in ref_index 1.0.
    """
    t_k = _in_range("temperature_k", temperature_k, 233.15, 373.15, "233.15-373.15 K")
    p = _positive("pressure_pa", pressure_pa)
    rh = _in_range("relative_humidity", relative_humidity, 0.0, 1.0, "0..1 (a fraction: 50 % is 0.5)")
    return _out(_xw(t_k, p, rh))


def _ciddor_inputs(temperature_k, pressure_pa, relative_humidity, co2_ppm):
    r = CIDDOR_RANGES
    t_k = _in_range("temperature_k", temperature_k, *r["temperature_k"],
                    "the Ciddor range 233.15-373.15 K (-40..100 degC)")
    p = _in_range("pressure_pa", pressure_pa, *r["pressure_pa"], "the Ciddor range 10-140 kPa")
    rh = _in_range("relative_humidity", relative_humidity, *r["relative_humidity"],
                   "0..1 (a fraction: 50 % is 0.5)")
    xc = _in_range("co2_ppm", co2_ppm, *r["co2_ppm"], "the Ciddor range 0-2000 ppm")
    return t_k, p, rh, xc


def _cipm_z(t_k, p, xw):
    """Compressibility factor of moist air, CIPM-81/91 equation (constants as in Ciddor 1996 / NIST A-III)."""
    t = t_k - 273.15
    c = _CIPM_Z
    return (1.0 - (p / t_k) * (c["a0"] + c["a1"] * t + c["a2"] * t**2 + (c["b0"] + c["b1"] * t) * xw
                               + (c["c0"] + c["c1"] * t) * xw**2)
            + (p / t_k) ** 2 * (c["d"] + c["e"] * xw**2))


def _cipm_partial_densities(t_k, p, rh, xc):
    """Partial densities (dry air, water vapour) from the CIPM equation [kg/m^3]."""
    xw = _xw(t_k, p, rh)
    molar_density = p / (_cipm_z(t_k, p, xw) * _R_CIPM * t_k)
    return (1.0 - xw) * molar_density * _ciddor_air_molar_mass(xc), xw * molar_density * _M_W


def air_refractive_index(*, wavelength_m, temperature_k, pressure_pa, relative_humidity=0.0, co2_ppm=450.0):
    """Refractive index of (moist) air after Ciddor 1996, NIST simplified form.

    n = 1 + (rho_a / rho_axs)(n_axs - 1) + (rho_w / rho_ws)(n_ws - 1), with the
    partial densities from the CIPM equation.  All inputs broadcast (numpy).

    Parameters
    ----------
    wavelength_m : float or array
        Vacuum wavelength, 300-1700 nm.
    temperature_k : float or array
        233.15-373.15 K (-40..100 degC).
    pressure_pa : float or array
        10-140 kPa.
    relative_humidity : float or array
        Fraction 0..1 (over ice below 0 degC, as NIST does).
    co2_ppm : float or array
        0-2000 umol/mol.

    Returns
    -------
    float or ndarray
        n (not n - 1).

    Raises
    ------
    InputError
        Any input outside the validity range above.

    References
    ----------
    Ciddor 1996, Appl. Opt. 35:1566; NIST Engineering Metrology Toolbox
    documentation A-III (simplified form, as coded in ref_index 1.0).
    """
    s2 = _sigma2(_wavelength(wavelength_m))
    t_k, p, rh, xc = _ciddor_inputs(temperature_k, pressure_pa, relative_humidity, co2_ppm)
    rho_a, rho_w = _cipm_partial_densities(t_k, p, rh, xc)
    return _out(1.0 + rho_a * _dry_air_k(s2, xc) + rho_w * _water_standard(s2) / _RHO_WS)


def air_density(*, temperature_k, pressure_pa, relative_humidity=0.0, co2_ppm=450.0, wavelength_m=None):
    """Density of moist air [kg/m^3] from the CIPM equation used inside Ciddor's model.

    Same keywords and validity range as :func:`air_refractive_index`;
    ``wavelength_m`` is accepted for symmetry and only range-checked.

    References
    ----------
    CIPM-81/91 (Davis 1992, Metrologia 29:67) with the constants of Ciddor
    (1996), Appl. Opt. 35:1566, as given in the NIST Engineering Metrology
    Toolbox documentation A-III.
    """
    if wavelength_m is not None:
        _wavelength(wavelength_m)
    rho_a, rho_w = _cipm_partial_densities(*_ciddor_inputs(temperature_k, pressure_pa, relative_humidity, co2_ppm))
    return _out(rho_a + rho_w)


# --- ideal gas and sound -----------------------------------------------------------------------
def ideal_gas_density(temperature_k, pressure_pa, molar_mass_kg_mol):
    """Ideal-gas density rho = p M / (R T) [kg/m^3]; arrays broadcast."""
    t = _positive("temperature_k", temperature_k)
    return _out(_positive("pressure_pa", pressure_pa) * _positive("molar_mass_kg_mol", molar_mass_kg_mol)
                / (GAS_CONSTANT * t))


def ideal_gas_temperature(density, pressure_pa, molar_mass_kg_mol):
    """Ideal-gas temperature T = p M / (R rho) [K]; arrays broadcast."""
    rho = _positive("density", density)
    return _out(_positive("pressure_pa", pressure_pa) * _positive("molar_mass_kg_mol", molar_mass_kg_mol)
                / (GAS_CONSTANT * rho))


def speed_of_sound(temperature_k, *, gas="air"):
    """Ideal-gas speed of sound c = sqrt(gamma R T / M) [m/s].

    Parameters
    ----------
    temperature_k : float or array
        Temperature [K], positive.
    gas : str
        Key of ``GASES`` (constant gamma from :func:`heat_capacity_ratio`).

    Notes
    -----
    For dry air at 1 atm this is within 0.07 % of the real-gas value over
    -20..100 degC (compared with CoolProp 8.0.0 real-gas air; checked in the tests).
    """
    g = gas_data(gas)
    return _out(np.sqrt(g.gamma * GAS_CONSTANT * _positive("temperature_k", temperature_k) / g.molar_mass))


def spl_to_pressure_amplitude(spl_db):
    """Peak acoustic pressure [Pa] of a sine wave of sound pressure level ``spl_db``.

    p_peak = sqrt(2) * 20 uPa * 10^(L/20)  (SPL re 20 uPa, the usual acoustics
    definition; from memory).
    """
    return _out(math.sqrt(2.0) * REFERENCE_SOUND_PRESSURE_PA * 10.0 ** (_finite("spl_db", spl_db) / 20.0))


def pressure_to_spl(p_rms):
    """Sound pressure level [dB re 20 uPa] of an rms acoustic pressure ``p_rms`` [Pa]."""
    return _out(20.0 * np.log10(_positive("p_rms", p_rms) / REFERENCE_SOUND_PRESSURE_PA))


def isentropic_temperature_amplitude(pressure_amplitude_pa, *, temperature_k, pressure_pa, gamma=1.4):
    """Isentropic temperature fluctuation T' = ((gamma - 1) / gamma) T p' / p0 [K].

    References
    ----------
    Linear acoustics, isentropic relation (textbook result, from memory; no
    specific source).
    """
    if not gamma > 1.0:
        raise InputError(f"gamma must exceed 1, got {gamma!r}")
    return _out((gamma - 1.0) / gamma * _positive("temperature_k", temperature_k)
                * _finite("pressure_amplitude_pa", pressure_amplitude_pa) / _positive("pressure_pa", pressure_pa))


# --- Medium --------------------------------------------------------------------------------------
def _nan_unless_positive(x):
    a = np.asarray(x, dtype=float)
    with np.errstate(invalid="ignore"):
        return np.where(a > 0, a, np.nan)


@dataclass(frozen=True)
class Medium:
    """The gas a BOS experiment looks through, with its ambient state.

    Parameters
    ----------
    gas : str
        Pure gas key (see ``GASES``); ignored in favour of ``composition``.
    wavelength_m : float
        Vacuum wavelength of the illumination, 300-1700 nm.
    pressure_pa : float
        Ambient (and assumed uniform) pressure, positive.
    temperature_k : float
        Ambient temperature, positive.
    relative_humidity : float
        Fraction 0..1; only for ``gas="air"`` (put "h2o" in ``composition`` otherwise).
    co2_ppm : float
        CO2 content of air, 0-2000 umol/mol (also for an "air" component of a mixture).
    composition : dict or None
        Mole fractions {gas: x_i} summing to 1 within 1e-6; then ``gas`` must stay "air".

    Notes
    -----
    Air (no composition) uses Ciddor 1996 for ``ambient_index``, the CIPM
    density for ``ambient_density`` and the mass-fraction rule over dry air
    and water vapour for ``gladstone_dale``, so that
    ``density_from_index(ambient_index) == ambient_density``.  Outside the
    Ciddor range (10-140 kPa, -40..100 degC) air falls back to the ideal gas
    with a note in ``warnings``.  Other gases and mixtures: ideal-gas
    density and n0 = 1 + K rho.

    ``temperature_from_density`` / ``density_from_temperature`` use the gas
    law at ``pressure_pa`` and the ambient composition: ideal (Z = 1) for
    other gases, and for air (within the Ciddor range) the CIPM
    compressibility Z(T) (|Z - 1| < 6e-4; held at its 233.15 K / 373.15 K
    value outside that range), so the ambient state maps back to
    ``temperature_k`` exactly.  Non-positive densities/temperatures in the
    array methods give NaN, as masked points do.
    """

    gas: str = "air"
    wavelength_m: float = 550e-9
    pressure_pa: float = 101325.0
    temperature_k: float = 293.15
    relative_humidity: float = 0.0
    co2_ppm: float = 450.0
    composition: dict | None = field(default=None, hash=False)

    def __post_init__(self):
        set_ = lambda k, v: object.__setattr__(self, k, v)  # noqa: E731  (frozen dataclass)
        _wavelength(self.wavelength_m)
        if np.ndim(self.wavelength_m) or np.ndim(self.pressure_pa) or np.ndim(self.temperature_k):
            raise InputError("Medium takes scalar wavelength_m, pressure_pa and temperature_k")
        _positive("pressure_pa", self.pressure_pa)
        _positive("temperature_k", self.temperature_k)
        rh = float(_in_range("relative_humidity", self.relative_humidity, 0.0, 1.0,
                             "0..1 (a fraction: 50 % is 0.5)"))
        xc = float(_in_range("co2_ppm", self.co2_ppm, *CIDDOR_RANGES["co2_ppm"], "0-2000 ppm"))
        gas = gas_data(self.gas).name
        mole = None
        if self.composition is not None:
            if gas != "air":
                raise InputError(f"give either gas={self.gas!r} or composition, not both")
            mole = _fractions("composition", self.composition)
            set_("composition", dict(mole))
            if len(mole) == 1:  # a single component is the pure gas
                gas, mole = next(iter(mole)), None
                set_("composition", None)
        if rh > 0 and (mole is not None or gas != "air"):
            raise InputError("relative_humidity applies to gas='air' only; put 'h2o' in composition instead")
        set_("gas", gas)
        self._derive(gas, mole, rh, xc)

    def _derive(self, gas, mole, rh, xc):
        """Fill the cached ambient properties (K, M, gamma, rho0, n0, gas law, notes)."""
        lam, p, t = float(self.wavelength_m), float(self.pressure_pa), float(self.temperature_k)
        s2 = _sigma2(lam)
        notes: list[str] = []
        ciddor = mole is None and gas == "air"
        if ciddor:
            (lo_t, hi_t), (lo_p, hi_p) = CIDDOR_RANGES["temperature_k"], CIDDOR_RANGES["pressure_pa"]
            if not (lo_t <= t <= hi_t and lo_p <= p <= hi_p):
                ciddor = False
                notes.append(f"air at {p:g} Pa, {t:g} K is outside the Ciddor range "
                             "(10-140 kPa, -40..100 degC): ideal gas and Gladstone-Dale used instead")
            xw = float(_xw(np.asarray(t), np.asarray(p), np.asarray(rh))) if rh > 0 else 0.0
            mole = {"air": 1.0 - xw, "h2o": xw} if xw > 0 else {"air": 1.0}
        elif mole is None:
            mole = {gas: 1.0}
        masses = {g: GASES[g].molar_mass for g in mole}
        k_comp = {g: float(GASES[g].dispersion(s2) / GASES[g].reference_density) for g in mole}
        if "air" in mole:  # CO2-dependent dry air, exactly as inside Ciddor's model
            masses["air"] = float(_ciddor_air_molar_mass(xc))
            k_comp["air"] = float(_dry_air_k(s2, xc))
        mass = _to_mass(mole, masses)
        k = sum(mass[g] * k_comp[g] for g in mole)
        m = sum(x * masses[g] for g, x in mole.items())
        if ciddor:
            rho0 = air_density(temperature_k=t, pressure_pa=p, relative_humidity=rh, co2_ppm=xc)
            n0 = air_refractive_index(wavelength_m=lam, temperature_k=t, pressure_pa=p,
                                      relative_humidity=rh, co2_ppm=xc)
        else:
            rho0 = p * m / (GAS_CONSTANT * t)
            n0 = 1.0 + k * rho0
        for g in mole:
            gd = GASES[g]
            if gd.note and (gd.is_estimate or not gd.fit_range_m[0] <= lam <= gd.fit_range_m[1]):
                notes.append(gd.note)
        # gas law: the CIPM one inside Ciddor (at the ambient water mole fraction) or the ideal gas;
        # only plain values are stored, so a Medium pickles (process pools)
        values = dict(_mole=dict(mole), _mass=mass, _k=k, _m=m, _gamma=_mix_gamma(mole), _rho0=rho0,
                      _n0=n0, _cipm_xw=mole.get("h2o", 0.0) if ciddor else None,
                      _rgas=_R_CIPM if ciddor else GAS_CONSTANT, _notes=tuple(notes))
        for name, v in values.items():
            object.__setattr__(self, name, v)

    def _z(self, t_k):
        """Compressibility factor at ``pressure_pa`` and temperature(s) ``t_k``."""
        if self._cipm_xw is None:
            return 1.0
        return _cipm_z(np.clip(t_k, *CIDDOR_RANGES["temperature_k"]), float(self.pressure_pa), self._cipm_xw)

    # -- ambient properties
    @property
    def gladstone_dale(self) -> float:
        """Gladstone-Dale constant K of the medium at ``wavelength_m`` [m^3/kg]."""
        return self._k

    @property
    def molar_mass(self) -> float:
        """Molar mass of the medium [kg/mol]."""
        return self._m

    @property
    def gamma(self) -> float:
        """Heat-capacity ratio of the medium (ideal mixture)."""
        return self._gamma

    @property
    def ambient_density(self) -> float:
        """Ambient density rho0 [kg/m^3] (CIPM for air, ideal gas otherwise)."""
        return self._rho0

    @property
    def ambient_index(self) -> float:
        """Ambient refractive index n0 (Ciddor for air, 1 + K rho0 otherwise)."""
        return self._n0

    @property
    def speed_of_sound(self) -> float:
        """Ideal-gas speed of sound at the ambient state [m/s]."""
        return math.sqrt(self._gamma * GAS_CONSTANT * float(self.temperature_k) / self._m)

    @property
    def mole_fractions(self) -> dict[str, float]:
        """Mole fractions of the components (humid air: "air" and "h2o")."""
        return dict(self._mole)

    @property
    def mass_fractions(self) -> dict[str, float]:
        """Mass fractions of the components."""
        return dict(self._mass)

    @property
    def warnings(self) -> tuple[str, ...]:
        """Caveats for the user: estimated K (propane), extrapolated dispersion, ideal-gas fallback."""
        return self._notes

    # -- conversions (array in, array out; NaN passes through)
    def density_from_index(self, n):
        """Density [kg/m^3] from refractive index n: rho = (n - 1) / K."""
        return _out((np.asarray(n, dtype=float) - 1.0) / self._k)

    def index_from_density(self, rho):
        """Refractive index from density: n = 1 + K rho."""
        return _out(1.0 + self._k * np.asarray(rho, dtype=float))

    def temperature_from_density(self, rho):
        """Temperature [K] from density at ``pressure_pa``: T = p M / (Z(T) R rho); rho <= 0 -> NaN."""
        pm_r_rho = self.pressure_pa * self._m / (self._rgas * _nan_unless_positive(rho))
        t = pm_r_rho / self._z(float(self.temperature_k))
        for _ in range(6):  # fixed point contracting by |T dZ/dT| < 5e-3: 6 steps reach round-off
            with np.errstate(invalid="ignore"):
                t = pm_r_rho / self._z(t)
        return _out(t)

    def density_from_temperature(self, t):
        """Density [kg/m^3] from temperature at ``pressure_pa``: rho = p M / (Z(T) R T); T <= 0 -> NaN."""
        tk = _nan_unless_positive(t)
        with np.errstate(invalid="ignore"):
            return _out(self.pressure_pa * self._m / (self._z(tk) * self._rgas * tk))

    def temperature_from_index(self, n):
        """Temperature [K] from refractive index (Gladstone-Dale, then ideal gas)."""
        return self.temperature_from_density(self.density_from_index(n))

    def acoustic_pressure(self, rho_prime):
        """Acoustic pressure p' = c^2 rho' [Pa] from a density fluctuation [kg/m^3]."""
        return _out(self.speed_of_sound**2 * np.asarray(rho_prime, dtype=float))

    def isentropic_temperature(self, p_prime):
        """Isentropic temperature fluctuation [K] for an acoustic pressure p' [Pa]."""
        return isentropic_temperature_amplitude(p_prime, temperature_k=self.temperature_k,
                                                pressure_pa=self.pressure_pa, gamma=self._gamma)
