"""Tests of voxelscope.core.diagnostics against outside references.

References (named beside each test):
* statsmodels: ``tsa.stattools.acf``, ``stats.stattools.durbin_watson``,
  ``stats.diagnostic.acorr_ljungbox``, ``stats.outliers_influence.OLSInfluence`` and
  ``variance_inflation_factor``;
* scipy: ``ndimage.distance_transform_edt`` is what the code uses, so edge distances are
  checked against a brute-force search instead; ``stats.median_abs_deviation``;
* Durbin & Watson (1950): DW is about 2 (1 - rho) for AR(1) residuals (from memory).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats as sstats
from statsmodels.regression.linear_model import OLS
from statsmodels.stats.diagnostic import acorr_ljungbox
from statsmodels.stats.outliers_influence import OLSInfluence, variance_inflation_factor
from statsmodels.stats.stattools import durbin_watson as sm_durbin_watson
from statsmodels.tsa.stattools import acf as sm_acf

from voxelscope.core.diagnostics import (
    RunSummary,
    acf,
    durbin_watson,
    influence,
    ljung_box,
    robust_spikes,
    run_summary,
    variance_inflation,
)
from voxelscope.core.glm import prepare

SEEDS = [0, 1, 2, 3, 4]


def _random_design(rng: np.random.Generator, n: int, p: int, constant: bool = True) -> np.ndarray:
    X = rng.standard_normal((n, p))
    X[:, 0] += 0.6 * X[:, 1]  # some correlation between columns, so VIFs differ from 1
    if constant:
        X = np.column_stack([X, np.ones(n)])
    return X


def _ar1(rng: np.random.Generator, n: int, rho: float) -> np.ndarray:
    e = rng.standard_normal(n)
    out = np.empty(n)
    out[0] = e[0] / math.sqrt(1 - rho * rho)
    for t in range(1, n):
        out[t] = rho * out[t - 1] + e[t]
    return out


# ----------------------------------------------------------------------------- autocorrelation


@pytest.mark.parametrize("seed", SEEDS)
def test_acf_matches_statsmodels(seed):
    """Reference: statsmodels.tsa.stattools.acf (nlags=20, fft=False)."""
    rng = np.random.default_rng(seed)
    r = _ar1(rng, int(rng.integers(60, 400)), float(rng.uniform(-0.5, 0.8))) + 3.0
    np.testing.assert_allclose(acf(r, 20), sm_acf(r, nlags=20, fft=False), rtol=0, atol=1e-12)


@pytest.mark.parametrize("seed", SEEDS)
def test_durbin_watson_matches_statsmodels(seed):
    """Reference: statsmodels.stats.stattools.durbin_watson."""
    rng = np.random.default_rng(seed)
    r = _ar1(rng, 250, float(rng.uniform(-0.5, 0.8)))
    assert durbin_watson(r) == pytest.approx(float(sm_durbin_watson(r)), rel=1e-12)


@pytest.mark.parametrize("seed", SEEDS)
def test_ljung_box_matches_statsmodels(seed):
    """Reference: statsmodels.stats.diagnostic.acorr_ljungbox(lags=[10]) lb_stat, lb_pvalue."""
    rng = np.random.default_rng(seed)
    r = _ar1(rng, 200, float(rng.uniform(0.0, 0.3)))
    q, p = ljung_box(r, 10)
    ref = acorr_ljungbox(r, lags=[10])
    assert q == pytest.approx(float(ref["lb_stat"].iloc[0]), rel=1e-10)
    assert p == pytest.approx(float(ref["lb_pvalue"].iloc[0]), rel=1e-8, abs=1e-300)


@pytest.mark.parametrize("rho", [0.0, 0.3, 0.6, 0.85])
def test_durbin_watson_is_about_two_times_one_minus_rho(rho):
    """Durbin & Watson (1950), from memory: DW ~ 2 (1 - rho_hat) for AR(1) residuals.

    The exact gap is (r_1^2 + r_n^2) / sum r^2 (an identity of the two sums), which is small
    for a long series.
    """
    rng = np.random.default_rng(int(rho * 100))
    r = _ar1(rng, 2000, rho)
    r -= r.mean()  # residuals of a model with a constant have mean zero
    a = acf(r, 1)
    assert durbin_watson(r) == pytest.approx(2 * (1 - a[1]), abs=0.01)
    assert a[1] == pytest.approx(rho, abs=0.06)


def test_constant_series_gives_nan():
    """A constant series has no autocorrelation (0/0): NaN, not an exception."""
    assert np.all(np.isnan(acf(np.ones(30), 5)))
    assert math.isnan(durbin_watson(np.zeros(30)))
    assert all(math.isnan(v) for v in ljung_box(np.ones(30)))


# ----------------------------------------------------------------------------- influence, VIF


@pytest.mark.parametrize("seed", SEEDS)
def test_influence_matches_statsmodels(seed):
    """Reference: statsmodels OLSInfluence: hat_matrix_diag, cooks_distance[0],
    resid_studentized_external, on the same design and residuals."""
    rng = np.random.default_rng(seed)
    n, p = int(rng.integers(40, 200)), int(rng.integers(2, 7))
    X = _random_design(rng, n, p)
    y = X @ rng.standard_normal(X.shape[1]) + rng.standard_normal(n)
    y[int(rng.integers(n))] += 6.0  # one outlier, so the measures are not all alike
    res = OLS(y, X).fit()
    ref = OLSInfluence(res)
    got = influence(prepare(X), res.resid)
    np.testing.assert_allclose(got.leverage, ref.hat_matrix_diag, rtol=1e-10, atol=1e-13)
    np.testing.assert_allclose(got.cooks, ref.cooks_distance[0], rtol=1e-9, atol=1e-14)
    np.testing.assert_allclose(
        got.studentized, ref.resid_studentized_external, rtol=1e-9, atol=1e-12
    )
    assert got.df == int(res.df_resid)


def test_influence_leverage_one_is_nan():
    """A column non-zero at one volume fits that volume exactly (h = 1): NaN, no warning."""
    rng = np.random.default_rng(7)
    n = 30
    spike = np.zeros(n)
    spike[5] = 1.0
    X = np.column_stack([rng.standard_normal(n), spike, np.ones(n)])
    y = rng.standard_normal(n)
    e = y - X @ np.linalg.lstsq(X, y, rcond=None)[0]
    got = influence(X, e)
    assert got.leverage[5] == pytest.approx(1.0)
    assert np.isnan(got.cooks[5]) and np.isnan(got.studentized[5])
    assert np.all(np.isfinite(np.delete(got.cooks, 5)))


@pytest.mark.parametrize("seed", SEEDS)
@pytest.mark.parametrize("constant", [True, False])
@pytest.mark.parametrize("standardize", [True, False])
def test_vif_matches_statsmodels(seed, constant, standardize):
    """Reference: statsmodels.stats.outliers_influence.variance_inflation_factor on the full
    design (the constant column included when there is one), with the same ``standardize``
    choice (statsmodels 0.15 standardizes by default; older releases used the raw columns)."""
    rng = np.random.default_rng(seed)
    X = _random_design(rng, int(rng.integers(30, 150)), int(rng.integers(2, 6)), constant)
    X[:, 1] += 2.0  # a non-zero mean, so centred and uncentred R^2 differ
    names = [f"c{j}" for j in range(X.shape[1])]
    got = variance_inflation(X, names, standardize=standardize)
    for j, name in enumerate(names):
        ref = variance_inflation_factor(X, j, standardize=standardize)
        assert got[name] == pytest.approx(ref, rel=1e-9)


# ----------------------------------------------------------------------------- spikes


@pytest.mark.parametrize("seed", SEEDS)
def test_robust_spikes_threshold_and_hits(seed):
    """Reference: scipy.stats.median_abs_deviation(scale='normal') (MAD * 1.4826); the planted
    spikes (20 robust SDs) are found and nothing else in Gaussian noise."""
    rng = np.random.default_rng(seed)
    s = 10 + rng.standard_normal(400)
    planted = sorted(int(v) for v in rng.choice(np.arange(1, 400), 3, replace=False))
    s[planted] += 20.0
    s[0] = np.nan
    idx, thr = robust_spikes(s, 5.0)
    ok = s[1:]
    mad = sstats.median_abs_deviation(ok, scale="normal")
    assert thr == pytest.approx(np.median(ok) + 5.0 * mad, rel=1e-4)  # 1.4826 vs 1/0.67449
    assert idx == planted


def test_robust_spikes_flat_series_has_none():
    """A series with zero MAD has no robust scale: no spikes are claimed."""
    assert robust_spikes(np.ones(20))[0] == []


# ----------------------------------------------------------------------------- run summary


class VolumeRun:
    """A tiny stand-in with the Run contract the checks use: mask(), voxel_size, volume(t)."""

    def __init__(self, data: np.ndarray, mask: np.ndarray, voxel_size):
        self.data = np.asarray(data, dtype=np.float32)
        self._mask = mask
        self.shape = mask.shape
        self.n_volumes = data.shape[-1]
        self.voxel_size = tuple(voxel_size)
        self.affine = np.diag([*voxel_size, 1.0])
        self.chunk_calls = 0
        self.volume_calls = 0

    def mask(self):
        return self._mask

    def volume(self, t):
        self.volume_calls += 1
        return self.data[..., t]


class FakeRun(VolumeRun):
    """Adds iter_rows (voxel-major chunks in C order, as Run.iter_rows)."""

    def iter_rows(self, mask=None, chunk_voxels=7):
        self.chunk_calls += 1
        mask = self._mask if mask is None else mask
        flat = np.flatnonzero(mask)
        rows = self.data.reshape(-1, self.n_volumes)
        for i in range(0, flat.size, chunk_voxels):
            yield flat[i : i + chunk_voxels], rows[flat[i : i + chunk_voxels]]


def _ellipsoid(shape, radii):
    g = np.indices(shape).astype(float)
    c = (np.array(shape) - 1) / 2.0
    r = sum(((g[a] - c[a]) / radii[a]) ** 2 for a in range(3))
    return r <= 1.0


def test_edge_distance_brute_force():
    """Reference: brute-force minimum Euclidean distance (mm) from each mask voxel to any
    voxel outside the mask, the grid border counting as outside."""
    mask = _ellipsoid((11, 9, 7), (4.6, 3.8, 2.9))
    vs = (2.0, 3.0, 4.0)
    run = FakeRun(np.zeros((*mask.shape, 3)), mask, vs)
    rs = RunSummary(run)  # refers to the run weakly: keep it alive
    padded = np.pad(mask, 1)
    outside = np.argwhere(~padded).astype(float) * vs
    for ijk in np.argwhere(mask)[::3]:
        p = (ijk + 1).astype(float) * vs
        expect = np.sqrt(((outside - p) ** 2).sum(axis=1)).min()
        assert rs.edge_distance[tuple(ijk)] == pytest.approx(expect, rel=1e-12)
    assert np.all(rs.edge_distance[~mask] == 0)


def test_volume_rms_change_and_spike():
    """Reference: the definition sqrt(mean over mask of (v_t - v_{t-1})^2), by numpy on the
    full 4D array; a whole-brain jump at volume 25 is a spike at 25 and 26."""
    rng = np.random.default_rng(11)
    shape, T = (6, 5, 4), 50
    mask = _ellipsoid(shape, (2.8, 2.4, 2.0))
    data = 100 + rng.standard_normal((*shape, T))
    data[..., 25] += 8.0
    run = FakeRun(data, mask, (3.0, 3.0, 3.0))
    rs = RunSummary(run)
    masked = data.astype(np.float32).astype(float)[mask]  # (n_voxels, T)
    expect = np.sqrt(np.mean(np.diff(masked, axis=1) ** 2, axis=0))
    np.testing.assert_allclose(rs.volume_rms_change[1:], expect, rtol=1e-10)
    assert np.isnan(rs.volume_rms_change[0])
    assert rs.rms_spikes == [25, 26]
    # the volume-by-volume path gives the same series
    vo = VolumeRun(data, mask, (3.0, 3.0, 3.0))
    np.testing.assert_allclose(RunSummary(vo).volume_rms_change[1:], expect, rtol=1e-10)
    assert vo.volume_calls == T


def test_run_summary_is_cached_per_run():
    """A second click reuses the per-run work (the data are read once); another run gets its
    own summary."""
    rng = np.random.default_rng(2)
    mask = np.ones((3, 3, 3), bool)
    a = FakeRun(rng.standard_normal((3, 3, 3, 20)), mask, (2.0, 2.0, 2.0))
    b = FakeRun(rng.standard_normal((3, 3, 3, 20)), mask, (2.0, 2.0, 2.0))
    s1 = run_summary(a)
    _ = s1.volume_rms_change
    s2 = run_summary(a)
    _ = s2.volume_rms_change
    assert s1 is s2 and a.chunk_calls == 1
    assert run_summary(b) is not s1
