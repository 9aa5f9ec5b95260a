"""Exact chord integrals of the Abel kernel shared by the methods."""

from __future__ import annotations

import numpy as np


def _kernel_integrals(r, a, b):
    """Exact integrals of 1/sqrt(y^2-r^2) and y/sqrt(y^2-r^2) over [a, b], a >= r >= 0."""
    sa = np.sqrt(np.maximum(a * a - r * r, 0.0))
    sb = np.sqrt(np.maximum(b * b - r * r, 0.0))
    with np.errstate(divide="ignore", invalid="ignore"):
        i0 = np.log((b + sb) / (a + sa))
    return i0, sb - sa
