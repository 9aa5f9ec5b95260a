"""Summary numbers and provenance attributes of a run (JSON-ready)."""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np

from .config import Experiment

def _finite_stat(a, fn, default=float("nan")) -> float:
    if a is None:
        return default
    a = np.asarray(a, float)
    a = a[np.isfinite(a)]
    return float(fn(a)) if a.size else default


def invalid_flags(disp, dens) -> np.ndarray:
    """Rejected vectors: by the displacement validation or lost in the reconstruction."""
    inv = np.asarray(disp.invalid, bool)
    if dens is not None and getattr(dens, "invalid", None) is not None:
        inv = inv | (np.asarray(dens.invalid, bool) & ~np.asarray(disp.masked, bool))
    return inv


def summarize(disp, dens, *, medium, warnings: list[str]) -> dict[str, Any]:
    """The short numbers a user wants first (JSON-ready)."""
    mag = np.hypot(disp.dy, disp.dx)
    sig = np.hypot(disp.sigma_dy, disp.sigma_dx)
    n = mag.size
    invalid = invalid_flags(disp, dens)
    valid = ~(disp.masked | invalid) & np.isfinite(mag)
    unmasked = int((~disp.masked).sum())
    out: dict[str, Any] = {
        "vectors": int(n),
        "grid_shape": [int(s) for s in mag.shape],
        "peak_displacement_px": _finite_stat(np.where(valid, mag, np.nan), np.max),
        "valid_fraction": float(valid.sum() / unmasked) if unmasked else 0.0,
        "masked_fraction": float(disp.masked.sum() / n) if n else 0.0,
        "invalid_fraction": float(invalid.sum() / n) if n else 0.0,
        "median_uncertainty_px": _finite_stat(np.where(valid, sig, np.nan), np.median),
        "camera_shift_px": [float(v) for v in (disp.camera_shift if disp.camera_shift is not None else (0.0, 0.0))],
        "method": disp.method,
    }
    if dens is not None:
        t0 = medium.temperature_k
        rho0 = medium.ambient_density
        tmax = _finite_stat(dens.temperature, np.max)
        tmin = _finite_stat(dens.temperature, np.min)
        out.update({
            "ambient_temperature_k": float(t0),
            "ambient_density_kg_m3": float(rho0),
            "min_density_kg_m3": _finite_stat(dens.density, np.min),
            "max_density_kg_m3": _finite_stat(dens.density, np.max),
            "min_temperature_k": tmin,
            "max_temperature_k": tmax,
            "peak_temperature_rise_k": tmax - t0 if math.isfinite(tmax) else float("nan"),
            "median_temperature_uncertainty_k": _finite_stat(getattr(dens, "sigma_temperature", None), np.median),
            "median_density_uncertainty_kg_m3": _finite_stat(getattr(dens, "sigma_density", None), np.median),
        })
        extra = getattr(dens, "info", None) or {}
        if extra.get("asymmetry") is not None:
            out["asymmetry"] = jsonable(extra["asymmetry"])
    out["warnings"] = list(warnings)
    return out


def jsonable(obj: Any) -> Any:
    if isinstance(obj, dict):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [jsonable(v) for v in obj]
    if isinstance(obj, Path):
        return str(obj)
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    return obj


def _small_items(params: dict[str, Any], *, max_size: int = 32) -> dict[str, Any]:
    """Scalars, strings and short numeric lists of a parameter dict (JSON-ready).

    Per-vector diagnostics (2-D arrays) and objects are left out of the
    attributes; the fields themselves are stored as variables.
    """
    out: dict[str, Any] = {}
    for key, value in params.items():
        if isinstance(value, (str, bool, int, float, np.generic)) or value is None:
            out[key] = jsonable(value)
        elif isinstance(value, (list, tuple, np.ndarray)):
            arr = np.asarray(value, dtype=object)
            if arr.size <= max_size and arr.ndim <= 2:
                out[key] = jsonable(value)
    return out


def _section_dict(section: Any) -> dict[str, Any]:
    import dataclasses

    return jsonable(dataclasses.asdict(section))


def _rig_dict(rig) -> dict[str, Any]:
    keys = ("focal_length_m", "pixel_pitch_m", "f_number", "z_a", "z_b", "z_d", "magnification",
            "image_distance_m", "object_pixel_m", "sensitivity_m_per_rad", "sensitivity_px_per_rad",
            "wavelength_m")
    out = {}
    for k in keys:
        try:
            v = getattr(rig, k)
        except Exception:  # noqa: BLE001 - a derived property may not apply
            continue
        if v is not None:
            out[k] = jsonable(v)
    return out


def _medium_dict(medium) -> dict[str, Any]:
    import dataclasses

    out = jsonable(dataclasses.asdict(medium))
    for k in ("gladstone_dale", "ambient_density", "ambient_index", "molar_mass"):
        try:
            out[k] = float(getattr(medium, k))
        except Exception:  # noqa: BLE001
            pass
    return out


def cautions(exp: Experiment) -> list[str]:
    """Safety cautions for the experiment's source and illumination (bos.safety)."""
    from .safety import cautions_for

    gas = list(exp.medium.composition) if exp.medium.composition else exp.medium.gas
    return [str(c) for c in cautions_for(exp.source.kind, exp.source.illumination,
                                         frequency_hz=exp.source.frequency_hz, gas=gas)]

