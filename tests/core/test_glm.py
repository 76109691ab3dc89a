"""Tests of voxelscope.core.glm against outside references.

References used here (see /work/shared/references.md):

* statsmodels ``OLS(...).fit()``, ``OLSResults.t_test`` and ``OLSResults.f_test``: computed
  values for betas, standard errors, t, df, residual variance (``scale``), R², residuals,
  fitted values, p values, t and F contrasts.
* NIST StRD Longley data (data from ``statsmodels.datasets.longley``); certified values
  *from memory* (see the Longley test).
* Prais & Winsten (1954) transform, written out independently in this file, then fitted with
  statsmodels OLS; statsmodels ``GLSAR`` (which drops the first observation),
  ``statsmodels.tsa.stattools.acf`` and ``statsmodels.regression.linear_model.yule_walker``
  for the AR(1) coefficient.
* ``scipy.stats.t`` for two-sided p values.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import statsmodels.api as sm
from hypothesis import assume, given
from hypothesis import strategies as st
from numpy.testing import assert_allclose
from scipy import stats
from statsmodels.regression.linear_model import GLSAR, yule_walker
from statsmodels.tsa.stattools import acf

from voxelscope.core.errors import InputError, ModelError
from voxelscope.core.glm import (
    ar1_rho,
    condition_f_matrix,
    f_test,
    fit,
    parse_contrast,
    prais_winsten,
    prepare,
)

# ----------------------------------------------------------------------------- helpers


def _random_problem(seed: int, n: int, p: int, offset: float = 0.0, const: float = 1.0):
    """Random design (p - 1 normal columns + a constant column) and data."""
    rng = np.random.default_rng(seed)
    X = np.column_stack([rng.standard_normal((n, p - 1)), np.full(n, const)])
    beta = rng.normal(0.0, 2.0, p)
    y = X @ beta + offset + rng.normal(0.0, rng.uniform(0.1, 3.0), n)
    return X, y, rng


def _my_prais_winsten(a: np.ndarray, rho: float) -> np.ndarray:
    """Independent Prais-Winsten transform (Prais & Winsten, 1954), written as a loop."""
    a = np.asarray(a, dtype=float)
    out = np.empty_like(a)
    out[0] = math.sqrt(1.0 - rho**2) * a[0]
    for t in range(1, a.shape[0]):
        out[t] = a[t] - rho * a[t - 1]
    return out


problems = st.tuples(
    st.integers(0, 2**32 - 1),  # seed
    st.integers(10, 80),  # n
    st.integers(1, 6),  # p
)


# ----------------------------------------------------------------------------- OLS vs statsmodels


@given(problems)
def test_ols_matches_statsmodels(prob):
    """betas, bse, t, df, scale, R², residuals, fitted, p: statsmodels OLS(...).fit()."""
    seed, n, p = prob
    assume(n >= p + 3)
    X, y, _ = _random_problem(seed, n, p)
    assume(np.linalg.cond(X) < 1e4)
    ref = sm.OLS(y, X).fit()
    for j in range(p):
        c = np.eye(p)[j]
        res = fit(X, y, c)
        assert res.df == int(ref.df_resid)
        assert_allclose(res.betas[:, 0], ref.params, rtol=1e-9, atol=1e-12)
        assert_allclose(res.estimate[0], ref.params[j], rtol=1e-9, atol=1e-12)
        assert_allclose(math.sqrt(res.variance[0]), ref.bse[j], rtol=1e-9)
        assert_allclose(res.t[0], ref.tvalues[j], rtol=1e-9, atol=1e-12)
        assert_allclose(res.p[0], ref.pvalues[j], rtol=1e-7, atol=1e-15)
    assert_allclose(res.sigma2[0], ref.scale, rtol=1e-9)
    assert_allclose(res.r2[0], ref.rsquared, rtol=1e-9, atol=1e-12)
    assert_allclose(res.residuals[:, 0], ref.resid, rtol=1e-9, atol=1e-10)
    assert_allclose(res.fitted[:, 0], ref.fittedvalues, rtol=1e-9, atol=1e-10)
    # every standard error at once, from cov_unscaled: statsmodels bse
    bse = np.sqrt(res.sigma2[0] * np.diag(res.cov_unscaled[0]))
    assert_allclose(bse, ref.bse, rtol=1e-9)


@given(problems, st.lists(st.floats(-3, 3, allow_nan=False), min_size=6, max_size=6))
def test_t_contrast_matches_statsmodels_t_test(prob, weights):
    """Random contrast weights: effect, sd, t, p of statsmodels OLSResults.t_test."""
    seed, n, p = prob
    assume(n >= p + 3)
    c = np.asarray(weights[:p])
    assume(np.abs(c).max() > 1e-3)
    X, y, _ = _random_problem(seed, n, p)
    assume(np.linalg.cond(X) < 1e4)
    ref = sm.OLS(y, X).fit().t_test(c[None, :])
    res = fit(X, y, c)
    assert_allclose(res.estimate[0], ref.effect[0], rtol=1e-9, atol=1e-11)
    assert_allclose(math.sqrt(res.variance[0]), ref.sd[0, 0], rtol=1e-9)
    assert_allclose(res.t[0], ref.tvalue[0, 0], rtol=1e-8, atol=1e-10)
    assert_allclose(res.p[0], ref.pvalue, rtol=1e-7, atol=1e-14)
    # p is the two-sided tail of scipy.stats.t with df = n - p
    assert_allclose(res.p[0], 2 * stats.t.sf(abs(res.t[0]), n - p), rtol=1e-12)


@given(problems, st.integers(0, 2**32 - 1), st.integers(1, 4))
def test_f_test_matches_statsmodels(prob, cseed, q):
    """F, p, df of OLSResults.f_test for random full-rank restriction matrices."""
    seed, n, p = prob
    assume(n >= p + 3)
    q = min(q, p)
    X, y, _ = _random_problem(seed, n, p)
    assume(np.linalg.cond(X) < 1e4)
    C = np.random.default_rng(cseed).standard_normal((q, p))
    assume(np.linalg.cond(C) < 1e3)
    ref = sm.OLS(y, X).fit().f_test(C)
    res = fit(X, y, np.eye(p)[0])
    F, pval, df1, df2 = f_test(res, C)
    assert (df1, df2) == (int(ref.df_num), int(ref.df_denom))
    assert_allclose(F[0], float(np.squeeze(ref.fvalue)), rtol=1e-8)
    assert_allclose(pval[0], float(ref.pvalue), rtol=1e-7, atol=1e-14)


@given(st.integers(0, 2**32 - 1), st.integers(12, 60), st.floats(0.25, 20.0))
def test_constant_column_not_one(seed, n, const):
    """A constant column of any value (not only 1): betas equal statsmodels' params.

    The engine centres the data; the mean must go back into the constant's beta divided by
    the column's value, not as if the column were all ones.
    """
    X, y, _ = _random_problem(seed, n, 3, offset=50.0, const=const)
    ref = sm.OLS(y, X).fit()
    res = fit(X, y, [1.0, 0.0, 0.0])
    assert_allclose(res.betas[:, 0], ref.params, rtol=1e-9, atol=1e-12)
    assert_allclose(res.fitted[:, 0], ref.fittedvalues, rtol=1e-9)
    res_c = fit(X, y, [0.0, 0.0, 1.0])
    assert_allclose(res_c.t[0], ref.tvalues[2], rtol=1e-9)


@given(st.integers(0, 2**32 - 1), st.integers(10, 60))
def test_r2_without_constant_matches_statsmodels(seed, n):
    """No constant column: R² is statsmodels' ``rsquared``, which is then uncentred.

    Reference: statsmodels OLS without a constant (``1 - ssr / uncentered_tss``).
    """
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((n, 2))
    y = X @ [1.0, -2.0] + 5.0 + rng.standard_normal(n)
    ref = sm.OLS(y, X).fit()
    res = fit(X, y, [1.0, 0.0])
    assert_allclose(res.betas[:, 0], ref.params, rtol=1e-9)
    assert_allclose(res.r2[0], ref.rsquared, rtol=1e-9)
    assert_allclose(res.r2[0], 1.0 - ref.ssr / ref.uncentered_tss, rtol=1e-9)
    assert_allclose(res.t[0], ref.tvalues[0], rtol=1e-9)


def test_raw_bold_float32_keeps_digits():
    """Data like raw BOLD (mean 10000, noise SD 0.5, float32) against float64 statsmodels.

    statsmodels OLS on the same float32 values cast to float64 is the reference. The engine
    centres each voxel, so shifting the data by 10000 must change nothing but the constant's
    beta (to ~1e-12), and the residual sum of squares must match an explicit ``r'r``.
    """
    rng = np.random.default_rng(20240611)
    n = 200
    t = np.arange(n)
    box = ((t // 10) % 2).astype(float)
    X = np.column_stack([box, np.cos(np.pi * (2 * t + 1) / (2 * n)), np.ones(n)])
    y32 = (10000.0 + 30.0 * box + rng.normal(0, 0.5, n)).astype(np.float32)
    y64 = y32.astype(np.float64)
    ref = sm.OLS(y64, X).fit()
    res = fit(X, y32, [1.0, 0.0, 0.0])
    assert_allclose(res.betas[:, 0], ref.params, rtol=1e-9)
    assert_allclose(res.t[0], ref.tvalues[0], rtol=1e-9)
    assert_allclose(res.sigma2[0], ref.scale, rtol=1e-9)
    assert_allclose(res.r2[0], ref.rsquared, rtol=1e-12)
    # offset invariance: subtracting 10000 is exact in float64 for these values
    shifted = fit(X, y64 - 10000.0, [1.0, 0.0, 0.0])
    # (the two centred series differ only by the rounding of their means, ~1e-12)
    assert_allclose(res.betas[:2, 0], shifted.betas[:2, 0], rtol=1e-12, atol=1e-11)
    assert_allclose(res.betas[2, 0] - 10000.0, shifted.betas[2, 0], rtol=1e-12, atol=1e-11)
    assert_allclose(res.t, shifted.t, rtol=1e-10)
    assert_allclose(res.sigma2, shifted.sigma2, rtol=1e-10)
    # residual variance equals the explicit r'r / df of statsmodels residuals
    assert_allclose(res.sigma2[0], ref.resid @ ref.resid / ref.df_resid, rtol=1e-10)
    # the shortcut y'y - b'X'y (which the engine must not use) loses digits here:
    naive = (y64 @ y64 - ref.params @ X.T @ y64) / ref.df_resid
    assert abs(naive - ref.scale) / ref.scale > 100 * abs(res.sigma2[0] - ref.scale) / ref.scale


# ----------------------------------------------------------------------------- batch = single


@given(
    st.integers(0, 2**32 - 1),
    st.integers(12, 60),
    st.integers(2, 5),
    st.integers(2, 7),
    st.sampled_from(["ols", "ar1"]),
)
def test_batch_equals_single(seed, n, p, v, noise):
    """Fitting Y (T, V) equals fitting each column alone (same code path), to ~1e-12."""
    X, _, rng = _random_problem(seed, n, p)
    assume(np.linalg.cond(X) < 1e4)
    Y = 100.0 + rng.standard_normal((n, v)).cumsum(axis=0) * 0.3 + rng.standard_normal((n, v))
    c = rng.standard_normal(p)
    batch = fit(X, Y, c, noise=noise)
    for j in range(v):
        one = fit(X, Y[:, j], c, noise=noise)
        for name in ("estimate", "variance", "t", "p", "sigma2", "r2"):
            assert_allclose(getattr(batch, name)[j], getattr(one, name)[0], rtol=1e-12, atol=1e-14)
        assert_allclose(batch.betas[:, j], one.betas[:, 0], rtol=1e-12, atol=1e-13)
        assert_allclose(batch.residuals[:, j], one.residuals[:, 0], rtol=1e-12, atol=1e-12)
        if noise == "ar1":
            assert_allclose(batch.rho[j], one.rho[0], rtol=1e-12, atol=1e-15)
    assert batch.df == one.df


# ----------------------------------------------------------------------------- Longley (NIST)

# NIST StRD Longley certified values, *from memory* (listed in references.md; the standard
# errors are also from memory, and agree with statsmodels to about 1e-12).
LONGLEY_BETA = np.array(
    [
        -3482258.63459582,
        15.0618722713733,
        -0.0358191792925910,
        -2.02022980381683,
        -1.03322686717359,
        -0.0511041056535807,
        1829.15146461355,
    ]
)
LONGLEY_SE = np.array(
    [
        890420.383607373,
        84.9149257747669,
        0.0334910077722432,
        0.488399681651699,
        0.214274163161675,
        0.226073200069370,
        455.478499142212,
    ]
)
LONGLEY_RESID_SD = 304.854073561965
LONGLEY_R2 = 0.995479004577296


def test_longley_certified_values():
    """NIST StRD Longley through prepare/fit: coefficients to 1e-10 relative.

    Data: statsmodels.datasets.longley. Certified values from memory (references.md).
    Reached precision (measured when written): coefficients ~1.3e-11 relative, residual SD
    ~2e-13, R² ~2e-15, standard errors ~3e-13; the assertions leave a 10x margin.
    """
    data = sm.datasets.longley.load_pandas()
    names = ["constant", *data.exog.columns]
    X = np.column_stack([np.ones(len(data.endog)), data.exog.to_numpy(float)])
    y = data.endog.to_numpy(float)
    prep = prepare(X, names)
    assert prep.df == 16 - 7
    assert prep.constant_index == 0
    res = fit(prep, y, np.eye(7)[6])
    assert_allclose(res.betas[:, 0], LONGLEY_BETA, rtol=1e-10)
    assert_allclose(math.sqrt(res.sigma2[0]), LONGLEY_RESID_SD, rtol=1e-11)
    assert_allclose(res.r2[0], LONGLEY_R2, rtol=1e-13)
    assert_allclose(np.sqrt(res.sigma2[0] * np.diag(res.cov_unscaled[0])), LONGLEY_SE, rtol=1e-11)
    assert_allclose(res.estimate[0], LONGLEY_BETA[6], rtol=1e-10)


# ----------------------------------------------------------------------------- AR(1)


@pytest.mark.filterwarnings("ignore::FutureWarning")  # yule_walker's return type notice
@given(st.integers(0, 2**32 - 1), st.integers(20, 120), st.floats(-0.6, 0.9))
def test_ar1_rho_matches_statsmodels(seed, n, phi):
    """rho = sum(r_t r_{t-1}) / sum(r_t^2) of statsmodels OLS residuals.

    Also equals statsmodels acf(resid, nlags=1, fft=False)[1] and yule_walker(resid, 1,
    method="mle"), which demean first: the same thing here because the intercept makes the
    residual mean zero.
    """
    X, _, rng = _random_problem(seed, n, 3)
    e = np.zeros(n)
    w = rng.standard_normal(n)
    for t in range(n):
        e[t] = (phi * e[t - 1] if t else 0.0) + w[t]
    y = X @ [1.0, -1.0, 10.0] + e
    r = sm.OLS(y, X).fit().resid
    expected = np.sum(r[1:] * r[:-1]) / np.sum(r * r)
    res = fit(X, y, [1.0, 0.0, 0.0], noise="ar1")
    assert_allclose(res.rho[0], expected, rtol=1e-9, atol=1e-12)
    assert_allclose(res.rho[0], acf(r, nlags=1, fft=False)[1], rtol=1e-9, atol=1e-12)
    assert_allclose(res.rho[0], yule_walker(r, order=1, method="mle")[0][0], rtol=1e-9, atol=1e-12)
    assert_allclose(ar1_rho(r)[0], expected, rtol=1e-12, atol=1e-15)


@given(st.integers(0, 2**32 - 1), st.integers(20, 100), st.integers(2, 5))
def test_ar1_fit_equals_independent_prais_winsten(seed, n, p):
    """AR(1) fit equals statsmodels OLS on our own Prais-Winsten transform of y and X.

    Prais & Winsten (1954): row 0 scaled by sqrt(1 - rho²), row t = a_t - rho a_{t-1}.
    rho from the statsmodels OLS residuals. Compared: params, bse, t, df.
    """
    X, _, rng = _random_problem(seed, n, p)
    assume(np.linalg.cond(X) < 1e4)
    e = np.zeros(n)
    for t in range(n):
        e[t] = (0.5 * e[t - 1] if t else 0.0) + rng.standard_normal()
    y = X @ rng.normal(0, 1, p) + 500.0 + e
    r = sm.OLS(y, X).fit().resid
    rho = float(np.clip(np.sum(r[1:] * r[:-1]) / np.sum(r * r), -0.99, 0.99))
    ref = sm.OLS(_my_prais_winsten(y, rho), _my_prais_winsten(X, rho)).fit()
    for j in range(p):
        res = fit(X, y, np.eye(p)[j], noise="ar1")
        assert_allclose(res.rho[0], rho, rtol=1e-10, atol=1e-13)
        assert res.df == int(ref.df_resid) == n - p
        assert_allclose(res.betas[:, 0], ref.params, rtol=1e-8, atol=1e-10)
        assert_allclose(math.sqrt(res.variance[0]), ref.bse[j], rtol=1e-8)
        assert_allclose(res.t[0], ref.tvalues[j], rtol=1e-8, atol=1e-10)
        assert_allclose(res.sigma2[0], ref.scale, rtol=1e-8)
    # residuals and fitted signal are reported in data units
    assert_allclose(res.residuals[:, 0], y - X @ ref.params, rtol=1e-8, atol=1e-8)
    assert_allclose(prais_winsten(X, rho), _my_prais_winsten(X, rho), rtol=1e-14)


@given(st.integers(0, 2**32 - 1), st.integers(15, 80), st.floats(-0.8, 0.95))
def test_glsar_fixed_rho_is_our_transform_without_row_0(seed, n, rho):
    """statsmodels GLSAR(y, X, rho=[rho]).fit() equals OLS on our transformed rows 1..n-1.

    First-observation difference: GLSAR's whitening drops observation 0, so its df is
    n - 1 - p; Prais-Winsten (and voxelscope) keeps row 0 scaled by sqrt(1 - rho²), so the
    engine's df is n - p. Rows 1..n-1 of the two transforms are identical.
    """
    X, y, _ = _random_problem(seed, n, 3)
    ref = GLSAR(y, X, rho=[rho]).fit()
    ours = sm.OLS(prais_winsten(y, rho)[1:], prais_winsten(X, rho)[1:]).fit()
    assert_allclose(ours.params, ref.params, rtol=1e-9, atol=1e-11)
    assert_allclose(ours.bse, ref.bse, rtol=1e-9)
    assert int(ref.df_resid) == n - 1 - 3
    # the engine keeps the first observation: one more residual degree of freedom
    res = fit(X, y, [1.0, 0.0, 0.0], noise="ar1")
    assert res.df == int(ref.df_resid) + 1


def test_ols_se_too_small_under_positive_autocorrelation():
    """Simulated AR(1) noise (phi = 0.6), smooth block regressor, 400 runs.

    Common practice: OLS t values are inflated under positive autocorrelation (its standard
    error is too small); prewhitening reduces them. Checked here against the Monte Carlo
    spread of the betas (an outside truth that needs no library).
    """
    rng = np.random.default_rng(7)
    n, runs, phi = 160, 400, 0.6
    t = np.arange(n)
    box = ((t // 16) % 2).astype(float)
    X = np.column_stack([np.convolve(box, np.ones(4) / 4)[:n], np.ones(n)])
    w = rng.standard_normal((n, runs))
    e = np.zeros((n, runs))
    e[0] = w[0] / math.sqrt(1 - phi**2)
    for i in range(1, n):
        e[i] = phi * e[i - 1] + w[i]
    Y = 1000.0 + e  # no true effect
    ols = fit(X, Y, [1.0, 0.0])
    ar1 = fit(X, Y, [1.0, 0.0], noise="ar1")
    se_ols = np.sqrt(ols.variance)
    se_ar1 = np.sqrt(ar1.variance)
    assert np.mean(se_ols) < np.mean(se_ar1)
    assert np.mean(se_ols < se_ar1) > 0.9
    # OLS reports a standard error well below the true spread of its own beta ...
    assert np.mean(se_ols) < 0.75 * np.std(ols.estimate)
    # ... and a false-positive rate above the nominal 5 %; AR(1) is close to nominal
    assert np.mean(ols.p < 0.05) > 0.12
    assert np.mean(ar1.p < 0.05) < 0.10
    assert 0.8 < np.mean(se_ar1) / np.std(ar1.estimate) < 1.25


def test_rho_step_groups_share_solves():
    """rho_step rounds rho to bins; each voxel equals a fit with its rounded rho.

    Reference: statsmodels OLS on our Prais-Winsten transform at the rounded rho.
    """
    rng = np.random.default_rng(3)
    n = 80
    X = np.column_stack([rng.standard_normal(n), np.ones(n)])
    Y = rng.standard_normal((n, 6)).cumsum(axis=0) * 0.5 + rng.standard_normal((n, 6))
    res = fit(X, Y, [1.0, 0.0], noise="ar1", rho_step=0.05)
    for j in range(6):
        rho = res.rho[j]
        assert abs(rho / 0.05 - round(rho / 0.05)) < 1e-9
        ref = sm.OLS(_my_prais_winsten(Y[:, j], rho), _my_prais_winsten(X, rho)).fit()
        assert_allclose(res.betas[:, j], ref.params, rtol=1e-9, atol=1e-12)
        assert_allclose(res.t[j], ref.tvalues[0], rtol=1e-9)


# ----------------------------------------------------------------------------- degenerate


def test_constant_voxel_gives_nan_not_inf():
    """A constant voxel has no residual variance: t, p, variance NaN (never inf)."""
    rng = np.random.default_rng(0)
    X = np.column_stack([rng.standard_normal(30), np.ones(30)])
    Y = np.column_stack([np.full(30, 812.5), 5 + rng.standard_normal(30)])
    for noise in ("ols", "ar1"):
        res = fit(X, Y, [1.0, 0.0], noise=noise)
        assert res.degenerate.tolist() == [True, False]
        for a in (res.t, res.p, res.variance):
            assert np.isnan(a[0]) and np.isfinite(a[1])
        assert not np.any(np.isinf(res.z))
        assert_allclose(res.betas[1, 0], 812.5, rtol=1e-14)


@given(
    st.integers(8, 300),
    st.floats(-1e5, 1e5, allow_nan=False, allow_infinity=False),
    st.sampled_from(["ols", "ar1"]),
)
def test_constant_voxel_any_value(n, value, noise):
    """Any constant value (its mean rounds): t, p, R² NaN; rho 0 under AR(1); beta = value.

    A constant series has no variance to explain (R² undefined) and no residual
    autocorrelation (the ar1_rho docstring's rule for no residuals); written from that.
    """
    rng = np.random.default_rng(n)
    X = np.column_stack([rng.standard_normal(n), np.ones(n)])
    res = fit(X, np.full(n, value), [1.0, 0.0], noise=noise)
    assert res.degenerate[0]
    assert np.isnan(res.t[0]) and np.isnan(res.p[0]) and np.isnan(res.r2[0])
    if noise == "ar1":
        assert res.rho[0] == 0.0
    assert_allclose(res.betas[1, 0], value, rtol=1e-12, atol=1e-300)


def test_exact_fit_is_degenerate():
    """Data the design fits exactly (to rounding) are flagged; t is NaN, not huge."""
    rng = np.random.default_rng(1)
    X = np.column_stack([rng.standard_normal(40), np.ones(40)])
    y = X @ [3.0, 10000.0]
    res = fit(X, y, [1.0, 0.0])
    assert res.degenerate[0]
    assert np.isnan(res.t[0])


# ----------------------------------------------------------------------------- prepare


def test_prepare_rank_deficient_names_columns():
    rng = np.random.default_rng(2)
    a = rng.standard_normal(20)
    X = np.column_stack([a, rng.standard_normal(20), 2 * a, np.ones(20)])
    with pytest.raises(ModelError) as err:
        prepare(X, ["tap", "tone", "tap_copy", "constant"])
    msg = str(err.value)
    assert "'tap'" in msg and "'tap_copy'" in msg and "'tone'" not in msg
    assert "\n" not in msg


def test_prepare_zero_column_and_too_few_rows():
    X = np.column_stack([np.zeros(10), np.ones(10)])
    with pytest.raises(ModelError, match="'tone'"):
        prepare(X, ["tone", "constant"])
    with pytest.raises(ModelError, match="3 volumes"):
        prepare(np.ones((3, 4)))


# ----------------------------------------------------------------------------- contrasts

NAMES = ["tone", "tap", "drift_1", "constant"]


@pytest.mark.parametrize(
    ("expr", "expected"),
    [
        ("tap", [0, 1, 0, 0]),
        ("tap - tone", [-1, 1, 0, 0]),
        ("tap-tone", [-1, 1, 0, 0]),
        ("0.5*tap + 0.5*tone", [0.5, 0.5, 0, 0]),
        ("2 tap", [0, 2, 0, 0]),
        ("2*tap", [0, 2, 0, 0]),
        ("-tone", [-1, 0, 0, 0]),
        ("  tone + tap ", [1, 1, 0, 0]),
        ("1e-1 tone", [0.1, 0, 0, 0]),
    ],
)
def test_parse_contrast_forms(expr, expected):
    """Weights written by hand from the expression (no engine values)."""
    assert parse_contrast(expr, NAMES).tolist() == pytest.approx(expected)


def test_parse_contrast_names_starting_with_digits():
    """Conditions such as '2back' (n-back tasks) are names, not a coefficient and 'back'."""
    names = ["0back", "2back", "constant"]
    assert parse_contrast("2back - 0back", names).tolist() == [-1.0, 1.0, 0.0]
    assert parse_contrast("2 2back", names).tolist() == [0.0, 2.0, 0.0]
    assert parse_contrast("0.5*2back", names).tolist() == [0.0, 0.5, 0.0]


def test_parse_contrast_unknown_names_listed():
    with pytest.raises(InputError) as err:
        parse_contrast("tapp - tonne", NAMES, groups={"tone": (0,), "tap": (1,)})
    msg = str(err.value)
    assert "'tapp' at character 1" in msg and "'tonne' at character 8" in msg
    assert "tone" in msg and "tap" in msg
    assert "\n" not in msg


@pytest.mark.parametrize(
    ("expr", "says"),
    [
        ("2*tap+", "expected a condition name after '+' at character 6"),
        ("tap -", "expected a condition name after '-' at character 5"),
        ("2*", "expected a condition name after '*' at character 2"),
        ("0.5", "expected a condition name after '0.5' at character 1"),
        ("tap tone", "expected + or - at character 5, found 'tone'"),
        ("tap*2", "unexpected '*' at character 4"),
        ("* tap", "expected a condition name at character 1"),
        ("tap - jump", "unknown name 'jump' at character 7"),
    ],
)
def test_parse_contrast_errors_say_what_and_where(expr, says):
    """Each malformed contrast names what was expected and the character (from 1)."""
    with pytest.raises(InputError) as err:
        parse_contrast(expr, NAMES, groups={"tone": (0,), "tap": (1,)})
    assert says in str(err.value)


def test_parse_contrast_default_and_empty():
    assert parse_contrast(None, NAMES, default="tap").tolist() == [0, 1, 0, 0]
    with pytest.raises(InputError):
        parse_contrast("", NAMES)
    with pytest.raises(InputError):
        parse_contrast("tap - tap", NAMES)


def test_parse_contrast_fir_group_is_average():
    names = ["a_fir0", "a_fir1", "a_fir2", "constant"]
    w = parse_contrast("a", names, groups={"a": (0, 1, 2)})
    assert_allclose(w, [1 / 3, 1 / 3, 1 / 3, 0])


def test_condition_f_matrix_matches_statsmodels_f_test():
    """F for a condition with its derivative: statsmodels f_test on the same rows."""
    rng = np.random.default_rng(11)
    n = 60
    X = np.column_stack([rng.standard_normal((n, 2)), np.ones(n)])
    y = X @ [0.5, 0.3, 2.0] + rng.standard_normal(n)
    names = ["a", "a_dt", "constant"]
    C = condition_f_matrix(names, {"a": (0, 1)}, "a")
    assert C.tolist() == [[1, 0, 0], [0, 1, 0]]
    ref = sm.OLS(y, X).fit().f_test(C)
    F, pval, q, df2 = f_test(fit(X, y, [1, 0, 0]), C)
    assert (q, df2) == (2, n - 3)
    assert_allclose(F[0], float(np.squeeze(ref.fvalue)), rtol=1e-9)
    assert_allclose(pval[0], float(ref.pvalue), rtol=1e-8)


def test_non_finite_voxel_has_no_fit():
    """A voxel with a NaN sample gets NaN everywhere (outside the mask), never zeros."""
    rng = np.random.default_rng(5)
    X = np.column_stack([rng.standard_normal(30), np.ones(30)])
    Y = rng.standard_normal((30, 2))
    Y[4, 1] = np.nan
    res = fit(X, Y, [1.0, 0.0])
    assert np.isfinite(res.t[0]) and res.degenerate[1]
    for a in (res.t[1], res.estimate[1], res.r2[1], res.p[1]):
        assert np.isnan(a)
    assert np.all(np.isnan(res.fitted[:, 1])) and np.all(np.isnan(res.residuals[:, 1]))


# ----------------------------------------------------------------------------- one product


def _near_exact_problem(seed: int, n: int = 240, p: int = 9, mean: float = 10000.0):
    """A BOLD-like design (constant, cosine drifts, block regressors) and voxels whose
    fraction of unexplained variance 1 - R^2 runs from 0.5 down to 1e-16 and to an
    exact fit, each on a raw-BOLD-like mean."""
    rng = np.random.default_rng(seed)
    t = np.arange(n)
    X = np.column_stack(
        [np.sin(2 * np.pi * t / rng.uniform(20, 60)) + rng.normal(0, 0.1, n) for _ in range(p - 4)]
        + [np.cos(np.pi * k * (2 * t + 1) / (2 * n)) for k in (1, 2, 3)]
        + [np.ones(n)]
    )
    signal = X[:, :-1] @ rng.normal(0, 50, p - 1)
    noise = rng.standard_normal((n, 1))
    noise -= X @ np.linalg.lstsq(X, noise, rcond=None)[0]  # exactly orthogonal to X
    noise /= np.linalg.norm(noise)
    ratios = np.concatenate([[0.5], 10.0 ** -np.arange(1, 17, 0.5), [0.0]])  # 1 - R^2
    # ||signal||^2 (1 - r) / r is the residual sum of squares that gives 1 - R^2 = r
    ss = float(signal @ signal)
    scale = np.sqrt(ss * ratios / np.where(ratios < 1, 1 - ratios, 1.0))
    Y = mean + signal[:, None] + noise * scale[None, :]
    return X, Y, ratios


def _explicit_rss(X: np.ndarray, Y: np.ndarray) -> np.ndarray:
    """The explicit computation, in extended precision: centre in long double, beta by
    least squares on the centred data, residuals r = y - X b and sum(r^2) in long double."""
    Yl = Y.astype(np.longdouble)
    Yc = Yl - Yl.mean(axis=0)
    b = np.linalg.lstsq(X, Yc.astype(np.float64), rcond=None)[0]
    R = Yc - X.astype(np.longdouble) @ b.astype(np.longdouble)
    return (R * R).sum(axis=0)


@pytest.mark.parametrize("seed", range(6))
def test_one_product_rss_equals_explicit_residuals_near_exact_fits(seed):
    """rss = ||y||^2 - ||Q'y||^2 on centred float64 data, with explicit residuals below the
    guard, against the explicit residual sum of squares computed here independently in
    long double, at every 1 - R^2 from 0.5 down to 3e-17, on raw-BOLD-like means.

    Error bounds (numerical analysis, common practice): the shortcut subtracts two sums
    accurate to a few eps * ||y||^2, so its relative error is about eps / (1 - R^2)
    (measured: at most 6.4 eps / (1 - R^2) over 12 seeds; allowed 10); explicit float64
    residuals of centred data carry about eps / sqrt(1 - R^2) (measured at most 0.21 of
    that; allowed 1). Overall below 2.5e-9. An exact fit is degenerate (NaN t).
    """
    from voxelscope.core.glm import RSS_GUARD

    eps = np.finfo(float).eps
    X, Y, ratios = _near_exact_problem(seed)
    res = fit(X, Y, np.eye(X.shape[1])[0], keep_series=False)
    ref = np.asarray(_explicit_rss(X, Y), dtype=np.float64)
    df = X.shape[0] - X.shape[1]
    exact = ratios == 0
    r = ratios[~exact]
    rel = np.abs(res.sigma2[~exact] * df - ref[~exact]) / ref[~exact]
    shortcut = r >= RSS_GUARD  # the voxel's own 1 - R^2 decides; these are above the guard
    assert np.all(rel[shortcut] <= 10 * eps / r[shortcut]), rel[shortcut] * r[shortcut] / eps
    assert np.all(rel[~shortcut] <= eps / np.sqrt(r[~shortcut])), rel[~shortcut]
    assert rel[r >= 1e-16].max() < 2.5e-9
    assert res.degenerate[exact].all() and np.isnan(res.t[exact]).all()
    # residuals at the rounding level of a mean of 1e4 count as none (glm's documented
    # rule); everything above has a finite t, and nothing anywhere is infinite
    assert np.isfinite(res.t[ratios >= 1e-14]).all()
    assert not np.isinf(res.t).any()


@pytest.mark.parametrize("seed", range(4))
def test_one_product_matches_statsmodels_near_exact_fits(seed):
    """t, standard error, residual variance and R^2 equal statsmodels OLS (reference
    library) down to 1 - R^2 = 1e-8. statsmodels works on the uncentred data, whose
    residuals carry rounding of about eps * mean * sqrt(n); the tolerance is that error
    relative to the residual size, which is why the check stops at 1e-8."""
    X, Y, ratios = _near_exact_problem(seed + 100)
    c = np.zeros(X.shape[1])
    c[0], c[1] = 1.0, -0.5
    res = fit(X, Y, c, keep_series=True)
    for v in np.flatnonzero((ratios >= 1e-8) & (ratios > 0)):
        sm_fit = sm.OLS(Y[:, v], X).fit()
        tt = sm_fit.t_test(c)
        tol = 1e-10 + 50 * np.finfo(float).eps * 1e4 * np.sqrt(X.shape[0]) / np.sqrt(sm_fit.ssr)
        assert_allclose(res.sigma2[v], sm_fit.scale, rtol=tol)
        assert_allclose(res.t[v], float(np.squeeze(tt.tvalue)), rtol=tol)
        assert_allclose(np.sqrt(res.variance[v]), float(np.squeeze(tt.sd)), rtol=tol)
        assert_allclose(res.r2[v], sm_fit.rsquared, rtol=1e-12)
        assert_allclose(res.betas[:, v], sm_fit.params, rtol=1e-9, atol=1e-9)


def test_one_product_same_for_one_voxel_and_a_batch():
    """One fitting path: a voxel fitted alone, with or without its residuals kept, gives
    the same t as in a batch of thousands (to rounding of the block's BLAS product)."""
    X, Y, ratios = _near_exact_problem(7)
    rng = np.random.default_rng(7)
    big = np.column_stack([Y, 10000 + rng.normal(0, 30, (Y.shape[0], 3000))])
    c = np.eye(X.shape[1])[1]
    batch = fit(X, big, c, keep_series=False)
    for v in range(0, Y.shape[1], 5):
        one = fit(X, Y[:, v], c, keep_series=True)
        if ratios[v] == 0:
            assert one.degenerate[0] and batch.degenerate[v]
            continue
        assert_allclose(one.t[0], batch.t[v], rtol=1e-9)
        assert_allclose(one.sigma2[0], batch.sigma2[v], rtol=1e-9)
