"""Three-point sub-pixel peak estimator shared by correlation and uncertainty."""

from __future__ import annotations

import numpy as np


def gauss3(cm, c0, cp):
    """Sub-pixel offset of a peak from three samples (three-point Gaussian).

    ``x0 = [ln c- - ln c+] / [2 ln c- - 4 ln c0 + 2 ln c+]``; falls back to a
    parabola where a sample is not positive, and to 0 where neither curve has
    a maximum.  Result clipped to [-1, 1].

    References
    ----------
    Raffel, M. et al. (2018). Particle Image Velocimetry - A Practical Guide,
    3rd ed., Springer.
    """
    with np.errstate(all="ignore"):
        pos = (cm > 0) & (c0 > 0) & (cp > 0)
        lm, l0, lp = (np.log(np.where(pos, c, 1.0)) for c in (cm, c0, cp))
        den_g = 2 * lm - 4 * l0 + 2 * lp
        den_p = 2 * cm - 4 * c0 + 2 * cp
        off = np.where(pos & (den_g < 0), (lm - lp) / den_g, np.where(den_p < 0, (cm - cp) / den_p, 0.0))
    return np.clip(np.nan_to_num(off), -1.0, 1.0)
