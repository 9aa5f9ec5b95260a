"""The result type shared by every displacement estimator."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np


@dataclass
class DisplacementField:
    """Apparent background displacement from the reference to the measurement.

    A feature at pixel ``p`` in the reference appears at ``p + d`` in the
    measurement (docs/architecture.md).  All 2-D arrays have the shape
    ``(rows.size, cols.size)``.

    Attributes
    ----------
    dy, dx : ndarray of float
        Displacement components [px]; NaN where ``masked`` or ``invalid``.
    rows, cols : ndarray of float, 1-D
        Pixel positions (row, column) of the vector grid [px].
    masked : ndarray of bool
        The user mask said "no data here".
    invalid : ndarray of bool
        Rejected by validation (outlier, no correlation peak, no texture).
    sigma_dy, sigma_dx : ndarray of float
        1-sigma random uncertainty of each vector [px] (NaN where no vector).
    camera_shift : tuple of float
        Global camera motion (dy, dx) [px] removed from ``dy, dx``
        (0, 0 when no camera-motion removal was asked for).
    method : str
        Name of the estimator in :data:`bos.displacement.METHODS`.
    params : dict
        Options used (resolved defaults included) and diagnostics.
    """

    dy: np.ndarray
    dx: np.ndarray
    rows: np.ndarray
    cols: np.ndarray
    masked: np.ndarray
    invalid: np.ndarray
    sigma_dy: np.ndarray
    sigma_dx: np.ndarray
    camera_shift: tuple[float, float] = (0.0, 0.0)
    method: str = ""
    params: dict = field(default_factory=dict)

    @property
    def shape(self) -> tuple[int, int]:
        """Shape of the vector grid (rows, cols)."""
        return self.dy.shape

    @property
    def valid(self) -> np.ndarray:
        """True where a vector exists (neither masked nor invalid)."""
        return ~(self.masked | self.invalid)
