"""voxelscope.core.glm with left-out volumes, and its rank and conditioning rules.

References (outside the project):

* statsmodels ``OLS(...).fit()`` and ``t_test`` on the kept rows only: betas, standard
  errors, t, p, df, residual variance, R².
* statsmodels ``GLS(y, X, sigma=V)`` with ``V[i, j] = rho^|t_i - t_j|`` over the kept volume
  times (the AR(1) correlation of a series sampled at those times; standard AR(1) algebra,
  from memory): betas, standard errors and t must be equal to ours for the same rho. Our
  ``sigma2`` is in units of the innovation variance of one step, ``(1 - rho^2)`` times
  statsmodels' ``scale`` (the module's documented Prais-Winsten convention).
* ``numpy.linalg.cond`` for the condition number of the design with unit-norm columns.

Designs, censoring patterns and data are random and unknown to the code under test.
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose, assert_array_equal

from voxelscope.core.design import dct_drift
from voxelscope.core.errors import ModelError
from voxelscope.core.glm import CONDITION_LIMIT, RANK_TOL, fit, prais_winsten, prepare


def _random_case(rng, n_voxels=4):
    n = int(rng.integers(60, 180))
    p = int(rng.integers(2, 7))
    X = np.column_stack([rng.standard_normal((n, p - 1)).cumsum(axis=0) * 0.1, np.ones(n)])
    X[:, 0] = rng.standard_normal(n)
    keep = rng.random(n) > rng.uniform(0.05, 0.35)
    keep[: int(rng.integers(0, 4))] = False  # often the first volumes too
    Y = (
        100
        + X[:, :-1] @ rng.standard_normal((p - 1, n_voxels))
        + rng.standard_normal((n, n_voxels))
    )
    c = np.zeros(p)
    c[0] = 1.0
    if p > 2:
        c[1] = -0.5
    return X, keep, Y, c


@pytest.mark.parametrize("seed", range(6))
def test_ols_on_kept_rows_equals_statsmodels(seed):
    rng = np.random.default_rng(1000 + seed)
    X, keep, Y, c = _random_case(rng)
    prep = prepare(X, keep=keep)
    res = fit(prep, Y, c)
    Xk = X[keep]
    assert res.df == keep.sum() - X.shape[1]
    assert res.fitted.shape == Y.shape and res.residuals.shape == Y.shape
    assert_array_equal(res.keep, keep)
    for v in range(Y.shape[1]):
        m = sm.OLS(Y[keep, v], Xk).fit()
        tt = m.t_test(c)
        assert_allclose(res.betas[:, v], m.params, rtol=1e-9, atol=1e-9)
        assert_allclose(res.estimate[v], float(np.squeeze(tt.effect)), rtol=1e-9)
        assert_allclose(res.variance[v], float(np.squeeze(tt.sd)) ** 2, rtol=1e-9)
        assert_allclose(res.t[v], float(np.squeeze(tt.tvalue)), rtol=1e-9)
        assert_allclose(res.p[v], float(np.squeeze(tt.pvalue)), rtol=1e-7)
        assert_allclose(res.sigma2[v], m.scale, rtol=1e-9)
        assert_allclose(res.r2[v], m.rsquared, rtol=1e-9)
        assert res.df == int(m.df_resid)
        # every row keeps its fitted value and residual, left-out rows included
        assert_allclose(res.fitted[:, v], X @ m.params, rtol=1e-10)
        assert_allclose(res.residuals[:, v], Y[:, v] - X @ m.params, atol=1e-8)


def _ar1_noise(rng, n, rho, n_voxels):
    e = rng.standard_normal((n, n_voxels))
    out = np.empty_like(e)
    out[0] = e[0] / np.sqrt(1 - rho * rho)
    for t in range(1, n):
        out[t] = rho * out[t - 1] + e[t]
    return out


@pytest.mark.parametrize("seed", range(6))
def test_ar1_with_gaps_equals_gls_over_kept_times(seed):
    """The whitening equals GLS with covariance rho^|t_i - t_j| over the kept volume times
    (statsmodels GLS), for each voxel's own rho."""
    rng = np.random.default_rng(2000 + seed)
    X, keep, _Y, c = _random_case(rng)
    n = X.shape[0]
    rhos = rng.uniform(-0.3, 0.8, 3)
    Y = np.column_stack([100 + X[:, 0] * 2 + _ar1_noise(rng, n, r, 1)[:, 0] for r in rhos])
    res = fit(prepare(X, keep=keep), Y, c, noise="ar1")
    times = np.flatnonzero(keep)
    assert np.diff(times).max() > 1  # there are gaps
    assert res.df == keep.sum() - X.shape[1]
    for v in range(Y.shape[1]):
        rho = float(res.rho[v])
        V = rho ** np.abs(times[:, None] - times[None, :])
        m = sm.GLS(Y[keep, v], X[keep], sigma=V).fit()
        tt = m.t_test(c)
        assert_allclose(res.betas[:, v], m.params, rtol=1e-8, atol=1e-8)
        assert_allclose(res.t[v], float(np.squeeze(tt.tvalue)), rtol=1e-8)
        assert_allclose(res.variance[v], float(np.squeeze(tt.sd)) ** 2, rtol=1e-8)
        assert_allclose(res.sigma2[v], m.scale * (1 - rho * rho), rtol=1e-8)
        assert_allclose(res.fitted[:, v], X @ m.params, rtol=1e-9)


def test_gap_whitening_is_gls_whitening():
    """prais_winsten with steps: W'W equals (1 - rho^2) V^-1 for V = rho^|t_i - t_j|
    (inverse by numpy.linalg.inv)."""
    times = np.array([0, 1, 2, 5, 6, 9, 10, 11, 15])
    rho = 0.62
    W = prais_winsten(np.eye(times.size), rho, steps=np.diff(times))
    V = rho ** np.abs(times[:, None] - times[None, :])
    assert_allclose(W.T @ W, (1 - rho**2) * np.linalg.inv(V), atol=1e-12)
    # all steps 1: the plain Prais-Winsten transform
    a = np.arange(5.0) ** 2
    assert_allclose(prais_winsten(a, 0.3, steps=np.ones(4, int)), prais_winsten(a, 0.3))


def test_rho_uses_neighbours_one_volume_apart():
    """The lag-1 estimate with gaps: products of residuals one volume apart, scaled by
    (n - 1) / pairs (the module's documented rule), from OLS residuals of the kept rows."""
    rng = np.random.default_rng(7)
    n = 150
    X = np.column_stack([rng.standard_normal(n), np.ones(n)])
    keep = np.ones(n, bool)
    keep[[3, 4, 40, 90, 91, 92, 130]] = False
    y = 5 + X[:, 0] + _ar1_noise(rng, n, 0.5, 1)[:, 0]
    res = fit(prepare(X, keep=keep), y, [1, 0], noise="ar1")
    r = sm.OLS(y[keep], X[keep]).fit().resid
    times = np.flatnonzero(keep)
    pairs = np.flatnonzero(np.diff(times) == 1) + 1
    want = np.sum(r[pairs] * r[pairs - 1]) / np.sum(r * r) * (r.size - 1) / pairs.size
    assert_allclose(res.rho[0], want, rtol=1e-10)


def test_all_kept_is_the_plain_fit():
    rng = np.random.default_rng(3)
    X, _keep, Y, c = _random_case(rng)
    for noise in ("ols", "ar1"):
        a = fit(prepare(X), Y, c, noise=noise)
        b = fit(prepare(X, keep=np.ones(X.shape[0], bool)), Y, c, noise=noise)
        assert b.keep is None
        assert_array_equal(a.t, b.t)


def test_too_few_kept_volumes_and_empty_columns():
    X = np.column_stack([np.r_[np.zeros(5), np.ones(5)], np.ones(10)])
    with pytest.raises(ModelError, match="all zero on the kept volumes"):
        prepare(X, ["late", "constant"], keep=np.r_[np.ones(5, bool), np.zeros(5, bool)])
    with pytest.raises(ModelError, match="1 kept volume \\(9 left out\\)"):
        prepare(X, keep=np.r_[True, np.zeros(9, bool)])


def test_six_digit_near_duplicate_is_rank_deficient_and_named():
    """A column that is a sum of two others, written to six significant digits, counts as
    dependent; the message names the three columns and the fix."""
    rng = np.random.default_rng(11)
    n = 120
    a, b = rng.standard_normal(n), rng.standard_normal(n)
    s = np.array([float(f"{v:.6g}") for v in a + 3 * b])
    X = np.column_stack([rng.standard_normal(n), a, b, s, np.ones(n)])
    names = ["tone", "csf", "white_matter", "csf_wm", "constant"]
    with pytest.raises(ModelError) as err:
        prepare(X, names)
    msg = str(err.value)
    assert "rank 4 of 5" in msg and "'csf'" in msg and "'white_matter'" in msg
    assert "'csf_wm'" in msg and "'tone'" not in msg and "drop one" in msg
    # the plain floating-point rank (numpy's default tolerance) misses it
    assert np.linalg.matrix_rank(X) == 5
    assert RANK_TOL == 1e-5


def test_file_cosines_next_to_our_drift_name_the_fix():
    n, tr = 200, 2.0
    drift = dct_drift(n, tr, 128.0)
    cos = np.array([[float(f"{v:.6g}") for v in row] for row in drift])
    X = np.column_stack([np.sin(np.arange(n) / 7.0), cos, drift, np.ones(n)])
    names = (
        ["tone"]
        + [f"cosine{k:02d}" for k in range(6)]
        + [f"drift_{k + 1}" for k in range(6)]
        + ["constant"]
    )
    with pytest.raises(ModelError) as err:
        prepare(X, names)
    msg = str(err.value)
    assert "rank 8 of 14" in msg and "high-pass filter off" in msg and "'cosine03'" in msg


def test_compcor_duplicates_say_choose_fewer():
    rng = np.random.default_rng(5)
    a = np.linalg.qr(rng.standard_normal((100, 3)))[0]
    X = np.column_stack([a, np.round(a[:, 0], 6), np.ones(100)])
    names = ["a_comp_cor_00", "a_comp_cor_01", "a_comp_cor_02", "c_comp_cor_00", "constant"]
    with pytest.raises(ModelError, match="fewer CompCor"):
        prepare(X, names)


def test_condition_number_warning():
    """Above CONDITION_LIMIT (numpy.linalg.cond of the unit-norm design) one warning names
    the overlapping columns; well-conditioned designs give none."""
    rng = np.random.default_rng(9)
    n = 150
    a = rng.standard_normal(n)
    near = a + 3e-5 * rng.standard_normal(n)
    X = np.column_stack([rng.standard_normal(n), a, near, np.ones(n)])
    Xn = X / np.linalg.norm(X, axis=0)
    assert CONDITION_LIMIT < np.linalg.cond(Xn) < 1 / RANK_TOL
    prep = prepare(X, ["tone", "trans_x", "trans_x_copy", "constant"])
    (w,) = prep.warnings
    assert f"{np.linalg.cond(Xn):.2g}" in w and "trans_x, trans_x_copy" in w and "1e+04" in w
    ok = prepare(np.column_stack([rng.standard_normal(n), np.ones(n)]))
    assert ok.warnings == ()


@pytest.mark.parametrize("noise", ["ols", "ar1"])
def test_maps_leave_out_the_same_volumes(noise):
    """A whole-volume map with left-out volumes equals, voxel by voxel, statsmodels on the
    kept rows (OLS) or GLS over the kept volume times with the map's rho (AR(1))."""
    from voxelscope.core.events import Condition
    from voxelscope.core.maps import ArrayRun, compute_map
    from voxelscope.core.model import Analysis, ModelSettings

    rng = np.random.default_rng(21)
    n, tr, shape = 120, 1.25, (3, 4, 2)
    a = Analysis([Condition("tone", [5.0, 45.0, 85.0, 125.0], [15.0] * 4)], n, tr)
    s = ModelSettings(noise=noise, drop_volumes=4)
    x = a.design("gamma", s).column("tone")
    data = (1000 + 30 * x + 5 * _ar1_noise(rng, n, 0.4, 24).T.reshape(*shape, n)).astype(np.float32)
    data[..., :4] += 200  # what the dropped volumes hide
    m = compute_map(ArrayRun(data), a, s, "gamma", mask=np.ones(shape, bool))
    X = a.design("gamma", s).X
    w = a.contrast_weights("gamma", s)
    keep = np.arange(n) >= 4
    assert m.df == n - 4 - X.shape[1]
    for ijk in [(0, 0, 0), (1, 2, 1), (2, 3, 0)]:
        y = data[ijk].astype(np.float64)
        if noise == "ols":
            ref = sm.OLS(y[keep], X[keep]).fit()
        else:
            times = np.flatnonzero(keep)
            V = float(m.rho[ijk]) ** np.abs(times[:, None] - times[None, :])
            ref = sm.GLS(y[keep], X[keep], sigma=V).fit()
        assert m.t[ijk] == pytest.approx(float(np.squeeze(ref.t_test(w).tvalue)), rel=1e-5)


def _censored_analysis():
    """A block design whose confounds table marks non-steady-state volumes 0-2 and has a
    framewise displacement column; the voxel's first volumes carry a large transient."""
    import io

    from voxelscope.core.confounds import parse_confounds
    from voxelscope.core.events import Condition
    from voxelscope.core.model import Analysis

    rng = np.random.default_rng(33)
    n = 150
    fd = np.abs(rng.standard_normal(n)) * 0.1
    fd[[40, 41, 97]] = 0.9
    lines = [
        "non_steady_state_outlier00\tnon_steady_state_outlier01\t"
        "non_steady_state_outlier02\tframewise_displacement"
    ]
    for i in range(n):
        cells = ["1" if i == k else "0" for k in range(3)]
        cells.append("n/a" if i == 0 else f"{fd[i]:.6g}")
        lines.append("\t".join(cells))
    conf = parse_confounds(io.StringIO("\n".join(lines) + "\n"), "c.tsv")
    conds = [Condition("tap", [12.0, 60.0, 110.0, 160.0], [15.0] * 4)]
    a = Analysis(conds, n, 1.25, conf)
    return a, rng, n


def test_checks_use_the_kept_volumes_only():
    """Durbin-Watson of the kept OLS residuals (statsmodels durbin_watson), studentized
    residuals of the kept rows (statsmodels OLSInfluence), NaN at left-out volumes; the
    transient in the left-out volumes is never an outlier."""
    from statsmodels.stats.outliers_influence import OLSInfluence
    from statsmodels.stats.stattools import durbin_watson

    from voxelscope.core.checks import voxel_checks
    from voxelscope.core.model import ModelSettings

    a, rng, n = _censored_analysis()
    s = ModelSettings(kernels=("gamma",), censor_fd_mm=0.5, confound_columns=())
    ex = a.excluded_volumes(s)
    assert sorted(ex) == [0, 1, 2, 40, 41, 97]
    X = a.design("gamma", s).X
    y = 500 + 3 * X[:, 0] + rng.standard_normal(n)
    y[:3] += 80
    c = voxel_checks(a, s, "gamma", y)
    keep = np.ones(n, bool)
    keep[sorted(ex)] = False
    m = sm.OLS(y[keep], X[keep]).fit()
    assert c.excluded_volumes == (0, 1, 2, 40, 41, 97)
    assert c.df == int(m.df_resid)
    assert c.durbin_watson == pytest.approx(durbin_watson(m.resid), rel=1e-10)
    inf = OLSInfluence(m)
    assert_allclose(c.studentized[keep], inf.resid_studentized_external, rtol=1e-8)
    assert_allclose(c.cooks[keep], inf.cooks_distance[0], rtol=1e-8)
    assert np.isnan(c.studentized[~keep]).all()
    assert not set(c.outlier_volumes) & set(ex) and not set(c.influential_volumes) & set(ex)
    assert "c.tsv" not in " ".join(f.text for f in c.flags)


def test_fir_estimate_uses_the_kept_volumes():
    """The FIR estimate equals statsmodels OLS of the FIR design on the kept rows."""
    from voxelscope.core.hrf import get_kernel
    from voxelscope.core.model import ModelSettings
    from voxelscope.core.timing import FIR_SPAN_S, fir_estimate

    a, rng, n = _censored_analysis()
    s = ModelSettings(kernels=("gamma",), censor_fd_mm=0.5, confound_columns=(), noise="ols")
    y = 500 + rng.standard_normal(n)
    y[:3] += 80
    est = fir_estimate(a, s, y, "tap")
    fk = get_kernel("fir", n_bins=int(np.ceil(FIR_SPAN_S / a.tr - 1e-9)), bin_s=a.tr)
    d = a.design(fk, s)
    keep = np.ones(n, bool)
    keep[sorted(a.excluded_volumes(s))] = False
    m = sm.OLS(y[keep], d.X[keep]).fit()
    cols = list(d.condition_columns["tap"])
    assert_allclose(est.estimate, m.params[cols], rtol=1e-9, atol=1e-9)
    assert_allclose(est.se, m.bse[cols], rtol=1e-9)


def test_sessions_and_reports_keep_the_left_out_volumes(tmp_path):
    from voxelscope.core.model import ModelSettings
    from voxelscope.core.model_json import FieldCheck, model_to_json, read_model_fields
    from voxelscope.core.report import _settings_rows

    a, _rng, _n = _censored_analysis()
    s = ModelSettings(drop_volumes=5, censor_fd_mm=0.5, confound_columns=())
    rows = dict(_settings_rows(s, a))
    assert rows["Volumes dropped at the start"] == "5"
    assert rows["Framewise-displacement limit"].startswith("0.5 mm")
    assert rows["Volumes left out"].startswith("8: 0 (non-steady-state")
    assert "97 (framewise displacement 0.90 mm > 0.5 mm)" in rows["Volumes left out"]

    c = FieldCheck("s.json")  # the session reader's field checker
    back = read_model_fields(model_to_json(s), c, [])
    assert back.drop_volumes == 5 and back.censor_fd_mm == 0.5


def test_null_false_positive_rates_with_censoring():
    """Null simulation: 4000 voxels of pure noise, a block regressor, 15% of volumes left
    out at random (and the first three). OLS on white noise keeps the nominal 5% (binomial
    SE 0.34%); on AR(1) noise (rho 0.4) OLS is far too liberal and AR(1) with gaps brings
    it close to nominal. Measured when written: OLS 0.050 (white); OLS 0.16 and AR(1) 0.069
    (rho 0.4); the one-step AR(1) estimate is itself a little liberal without gaps (0.065),
    the gaps add about half a point."""
    from scipy import stats

    rng = np.random.default_rng(123)
    n, v = 200, 4000
    t = np.arange(n)
    drift = np.cos(np.pi * np.arange(1, 4)[None, :] * (2 * t[:, None] + 1) / (2 * n))
    X = np.column_stack([((t % 40) < 20).astype(float), drift, np.ones(n)])
    keep = rng.random(n) > 0.15
    keep[:3] = False
    prep = prepare(X, keep=keep)
    c = np.r_[1.0, 0, 0, 0, 0]

    def rate(y, noise):
        r = fit(prep, y, c, noise=noise, keep_series=False)
        return float(np.mean(np.abs(r.t) > stats.t.isf(0.025, r.df)))

    assert abs(rate(rng.standard_normal((n, v)), "ols") - 0.05) < 0.012
    y = _ar1_noise(rng, n, 0.4, v)
    assert rate(y, "ols") > 0.12
    assert 0.035 < rate(y, "ar1") < 0.085


def test_no_choice_on_a_pipeline_table_asks_for_one(tmp_path):
    """Through the core too, a pipeline-sized table never enters the model whole."""
    from tests.confound_tables import write_pipeline_table
    from voxelscope.core.confounds import read_confounds
    from voxelscope.core.errors import InputError
    from voxelscope.core.events import Condition
    from voxelscope.core.model import Analysis, ModelSettings

    p = tmp_path / "c.tsv"
    write_pipeline_table(p, n=200, tr=2.0)
    a = Analysis([Condition("tap", [10.0, 90.0], [20.0, 20.0])], 200, 2.0, read_confounds(p))
    with pytest.raises(InputError, match="motion24"):
        a.fit_voxel(np.random.default_rng(0).standard_normal(200), ModelSettings())
    fits = a.fit_voxel(
        np.random.default_rng(0).standard_normal(200), ModelSettings(confound_columns=())
    )
    assert fits.fits[0].df == 200 - 2 - len(fits.fits[0].design.names)
