"""Tests of the dense optical-flow estimator (bos.displacement.optical_flow).

Outside sources: the Fourier shift theorem (exact sub-pixel shifts), the
analytic renderer bos.synthetic (exact displacement), and scikit-image's
TV-L1 and iLK optical flow (general-purpose reference library).
"""

from __future__ import annotations

import numpy as np
import pytest
from skimage.registration import optical_flow_ilk, optical_flow_tvl1

from bos.displacement import estimate, optical_flow
from bos.errors import InputError
from bos.synthetic import render_pair
from test_displacement import _blob_field, fourier_pair, reference_truth


def _rms(f, ty, tx, border=0):
    s = (slice(border, -border or None),) * 2
    ok = f.valid[s]
    return float(np.sqrt(np.mean((f.dy[s] - ty[s])[ok] ** 2 + (f.dx[s] - tx[s])[ok] ** 2) / 2))


@pytest.mark.parametrize("shift", [(0.18, 0.3), (0.42, 0.7)])
def test_flow_uniform_fourier_shift(shift):
    # Source: Fourier shift theorem (exact sub-pixel shift of band-limited noise).
    # Dense flow: |bias| < 0.002 px and rms < 0.01 px away from the image edge.
    a, b = fourier_pair(shift, n=256)
    f = optical_flow(a, b)
    assert f.dy.shape == a.shape and f.rows.size == 256 and f.cols[-1] == 255
    inner = (slice(20, -20),) * 2
    assert abs(np.nanmean(f.dy[inner]) - shift[0]) < 0.002
    assert abs(np.nanmean(f.dx[inner]) - shift[1]) < 0.002
    assert np.nanstd(f.dy[inner]) < 0.01 and np.nanstd(f.dx[inner]) < 0.01


def test_flow_beats_scikit_image_on_a_smooth_strong_field():
    # Source: scikit-image optical_flow_tvl1 / optical_flow_ilk run on the same
    # rendered pair (images scaled to [0, 1] as those functions expect); truth
    # from the analytic renderer.  Ours must have the smaller rms error.
    n = 384
    ft = _blob_field(3.0, n, 96.0)
    p = render_pair(shape=(n, n), displacement=ft, seed=9)
    f = estimate(p.reference, p.measurement, method="flow")
    ty, tx = reference_truth(ft, f.rows, f.cols)
    ours = _rms(f, ty, tx)
    scale = max(p.reference.max(), p.measurement.max())
    a = (p.reference / scale).astype(np.float32)
    b = (p.measurement / scale).astype(np.float32)
    for fn in (optical_flow_tvl1, optical_flow_ilk):
        v, u = fn(a, b)  # flow such that b(x + flow) ~ a(x): same convention as ours
        ref_rms = float(np.sqrt(np.mean((v - ty) ** 2 + (u - tx) ** 2) / 2))
        assert ours < ref_rms, (fn.__name__, ours, ref_rms)
    assert ours < 0.03
    assert f.invalid.mean() < 0.01


def test_flow_uncertainty_and_mask():
    # Source: analytic rendering with camera noise; the least-squares sigma must
    # track the actual random error within a factor 3 (pixels inside one
    # integration window are correlated, so the formula is approximate).
    n = 256
    p = render_pair(shape=(n, n), displacement=(np.full((n, n), 0.25), np.full((n, n), -0.4)), seed=4)
    mask = np.zeros((n, n), dtype=bool)
    mask[100:140, 100:140] = True
    f = optical_flow(p.reference, p.measurement, mask=mask)
    inner = (slice(16, -16),) * 2
    ok = f.valid[inner]
    actual = np.sqrt(np.mean((f.dx[inner][ok] + 0.4) ** 2))
    predicted = np.sqrt(np.mean(f.sigma_dx[inner][ok] ** 2))
    assert 1 / 3 < predicted / actual < 3, (predicted, actual)
    assert f.masked[100:140, 100:140].all() and np.isnan(f.dx[100:140, 100:140]).all()
    assert not (f.masked & f.invalid).any()
    assert abs(np.nanmedian(f.dy) - 0.25) < 0.01


def test_flow_bad_options():
    a, b = fourier_pair((0.1, 0.1), n=64)
    with pytest.raises(InputError, match="sigma"):
        optical_flow(a, b, sigma=0)
