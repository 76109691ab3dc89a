"""Tests of voxelscope.core.loops: the compiled loops of the AR(p) map equal their NumPy
definitions in voxelscope.core.noise, and through them the outside references.

Outside references, named beside each test: ``numpy.linalg.cholesky`` and
``numpy.linalg.solve`` (LAPACK) for the factorisation, statsmodels' ``arma_acf`` and
``levinson_durbin`` for the AR(2) autocorrelations and Yule-Walker coefficients. The
NumPy path (``noise._loops`` returning None) is itself tested against statsmodels in
tests/core/test_noise.py. All data here are random, drawn in the tests.
"""

from __future__ import annotations

import os
import subprocess
import sys

import numpy as np
import pytest
from statsmodels.tsa.arima_process import arma_acf
from statsmodels.tsa.stattools import levinson_durbin

from voxelscope.core import glm, noise
from voxelscope.core.events import Condition
from voxelscope.core.maps import ArrayRun, compute_map
from voxelscope.core.model import Analysis, ModelSettings

loops = pytest.importorskip("voxelscope.core.loops")


@pytest.fixture(autouse=True)
def _loaded():
    """The loops as the window has them (noise.load_loops), for every test here."""
    assert noise.load_loops()


def _numpy_only(monkeypatch):
    monkeypatch.setattr(noise, "_loops", lambda n_voxels: None)


def _ar2(rng, V):
    """AR(2) coefficients across the stationary triangle (phi2 > -1, phi1 + phi2 < 1,
    phi2 - phi1 < 1), with some close to its edges."""
    phi2 = rng.uniform(-0.9, 0.9, V)
    phi1 = rng.uniform(-(1 - phi2), 1 - phi2) * 0.995
    return np.vstack([phi1, phi2])


def test_cholesky_loop_equals_lapack_and_the_numpy_loop(monkeypatch):
    """The compiled bordered Cholesky gives numpy.linalg.cholesky's factor and
    numpy.linalg.solve's forward solve (L^-1 b) matrix by matrix, to 1e-12, on 2000 random
    12 x 12 SPD matrices; matrices that are not positive definite give NaN exactly where
    the NumPy loop gives NaN."""
    rng = np.random.default_rng(11)
    q, V = 12, 2000
    X = rng.standard_normal((V, 30, q)) * rng.uniform(0.1, 10, q)
    G = np.einsum("vti,vtj->vij", X, X)
    b = rng.standard_normal((V, q))
    G[7] = -np.eye(q)  # not positive definite
    G[8, 3, 3] = -1.0
    A = np.empty((q, q + 1, V))
    A[:, :q] = np.transpose(G, (2, 1, 0))  # A[j, i, v] = G[v, i, j]
    A[:, q] = b.T
    got = noise._bordered_cholesky(A.copy())  # V >= LOOP_VOXELS: the compiled loop
    _numpy_only(monkeypatch)
    ref = noise._bordered_cholesky(A.copy())
    monkeypatch.undo()
    assert np.array_equal(np.isnan(got), np.isnan(ref))
    ok = np.isfinite(ref)
    np.testing.assert_allclose(got[ok], ref[ok], rtol=1e-12, atol=1e-12 * np.abs(ref[ok]).max())
    for v in (0, 123, 1999):
        L = np.linalg.cholesky(G[v])
        np.testing.assert_allclose(np.tril(got[:, :q, v].T), L, rtol=1e-12, atol=1e-12)
        np.testing.assert_allclose(got[:, q, v], np.linalg.solve(L, b[v]), rtol=1e-10, atol=1e-12)


def test_refined_ar2_estimate_equals_numpy_and_statsmodels(monkeypatch):
    """The compiled defect correction gives the NumPy estimate to 1e-11 for 4001 voxels
    (an odd count: the last group of four is short), some invalid (v_0 <= 0). When the
    data's autocovariances are exactly those an AR(2) process implies, the estimate
    recovers the process (statsmodels' arma_acf gives the sequence, levinson_durbin the
    coefficients of its first autocorrelations) to 1e-4 where the process is moderate
    (phi1 in [-0.3, 0.6], |phi2| < 0.2; the three correction steps leave more at roots
    near 1, as DEVELOPERS.md records)."""
    rng = np.random.default_rng(12)
    n = 240
    X = np.column_stack([np.ones(n), np.linspace(-1, 1, n), np.cos(np.arange(n) / 9.0)])
    prep = glm.prepare(X)
    V = 4001
    phi = _ar2(rng, V)
    phi = phi[:, np.argsort(phi[0])]  # neighbours alike, as in a map
    F = noise.full_bias_matrix(X, 2)
    g = np.stack([arma_acf(np.r_[1, -phi[:, v]], [1], n) for v in range(V)], axis=1)
    values = noise._inverse(noise.bias_matrix(X, 2)) @ (F @ g)  # corrected like data
    noisy = values * (1 + rng.normal(0, 0.02, values.shape))
    noisy[:, :5] = 0.0
    noisy[0, 5:9] = -1.0
    for vals in (values, noisy):
        got_phi, got_rho = noise.ar_from_smoothed(vals, 2, prep)
        _numpy_only(monkeypatch)
        ref_phi, ref_rho = noise.ar_from_smoothed(vals, 2, prep)
        monkeypatch.undo()
        np.testing.assert_allclose(got_phi, ref_phi, rtol=0, atol=1e-11)
        np.testing.assert_allclose(got_rho, ref_rho, rtol=0, atol=1e-11)
    assert not got_phi[:, :9].any() and not got_rho[:, :9].any()
    exact, _rho = noise.ar_from_smoothed(values, 2, prep)
    inner = (phi[0] > -0.3) & (phi[0] < 0.6) & (np.abs(phi[1]) < 0.2)
    assert inner.sum() > 200
    np.testing.assert_allclose(exact[:, inner], phi[:, inner], rtol=0, atol=1e-4)
    for v in np.flatnonzero(inner)[::50]:
        _s, yw, *_ = levinson_durbin(g[:, v], nlags=2, isacov=True)
        np.testing.assert_allclose(exact[:, v], yw, rtol=0, atol=1e-4)


def test_the_loops_are_loaded_only_when_asked_for():
    """A process uses the compiled loops only after noise.load_loops() (numba is not even
    imported before), only for batches of at least LOOP_VOXELS, and never with
    VOXELSCOPE_COMPILED=0."""
    assert noise._loops(noise.LOOP_VOXELS - 1) is None
    code = (
        "import sys; from voxelscope.core import noise;"
        "n = noise.LOOP_VOXELS; before = noise._loops(n) is None and 'numba' not in sys.modules;"
        "print(before, noise.load_loops(), noise._loops(n) is not None, 'numba' in sys.modules)"
    )
    for env, want in (
        ({}, "True True True True"),
        ({"VOXELSCOPE_COMPILED": "0"}, "True False False False"),
    ):
        out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                             env={**os.environ, **env}, timeout=120)  # fmt: skip
        assert out.stdout.split() == want.split(), out.stderr


def test_map_is_the_same_with_and_without_the_loops(monkeypatch):
    """The default AR(p) map of a run with AR(2) noise varying in space is the same, to
    1e-10 in t and in the AR coefficients, whether its pieces go through the compiled loops
    or through NumPy (two workers, so both loops also run side by side)."""
    rng = np.random.default_rng(13)
    shape, n, tr = (16, 14, 10), 120, 2.0
    a1 = np.linspace(0.0, 0.6, shape[0])[:, None, None] * np.ones(shape)
    e = rng.standard_normal((*shape, n))
    y = np.zeros_like(e)
    for t in range(n):
        y[..., t] = e[..., t] + (a1 * y[..., t - 1] - 0.2 * y[..., t - 2] if t > 1 else 0)
    on = np.arange(10.0, n * tr - 30, 40.0)
    a = Analysis([Condition("tone", on, [16.0] * on.size)], n, tr)
    run = ArrayRun((100 + y).astype(np.float32), np.diag([3.0, 3.0, 3.0, 1.0]), tr)
    mask = np.ones(shape, dtype=bool)
    assert mask.sum() // 2 >= noise.LOOP_VOXELS  # each worker's piece takes the loops
    s = ModelSettings(contrast="tone", noise="arp")
    got = compute_map(run, a, s, "double-gamma", mask=mask, stats=("t",), workers=2)
    _numpy_only(monkeypatch)
    ref = compute_map(run, a, s, "double-gamma", mask=mask, stats=("t",), workers=2)
    np.testing.assert_allclose(got.stat("t"), ref.stat("t"), rtol=1e-10, atol=1e-10)
    np.testing.assert_allclose(got.ar, ref.ar, rtol=0, atol=1e-10)


def test_lag_products_equal_the_sums_they_stand_for(monkeypatch):
    """The one-pass lagged products of a block equal sum_t y_t y_{t-d} computed as dot
    products (numpy.dot, column by column) to 1e-12, and arp_sums gives the same acy with
    and without the compiled loop."""
    rng = np.random.default_rng(14)
    n, V = 150, 1500
    Y = np.cumsum(rng.standard_normal((n, V)), axis=0)
    out = np.full((4, V), 7.0)
    loops.lag_products(Y, 3, out)
    assert (out[0] == 7.0).all()  # row 0 (the sum of squares) is the caller's
    for v in (0, 700, 1499):
        for d in (1, 2, 3):
            ref = np.dot(Y[d:, v], Y[: n - d, v])
            assert out[d, v] == pytest.approx(ref, rel=1e-12)
    X = np.column_stack([np.ones(n), np.linspace(-1, 1, n)])
    prep = glm.prepare(X)
    Yc, mean, tss, bad = glm.working_copy(prep, Y)
    got = noise.arp_sums(prep, Yc, mean, tss, bad, autocov=False).acy
    _numpy_only(monkeypatch)
    ref = noise.arp_sums(prep, Yc, mean, tss, bad, autocov=False).acy
    np.testing.assert_allclose(got, ref, rtol=1e-12)


def test_gram_coefficients_equal_the_filters_they_come_from():
    """The compiled (g, top, bottom) of AR(2) voxels equal those of whitening_filter and
    _boundary to 1e-14; W'W built from them (the band Toeplitz part plus the corrections
    at both ends) is the inverse of the AR(2) covariance from statsmodels' arma_acf, up to
    the innovation variance."""
    from scipy.linalg import toeplitz

    rng = np.random.default_rng(15)
    V = 3000
    phi = _ar2(rng, V)
    got = loops.gram_coefficients_ar2(phi, np.empty((11, V)))
    C = noise.whitening_filter(phi)
    cp = C[:, 2, :].T
    g = np.stack([np.einsum("kv,kv->v", cp[: 3 - d], cp[d:]) for d in range(3)])
    top, bot = noise._boundary(C, g)
    ref = np.concatenate([g, top.reshape(4, -1), bot.reshape(4, -1)])
    np.testing.assert_allclose(got, ref, rtol=1e-14, atol=1e-14)
    n = 12
    for v in (0, 1500, 2999):
        gv, t, b = got[:3, v], got[3:7, v].reshape(2, 2), got[7:, v].reshape(2, 2)
        WtW = toeplitz(np.r_[gv, np.zeros(n - 3)])
        WtW[:2, :2] += t
        WtW[n - 2 :, n - 2 :] += b
        acf = arma_acf(np.r_[1, -phi[:, v]], [1], n)
        K = WtW @ toeplitz(acf)
        np.testing.assert_allclose(K / K[0, 0], np.eye(n), rtol=0, atol=1e-9)
