"""The grid Cholesky solver (nested dissection with dense fronts, bos.reconstruct._nested).

Reference: scipy's sparse LU (``scipy.sparse.linalg.spsolve``, SuperLU) on the same
5-point matrices, assembled independently here with scipy.sparse.
"""

from __future__ import annotations

import os

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from bos.errors import InputError
from bos.reconstruct._nested import GridCholesky


def five_point(ny, nx, seed, *, decoupled=None):
    """Random SPD 5-point matrix (couplings spanning x100, diagonally dominant by a small margin)."""
    rng = np.random.default_rng(seed)
    cy = rng.uniform(0.1, 10, (ny - 1, nx))
    cx = rng.uniform(0.1, 10, (ny, nx - 1))
    if decoupled is not None:  # unit rows with no coupling (how invalid cells enter the solver)
        cy[decoupled[:-1] | decoupled[1:]] = 0.0
        cx[decoupled[:, :-1] | decoupled[:, 1:]] = 0.0
    d = np.zeros((ny, nx))
    d[:-1] += cy
    d[1:] += cy
    d[:, :-1] += cx
    d[:, 1:] += cx
    d += rng.uniform(1e-3, 0.1, (ny, nx))
    if decoupled is not None:
        d[decoupled] = 1.0
    idx = np.arange(ny * nx).reshape(ny, nx)
    rows = np.r_[idx.ravel(), idx[:-1].ravel(), idx[1:].ravel(), idx[:, :-1].ravel(), idx[:, 1:].ravel()]
    cols = np.r_[idx.ravel(), idx[1:].ravel(), idx[:-1].ravel(), idx[:, 1:].ravel(), idx[:, :-1].ravel()]
    vals = np.r_[d.ravel(), -cy.ravel(), -cy.ravel(), -cx.ravel(), -cx.ravel()]
    A = sp.csc_matrix((vals, (rows, cols)), shape=(ny * nx, ny * nx))
    return d, -cy, -cx, A


@pytest.mark.parametrize("shape", [(1, 5), (2, 2), (3, 7), (1, 40), (14, 18), (17, 9), (40, 33), (100, 7), (64, 129),
                                   (512, 3)])
def test_solves_equal_scipy_sparse_lu(shape):
    d, oy, ox, A = five_point(*shape, seed=sum(shape))
    chol = GridCholesky(d, oy, ox)
    b = np.random.default_rng(1).standard_normal((A.shape[0], 3))
    want = spla.spsolve(A, b)
    scale = np.abs(want).max()
    assert np.abs(chol.solve(b) - want).max() < 1e-10 * scale  # measured ~1e-14
    assert np.abs(chol.solve(b[:, 1]) - want[:, 1]).max() < 1e-10 * scale  # one right-hand side


def test_decoupled_cells():
    ny, nx = 37, 52
    rng = np.random.default_rng(3)
    off = rng.random((ny, nx)) < 0.1
    off[:, 30] = True
    d, oy, ox, A = five_point(ny, nx, seed=2, decoupled=off)
    b = rng.standard_normal(ny * nx)
    got = GridCholesky(d, oy, ox).solve(b)
    want = spla.spsolve(A, b)
    assert np.abs(got - want).max() < 1e-10 * np.abs(want).max()
    assert np.allclose(got[off.ravel()], b[off.ravel()])  # unit rows


def test_not_positive_definite_is_an_input_error():
    d, oy, ox, _ = five_point(20, 20, seed=0)
    d[5, 5] = -1.0
    with pytest.raises(InputError, match="positive definite"):
        GridCholesky(d, oy, ox)


def test_warm_up_loads_the_only_signature_of_each_kernel():
    # bos run loads the compiled kernels in the background on a 3 x 3 grid; a large problem must
    # then run the same machine code (one type signature per kernel), not compile another
    from bos.reconstruct import _nested, _nested_kernels as kern

    _nested.warm_up()
    d, oy, ox, _ = five_point(23, 41, seed=5)
    GridCholesky(d, oy, ox).solve(np.ones((23 * 41, 3)))
    for fn in (kern.factor_boxes, kern.forward_boxes, kern.backward_boxes):
        assert len(fn.signatures) == 1, fn.signatures


def test_too_little_memory_is_an_input_error_before_factorising(monkeypatch):
    from bos.reconstruct import _nested

    d, oy, ox, _ = five_point(40, 50, seed=1)
    need = _nested.factor_memory_bytes(40, 50)
    # the estimate covers the factors (the L^-1 and L^-1 F_SB blocks actually kept)
    chol = GridCholesky(d, oy, ox)
    kept = sum(a.nbytes + b.nbytes for a, b in chol._factors.values())
    assert kept < need < 4 * kept
    monkeypatch.setattr(_nested, "_available_memory_bytes", lambda: need)
    with pytest.raises(InputError, match="multigrid"):
        GridCholesky(d, oy, ox)


def test_a_batch_workers_thread_budget_is_respected(monkeypatch):
    # bos batch gives each local worker cores // workers threads; the solver must not take more
    import threadpoolctl

    from bos import _threads, batch

    monkeypatch.setitem(_threads._BUDGET, "n", None)
    d, oy, ox, A = five_point(30, 40, seed=4)
    assert GridCholesky(d, oy, ox)._threads == min(2, os.cpu_count() or 1)
    # the worker's budget as bos batch sets it (BLAS limits and environment left to this test's scope)
    monkeypatch.setattr(threadpoolctl, "threadpool_limits", lambda limits=None: None)
    for var in batch._THREAD_VARS:
        monkeypatch.setenv(var, "")
    monkeypatch.setattr(batch, "_THREADS", {"n": None})
    batch.apply_thread_budget(1)
    chol = GridCholesky(d, oy, ox)
    assert chol._threads == 1
    b = np.random.default_rng(0).standard_normal((A.shape[0], 2))
    want = spla.spsolve(A, b)
    assert np.abs(chol.solve(b) - want).max() < 1e-10 * np.abs(want).max()
