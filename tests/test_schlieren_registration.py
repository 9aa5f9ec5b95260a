"""Registration of BOS and knife-edge views (bos.schlieren.registration).

Outside sources of the checks:
* control-point fits are compared with scikit-image's
  ``SimilarityTransform.estimate`` (general-purpose reference library) and
  with the known transform that generated the points;
* the masked normalised cross-correlation is compared with numpy's
  ``corrcoef`` evaluated directly on the overlap at a few shifts;
* automatic registration: the knife-edge field is the analytic deflection
  field (gradient of Gaussian index blobs) evaluated at the positions given
  by a known similarity, rotated into the knife frame and projected on the
  knife normal.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from bos.errors import InputError
from bos.schlieren.registration import Similarity, masked_ncc, register_fields, similarity_from_points

TRUTH = Similarity(scale=1.3, rotation_rad=math.radians(12.0), shift_xy=(40.0, -30.0))
BLOBS = [(70, 60, 22, 1e-4), (130, 150, 28, -1.5e-4), (55, 165, 18, 0.8e-4), (150, 55, 25, 1.2e-4)]


def blob_field(r, c, blobs=BLOBS):
    """eps = grad(phi) of Gaussian blobs (row, col, 1/e radius, amplitude [rad]) in BOS pixel coordinates."""
    ey = np.zeros_like(r, float)
    ex = np.zeros_like(r, float)
    for r0, c0, s, a in blobs:
        g = a * np.exp(-((r - r0) ** 2 + (c - c0) ** 2) / s ** 2)
        ey += -2 * (r - r0) / s * g
        ex += -2 * (c - c0) / s * g
    return ey, ex


def knife_view(truth: Similarity, shape, normal, *, bos_rows, bos_cols, noise=3e-6, seed=0):
    """Knife-frame field eps'.k where eps' = R(theta) eps, at the BOS point each knife pixel sees."""
    kr, kc = np.mgrid[0:shape[0], 0:shape[1]].astype(float)
    br, bc = truth.inverse().apply(kr, kc)
    ey, ex = blob_field(br, bc)
    th = truth.rotation_rad
    exk = math.cos(th) * ex - math.sin(th) * ey
    eyk = math.sin(th) * ex + math.cos(th) * ey
    kn = normal[0] * eyk + normal[1] * exk
    inside = (br >= bos_rows[0]) & (br <= bos_rows[-1]) & (bc >= bos_cols[0]) & (bc <= bos_cols[-1])
    return np.where(inside, kn, np.nan) + np.random.default_rng(seed).normal(0.0, noise, shape)


def _points(n, seed=1):
    rng = np.random.default_rng(seed)
    return rng.uniform(0, 200, size=(n, 2))


def test_control_points_match_scikit_image_and_the_truth():
    tf_mod = pytest.importorskip("skimage.transform")
    src = _points(7)
    r, c = TRUTH.apply(src[:, 0], src[:, 1])
    dst = np.column_stack([r, c]) + np.random.default_rng(2).normal(0, 0.2, (7, 2))
    sim, resid = similarity_from_points(src, dst)
    cls = tf_mod.SimilarityTransform                                    # skimage works in (x, y)
    if hasattr(cls, "from_estimate"):                                   # scikit-image >= 0.26
        ref = cls.from_estimate(src[:, ::-1], dst[:, ::-1])
        assert ref
    else:
        ref = cls()
        assert ref.estimate(src[:, ::-1], dst[:, ::-1])
    assert sim.scale == pytest.approx(ref.scale, rel=1e-9)
    assert sim.rotation_rad == pytest.approx(ref.rotation, abs=1e-9)
    assert np.allclose(sim.shift_xy, ref.translation, atol=1e-7)
    # residuals: distances to the fitted transform, as skimage computes them
    assert np.allclose(resid, ref.residuals(src[:, ::-1], dst[:, ::-1]), atol=1e-9)
    # within 0.5 px of the known transform over the field
    grid = np.array([[0, 0], [0, 200], [200, 0], [200, 200], [100, 100]], float)
    a = np.column_stack(TRUTH.apply(grid[:, 0], grid[:, 1]))
    b = np.column_stack(sim.apply(grid[:, 0], grid[:, 1]))
    assert np.max(np.hypot(*(a - b).T)) < 0.5
    # inverse really inverts
    back = np.column_stack(sim.inverse().apply(b[:, 0], b[:, 1]))
    assert np.allclose(back, grid, atol=1e-9)


def test_control_point_errors():
    with pytest.raises(InputError, match="at least 3"):
        similarity_from_points([[0, 0], [1, 1]], [[0, 0], [1, 1]])
    with pytest.raises(InputError, match="coincide"):
        similarity_from_points([[5, 5]] * 3, [[1, 2], [3, 4], [5, 6]])
    with pytest.raises(InputError):
        similarity_from_points([[0, 0], [1, 1], [2, 3]], [[0, 0], [1, 1]])


def test_masked_ncc_matches_direct_correlation():
    rng = np.random.default_rng(4)
    f = rng.normal(size=(30, 40))
    m = rng.normal(size=(20, 25))
    fm = rng.random(f.shape) > 0.2
    mm = rng.random(m.shape) > 0.2
    ncc = masked_ncc(f, fm, m, mm, min_overlap=0.0)
    for dy, dx in [(0, 0), (5, 7), (-3, 10), (12, -4)]:
        # fixed[y, x] against moving[y - dy, x - dx]
        a, b = [], []
        for y in range(f.shape[0]):
            for x in range(f.shape[1]):
                yy, xx = y - dy, x - dx
                if 0 <= yy < m.shape[0] and 0 <= xx < m.shape[1] and fm[y, x] and mm[yy, xx]:
                    a.append(f[y, x])
                    b.append(m[yy, xx])
        expected = np.corrcoef(a, b)[0, 1]
        assert ncc[dy + m.shape[0] - 1, dx + m.shape[1] - 1] == pytest.approx(expected, abs=1e-9)


@pytest.mark.parametrize("normal, bos_noise", [((0.0, 1.0), 0.0),
                                               ((math.cos(math.radians(40)), math.sin(math.radians(40))), 4e-6)])
def test_automatic_registration_recovers_a_known_similarity(normal, bos_noise):
    """Noise-free BOS field, and one with noise of 3 % of the peak deflection on every vector."""
    rows = np.arange(2, 200, 4.0)
    cols = np.arange(2, 220, 4.0)
    ey, ex = blob_field(*np.meshgrid(rows, cols, indexing="ij"))
    rng = np.random.default_rng(8)
    ey, ex = ey + rng.normal(0, bos_noise, ey.shape), ex + rng.normal(0, bos_noise, ex.shape)
    knife = knife_view(TRUTH, (250, 280), normal, bos_rows=rows, bos_cols=cols)
    reg = register_fields(ey, ex, rows, cols, knife, knife_normal=normal, scale_guess=1.2)
    pts = np.array([[20, 20], [190, 30], [100, 110], [180, 200], [30, 210]], float)
    a = np.column_stack(TRUTH.apply(pts[:, 0], pts[:, 1]))
    b = np.column_stack(reg.transform.apply(pts[:, 0], pts[:, 1]))
    assert np.max(np.hypot(*(a - b).T)) < 0.5
    assert reg.correlation > 0.99
    assert reg.residual_px < 0.5
    assert reg.n_inliers >= 3


def test_automatic_registration_refuses_a_field_without_structure():
    rows = np.arange(2, 100, 4.0)
    cols = np.arange(2, 100, 4.0)
    rng = np.random.default_rng(0)
    ey = rng.normal(size=(rows.size, cols.size))
    ex = rng.normal(size=(rows.size, cols.size))
    knife = rng.normal(size=(120, 120))
    with pytest.raises(InputError, match="control points"):
        register_fields(ey, ex, rows, cols, knife, knife_normal=(0.0, 1.0), scale_guess=1.0)
