"""Tests of voxelscope.core.noise: the default AR(p) noise model.

Outside references, named beside each test:
* the bias correction against the trace formula of Worsley et al. (2002, NeuroImage 15:1-15;
  from memory: ``E[r' D_j r] = tr(R D_j R V)`` with the residual-forming matrix ``R``)
  computed with dense n x n matrices on the real design of a run;
* ``statsmodels.tsa.arima_process.arma_acf`` for the autocorrelations of an AR process,
  ``statsmodels.tsa.stattools.levinson_durbin`` for Yule-Walker coefficients,
  ``statsmodels.api.GLS`` with the fitted AR covariance for the whitened fit at sampled
  voxels, ``statsmodels.stats.diagnostic.acorr_ljungbox`` for the Ljung-Box check on the
  whitened residuals;
* null simulations (a small version of tests/benchmarks/calibration.py) for the
  false-positive rate, with the binomial confidence interval of scipy.stats.binomtest.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import stats
from scipy.linalg import toeplitz
from statsmodels.stats.diagnostic import acorr_ljungbox
from statsmodels.tsa.arima_process import arma_acf
from statsmodels.tsa.stattools import levinson_durbin

from voxelscope.core import glm
from voxelscope.core.checks import voxel_checks
from voxelscope.core.errors import InputError
from voxelscope.core.events import Condition
from voxelscope.core.maps import ArrayRun, compute_map
from voxelscope.core.model import Analysis, ModelSettings
from voxelscope.core.noise import (
    ar_from_autocorr,
    bias_matrix,
    full_bias_matrix,
    smooth_in_mask,
    voxel_ar,
    whiten,
    whitening_filter,
)

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))
import calibration

TR = 2.0
T = 150
KERNEL = "double-gamma"


def _analysis(n=T):
    on = np.arange(10.0, n * TR - 30, 40.0)
    return Analysis([Condition("tone", on[::2], [16.0] * on[::2].size),
                     Condition("tap", on[1::2], [16.0] * on[1::2].size)], n, TR)  # fmt: skip


def _lag(n, j):
    return np.eye(n, k=-j)


def _dense_trace(X, j, k):
    """tr(L_j R S_k R) with dense matrices: R = I - X pinv(X), S_0 = I, S_k = L_k + L_k'."""
    n = X.shape[0]
    R = np.eye(n) - X @ np.linalg.pinv(X)
    S = np.eye(n) if k == 0 else _lag(n, k) + _lag(n, k).T
    return float(np.trace(_lag(n, j) @ R @ S @ R))


def test_bias_matrix_equals_the_trace_formula_on_a_known_design():
    a = _analysis()
    X = a.design(KERNEL, ModelSettings()).X  # conditions, cosine drift, constant
    M = bias_matrix(X, 3)
    ref = np.array([[_dense_trace(X, j, k) for k in range(4)] for j in range(4)])
    np.testing.assert_allclose(M, ref, rtol=1e-12, atol=1e-10)
    F = full_bias_matrix(X, 3)
    np.testing.assert_allclose(F[:, :4], M, rtol=1e-12, atol=1e-10)
    np.testing.assert_allclose(F[1, 40], _dense_trace(X, 1, 40), rtol=1e-12, atol=1e-10)


def test_expected_residual_autocovariance_is_what_the_correction_inverts():
    """E[r' L_j r] for AR(1) noise (phi 0.6, arma_acf) equals tr(L_j R Sigma R) computed
    densely, and equals full_bias_matrix @ acf: the model the correction inverts."""
    a = _analysis()
    X = a.design(KERNEL, ModelSettings()).X
    acf = arma_acf([1, -0.6], [1], T)
    Sigma = toeplitz(acf)
    R = np.eye(T) - X @ np.linalg.pinv(X)
    dense = [float(np.trace(_lag(T, j) @ R @ Sigma @ R)) for j in range(3)]
    np.testing.assert_allclose(full_bias_matrix(X, 2) @ acf, dense, rtol=1e-10)


def test_levinson_matches_statsmodels():
    phi = np.array([0.5, 0.2, -0.1])
    acf = arma_acf(np.r_[1, -phi], [1], 10)
    ours = ar_from_autocorr(acf[1:4], 3)[:, 0]
    _s, ref, *_rest = levinson_durbin(acf, nlags=3, isacov=True)
    np.testing.assert_allclose(ours, ref, rtol=1e-12)
    np.testing.assert_allclose(ours, phi, rtol=1e-10)


@pytest.mark.parametrize("phi", [[0.5], [0.5, 0.2], [0.3, -0.2, 0.1]])
def test_whitening_is_the_inverse_cholesky_of_the_ar_covariance(phi):
    """W'W is proportional to Sigma^-1 with Sigma the Toeplitz matrix of arma_acf; for p = 1
    the rows are those of the Prais-Winsten transform."""
    phi = np.asarray(phi)
    n = 30
    W = whiten(whitening_filter(phi[:, None]), np.eye(n))
    assert np.allclose(np.triu(W, 1), 0)  # a causal filter
    Si = np.linalg.inv(toeplitz(arma_acf(np.r_[1, -phi], [1], n)))
    WtW = W.T @ W
    np.testing.assert_allclose(WtW / WtW[n // 2, n // 2], Si / Si[n // 2, n // 2], atol=1e-12)
    if phi.size == 1:
        np.testing.assert_allclose(W, glm.prais_winsten(np.eye(n), float(phi[0])), atol=1e-14)


def _one_pass_case(n_vox=80, seed=5):
    """A real design (conditions, cosine drift, constant) and AR(2) series around 1000."""
    a = _analysis()
    d = a.design(KERNEL, ModelSettings())
    rng = np.random.default_rng(seed)
    e = rng.standard_normal((T + 50, n_vox))
    x = np.zeros_like(e)
    for t in range(e.shape[0]):
        x[t] = e[t] + (0.5 * x[t - 1] if t >= 1 else 0) + (0.2 * x[t - 2] if t >= 2 else 0)
    Y = 1000 + 3 * x[50:] + d.X[:, :1] * rng.normal(0, 2, n_vox)
    return a, d, Y


def test_one_pass_residual_autocovariances_equal_explicit_ones():
    """The sums of one pass give the OLS residual autocovariances sum_t r_t r_{t-j}: equal
    to statsmodels' acovf (not demeaned, not adjusted, times n) of the residuals of
    statsmodels OLS."""
    sm = pytest.importorskip("statsmodels.api")
    from statsmodels.tsa.stattools import acovf

    from voxelscope.core.noise import design_bias_matrix

    _a, d, Y = _one_pass_case()
    prep = glm.prepare(d.X)
    s = glm.arp_block_sums(prep, Y.astype(np.float32))
    M = design_bias_matrix(prep, s.lags)
    for v in (0, 7, 41):
        y = Y[:, v].astype(np.float32).astype(np.float64)
        r = sm.OLS(y, d.X).fit().resid
        ref = acovf(r, adjusted=False, demean=False, fft=False, nlag=s.lags)[: s.lags + 1] * T
        np.testing.assert_allclose(M @ s.v[:, v], ref, rtol=1e-9, atol=1e-9 * ref[0])


def test_one_pass_lagged_sums_equal_dense_products_with_a_confound():
    """The sums Xs' S_d y of the stacked product: the cosine drift columns and the constant
    are closed under the symmetric shifts away from the ends (cos(w(t-d)) + cos(w(t+d)) =
    2 cos(wd) cos(wt), a trigonometric identity), so they come from Xs'y and the first and
    last samples; the task and confound columns from their own shifted rows. Both equal
    the products with dense shift matrices (numpy, np.eye(n, k=d))."""
    from voxelscope.core.confounds import Confounds
    from voxelscope.core.noise import _design_lags

    rng = np.random.default_rng(8)
    a = _analysis()
    conf = Confounds(("motion_x",), rng.standard_normal((T, 1)))
    a = Analysis(a.conditions, T, TR, confounds=conf)
    d = a.design(KERNEL, ModelSettings(confound_columns=("motion_x",)))
    prep = glm.prepare(d.X)
    _a, _d, Y = _one_pass_case(n_vox=30)
    s = glm.arp_block_sums(prep, Y, 3)
    D = _design_lags(prep, 3)
    names = np.array(d.names)
    assert "motion_x" in names and "tone" in names
    assert {n for n in names[D["closed"]]} == {n for n in names if n.startswith("drift")} | {
        "constant"
    }
    Yc = glm.working_copy(prep, Y)[0]
    Xs = d.X / np.linalg.norm(d.X, axis=0)
    for k in range(4):
        S = np.eye(T) if k == 0 else np.eye(T, k=k) + np.eye(T, k=-k)
        np.testing.assert_allclose(s.H[k], Xs.T @ S @ Yc, rtol=1e-12, atol=1e-12 * abs(Yc).max())


def test_implied_autocovariances_equal_the_full_sequence():
    """_implied stops each voxel's AR autocorrelation sequence where it has decayed below
    a tolerance: F @ g equals the product with the whole sequence of statsmodels'
    arma_acf, for voxels that decay at very different speeds computed together, to 1e-12
    with the tolerance 1e-13 and to 1e-9 of the lag-0 value with the default
    (IMPLIED_TOL, what the estimate uses)."""
    from voxelscope.core.noise import IMPLIED_TOL, _implied, _stationary_rho

    n = 200
    X = np.column_stack([np.ones(n), np.linspace(-1, 1, n)])
    F = full_bias_matrix(X, 2)
    phi = np.array([[0.01, 0.5, 1.6, -0.3, 0.9, 0.7], [0.0, 0.2, -0.8, 0.1, 0.05, 0.0]])
    rho = _stationary_rho(phi, np.zeros_like(phi))
    fine = _implied(phi, rho, F, tol=1e-13)
    got = _implied(phi, rho, F)
    assert IMPLIED_TOL <= 1e-10
    for v in range(phi.shape[1]):
        ref = F @ arma_acf(np.r_[1, -phi[:, v]], [1], n)
        np.testing.assert_allclose(fine[:, v], ref, rtol=1e-12, atol=1e-12)
        np.testing.assert_allclose(got[:, v], ref, rtol=0, atol=1e-9 * abs(ref[0]))


def test_early_correction_steps_need_no_more_than_the_early_tolerance(monkeypatch):
    """The defect correction's steps before its last stop the recursion at EARLY_TOL: the
    AR estimate stays within 1e-8 of the one with every step at 1e-13 (statsmodels'
    arma_acf is the reference for the recursion itself, in the test above), on AR(2)
    processes with coefficients across the stationary region; at a tolerance of 1e-3
    the same comparison moves by more (so the check can fail)."""
    from voxelscope.core import noise

    n = 200
    X = np.column_stack([np.ones(n), np.linspace(-1, 1, n), np.sin(np.arange(n) / 7.0)])
    prep = glm.prepare(X)
    rng = np.random.default_rng(23)
    V = 400
    phi = np.vstack([rng.uniform(-0.4, 0.9, V), rng.uniform(-0.3, 0.3, V)])
    phi[0] = np.minimum(phi[0], 0.97 - phi[1])  # stationary: phi1 + phi2 < 1
    rho = noise._stationary_rho(phi, np.zeros_like(phi))
    F = noise.full_bias_matrix(X, 2)
    values = noise._implied(phi, rho, F, tol=1e-13)
    values = noise._inverse(noise.bias_matrix(X, 2)) @ values  # corrected like data

    def estimate(early: float) -> np.ndarray:
        monkeypatch.setattr(noise, "EARLY_TOL", early)
        monkeypatch.setattr(noise, "IMPLIED_TOL", min(early, noise.IMPLIED_TOL))
        return noise.ar_from_smoothed(values, 2, prep)[0]

    fine = estimate(1e-13)
    monkeypatch.undo()
    assert noise.EARLY_TOL >= 1e-8  # a real saving over the last step's tolerance
    got = noise.ar_from_smoothed(values, 2, prep)[0]
    np.testing.assert_allclose(got, fine, rtol=0, atol=1e-8)
    monkeypatch.setattr(noise, "EARLY_TOL", 1e-3)
    assert np.abs(noise.ar_from_smoothed(values, 2, prep)[0] - fine).max() > 1e-6


@pytest.mark.parametrize("piece", [2048, 7])
@pytest.mark.parametrize("order", [1, 2, 3])
def test_one_pass_gls_equals_statsmodels_gls_for_many_voxels(order, piece, monkeypatch):
    """fit_sums (the map's path: batched Cholesky over > 64 voxels, no data; in pieces of
    7 voxels, the last one shorter, as well as in one piece) and fit (with the data) both
    equal statsmodels GLS with sigma = the Toeplitz AR(p) correlation (arma_acf) of each
    voxel's own coefficients, at every sampled voxel."""
    from voxelscope.core import noise

    monkeypatch.setattr(noise, "SOLVE_PIECE", piece)
    sm = pytest.importorskip("statsmodels.api")
    a, d, Y = _one_pass_case(n_vox=100, seed=order)
    w = a.contrast_weights(KERNEL, ModelSettings())
    rng = np.random.default_rng(order)
    rho = np.vstack([rng.uniform(-0.2, 0.8, 100), rng.uniform(-0.2, 0.3, 100),
                     rng.uniform(-0.1, 0.1, 100)])[:order]  # fmt: skip
    phi = ar_from_autocorr(rho, order)
    prep = glm.prepare(d.X)
    from voxelscope.core.noise import AR_ORDER, BIAS_LAGS

    s = glm.arp_block_sums(prep, Y, max(order, AR_ORDER, BIAS_LAGS))
    many = glm.fit_sums(prep, s, w, phi)
    contrast_only = glm.fit_sums(prep, s, w, phi, betas=False)  # what a map asks for
    assert contrast_only.betas is None
    direct = glm.fit(prep, Y, w, noise="arp", ar=phi, keep_series=False)
    for v in (0, 13, 77, 99):
        Sigma = toeplitz(arma_acf(np.r_[1, -phi[:, v]], [1], T))
        tt = sm.GLS(Y[:, v], d.X, sigma=Sigma).fit().t_test(w)
        for res in (many, contrast_only, direct):
            assert float(res.estimate[v]) == pytest.approx(float(np.squeeze(tt.effect)), rel=1e-9)
            assert float(res.variance[v]) == pytest.approx(float(np.squeeze(tt.sd)) ** 2, rel=1e-8)
            assert float(res.t[v]) == pytest.approx(float(np.squeeze(tt.tvalue)), rel=1e-8)


@pytest.mark.parametrize("piece", [8192, 7])
@pytest.mark.parametrize("betas", [True, False])
def test_one_pass_near_exact_fits_use_explicit_residuals(betas, piece, monkeypatch):
    """A voxel that the design fits almost exactly (1 - R^2 ~ 1e-14): the difference
    y*'y* - b'X*'y* would cancel, so fit_sums asks for the voxel's series and whitens its
    residuals; the variance equals statsmodels GLS to 1e-6 (its own rounding). In parts of
    7 voxels the voxel (index 10) sits in the second part: the part asks for it by its
    index in the whole set, for the OLS autocovariances and for the whitened fit."""
    from voxelscope.core import noise

    monkeypatch.setattr(noise, "SOLVE_PIECE", piece)
    sm = pytest.importorskip("statsmodels.api")
    from statsmodels.tsa.stattools import acovf

    a, d, Y = _one_pass_case(n_vox=70)
    w = a.contrast_weights(KERNEL, ModelSettings())
    Y[:, 10] = d.X @ np.arange(1.0, d.X.shape[1] + 1) + 1e-6 * Y[:, 4]
    prep = glm.prepare(d.X)
    phi = np.tile([[0.4], [0.1]], (1, 70))
    Yc = glm.working_copy(prep, Y)[0]
    asked = []

    def series(idx):
        asked.extend(idx.tolist())
        return Yc[:, idx]

    sums = glm.arp_block_sums(prep, Y, autocov=False)
    noise.arp_autocov(prep, sums, series)
    assert asked == [10]  # the OLS residual autocovariances: explicit residuals
    r = sm.OLS(Y[:, 10], d.X).fit().resid
    ref = acovf(r, adjusted=False, demean=False, fft=False, nlag=sums.lags)[: sums.lags + 1] * T
    M = noise.design_bias_matrix(prep, sums.lags)
    np.testing.assert_allclose(M @ sums.v[:, 10], ref, rtol=1e-6, atol=1e-6 * ref[0])
    asked.clear()
    res = glm.fit_sums(prep, sums, w, phi, series=series, betas=betas)
    assert 10 in asked and len(asked) < 5
    Sigma = toeplitz(arma_acf([1, -0.4, -0.1], [1], T))
    tt = sm.GLS(Y[:, 10], d.X, sigma=Sigma).fit().t_test(w)
    assert float(res.variance[10]) == pytest.approx(float(np.squeeze(tt.sd)) ** 2, rel=1e-6)


def test_batched_cholesky_solve_equals_numpy():
    """The voxels-last Cholesky solve equals numpy.linalg.solve matrix by matrix."""
    from voxelscope.core.noise import _spd_solve

    rng = np.random.default_rng(3)
    A = rng.standard_normal((50, 9, 30))
    G = np.einsum("vik,vjk->ijv", A, A)
    rhs = rng.standard_normal((9, 2, 50))
    x = _spd_solve(G, rhs)
    for v in (0, 17, 49):
        np.testing.assert_allclose(x[:, :, v], np.linalg.solve(G[:, :, v], rhs[:, :, v]),
                                   rtol=1e-10, atol=1e-12)  # fmt: skip


def _null_run(seed, shape=(9, 8, 6), phi=(0.45, 0.15)):
    rng = np.random.default_rng(seed)
    e = rng.standard_normal((*shape, T + 100))
    x = np.zeros_like(e)
    for t in range(e.shape[-1]):
        x[..., t] = e[..., t]
        if t >= 1:
            x[..., t] += phi[0] * x[..., t - 1]
        if t >= 2:
            x[..., t] += phi[1] * x[..., t - 2]
    data = 1000 + rng.normal(0, 30, shape)[..., None] + 5 * x[..., 100:]
    data[0, 0, 0] = 1000.0  # a constant voxel
    return ArrayRun(data.astype(np.float32), np.diag([3.0, 3.0, 3.0, 1.0]), TR)


def test_map_equals_statsmodels_gls_with_the_fitted_covariance_at_sampled_voxels():
    """At sampled voxels: beta, its standard error, t and df of the map equal
    statsmodels GLS with sigma = the Toeplitz AR(2) correlation of the voxel's own fitted
    coefficients (arma_acf)."""
    sm = pytest.importorskip("statsmodels.api")
    run = _null_run(1)
    a = _analysis()
    s = ModelSettings(kernels=(KERNEL,), contrast="tone - tap")
    m = compute_map(run, a, s, stats=("t", "estimate", "variance"))
    d = a.design(KERNEL, s)
    w = a.contrast_weights(KERNEL, s)
    rng = np.random.default_rng(99)
    for ijk in [tuple(rng.integers(0, n) for n in run.shape) for _ in range(6)]:
        if not m.mask[ijk]:
            continue
        phi = m.ar[ijk].astype(np.float64)
        y = run.data[ijk].astype(np.float64)
        # the map keeps float32 AR coefficients; refit the voxel with exactly those
        res = glm.fit(d, y, w, noise="arp", ar=phi)
        Sigma = toeplitz(arma_acf(np.r_[1, -phi], [1], T))
        ref = sm.GLS(y, d.X, sigma=Sigma).fit()
        tt = ref.t_test(w)
        assert float(res.estimate[0]) == pytest.approx(float(np.squeeze(tt.effect)), rel=1e-9)
        assert float(res.variance[0]) == pytest.approx(float(np.squeeze(tt.sd)) ** 2, rel=1e-8)
        assert float(res.t[0]) == pytest.approx(float(np.squeeze(tt.tvalue)), rel=1e-8)
        assert res.df == int(ref.df_resid)
        assert float(m.t[ijk]) == pytest.approx(float(res.t[0]), rel=2e-5)


def test_clicked_voxel_uses_the_maps_whitening():
    """One fitting path: a clicked voxel's coefficients come from its neighbourhood and
    equal the map's; its t equals the map's t (float32 map)."""
    run = _null_run(2)
    a = _analysis()
    s = ModelSettings(kernels=("gamma", KERNEL))
    m = compute_map(run, a, s, KERNEL, stats=("t",))
    for ijk in [(4, 4, 3), (0, 7, 5), (8, 0, 0)]:
        est = a.noise_at(run, ijk, s)
        assert set(est) == {"gamma", KERNEL}
        np.testing.assert_allclose(est[KERNEL].phi, m.ar[ijk], rtol=1e-5, atol=1e-6)
        # every kernel shares one read of the box: the same as reading it for each
        alone = voxel_ar(run, a.prepared("gamma", s)[1], ijk)
        np.testing.assert_array_equal(est["gamma"].phi, alone.phi)
        assert est["gamma"].n_neighbours == alone.n_neighbours
        vf = a.fit_voxel(run.data[ijk], s, est)
        f = vf.by_kernel(KERNEL)
        assert f.t == pytest.approx(float(m.t[ijk]), rel=1e-5, abs=1e-6)
        assert "mask voxels" in f.noise_text and not vf.warnings
    # without a neighbourhood: the voxel's own estimate, and a warning that says so
    vf = a.fit_voxel(run.data[4, 4, 3], s)
    assert any("this voxel alone" in w for w in vf.warnings)


def test_arp_maps_equal_across_blocks_and_workers():
    run = _null_run(3)
    a = _analysis()
    s = ModelSettings(kernels=(KERNEL,))
    first = compute_map(run, a, s, chunk_voxels=1024, workers=1)
    for block, workers in ((7, 2), (100, 1)):
        m = compute_map(run, a, s, chunk_voxels=block, workers=workers)
        np.testing.assert_allclose(m.t, first.t, rtol=1e-6, atol=1e-7)
        np.testing.assert_allclose(m.ar, first.ar, rtol=1e-6, atol=1e-7)
    assert first.t[0, 0, 0] == 0 and not first.mask[0, 0, 0]  # the constant voxel
    assert np.all(np.isfinite(first.t)) and "AR(p)" in first.describe()


def test_checks_judge_the_arp_whitened_residuals_with_ljung_box():
    """Under the default model the Ljung-Box test is on the AR(p)-whitened residuals,
    whitened here independently with the Cholesky factor of statsmodels' AR covariance
    (scale does not matter to Ljung-Box): equal to acorr_ljungbox (lags=10)."""
    run = _null_run(4)
    a = _analysis()
    s = ModelSettings(kernels=(KERNEL,))
    ijk = (4, 3, 2)
    y = run.data[ijk].astype(np.float64)
    phi = voxel_ar(run, a.prepared(KERNEL, s)[1], ijk).phi
    c = voxel_checks(a, s, KERNEL, y, ar=phi)
    res = glm.fit(a.design(KERNEL, s), y, a.contrast_weights(KERNEL, s), noise="arp", ar=phi)
    L = np.linalg.cholesky(toeplitz(arma_acf(np.r_[1, -phi], [1], T)))
    rw = np.linalg.solve(L, res.residuals[:, 0])
    lb = acorr_ljungbox(rw, lags=[10])
    assert c.whitened_ljung_box_p == pytest.approx(float(lb["lb_pvalue"].iloc[0]), rel=1e-6)
    assert c.t == pytest.approx(float(res.t[0]), rel=1e-12)


def test_smoothing_over_the_valid_box_equals_scipy_over_the_whole_grid():
    """Reference: scipy.ndimage.correlate1d over the whole grid (normalised convolution,
    common practice); the box around the valid voxels must give the same numbers."""
    from scipy import ndimage

    rng = np.random.default_rng(3)
    shape = (23, 19, 17)
    weights = tuple(
        np.exp(-0.5 * (np.arange(-r, r + 1) / s) ** 2) for r, s in ((3, 1.5), (2, 1.0), (4, 2.0))
    )
    for valid in (
        np.zeros(shape, bool),  # nothing valid
        rng.random(shape) < 0.3,  # scattered over the grid
    ):
        plane = np.zeros(shape, bool)
        plane[:, :, 2] = valid[:, :, 2]  # one plane near the edge, as the window's preview
        for ok in (valid, plane):
            values = rng.normal(size=(*shape, 3))
            num = values * ok[..., None]
            den = ok.astype(float)
            for axis, w in enumerate(weights):
                num = ndimage.correlate1d(num, w, axis=axis, mode="constant")
                den = ndimage.correlate1d(den, w, axis=axis, mode="constant")
            want = np.where(den[..., None] > 0, num / np.where(den > 0, den, 1)[..., None], 0)
            got, got_den = smooth_in_mask(values, ok, weights)
            np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-15)
            np.testing.assert_allclose(got_den, den, rtol=1e-12, atol=1e-15)


def test_bad_and_degenerate_inputs():
    a = _analysis()
    d = a.design(KERNEL, ModelSettings())
    w = a.contrast_weights(KERNEL, ModelSettings())
    with pytest.raises(InputError, match="ar has"):
        glm.fit(d, np.ones((T, 3)), w, noise="arp", ar=np.zeros((2, 2)))
    with pytest.raises(InputError, match="noise model must be one of"):
        glm.fit(d, np.ones(T), w, noise="ar2")
    res = glm.fit(d, np.full(T, 7.0), w, noise="arp")  # constant: NaN t, never inf
    assert res.degenerate[0] and np.isnan(res.t[0])
    # a voxel whose neighbourhood holds no usable voxel gets white noise, and says so
    data = np.full((3, 3, 3, T), 100.0, dtype=np.float32)
    data[1, 1, 1] += np.random.default_rng(0).standard_normal(T).astype(np.float32)
    run = ArrayRun(data, np.eye(4), TR)
    alone = np.zeros((3, 3, 3), dtype=bool)
    alone[0, 0, 0] = True  # a mask of one constant voxel
    est = voxel_ar(run, a.prepared(KERNEL, ModelSettings())[1], (0, 0, 0), mask=alone)
    assert est.n_neighbours == 0 and np.all(est.phi == 0)


@pytest.mark.slow
@pytest.mark.parametrize(
    ("noise", "design"), [("ar1-varying", "block"), ("ar2", "block"), ("ar2", "event")]
)
def test_null_false_positive_rate_is_nominal(noise, design):
    """A small calibration (tests/benchmarks/calibration.py has the full one): on null runs
    the default model's rate at p < .05 lies in the 99 % binomial interval around .05
    (scipy.stats.binomtest), while OLS is far above it for block designs."""
    rates = calibration.false_positive_rates(
        noise, design, models=("ols", "arp"), shape=(20, 20, 10), reps=2, seed=7
    )
    r = rates["arp"][0]
    ci = stats.binomtest(round(0.05 * r.n), r.n, 0.05).proportion_ci(0.99)
    assert ci.low <= r.rate <= ci.high, (r.rate, ci)
    if design == "block":
        assert rates["ols"][0].rate > 0.1


# ----------------------------------------------------------------------------- censored volumes


def _censored_case(seed, n_vox=40):
    """A run with random leading drops and random censored volumes inside it (through the
    framewise displacement column of a confounds table), AR(2) null data."""
    from voxelscope.core.confounds import Confounds

    rng = np.random.default_rng(seed)
    fd = rng.uniform(0.0, 0.4, T)
    fd[rng.choice(np.arange(8, T - 3), size=rng.integers(3, 15), replace=False)] = 2.0
    fd[-1] = 2.0 if seed % 2 else fd[-1]  # sometimes the last volume too
    on = np.arange(10.0, T * TR - 30, 40.0)
    conds = [Condition("tone", on[::2], [16.0] * on[::2].size),
             Condition("tap", on[1::2], [16.0] * on[1::2].size)]  # fmt: skip
    a = Analysis(conds, T, TR, Confounds(("framewise_displacement",), fd[:, None], "c.tsv"))
    s = ModelSettings(kernels=(KERNEL,), contrast="tone - tap", censor_fd_mm=1.0,
                      drop_volumes=int(rng.integers(0, 4)))  # fmt: skip
    e = rng.standard_normal((n_vox, T + 100))
    x = np.zeros_like(e)
    for t in range(2, e.shape[1]):
        x[:, t] = 0.5 * x[:, t - 1] + 0.2 * x[:, t - 2] + e[:, t]
    Y = (500.0 + 5.0 * x[:, 100:]).T
    Y[~a.keep_mask(s)] += 300.0 * rng.standard_normal((int((~a.keep_mask(s)).sum()), n_vox))
    return a, s, Y


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_censored_volumes_inside_the_run_are_exact(seed):
    """Volumes censored inside the run: the AR(p) fit equals statsmodels GLS on the kept
    volumes alone, with sigma = the kept rows and columns of the Toeplitz AR(2) covariance
    of the whole run (arma_acovf with unit innovations: the exact likelihood of the
    observed volumes). beta, its variance, t, df and the residual variance agree; the
    one-pass sums (the map's path) agree with the fit of the data (the clicked voxel's)."""
    sm = pytest.importorskip("statsmodels.api")
    from statsmodels.tsa.arima_process import arma_acovf

    a, s, Y = _censored_case(seed)
    d, prep = a.prepared(KERNEL, s)
    keep = a.keep_mask(s)
    kept = np.flatnonzero(keep)
    assert np.diff(kept).max() > 1  # there are gaps inside the run
    w = a.contrast_weights(KERNEL, s)
    rng = np.random.default_rng(seed + 10)
    phi = np.vstack([rng.uniform(0.1, 0.7, Y.shape[1]), rng.uniform(-0.2, 0.25, Y.shape[1])])
    direct = glm.fit(prep, Y, w, noise="arp", ar=phi)
    cp = glm.censored_design(prep)
    sums = glm.arp_block_sums(cp, Y)
    many = glm.fit_sums(cp, sums, w, phi)
    assert direct.df == many.df == kept.size - d.X.shape[1]
    assert direct.betas.shape[0] == d.X.shape[1] and np.array_equal(direct.keep, keep)
    for v in (0, 7, 23, 39):
        full = toeplitz(arma_acovf(np.r_[1, -phi[:, v]], [1], nobs=T, sigma2=1.0))
        ref = sm.GLS(Y[kept, v], d.X[kept], sigma=full[np.ix_(kept, kept)]).fit()
        tt = ref.t_test(w)
        assert direct.df == int(ref.df_resid)
        np.testing.assert_allclose(direct.betas[:, v], ref.params, rtol=1e-8, atol=1e-8)
        assert float(direct.sigma2[v]) == pytest.approx(float(ref.scale), rel=1e-8)
        for res in (direct, many):
            assert float(res.estimate[v]) == pytest.approx(float(np.squeeze(tt.effect)), rel=1e-8)
            assert float(res.variance[v]) == pytest.approx(float(np.squeeze(tt.sd)) ** 2, rel=1e-8)
            assert float(res.t[v]) == pytest.approx(float(np.squeeze(tt.tvalue)), rel=1e-8)


def test_censored_map_and_clicked_voxel_agree_and_say_nothing_approximate():
    """With censored volumes inside the run, the map (one pass) and a clicked voxel give
    the same coefficients and t, and no warning speaks of an approximation any more."""
    a, s, Y = _censored_case(5, n_vox=6 * 6 * 4)
    run = ArrayRun(Y.T.reshape(6, 6, 4, T).astype(np.float32), np.diag([3.0, 3.0, 3.0, 1.0]), TR)
    m = compute_map(run, a, s, stats=("t",))
    assert "approximat" not in m.describe()
    for ijk in [(0, 0, 0), (3, 2, 1), (5, 5, 3)]:
        est = a.noise_at(run, ijk, s)
        np.testing.assert_allclose(est[KERNEL].phi, m.ar[ijk], rtol=1e-5, atol=1e-6)
        vf = a.fit_voxel(run.data[ijk], s, est)
        assert vf.by_kernel(KERNEL).t == pytest.approx(float(m.t[ijk]), rel=1e-5, abs=1e-6)
        assert not any("approximat" in w for w in vf.warnings)


# ----------------------------------------------------------------------------- effective df


def test_rho_df_tends_to_the_published_formula_for_wide_kernels(monkeypatch):
    """rho_df on the voxel grid against the continuum formula of Worsley et al. (2002,
    from memory) nu (2 (f_rho / f_data)^2 + 1)^(3/2), for kernels many voxels wide (the
    discrete sums tend to the integrals), and the number of voxels averaged,
    (sum w)^2 / sum w^2 per axis, for independent voxels (a published identity for a
    weighted mean of independent values)."""
    from voxelscope.core import noise
    from voxelscope.core.noise import rho_df, smoothing_weights

    truncated = [rho_df(100, (0.25, 0.25, 0.25), f, fwhm_mm=8.0) for f in (4.0, 8.0, 12.0)]
    monkeypatch.setattr(noise, "TRUNCATE_SIGMA", 6.0)  # the untruncated Gaussian
    for f_data, cut in zip((4.0, 8.0, 12.0), truncated):
        got = rho_df(100, (0.25, 0.25, 0.25), f_data, fwhm_mm=8.0)
        ref = 100 * (2 * (8.0 / f_data) ** 2 + 1) ** 1.5
        assert got == pytest.approx(ref, rel=0.01)
        assert cut < got  # the kernel as used (2 sigma) averages fewer voxels
    monkeypatch.undo()
    w = smoothing_weights((3.0, 3.0, 4.0), 8.0)
    count = np.prod([w_.sum() ** 2 / (w_**2).sum() for w_ in w])
    assert rho_df(50, (3.0, 3.0, 4.0), 0.0, 8.0) == pytest.approx(50 * count, rel=1e-12)


def test_smoothness_estimate_finds_a_known_gaussian_smoothing():
    """White noise smoothed with a Gaussian of known FWHM (scipy.ndimage.gaussian_filter;
    FWHM = 2 sqrt(2 ln 2) sigma, a published identity) is found within 5 %."""
    from scipy import ndimage

    from voxelscope.core.noise import smoothness_fwhm

    e = np.random.default_rng(3).standard_normal((30, 30, 20, 30))
    sig = (1.5, 2.0, 1.2)
    x = ndimage.gaussian_filter(e, (*sig, 0.0), mode="wrap")
    got = smoothness_fwhm(x, np.ones(x.shape[:3], bool), (2.0, 2.0, 3.0))
    want = [2.0 * np.sqrt(2.0 * np.log(2.0)) * s * v for s, v in zip(sig, (2.0, 2.0, 3.0))]
    np.testing.assert_allclose(got, want, rtol=0.05)


def test_contrast_autocorr_equals_dense_whitening():
    """tau_j of the whitened contrast weights, against the whitening done here with the
    inverse Cholesky factor of statsmodels' AR covariance (arma_acf), dense."""
    from voxelscope.core.noise import contrast_autocorr

    a = _analysis()
    d, prep = a.prepared(KERNEL, ModelSettings())
    w = a.contrast_weights(KERNEL, ModelSettings())
    phi = np.array([[0.5, 0.1], [0.2, -0.05]])
    tau = contrast_autocorr(prep, phi, w, lags=5)
    for v in range(2):
        L = np.linalg.cholesky(toeplitz(arma_acf(np.r_[1, -phi[:, v]], [1], T)))
        Xw = np.linalg.solve(L, d.X)
        av = Xw @ np.linalg.solve(Xw.T @ Xw, w)
        ref = [av[j:] @ av[: T - j] / (av @ av) for j in range(1, 6)]
        np.testing.assert_allclose(tau[:, v], ref, rtol=1e-9, atol=1e-12)


@pytest.mark.slow
def test_recalled_effective_df_overcorrects_with_a_known_pooling():
    """The check by simulation of the effective df as recalled (the module text of
    noise.py): null AR(2) series of a block design, each voxel's AR coefficients from the
    bias-corrected autocovariances averaged over K = 4 independent voxels (so nu_rho is
    nu K exactly, by construction). The rate of |t| beyond the t(n - rank) critical value
    is inside the 99 % binomial interval around .05 (scipy.stats.binomtest), while the
    effective df of the recalled formula puts it far below: it over-corrects."""
    from voxelscope.core.noise import (
        AR_ORDER,
        BIAS_LAGS,
        ar_from_smoothed,
        contrast_autocorr,
        effective_df,
    )

    n, K, reps = 200, 4, 24000
    rng = np.random.default_rng(11)
    a = Analysis(calibration.design("block", n, rng), n_volumes=n, tr=TR)
    _d, prep = a.prepared(KERNEL, ModelSettings(kernels=(KERNEL,)))
    w = a.contrast_weights(KERNEL, ModelSettings(kernels=(KERNEL,)))
    nu = prep.df
    ts, taus = [], []
    for _ in range(reps // 4000):
        e = rng.standard_normal((n + 100, 4000 * K))
        x = np.zeros_like(e)
        for t in range(e.shape[0]):
            x[t] = e[t] + (0.5 * x[t - 1] if t else 0) + (0.2 * x[t - 2] if t > 1 else 0)
        s = glm.arp_block_sums(prep, x[100:], max(AR_ORDER, BIAS_LAGS))
        phi = ar_from_smoothed(s.v.reshape(s.v.shape[0], 4000, K).mean(axis=2), AR_ORDER, prep)[0]
        ts.append(glm.fit_sums(prep, s.take(np.arange(4000) * K), w, phi).t)
        taus.append(contrast_autocorr(prep, phi[:, ::100], w))
    t = np.concatenate(ts)
    nu_eff = float(np.median(effective_df(nu, np.concatenate(taus, axis=1), nu * K)))
    ci = stats.binomtest(round(0.05 * t.size), t.size, 0.05).proportion_ci(0.99)
    plain = float(np.mean(np.abs(t) > stats.t.isf(0.025, nu)))
    recalled = float(np.mean(np.abs(t) > stats.t.isf(0.025, nu_eff)))
    assert ci.low <= plain <= ci.high, (plain, ci)
    assert recalled < ci.low, (recalled, nu_eff)


def test_tau_squares_from_the_sums_equal_the_dense_autocorrelations():
    """tau_squares (the map's route: X*'X* from the one-pass design sums) equals the sum of
    squares of contrast_autocorr (checked above against statsmodels' AR covariance)."""
    from voxelscope.core.noise import contrast_autocorr, tau_squares

    a = _analysis()
    _d, prep = a.prepared(KERNEL, ModelSettings())
    w = a.contrast_weights(KERNEL, ModelSettings())
    rng = np.random.default_rng(5)
    phi = np.vstack([rng.uniform(0.0, 0.8, 30), rng.uniform(-0.2, 0.2, 30)])
    ref = (contrast_autocorr(prep, phi, w) ** 2).sum(axis=0)
    np.testing.assert_allclose(tau_squares(prep, phi, w, step=0), ref, rtol=1e-9)
    # the map's default reads phi rounded to TAU_STEP: the effective df moves < 0.1 %
    from voxelscope.core.noise import effective_df

    nu = prep.df
    for nu_rho in (nu * 3.0, nu * 60.0):
        exact = effective_df(nu, np.sqrt(ref)[None], nu_rho)
        rounded = effective_df(nu, np.sqrt(tau_squares(prep, phi, w))[None], nu_rho)
        np.testing.assert_allclose(rounded, exact, rtol=1e-3)


def test_one_tau_table_for_a_map_reads_what_each_voxel_gets_alone(monkeypatch):
    """A map's table of sum tau^2 (one grid for all its voxels, its points in batches that
    may run side by side) gives each voxel what tau_squares gives it alone, as a clicked
    voxel computes it; the sorted index of a wide box equals the dense one; and grid
    points beyond the stationary region fall back to the exact sum (contrast_autocorr,
    checked above against statsmodels' AR covariance)."""
    from voxelscope.core import noise
    from voxelscope.core.noise import TauTable, contrast_autocorr, tau_squares

    a = _analysis()
    _d, prep = a.prepared(KERNEL, ModelSettings())
    w = a.contrast_weights(KERNEL, ModelSettings())
    rng = np.random.default_rng(7)
    phi = np.vstack([rng.uniform(0.0, 0.7, 300), rng.uniform(-0.05, 0.05, 300)])
    batches: list[int] = []

    def parallel(fn, items):
        batches.append(len(items))
        return [fn(i) for i in reversed(items)][::-1]  # any order of the batches

    table = TauTable.build(prep, phi, w, parallel=parallel)
    assert batches and table.nodes.shape[1] < 4 * phi.shape[1]
    alone = np.array([tau_squares(prep, phi[:, [v]], w)[0] for v in range(0, 300, 7)])
    np.testing.assert_allclose(table.at(phi[:, ::7]), alone, rtol=1e-12)
    monkeypatch.setattr(noise, "_dense_limit", lambda _v: 0)  # index by sorting instead
    wide = TauTable.build(prep, phi, w)
    assert wide.slot is None
    np.testing.assert_allclose(wide.at(phi), table.at(phi), rtol=1e-12)
    # an AR(1) coefficient at the edge of the stationary region: the grid point 1.0 above
    # it is no stationary process (NaN), so that voxel is computed exactly
    edge = np.array([[0.995, 0.5]])
    exact = (contrast_autocorr(prep, edge, w) ** 2).sum(axis=0)
    np.testing.assert_allclose(tau_squares(prep, edge, w), exact, rtol=1e-3)
    np.testing.assert_allclose(tau_squares(prep, edge, w)[0], exact[0], rtol=1e-9)


def test_map_and_clicked_voxel_share_the_effective_df():
    """The default map reads each voxel's t with its effective df: p equals scipy's
    t distribution (stats.t.sf) at that df; a clicked voxel gets the same df and p, and
    its outputs name the df as effective; inside the mask the df lies between 1 and
    n - rank, and is lower at the edge of the mask (fewer neighbours averaged)."""
    from voxelscope.core.model import DF_EFFECTIVE

    run = _null_run(6)
    a = _analysis()
    s = ModelSettings(kernels=(KERNEL,))
    m = compute_map(run, a, s, stats=("t", "p", "z"))
    d = m.df_eff[m.mask].astype(np.float64)
    assert np.all((d > 1) & (d < m.df)) and "effective df" in m.describe()
    t = m.t[m.mask].astype(np.float64)
    np.testing.assert_allclose(m.p[m.mask], 2 * stats.t.sf(np.abs(t), d), rtol=1e-5, atol=1e-7)
    np.testing.assert_allclose(m.z[m.mask], stats.norm.isf(stats.t.sf(t, d)), rtol=1e-4, atol=1e-5)
    centre = tuple(n // 2 for n in run.shape)
    assert m.df_eff[0, 1, 1] < m.df_eff[centre]  # a corner region keeps fewer neighbours
    for ijk in [(4, 4, 3), (0, 7, 5), centre]:
        est = a.noise_at(run, ijk, s)
        f = a.fit_voxel(run.data[ijk], s, est).by_kernel(KERNEL)
        assert f.df == pytest.approx(float(m.df_eff[ijk]), abs=0.06)
        assert f.p == pytest.approx(float(m.p[ijk]), rel=1e-4)
        assert f.df_kind == DF_EFFECTIVE
    # without a neighbourhood there is no nu_rho: n - rank, and it says so
    f = a.fit_voxel(run.data[4, 4, 3], s).by_kernel(KERNEL)
    assert f.df == m.df and f.df_kind == "n - rank"


def test_smoothness_sample_is_read_once_for_every_design():
    """Issue 18: a fit's kernels share one read of the run's smoothness sample (the
    seeded pairs of neighbours), and each design's smoothness equals the one computed
    from a fresh run object that reads it again: the numbers do not change."""
    from voxelscope.core.events import Condition
    from voxelscope.core.maps import ArrayRun
    from voxelscope.core.model import Analysis, ModelSettings
    from voxelscope.core.noise import run_smoothness

    class CountedRun(ArrayRun):
        def __init__(self, data):
            super().__init__(data, np.diag([3.0, 3.0, 3.5, 1.0]))
            self.reads = 0

        def timeseries_many(self, idx):
            self.reads += 1
            return self.data.reshape(-1, self.n_volumes)[idx]

    rng = np.random.default_rng(11)
    e = rng.standard_normal((10, 9, 8, 80))
    e[1:] += 0.6 * e[:-1]  # some smoothness along x
    data = (1000 + e).astype(np.float32)
    a = Analysis([Condition("x", [10.0, 70.0, 130.0], [20.0] * 3)], n_volumes=80, tr=2.0)
    s = ModelSettings()
    preps = [a.prepared(k, s)[1] for k in ("boxcar", "gamma", "double-gamma")]
    run = CountedRun(data)
    mask = run.mask()
    shared = [run_smoothness(run, p, mask) for p in preps]
    assert run.reads == 3  # one read per axis, for all three designs
    for p, got in zip(preps, shared):
        fresh = CountedRun(data)
        assert run_smoothness(fresh, p, mask) == got and fresh.reads == 3
    assert shared[0][0] > max(shared[0][1], shared[0][2])  # smoother along x, as planted


# ------------------------------------------------ the run's smoothness, kept beside the cache
#
# Issue 18: a cached run keeps each design's smoothness beside its entry. These tests hold
# the cache's promise for it: the kept value is the computed one bit for bit, and anything
# it depends on (design, mask, estimator version) changed, or the file damaged, means it is
# computed again, never served.

#: Digest of the smoothness estimator's code (docstrings, comments and layout left out) for
#: each ``noise.SMOOTHNESS_VERSION``. When the test below fails, the code changed: raise
#: SMOOTHNESS_VERSION in voxelscope/core/noise.py (results kept by the old code would
#: otherwise be served) and add the new version's digest here.
SMOOTHNESS_CODE_DIGESTS = {
    1: "3114aa52343e386afd0f28164fa15d7cbff3678c4b412e0ed3ba9d715dce19e4",
}


def _code_digest() -> str:
    """SHA-256 of the syntax trees of the functions whose results the version vouches for."""
    import ast
    import hashlib
    import inspect
    import textwrap

    from voxelscope.core import noise, workcopy

    def dump(node) -> str:
        if isinstance(node, list):
            return "[" + ",".join(dump(v) for v in node) + "]"
        if not isinstance(node, ast.AST):
            return repr(node)
        body = getattr(node, "body", None)
        if (
            isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef, ast.Module))
            and body
            and isinstance(body[0], ast.Expr)
            and isinstance(body[0].value, ast.Constant)
            and isinstance(body[0].value.value, str)
        ):
            body = body[1:]
        fields = []
        for name, value in ast.iter_fields(node):
            if name == "body" and body is not None:
                value = body
            if value is None or value == []:  # left out: differs between Python versions
                continue
            fields.append(f"{name}={dump(value)}")
        return f"{type(node).__name__}({','.join(fields)})"

    funcs = (
        noise._estimate_smoothness,
        noise._smoothness_sample,
        noise.voxel_sizes,
        workcopy.working_copy,
    )
    h = hashlib.sha256()
    for f in funcs:
        h.update(dump(ast.parse(textwrap.dedent(inspect.getsource(f)))).encode())
    return h.hexdigest()


def test_smoothness_version_is_raised_when_its_code_changes():
    from voxelscope.core import noise

    got = _code_digest()
    assert SMOOTHNESS_CODE_DIGESTS.get(noise.SMOOTHNESS_VERSION) == got, (
        "the code of the smoothness estimate changed: raise SMOOTHNESS_VERSION in "
        "voxelscope/core/noise.py (kept results of the old code would be served) and add "
        f"{noise.SMOOTHNESS_VERSION + 1}: {got!r} to SMOOTHNESS_CODE_DIGESTS"
    )


def _cached_smooth_run(folder: Path, seed: int = 12) -> Path:
    """A .nii.gz run of noise smoothed along x (a bright block in zeros: a mask to find)."""
    import nibabel as nib

    rng = np.random.default_rng(seed)
    e = rng.standard_normal((12, 10, 8, 60))
    e[1:] += 0.7 * e[:-1]
    data = np.zeros_like(e, dtype=np.float32)
    data[1:11, 1:9, 1:7] = 1000 + 5 * e[1:11, 1:9, 1:7]
    img = nib.Nifti1Image(data, np.diag([3.0, 3.0, 3.5, 1.0]))
    img.header.set_zooms((3.0, 3.0, 3.5, 2.0))
    img.header.set_xyzt_units("mm", "sec")
    path = folder / "sub-01_task-s_bold.nii.gz"
    nib.save(img, str(path))
    return path


def _smooth_setup(tmp_path, kernel="double-gamma"):
    from voxelscope.core.run import open_run

    path = _cached_smooth_run(tmp_path)
    a = Analysis([Condition("x", [10.0, 50.0, 90.0], [16.0] * 3)], n_volumes=60, tr=2.0)
    prep = a.prepared(kernel, ModelSettings())[1]

    def run():
        return open_run(path, cache_dir=tmp_path / "c")

    return run, prep, a


def _kept_file(tmp_path) -> Path:
    from voxelscope.core import cache

    (kept,) = (tmp_path / "c").glob(f"*{cache.KEPT_SUFFIX}")
    return kept


def _count_estimates(monkeypatch) -> list[int]:
    from voxelscope.core import noise

    calls: list[int] = []
    real = noise._estimate_smoothness

    def counted(*args):
        calls.append(1)
        return real(*args)

    monkeypatch.setattr(noise, "_estimate_smoothness", counted)
    return calls


def test_kept_smoothness_is_the_computed_one_bit_for_bit(tmp_path, monkeypatch):
    """The second open of a cached run serves the kept smoothness without reading the
    sample; it equals, bit for bit, the estimate computed again from the run."""
    from voxelscope.core import noise

    open_again, prep, _ = _smooth_setup(tmp_path)
    first = open_again()
    want = noise.run_smoothness(first, prep, first.mask())
    assert _kept_file(tmp_path).stat().st_size > 0
    assert want[0] > max(want[1], want[2]) > 0  # smoother along x, as planted

    def no_sample(*_a):
        raise AssertionError("the sample was read although the result was kept")

    monkeypatch.setattr(noise, "_smoothness_sample", no_sample)
    second = open_again()
    got = noise.run_smoothness(second, prep, second.mask())
    monkeypatch.undo()
    fresh = noise._estimate_smoothness(second, prep, second.mask(), {})
    assert [v.hex() for v in got] == [v.hex() for v in want] == [v.hex() for v in fresh]
    assert all(type(v) is float for v in got)


def test_kept_smoothness_of_another_design_mask_or_version_is_computed(tmp_path, monkeypatch):
    from voxelscope.core import noise

    open_again, prep, a = _smooth_setup(tmp_path)
    run = open_again()
    noise.run_smoothness(run, prep, run.mask())
    estimate = noise._estimate_smoothness  # the reference, computed directly
    calls = _count_estimates(monkeypatch)
    # the same model in a new process: kept
    run = open_again()
    noise.run_smoothness(run, prep, run.mask())
    assert calls == []
    # another kernel, another high-pass: other designs
    other = a.prepared("boxcar", ModelSettings())[1]
    want = estimate(run, other, run.mask(), {})
    assert noise.run_smoothness(open_again(), other, run.mask()) == want
    assert len(calls) == 1
    # another mask (one voxel less)
    mask = run.mask().copy()
    mask[tuple(np.argwhere(mask)[0])] = False
    want = estimate(run, prep, mask, {})
    assert noise.run_smoothness(open_again(), prep, mask) == want
    assert len(calls) == 2
    # another version of the estimator: nothing kept before it is used
    monkeypatch.setattr(noise, "SMOOTHNESS_VERSION", noise.SMOOTHNESS_VERSION + 1)
    run = open_again()
    noise.run_smoothness(run, prep, run.mask())
    assert len(calls) == 3
    run = open_again()
    noise.run_smoothness(run, prep, run.mask())  # and kept under the new version
    assert len(calls) == 3


@pytest.mark.parametrize("cut", [False, True])
@pytest.mark.parametrize("where", [0.0, 0.1, 0.5, 0.99])
def test_damaged_kept_smoothness_is_computed_never_served(tmp_path, monkeypatch, where, cut):
    """Fault injection: a byte of the kept file flipped or the file cut short there: the
    value is computed again (no traceback) and equals the clean one."""
    from voxelscope.core import noise

    open_again, prep, _ = _smooth_setup(tmp_path)
    run = open_again()
    want = noise.run_smoothness(run, prep, run.mask())
    target = _kept_file(tmp_path)
    blob = bytearray(target.read_bytes())
    at = min(len(blob) - 1, int(where * len(blob)))
    if cut:
        del blob[at:]
    else:
        blob[at] ^= 0x5A
    target.write_bytes(bytes(blob))
    calls = _count_estimates(monkeypatch)
    run = open_again()
    assert noise.run_smoothness(run, prep, run.mask()) == want
    assert calls == [1]


def test_a_run_not_served_from_the_cache_keeps_nothing(tmp_path):
    """In memory (--no-cache) the smoothness is computed in each process; the cache
    folder gets no file."""
    from voxelscope.core import noise
    from voxelscope.core.run import open_run

    path = _cached_smooth_run(tmp_path)
    a = Analysis([Condition("x", [10.0, 50.0, 90.0], [16.0] * 3)], n_volumes=60, tr=2.0)
    prep = a.prepared("double-gamma", ModelSettings())[1]
    run = open_run(path, use_cache=False, cache_dir=tmp_path / "c")
    assert run.kept_values is None
    assert noise.run_smoothness(run, prep, run.mask())[0] > 0
    assert not (tmp_path / "c").exists() or not list((tmp_path / "c").iterdir())
