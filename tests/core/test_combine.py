"""Tests of voxelscope.core.combine: fixed effects across runs and Cochran's Q.

References:
- statsmodels OLS (``statsmodels.api.OLS(...).fit().t_test``) for each run's contrast
  estimate, its standard error and df, fitted independently of voxelscope's GLM;
- the fixed-effects formulas (common practice): inverse-variance weighted estimate,
  variance ``1 / sum(1/v_i)``, ``df = sum(df_i)``, written out again here in plain numpy;
- Cochran (1954), Biometrics 10:101-129: ``Q = sum(w_i (b_i - b)^2)``, chi-square on
  ``k - 1`` df, with the tail from ``scipy.stats.chi2.sf``; p of t from ``scipy.stats.t``;
- nibabel for the files read through :func:`voxelscope.core.run.open_run`.
"""

from __future__ import annotations

import doctest

import nibabel as nib
import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats

from voxelscope.core import combine
from voxelscope.core.combine import (
    combine_fits,
    compute_combined_map,
    fixed_effects,
    nearest_on_grid,
    run_labels,
    voxel_in_runs,
)
from voxelscope.core.errors import InputError
from voxelscope.core.events import Condition
from voxelscope.core.glm import fit
from voxelscope.core.maps import compute_map
from voxelscope.core.model import Analysis, ModelSettings
from voxelscope.core.run import open_run

TR = 1.25
T = 120


def _conditions(shift: float = 0.0):
    return [
        Condition("tone", [5.0 + shift, 45.0 + shift, 85.0 + shift], [15.0] * 3),
        Condition("tap", [25.0 + shift, 65.0 + shift, 105.0 + shift], [15.0] * 3),
    ]


def test_doctests():
    assert doctest.testmod(combine, optionflags=doctest.ELLIPSIS).failed == 0


def _hand_combination(b, v, d):
    """The fixed-effects formulas and Cochran's Q, written out independently."""
    b, v, d = (np.asarray(x, dtype=float) for x in (b, v, d))
    w = 1.0 / v
    beta = np.sum(w * b) / np.sum(w)
    var = 1.0 / np.sum(w)
    t = beta / np.sqrt(var)
    df = np.sum(d)
    p = 2 * stats.t.sf(abs(t), df)  # scipy.stats.t
    q = np.sum(w * (b - beta) ** 2)
    q_p = stats.chi2.sf(q, len(b) - 1)  # scipy.stats.chi2 (Cochran 1954)
    return beta, var, t, df, p, q, q_p


@pytest.mark.parametrize("kernel", ["double-gamma", "boxcar"])
def test_voxel_combination_equals_formulas_on_statsmodels_fits(kernel):
    """Three runs with different event timings and lengths; each run fitted by statsmodels
    OLS (t_test of the contrast), combined by the formulas; voxelscope fits each run with
    Analysis.fit_voxel (glm.fit) and combines with combine_fits."""
    rng = np.random.default_rng(1501)
    settings = ModelSettings(noise="ols", kernels=(kernel,), contrast="tone - 0.5*tap")
    labels, bs, vs, ds, sm_b, sm_v, sm_d = [], [], [], [], [], [], []
    for i, (n, shift) in enumerate([(120, 0.0), (100, 3.0), (130, -2.0)]):
        a = Analysis(_conditions(shift), n_volumes=n, tr=TR)
        d = a.design(kernel, settings)
        y = 500 + d.X @ rng.normal(0, 2, d.X.shape[1]) + rng.normal(0, 3, n)
        fit = a.fit_voxel(y, settings).by_kernel(kernel)
        labels.append(f"run-{i + 1}")
        bs.append(fit.estimate)
        vs.append(fit.variance)
        ds.append(fit.df)
        w = a.contrast_weights(kernel, settings)
        ref = sm.OLS(y, d.X).fit()
        tt = ref.t_test(w)
        sm_b.append(float(np.squeeze(tt.effect)))
        sm_v.append(float(np.squeeze(tt.sd)) ** 2)
        sm_d.append(float(ref.df_resid))
    got = combine_fits(kernel, "tone - 0.5*tap", labels, bs, vs, ds)
    beta, var, t, df, p, q, q_p = _hand_combination(sm_b, sm_v, sm_d)
    assert got.estimate == pytest.approx(beta, rel=1e-9, abs=1e-12)
    assert got.variance == pytest.approx(var, rel=1e-9)
    assert got.t == pytest.approx(t, rel=1e-9)
    assert got.df == df == sum(ds)
    assert got.p == pytest.approx(p, rel=1e-7, abs=1e-300)
    assert got.q == pytest.approx(q, rel=1e-8, abs=1e-12)
    assert got.q_p == pytest.approx(q_p, rel=1e-7, abs=1e-300)
    # every run's row carries its own t
    for row, b_, v_ in zip(got.runs, sm_b, sm_v):
        assert row["t"] == pytest.approx(b_ / np.sqrt(v_), rel=1e-9)
    # leave-one-out equals the formulas on the other two runs
    for i, lo in enumerate(got.leave_one_out):
        keep = [j for j in range(3) if j != i]
        ref = _hand_combination(
            [sm_b[j] for j in keep], [sm_v[j] for j in keep], [sm_d[j] for j in keep]
        )
        assert lo.run == labels[i]
        assert lo.estimate == pytest.approx(ref[0], rel=1e-9, abs=1e-12)
        # JSON: the earlier key of the estimate stays beside it for older scripts
        assert lo.to_json()["estimate"] == lo.to_json()["beta"] == lo.estimate
        assert lo.t == pytest.approx(ref[2], rel=1e-9)
        assert lo.p == pytest.approx(ref[4], rel=1e-7, abs=1e-300)


def test_df_is_the_sum_of_run_dfs():
    """df = sum(df_i) (common practice)."""
    fe = fixed_effects([1.0, 2.0, 3.0], [1.0, 2.0, 4.0], [50, 60, 70])
    assert fe.df[0] == 180


def test_cochran_q_against_scipy_chi2_on_random_values():
    """Q and its p on random estimates, against the formulas and scipy.stats.chi2."""
    rng = np.random.default_rng(7)
    for k in (2, 3, 4, 7):
        b = rng.normal(0, 2, (k, 200))
        v = rng.uniform(0.1, 3.0, (k, 200))
        d = rng.integers(20, 300, k)
        fe = fixed_effects(b, v, d)
        w = 1 / v
        bb = (w * b).sum(0) / w.sum(0)
        q = (w * (b - bb) ** 2).sum(0)
        np.testing.assert_allclose(fe.estimate, bb, rtol=1e-12, atol=1e-14)
        np.testing.assert_allclose(fe.q, q, rtol=1e-11)
        np.testing.assert_allclose(fe.q_p, stats.chi2.sf(q, k - 1), rtol=1e-9, atol=1e-300)
        t = bb * np.sqrt(w.sum(0))
        np.testing.assert_allclose(fe.p, 2 * stats.t.sf(np.abs(t), d.sum()), rtol=1e-9)


def test_one_run_and_undefined_runs_give_clear_answers():
    fe = fixed_effects([2.0], [4.0], [30])
    assert fe.t[0] == pytest.approx(1.0)
    assert np.isnan(fe.q[0]) and np.isnan(fe.q_p[0])
    c = combine_fits("gamma", "tone", ["a", "b"], [1.0, None], [0.5, None], [30, 30])
    assert c.estimate is None and c.t is None and c.p is None and c.q is None
    assert [(f.id, f.run) for f in c.flags] == [("run-undefined", "b")]
    c = combine_fits("gamma", "tone", ["a", "b"], [1.0, 1.0], [0.5, 0.0], [30, 30])
    assert c.t is None and c.flags[0].run == "b"
    with pytest.raises(InputError):
        combine_fits("gamma", "tone", ["a", "b"], [1.0], [0.5], [30])


def _simulate_runs(rng, amps, n=T, noise=3.0, kernel="double-gamma"):
    """One voxel per run; amplitude of 'tone' per run; returns fits and labels."""
    settings = ModelSettings(kernels=(kernel,))
    bs, vs, ds = [], [], []
    for amp in amps:
        a = Analysis(_conditions(), n_volumes=n, tr=TR)
        x = a.design(kernel, settings).column("tone")
        y = 800 + amp * x + rng.normal(0, noise, n)
        f = a.fit_voxel(y, settings).by_kernel(kernel)
        bs.append(f.estimate)
        vs.append(f.variance)
        ds.append(f.df)
    labels = [f"run-{i + 1}" for i in range(len(amps))]
    return combine_fits(kernel, "tone", labels, bs, vs, ds)


def test_a_voxel_active_in_one_run_only_is_flagged_naming_the_run():
    """Planted: run-3 of four responds to 'tone', the others do not."""
    rng = np.random.default_rng(15)
    c = _simulate_runs(rng, [0.0, 0.0, 6.0, 0.0])
    ids = {(f.id, f.run) for f in c.flags}
    assert ("runs-disagree", None) in ids
    assert ("one-run", "run-3") in ids
    assert not any(f.id == "one-run" and f.run != "run-3" for f in c.flags)
    assert "run-3" in next(f.text for f in c.flags if f.id == "one-run")
    # every run active: no flag
    c = _simulate_runs(rng, [4.0, 4.0, 4.0, 4.0])
    assert c.p < 1e-6 and c.flags == ()


def test_null_simulation_error_rates_of_q_and_combined_t():
    """Null simulation: four runs of pure noise plus the same effect. Cochran's Q flags
    disagreement at about its nominal 5 % (Cochran 1954), and the combined t under no
    effect rejects at about 5 %. 4000 voxels through glm.fit as one batch per run;
    binomial 4-sigma bounds."""
    rng = np.random.default_rng(20261202)
    settings = ModelSettings(noise="ols", kernels=("gamma",))
    n_vox = 4000
    B, V, D = [], [], []
    B0, V0 = [], []
    for _ in range(4):
        a = Analysis(_conditions(), n_volumes=T, tr=TR)
        x = a.design("gamma", settings).column("tone")
        e = rng.standard_normal((T, n_vox))
        _d, prep = a.prepared("gamma", settings)
        w = a.contrast_weights("gamma", settings)
        res = fit(prep, 600 + 2.0 * x[:, None] + e, w, noise="ols")
        res0 = fit(prep, 600 + rng.standard_normal((T, n_vox)), w, noise="ols")
        B.append(res.estimate)
        V.append(res.variance)
        D.append(res.df)
        B0.append(res0.estimate)
        V0.append(res0.variance)
    fe = fixed_effects(np.array(B), np.array(V), D)
    rate = np.mean(fe.q_p < combine.DISAGREE_P)
    sd = np.sqrt(0.05 * 0.95 / n_vox)
    assert abs(rate - 0.05) < 4 * sd, rate
    fe0 = fixed_effects(np.array(B0), np.array(V0), D)
    rate0 = np.mean(fe0.p < 0.05)
    assert abs(rate0 - 0.05) < 4 * sd, rate0


def test_run_labels_and_voxel_addressing():
    assert run_labels(["s_run-01_bold.nii", "s_run-02_bold.nii"]) == ["run-01", "run-02"]
    assert run_labels(["a_bold.nii", "a_bold.nii"]) == ["1: a_bold", "2: a_bold"]


# ----------------------------------------------------------------------------- maps


def _write(tmp_path, data, affine, name):
    img = nib.Nifti1Image(np.asarray(data, dtype=np.float32), affine)
    img.header.set_xyzt_units("mm", "sec")
    img.header["pixdim"][4] = TR
    path = tmp_path / name
    nib.save(img, path)
    return path


def _planted_run(rng, shape, affine, shift=0.0):
    """A run whose voxels respond to 'tone' where their centre has x < 7.5 mm."""
    a = Analysis(_conditions(shift), n_volumes=T, tr=TR)
    x = a.design("double-gamma", ModelSettings()).column("tone")
    ijk = np.indices(shape).reshape(3, -1).T
    mm = nib.affines.apply_affine(affine, ijk).reshape(*shape, 3)
    amp = np.where(mm[..., 0] < 7.5, 40.0, 0.0)
    data = 1000 + rng.normal(0, 50, shape)[..., None] + amp[..., None] * x
    data = data + 20 * rng.standard_normal((*shape, T))
    return data, a


def test_same_grid_map_equals_voxel_combination(tmp_path):
    rng = np.random.default_rng(3)
    aff = np.diag([3.0, 3.0, 3.5, 1.0])
    runs, analyses = [], []
    for i in range(3):
        data, a = _planted_run(rng, (5, 4, 3), aff, shift=i)
        runs.append(open_run(_write(tmp_path, data, aff, f"s_run-{i + 1}_bold.nii")))
        analyses.append(a)
    settings = ModelSettings(noise="ols")
    m = compute_combined_map(runs, analyses, settings, "double-gamma", stats=combine.COMBINED_STATS)
    assert m.labels == ("run-1", "run-2", "run-3") and m.resampled == ()
    assert m.df == sum(x.df for x in m.run_maps)
    for ijk in [(0, 0, 0), (1, 2, 1), (4, 3, 2), (3, 1, 0)]:
        fits = [
            an.fit_voxel(r.timeseries(ijk), settings).by_kernel("double-gamma")
            for r, an in zip(runs, analyses)
        ]
        c = combine_fits(
            "double-gamma",
            "tone",
            list(m.labels),
            [f.estimate for f in fits],
            [f.variance for f in fits],
            [f.df for f in fits],
        )
        # maps hold float32
        assert m.t[ijk] == pytest.approx(c.t, rel=2e-5)
        assert m.estimate[ijk] == pytest.approx(c.estimate, rel=2e-5, abs=1e-4)
        assert m.variance[ijk] == pytest.approx(c.variance, rel=2e-5)
        assert m.q[ijk] == pytest.approx(c.q, rel=1e-4, abs=1e-5)
        assert m.q_p[ijk] == pytest.approx(c.q_p, rel=1e-4, abs=1e-6)
        assert m.p[ijk] == pytest.approx(c.p, rel=1e-4, abs=1e-30)
        assert np.sign(m.z[ijk]) == np.sign(c.t)
        assert stats.norm.sf(abs(m.z[ijk])) * 2 == pytest.approx(c.p, rel=1e-3, abs=1e-30)
    assert "fixed effects over 3 runs" in m.describe()


def test_runs_on_different_grids_combine_at_the_same_place_in_mm(tmp_path):
    """Run 2 has another shape, a flipped x axis and centres 1 mm off run 1's: the combined
    map at a run-1 voxel uses run 2's voxel nearest to that voxel's centre in mm, exactly
    what the --mm path (voxel_in_runs) picks, and the planted region (x < 7.5 mm) shows up
    at the right place."""
    rng = np.random.default_rng(4)
    aff1 = np.diag([3.0, 3.0, 3.5, 1.0])
    aff2 = np.array(
        [[-3.0, 0, 0, 19.0], [0, 3.0, 0, -2.0], [0, 0, 3.5, 1.0], [0, 0, 0, 1]], dtype=float
    )
    d1, a1 = _planted_run(rng, (6, 4, 3), aff1)
    d2, a2 = _planted_run(rng, (8, 5, 3), aff2)
    r1 = open_run(_write(tmp_path, d1, aff1, "s_run-1_bold.nii"))
    r2 = open_run(_write(tmp_path, d2, aff2, "s_run-2_bold.nii"))
    settings = ModelSettings(noise="ols")
    m = compute_combined_map([r1, r2], [a1, a2], settings, "double-gamma")
    assert m.resampled == ("run-2",) and "nearest voxel" in m.describe()
    assert m.t.shape == (6, 4, 3)
    checked = 0
    for ijk in np.ndindex(6, 4, 3):
        mm = r1.voxel_to_mm(ijk)
        try:
            places = voxel_in_runs([r1, r2], mm=mm)
        except InputError:
            assert not m.mask[ijk]  # outside run 2
            continue
        assert places[0] == ijk
        f1 = a1.fit_voxel(r1.timeseries(places[0]), settings).by_kernel("double-gamma")
        f2 = a2.fit_voxel(r2.timeseries(places[1]), settings).by_kernel("double-gamma")
        c = combine_fits(
            "double-gamma",
            "tone",
            ["1", "2"],
            [f1.estimate, f2.estimate],
            [f1.variance, f2.variance],
            [f1.df, f2.df],
        )
        assert m.t[ijk] == pytest.approx(c.t, rel=2e-5)
        planted = mm[0] < 7.5
        assert (m.t[ijk] > 8) == planted, (ijk, mm, m.t[ijk])
        checked += 1
    assert checked >= 40
    with pytest.raises(InputError, match=r"different grids.*position in mm") as err:
        voxel_in_runs([r1, r2], voxel=(1, 1, 1))
    assert err.value.remedy == "position"
    assert voxel_in_runs([r1, r1], voxel=(1, 1, 1)) == [(1, 1, 1), (1, 1, 1)]


def test_map_of_a_constant_run_region_is_zero_not_infinite(tmp_path):
    rng = np.random.default_rng(5)
    aff = np.diag([3.0, 3.0, 3.5, 1.0])
    d1, a1 = _planted_run(rng, (5, 4, 3), aff)
    d2, a2 = _planted_run(rng, (5, 4, 3), aff)
    d2[2, 2, 1] = 1000.0  # constant in run 2 only
    r1 = open_run(_write(tmp_path, d1, aff, "a_bold.nii"))
    r2 = open_run(_write(tmp_path, d2, aff, "b_bold.nii"))
    m = compute_combined_map([r1, r2], [a1, a2], ModelSettings(), stats=("t", "p", "z", "q"))
    assert not m.mask[2, 2, 1]
    assert m.t[2, 2, 1] == 0 and m.p[2, 2, 1] == 1 and m.z[2, 2, 1] == 0
    assert np.all(np.isfinite(m.t)) and np.all(np.isfinite(m.z))
    assert m.estimate is None and m.stat("q").shape == (5, 4, 3)
    with pytest.raises(InputError):
        m.stat("q_p")
    with pytest.raises(InputError):
        compute_combined_map([r1, r2], [a1, a2], ModelSettings(), stats=("nonsense",))


def test_one_run_map_equals_the_single_run_map(tmp_path):
    rng = np.random.default_rng(6)
    aff = np.diag([3.0, 3.0, 3.5, 1.0])
    d1, a1 = _planted_run(rng, (5, 4, 3), aff)
    r1 = open_run(_write(tmp_path, d1, aff, "a_bold.nii"))
    one = compute_combined_map([r1], [a1], ModelSettings())
    ref = compute_map(r1, a1, ModelSettings())
    np.testing.assert_allclose(one.t, ref.t, rtol=1e-5, atol=1e-5)
    assert one.df == ref.df


def test_nearest_on_grid_fills_outside():
    src = np.arange(8.0).reshape(2, 2, 2)
    out = nearest_on_grid(src, np.eye(4), (3, 2, 2), np.eye(4))
    assert out[:2].tolist() == src.tolist() and np.all(np.isnan(out[2]))


def test_combined_tails_z_and_neglog10p_against_scipy():
    """p for each tail from scipy.stats.t on sum(df_i), -log10 p from it, and z with the
    same two-sided p from scipy.stats.norm; at an extreme t, -log10 p and z against mpmath
    (the reference for tails beyond float64)."""
    for tail, ref in (
        ("two", lambda t, d: 2 * stats.t.sf(abs(t), d)),
        ("positive", lambda t, d: stats.t.sf(t, d)),
        ("negative", lambda t, d: stats.t.cdf(t, d)),
    ):
        c = combine_fits("gamma", "tone", ["a", "b"], [1.0, 1.4], [0.2, 0.3], [40, 50], tail)
        assert c.tail == tail
        assert c.to_json()["p"] == pytest.approx(ref(c.t, 90), rel=1e-9)
        assert c.neglog10p == pytest.approx(-np.log10(ref(c.t, 90)), rel=1e-9)
        assert c.z == pytest.approx(stats.norm.isf(stats.t.sf(c.t, 90)), rel=1e-9)
    mpmath = pytest.importorskip("mpmath")
    c = combine_fits("gamma", "tone", ["a", "b"], [10.0, 10.0], [1e-4, 1e-4], [100, 100])
    mpmath.mp.dps = 60
    t, df = mpmath.mpf(c.t), 200
    # two-sided tail of t: I_x(df/2, 1/2) with x = df / (df + t^2) (closed form)
    tail = mpmath.betainc(df / 2, 0.5, 0, df / (df + t * t), regularized=True)
    assert c.neglog10p == pytest.approx(float(-mpmath.log10(tail)), rel=1e-9)
    assert c.neglog10p > 330  # beyond float64: p itself underflows, -log10 p does not
    # z with the same two-sided tail: erfc(z / sqrt 2) = tail, solved in logs
    z = mpmath.findroot(
        lambda z: mpmath.log(mpmath.erfc(z / mpmath.sqrt(2))) - mpmath.log(tail), 40
    )
    assert c.z == pytest.approx(float(z), rel=1e-9)


def test_combined_map_neglog10p_and_tail(tmp_path):
    rng = np.random.default_rng(8)
    aff = np.diag([3.0, 3.0, 3.5, 1.0])
    runs, analyses = [], []
    for i in range(2):
        data, a = _planted_run(rng, (5, 4, 3), aff)
        runs.append(open_run(_write(tmp_path, data, aff, f"s_run-{i + 1}_bold.nii")))
        analyses.append(a)
    m = compute_combined_map(
        runs, analyses, ModelSettings(), stats=("t", "p", "neglog10p", "z"), tail="positive"
    )
    assert m.tail == "positive"
    inside = m.mask
    t = m.t[inside].astype(float)
    np.testing.assert_allclose(m.p[inside], stats.t.sf(t, m.df), rtol=2e-4, atol=1e-30)
    small = stats.t.sf(t, m.df) > 1e-30
    np.testing.assert_allclose(
        m.neglog10p[inside][small], -np.log10(stats.t.sf(t[small], m.df)), rtol=2e-4
    )
