"""Safety cautions for BOS and schlieren work, keyed by source and illumination.

The cautions are short reminders drawn from the standards and guidance
listed under References, plus common laboratory practice (the 3-30 Hz
photosensitive band, IEC TR 62778, IEC 61010-1 / EN 50191 and the gas remarks
are cited from memory); they are not a risk assessment.  Every list ends with a pointer to local codes,
the equipment makers' instructions and licensed practice, which always take
precedence.

References
----------
- WCAG 2.x success criterion 2.3.1 (three flashes or below threshold).
- IEC 62471:2006 / CIE S 009:2002, photobiological safety of lamps (risk
  groups Exempt, RG1, RG2, RG3); IEC 62471-7:2023.
- IEC 60825-1:2014, safety of laser products (classes 1 ... 4); ANSI Z136.1.
- Health Canada Safety Code 24 (1991), airborne ultrasound; Howard, Hansen
  & Zander (2004), J. Occup. Health Safety ANZ 21:253-257.
"""

from __future__ import annotations

from .errors import InputError

__all__ = ["SOURCE_KINDS", "ILLUMINATION_KINDS", "cautions_for", "all_cautions"]

DEFER = ("These notes are reminders, not a risk assessment: follow local codes and regulations, "
         "the equipment makers' instructions and your institution's licensed safety practice.")

_PHOTOSENSITIVE = (
    "Strobe/flash photosensitivity: flicker in roughly the 3-30 Hz band can trigger photosensitive seizures; "
    "WCAG 2.x SC 2.3.1 asks that nothing flash more than three times in any one second unless below the general "
    "and red flash thresholds. Warn people present, shield or enclose strobes, avoid visible low strobe rates "
    "(also in replayed video)."
)
_LED = (
    "High-power LEDs: assess photobiological safety per IEC 62471 (risk groups Exempt, RG1, RG2, RG3; RG3 is "
    "hazardous even for momentary exposure; blue-light and retinal-thermal hazards). Never look into a focused "
    "source or into the schlieren cut-off plane."
)
_ARC = (
    "Arc and flash lamps: IEC 62471 risk groups apply; continuous arc lamps emit UV (skin and eye) and run hot "
    "under pressure. Never look into the focused source or the cut-off plane."
)
_LASER = (
    "Lasers: classify per IEC 60825-1 (1, 1M, 2, 2M, 3R, 3B, 4). Class 3B (about 5-500 mW cw) is hazardous to "
    "direct viewing; Class 4 (incl. pulsed PIV-type lasers) is also a diffuse-reflection, skin and fire hazard. "
    "Use beam enclosures, interlocks and wavelength-rated eyewear; in the US see ANSI Z136.1."
)
_SCREEN = (
    "Screen backgrounds: if the displayed pattern changes or flashes, keep below three flashes per second "
    "(WCAG 2.x SC 2.3.1)."
)
_SPARK = (
    "High-voltage sparks: capacitor banks and spark gaps store lethal energy. Use bleeder resistors, earthing "
    "sticks and interlocked enclosures; work to electrical-safety rules for lab and test equipment (e.g. "
    "IEC 61010-1, EN 50191). Sparks also give UV, ozone/NOx, loud impulse noise (hearing protection) and EMI "
    "that can upset cameras and triggers."
)
_HOT = (
    "Hot air and hot surfaces: burns and fire risk. Keep flammables away, let heaters cool, and keep "
    "fire-extinguishing means at hand."
)
_FLAME = (
    "Flames and fuel gas: burns, fire, carbon monoxide from combustion and fuel-gas leaks (CH4, propane, H2 are "
    "flammable; H2 burns with an almost invisible flame). Leak-check connections, ventilate and keep "
    "fire-extinguishing means at hand."
)
_COMPRESSED = (
    "Compressed and special gases: restrain cylinders, use the correct regulators and pressure-rated lines. He, "
    "N2, Ar, CO2 and SF6 can displace oxygen in enclosed spaces (monitor O2); CO2 is toxic at high "
    "concentration; SF6 is a very potent greenhouse gas: avoid venting it."
)
_SHOCK = (
    "Shock and blast sources: pressure vessels, diaphragms and charges need rated containment, barriers and "
    "exclusion zones; the impulse noise needs hearing protection."
)
_ULTRASOUND = (
    "Intense airborne ultrasound (e.g. 40 kHz levitators at 140-160 dB): Health Canada Safety Code 24 and the "
    "review by Howard, Hansen & Zander (2004) give exposure limits, consensus 1/3-octave limits for < 4 h being "
    "75 dB at 20 kHz and 110 dB at 25-50 kHz; reported effects include nausea, fatigue, headache and temporary "
    "threshold shift. Use hearing protection, keep distance and avoid coupling to the body."
)

SOURCE_CAUTIONS: dict[str, tuple[str, ...]] = {
    "none": (),
    "other": (),
    "hot-air": (_HOT,),
    "plume": (_HOT,),
    "flame": (_FLAME, _HOT),
    "gas-jet": (_COMPRESSED,),
    "compressed-gas": (_COMPRESSED,),
    "spark": (_SPARK,),
    "ultrasound": (_ULTRASOUND,),
    "shock": (_SHOCK, _COMPRESSED),
}
ILLUMINATION_CAUTIONS: dict[str, tuple[str, ...]] = {
    "ambient": (),
    "led": (),
    "screen": (_SCREEN,),
    "high-power-led": (_LED,),
    "strobe": (_PHOTOSENSITIVE,),
    "flash": (_PHOTOSENSITIVE,),
    "laser": (_LASER,),
    "arc-lamp": (_ARC,),
}
SOURCE_KINDS = tuple(SOURCE_CAUTIONS)
ILLUMINATION_KINDS = tuple(ILLUMINATION_CAUTIONS)

_FLAMMABLE = {"h2", "ch4", "c3h8"}
_ASPHYXIANT = {"he", "n2", "ar", "co2", "sf6", "h2", "ch4", "c3h8"}


def _lookup(table: dict[str, tuple[str, ...]], key: str, what: str) -> tuple[str, ...]:
    k = str(key).strip().lower()
    if k not in table:
        raise InputError(f"unknown {what} {key!r}; known: {', '.join(table)}")
    return table[k]


def cautions_for(source_kind: str, illumination: str, *, frequency_hz: float | None = None,
                 gas: str | None = None) -> list[str]:
    """Safety cautions relevant to a source and an illumination.

    Parameters
    ----------
    source_kind : str
        One of :data:`SOURCE_KINDS` (e.g. "plume", "spark", "ultrasound").
    illumination : str
        One of :data:`ILLUMINATION_KINDS` (e.g. "strobe", "laser").
    frequency_hz : float, optional
        Source frequency (ultrasound level limits; strobe rates in the
        photosensitive band).
    gas : str or iterable of str, optional
        Gas name(s) of the medium; flammable or asphyxiant gases add the
        fuel-gas / compressed-gas cautions.

    Returns
    -------
    list of str
        One caution per line, ending with the deferral to local codes and
        licensed practice (always present).

    Raises
    ------
    InputError
        Unknown source kind or illumination.
    """
    out: list[str] = []
    for c in _lookup(SOURCE_CAUTIONS, source_kind, "source kind") + _lookup(
            ILLUMINATION_CAUTIONS, illumination, "illumination"):
        if c not in out:
            out.append(c)
    kind, light = str(source_kind).strip().lower(), str(illumination).strip().lower()
    if frequency_hz is not None:
        if kind == "ultrasound" and frequency_hz >= 20e3:
            limit = "75 dB (20 kHz band)" if frequency_hz < 22.4e3 else "110 dB"
            out.append(f"At {frequency_hz / 1e3:.4g} kHz the consensus 1/3-octave exposure limit (< 4 h) is about "
                       f"{limit}; expect BOS-visible sources to exceed it by far.")
        if light in ("strobe", "flash") and 3.0 <= frequency_hz <= 30.0:
            out.append(f"The stated rate {frequency_hz:g} Hz lies in the 3-30 Hz photosensitive band: "
                       "shield the strobe from view or change the rate.")
    gases = {gas} if isinstance(gas, str) else set(gas or ())
    gases = {g.strip().lower() for g in gases}
    if gases & _FLAMMABLE and _FLAME not in out:
        out.append(_FLAME)
    if gases & _ASPHYXIANT and _COMPRESSED not in out:
        out.append(_COMPRESSED)
    out.append(DEFER)
    return out


def all_cautions() -> dict[str, list[str]]:
    """Every caution text, keyed by source kind and illumination (for the docs)."""
    out = {f"source: {k}": list(v) for k, v in SOURCE_CAUTIONS.items() if v}
    out.update({f"illumination: {k}": list(v) for k, v in ILLUMINATION_CAUTIONS.items() if v})
    return out
