"""Tests of voxelscope.core.maps: whole-volume maps equal single-voxel fits.

References: statsmodels OLS (``statsmodels.api.OLS(...).fit().t_test``) and GLSAR
(``statsmodels.regression.linear_model.GLSAR``) for the numbers, scipy.stats.t / norm for
p and z; nibabel for the files read through the real :func:`voxelscope.core.run.open_run`.
"""

from __future__ import annotations

import itertools

import nibabel as nib
import numpy as np
import pytest
from scipy import stats

from voxelscope.core import glm
from voxelscope.core.events import Condition
from voxelscope.core.maps import ArrayRun, Cancelled, MapResult, compute_map, kernel_difference
from voxelscope.core.model import Analysis, ModelSettings
from voxelscope.core.run import open_run

TR = 1.25
T = 120
SHAPE = (6, 5, 4)


def _conditions():
    return [
        Condition("tone", [5.0, 45.0, 85.0, 125.0], [15.0] * 4),
        Condition("tap", [25.0, 65.0, 105.0], [15.0] * 3),
    ]


def _analysis():
    return Analysis(_conditions(), n_volumes=T, tr=TR)


def _data(rng, mean=10000.0, noise=40.0, ar=0.0, shape=SHAPE):
    """Raw-BOLD-like float32 data with a response to 'tone' in part of the grid."""
    a = _analysis()
    x = a.design("double-gamma", ModelSettings()).column("tone")
    e = rng.standard_normal((*shape, T))
    if ar:
        for t in range(1, T):
            e[..., t] += ar * e[..., t - 1]
    amp = np.zeros(shape)
    amp[: shape[0] // 2] = 60.0
    data = mean + rng.normal(0, 200, shape)[..., None] + amp[..., None] * x + noise * e
    return data.astype(np.float32)


def _write(tmp_path, data, affine=None, name="sub-01_task-x_bold.nii"):
    affine = np.diag([3.0, 3.0, 3.5, 1.0]) if affine is None else affine
    img = nib.Nifti1Image(data, affine)
    img.header.set_xyzt_units("mm", "sec")
    img.header["pixdim"][4] = TR
    path = tmp_path / name
    nib.save(img, path)
    return path


def _per_voxel(a, data, settings, kernel, noise="ols", rho_step=None):
    """Reference: the single-voxel path (a batch of one), voxel by voxel, float64 input."""
    _d, prep = a.prepared(kernel, settings)
    w = a.contrast_weights(kernel, settings)
    out = np.full(data.shape[:3], np.nan)
    for ijk in np.ndindex(data.shape[:3]):
        r = glm.fit(prep, data[ijk].astype(np.float64), w, noise=noise, rho_step=rho_step)
        out[ijk] = r.t[0]
    return out


def test_ols_map_equals_per_voxel_fits_on_real_run(tmp_path):
    """Map t, beta, variance equal per-voxel fits through open_run (float32 .nii) to 1e-5
    relative; the map path chunks voxels (chunk of 7 forces many partial chunks)."""
    rng = np.random.default_rng(1)
    data = _data(rng)
    run = open_run(_write(tmp_path, data))
    a = _analysis()
    s = ModelSettings(noise="ols", contrast="tone - tap")
    mask = np.ones(SHAPE, dtype=bool)
    m = compute_map(run, a, s, "double-gamma", mask=mask, chunk_voxels=7)
    ref = _per_voxel(a, data, s, "double-gamma")
    np.testing.assert_allclose(m.t, ref, rtol=1e-5, atol=1e-6)
    assert m.t.dtype == np.float32 and m.mask.all() and m.df == T - len(m.columns)
    _d, prep = a.prepared("double-gamma", s)
    w = a.contrast_weights("double-gamma", s)
    r = glm.fit(prep, data[2, 3, 1].astype(np.float64), w)
    assert m.estimate[2, 3, 1] == pytest.approx(float(r.estimate[0]), rel=1e-5)
    assert m.variance[2, 3, 1] == pytest.approx(float(r.variance[0]), rel=1e-5)


def test_ols_map_matches_statsmodels_at_sampled_voxels(tmp_path):
    """t, beta, variance (c' cov c), p at random voxels equal statsmodels OLS t_test on the
    same design (reference library); z has the same two-sided p (scipy.stats.norm)."""
    sm = pytest.importorskip("statsmodels.api")
    rng = np.random.default_rng(2)
    data = _data(rng)
    run = open_run(_write(tmp_path, data))
    a = _analysis()
    s = ModelSettings(noise="ols", contrast="tap")
    m = compute_map(run, a, s, "gamma")
    X = a.design("gamma", s).X
    w = a.contrast_weights("gamma", s)
    for flat in rng.choice(np.flatnonzero(m.mask), size=8, replace=False):
        ijk = np.unravel_index(flat, SHAPE)
        res = sm.OLS(data[ijk].astype(np.float64), X).fit()
        tt = res.t_test(w)
        assert m.t[ijk] == pytest.approx(float(tt.tvalue.squeeze()), rel=1e-5)
        assert m.estimate[ijk] == pytest.approx(float(tt.effect.squeeze()), rel=1e-5)
        assert m.variance[ijk] == pytest.approx(float(tt.sd.squeeze()) ** 2, rel=1e-5)
        assert m.p[ijk] == pytest.approx(float(tt.pvalue), rel=1e-4, abs=1e-30)
        p_from_z = 2 * stats.norm.sf(abs(float(m.z[ijk])))
        assert p_from_z == pytest.approx(float(tt.pvalue), rel=1e-3, abs=1e-30)
        assert np.sign(m.z[ijk]) == np.sign(m.t[ijk])


def test_ar1_map_binned_against_exact_per_voxel(tmp_path):
    """Binned AR(1) maps against exact per-voxel AR(1) fits (glm.fit with each voxel's own
    rho). Rounding rho to rho_step moves it by up to rho_step/2, and t moves by about 2 x
    that relative (measured): rho_step=0.0005 is within 1e-3 relative, rho_step=0.01 within
    2e-2 (measured 0.8 % here). The exact path (rho_step=None) equals the per-voxel fits to
    1e-6."""
    rng = np.random.default_rng(3)
    data = _data(rng, ar=0.4)
    run = ArrayRun(data)
    a = _analysis()
    s = ModelSettings(noise="ar1")
    mask = np.ones(SHAPE, dtype=bool)
    exact = _per_voxel(a, data, s, "double-gamma", noise="ar1")
    m = compute_map(run, a, s, "double-gamma", mask=mask, rho_step=0.0005, chunk_voxels=50)
    rel = np.abs(m.t - exact) / np.maximum(np.abs(exact), 1.0)
    assert rel.max() < 1e-3
    m = compute_map(run, a, s, "double-gamma", mask=mask, rho_step=0.01, chunk_voxels=50)
    rel = np.abs(m.t - exact) / np.maximum(np.abs(exact), 1.0)
    assert 1e-5 < rel.max() < 2e-2
    assert not np.allclose(m.t, compute_map(run, a, s.with_(noise="ols"), mask=mask).t, rtol=1e-2)
    m2 = compute_map(run, a, s, "double-gamma", mask=mask, rho_step=None)
    np.testing.assert_allclose(m2.t, exact, rtol=1e-6, atol=1e-6)
    assert m.rho is not None and np.all(np.abs(m.rho) < 1)


def test_ar1_map_equals_gls_with_ar1_covariance_and_near_glsar():
    """Prais-Winsten prewhitening is GLS with the exact AR(1) covariance
    Sigma_ij = rho^|i-j| / (1 - rho^2) (Prais & Winsten, 1954): at sampled voxels the exact AR(1)
    map (rho_step=None) equals statsmodels GLS with that Sigma and the map's rho, to 1e-6
    (reference library). statsmodels GLSAR (iterative_fit(maxiter=2): OLS, Yule-Walker rho,
    one whitened fit) drops the first observation and estimates rho its own way, so it
    agrees only to a few percent."""
    sm = pytest.importorskip("statsmodels.api")
    from scipy.linalg import toeplitz

    rng = np.random.default_rng(4)
    data = _data(rng, ar=0.5)
    a = _analysis()
    s = ModelSettings(noise="ar1", contrast="tone")
    m = compute_map(ArrayRun(data), a, s, "double-gamma", mask=np.ones(SHAPE, bool), rho_step=None)
    X = a.design("double-gamma", s).X
    w = a.contrast_weights("double-gamma", s)
    for ijk in [(0, 0, 0), (1, 2, 3), (2, 1, 0), (4, 4, 1)]:
        y = data[ijk].astype(np.float64)
        rho = float(m.rho[ijk])
        sigma = toeplitz(rho ** np.arange(T)) / (1 - rho**2)
        g = sm.GLS(y, X, sigma=sigma).fit()
        tt = g.t_test(w)
        assert m.t[ijk] == pytest.approx(float(tt.tvalue.squeeze()), rel=1e-5)
        assert m.estimate[ijk] == pytest.approx(float(tt.effect.squeeze()), rel=1e-5)
        if ijk[0] < 3:  # responding voxels (large t): relative agreement is meaningful
            gl = sm.GLSAR(y, X, rho=1).iterative_fit(maxiter=2)
            assert m.t[ijk] == pytest.approx(float(gl.t_test(w).tvalue.squeeze()), rel=0.05)


def test_constant_and_outside_voxels_are_zero():
    """A constant voxel gives t = z = 0 and p = 1, flagged degenerate, never a huge t; voxels
    outside the mask are 0 and not in the result mask (common practice for stat maps)."""
    rng = np.random.default_rng(5)
    data = _data(rng)
    data[1, 1, 1] = np.float32(10000.0)  # constant voxel
    data[2, 2, 2] = np.float32(12345.678)
    mask = np.ones(SHAPE, dtype=bool)
    mask[5, 4, 3] = False
    m = compute_map(ArrayRun(data), _analysis(), ModelSettings(), mask=mask)
    for ijk in [(1, 1, 1), (2, 2, 2)]:
        assert m.t[ijk] == 0 and m.z[ijk] == 0 and m.p[ijk] == 1 and m.variance[ijk] == 0
        assert m.degenerate[ijk] and not m.mask[ijk]
    assert m.t[5, 4, 3] == 0 and not m.mask[5, 4, 3] and not m.degenerate[5, 4, 3]
    assert np.all(np.isfinite(m.t)) and np.abs(m.t).max() < 50
    assert m.mask.sum() == mask.sum() - 2


def test_float32_raw_bold_keeps_digits():
    """float32 data with mean 10000 and small noise: the map equals a float64 statsmodels fit
    of the same float32 values to 1e-6 relative (no digits lost to y'y - b'X'y); the same
    data shifted to mean 0 give the same t (t is invariant to adding a constant)."""
    sm = pytest.importorskip("statsmodels.api")
    rng = np.random.default_rng(6)
    data = _data(rng, mean=10000.0, noise=0.5)
    a = _analysis()
    s = ModelSettings(noise="ols")
    m = compute_map(ArrayRun(data), a, s, "double-gamma", mask=np.ones(SHAPE, bool))
    X = a.design("double-gamma", s).X
    w = a.contrast_weights("double-gamma", s)
    ijk = (4, 3, 2)
    t_ref = float(sm.OLS(data[ijk].astype(np.float64), X).fit().t_test(w).tvalue.squeeze())
    assert m.t[ijk] == pytest.approx(t_ref, rel=1e-6)
    centred = (data.astype(np.float64) - data.mean(axis=-1, keepdims=True)).astype(np.float64)
    m0 = compute_map(ArrayRun(centred), a, s, "double-gamma", mask=np.ones(SHAPE, bool))
    np.testing.assert_allclose(m.t, m0.t, rtol=1e-5, atol=1e-5)


def test_progress_and_cancel():
    rng = np.random.default_rng(7)
    run = ArrayRun(_data(rng))
    seen = []
    compute_map(run, _analysis(), ModelSettings(), chunk_voxels=20, progress=seen.append)
    assert seen[0] == 0.0 and seen[-1] == pytest.approx(1.0)
    assert all(b >= a for a, b in itertools.pairwise(seen)) and len(seen) > 3
    calls = []

    def stop(f):
        calls.append(f)
        return len(calls) < 3

    with pytest.raises(Cancelled):
        compute_map(run, _analysis(), ModelSettings(), chunk_voxels=20, progress=stop)
    assert len(calls) == 3


def test_kernel_difference_and_stats_selection():
    rng = np.random.default_rng(8)
    run = ArrayRun(_data(rng))
    a = _analysis()
    mb = compute_map(run, a, ModelSettings(), "boxcar", stats=("t",))
    md = compute_map(run, a, ModelSettings(), "double-gamma")
    diff = kernel_difference(md, mb)
    np.testing.assert_allclose(diff, md.t - mb.t, rtol=1e-6, atol=1e-6)
    assert mb.estimate is None and mb.z is None
    assert isinstance(md, MapResult) and md.kernel == "double-gamma" and md.contrast == "tone"
    # A block response is fitted better by a smooth kernel than by the raw boxcar where it is
    # present (common practice: the t is markedly larger).
    resp = np.zeros(SHAPE, dtype=bool)
    resp[:3] = True
    assert np.median(diff[resp]) > 0


def test_bad_inputs_raise_one_line_errors():
    from voxelscope.core.errors import InputError

    rng = np.random.default_rng(9)
    run = ArrayRun(_data(rng))
    with pytest.raises(InputError, match="mask has shape"):
        compute_map(run, _analysis(), ModelSettings(), mask=np.ones((2, 2, 2), bool))
    with pytest.raises(InputError, match="unknown map statistic"):
        compute_map(run, _analysis(), ModelSettings(), stats=("r2",))
    with pytest.raises(InputError, match="unknown name"):
        compute_map(run, _analysis(), ModelSettings(contrast="tonne"))
    other = Analysis(_conditions(), n_volumes=T - 1, tr=TR)
    with pytest.raises(InputError, match="volumes"):
        compute_map(run, other, ModelSettings())


def test_workers_do_not_change_results_and_blas_threads_are_restored():
    """One worker or two give identical maps; BLAS runs on one thread during a map and has
    the same thread counts after it as before (read with threadpoolctl, an outside tool)."""
    from threadpoolctl import threadpool_info

    def blas_threads():
        return [d["num_threads"] for d in threadpool_info() if d["user_api"] == "blas"]

    rng = np.random.default_rng(10)
    run = ArrayRun(_data(rng, ar=0.3))
    a = _analysis()
    before = blas_threads()
    inside: list[list[int]] = []
    for s in (ModelSettings(), ModelSettings(noise="ar1")):
        m1 = compute_map(run, a, s, "gamma", chunk_voxels=9, workers=1)
        m2 = compute_map(
            run,
            a,
            s,
            "gamma",
            chunk_voxels=9,
            workers=2,
            progress=lambda f: inside.append(blas_threads()) if f > 0 else None,
        )
        np.testing.assert_array_equal(m1.t, m2.t)
        np.testing.assert_array_equal(m1.p, m2.p)
    assert inside and all(n == 1 for row in inside for n in row)
    assert blas_threads() == before


def _stores(tmp_path, data):
    """The same data as .nii (memory-mapped), .nii.gz through the cache and in memory."""
    plain = _write(tmp_path, data)
    gz = _write(tmp_path, data, name="sub-01_task-x_bold.nii.gz")
    return {
        "memmap": open_run(plain),
        "cache": open_run(gz, cache_dir=tmp_path / "cache"),
        "memory": open_run(gz, use_cache=False),
    }


def test_maps_equal_across_stores_and_block_sizes(tmp_path):
    """The volume-major memory map, the voxel-major cache and the in-memory store give the
    same OLS and AR(1) maps (each store hands its blocks in its own layout), for a brain-like
    mask with gaps (partial blocks) and block sizes that do not divide the mask; all equal
    the per-voxel single-fit reference (glm.fit on float64 series) to 1e-5 relative."""
    rng = np.random.default_rng(21)
    data = _data(rng, ar=0.3)
    runs = _stores(tmp_path, data)
    assert {k: r.storage for k, r in runs.items()} == {k: k for k in runs}
    a = _analysis()
    mask = rng.random(SHAPE) < 0.7
    for s in (
        ModelSettings(contrast="tone", noise="ols"),
        ModelSettings(contrast="tone", noise="ar1"),
    ):
        ref = _per_voxel(a, data, s, "double-gamma", noise=s.noise)
        maps = {
            (name, block): compute_map(run, a, s, "double-gamma", mask=mask, chunk_voxels=block)
            for name, run in runs.items()
            for block in (5, 64, 1024)
        }
        first = maps[("memmap", 1024)]
        np.testing.assert_allclose(first.t[mask], ref[mask], rtol=1e-5, atol=1e-6)
        assert np.all(first.t[~mask] == 0) and np.array_equal(first.mask, mask)
        for m in maps.values():
            for stat in ("t", "estimate", "variance", "z", "p"):
                np.testing.assert_allclose(m.stat(stat), first.stat(stat), rtol=1e-6, atol=1e-7)


def test_t_only_map_equals_t_of_full_map():
    """A map asked only for t (the fit then skips p) has the same t, bit for bit, as a map
    with every statistic; its p and z, when asked, equal scipy.stats.t / norm of that t."""
    rng = np.random.default_rng(22)
    run = ArrayRun(_data(rng))
    a = _analysis()
    s = ModelSettings(contrast="tap")
    full = compute_map(run, a, s, "gamma")
    only_t = compute_map(run, a, s, "gamma", stats=("t",))
    np.testing.assert_array_equal(only_t.t, full.t)
    assert only_t.p is None and only_t.z is None
    good = full.mask
    # the default AR(p) map reads each voxel's t with its effective df
    df = full.df if full.df_eff is None else full.df_eff[good].astype(np.float64)
    p_ref = 2 * stats.t.sf(np.abs(full.t[good].astype(np.float64)), df)
    np.testing.assert_allclose(full.p[good], p_ref, rtol=1e-4)
    z_ref = np.sign(full.t[good]) * stats.norm.isf(p_ref / 2)
    np.testing.assert_allclose(full.z[good], z_ref, rtol=1e-4, atol=1e-5)


def test_z_and_neglog10p_maps_are_exact_at_extreme_t():
    """z and -log10 p keep growing where the float32 p map underflows (the issue: z
    saturated at 38); mpmath (50 digits) gives the reference at the largest t of the map."""
    mp = pytest.importorskip("mpmath")
    mp.mp.dps = 50
    rng = np.random.default_rng(11)
    a = _analysis()
    s = ModelSettings(kernels=("double-gamma",), noise="ols")
    x = a.design("double-gamma", s).column("tone")
    data = 1000 + rng.standard_normal((*SHAPE, T))
    data[0, 0, 0] += 400 * x  # a huge, noise-free-looking response: t in the hundreds
    data[1, 0, 0] += 4 * x
    m = compute_map(ArrayRun(data), a, s, stats=("t", "z", "p", "neglog10p"))
    ref = glm.fit(
        a.prepared("double-gamma", s)[1], data[0, 0, 0], a.contrast_weights("double-gamma", s)
    )
    t, df = float(ref.t[0]), ref.df
    assert t > 100 and m.p[0, 0, 0] == 0.0  # p underflows in float32 ...
    x_ = mp.mpf(df) / (df + mp.mpf(t) ** 2)
    low = mp.betainc(mp.mpf(df) / 2, mp.mpf(1) / 2, 0, x_, regularized=True) / 2
    z_ref = mp.findroot(lambda z: mp.log(mp.ncdf(-z)) - mp.log(low), mp.sqrt(-2 * mp.log(low)))
    assert float(m.z[0, 0, 0]) == pytest.approx(float(z_ref), rel=1e-6)  # float32 map
    assert float(m.neglog10p[0, 0, 0]) == pytest.approx(float(-mp.log10(2 * low)), rel=1e-6)
    # moderate t: scipy.stats.t / norm agree with the map
    t1 = float(m.t[1, 0, 0])
    assert float(m.neglog10p[1, 0, 0]) == pytest.approx(
        -np.log10(2 * stats.t.sf(abs(t1), m.df)), rel=1e-5
    )
    assert float(m.z[1, 0, 0]) == pytest.approx(stats.norm.isf(stats.t.sf(t1, m.df)), rel=1e-5)
    assert m.tail == "two" and "two-sided" in m.describe()


def test_one_sided_tails_in_maps_match_scipy():
    """p and -log10 p for each tail equal scipy.stats.t sf / cdf of the map's t."""
    rng = np.random.default_rng(5)
    a = _analysis()
    s = ModelSettings(kernels=("gamma",), noise="ols")
    run = ArrayRun(_data(rng))
    for tail, ref in (("positive", stats.t.sf), ("negative", stats.t.cdf)):
        m = compute_map(run, a, s, stats=("t", "p", "neglog10p"), tail=tail)
        t = m.t[m.mask].astype(np.float64)
        np.testing.assert_allclose(m.p[m.mask], ref(t, m.df), rtol=2e-5, atol=1e-30)
        np.testing.assert_allclose(
            m.neglog10p[m.mask], -np.log10(ref(t, m.df)), rtol=2e-5, atol=1e-6
        )
    with pytest.raises(Exception, match="tail must be one of"):
        compute_map(run, a, s, tail="left")


def _one_pass_run(rng, shape=(14, 12, 10)):
    """A plain float32 run, bright almost everywhere (so a map reads it once), with a NaN
    voxel, a constant voxel, a dim corner, and a voxel dark in the first volumes (outside
    the guess from them) but bright on average (inside the mask)."""
    data = _data(rng, shape=shape)
    data[0, 0, :3] = rng.uniform(20, 60, (3, 1))  # dim: outside the mask
    data[2, 2, 2, 7] = np.nan
    data[3, 3, 3] = 9000.0  # constant
    data[0, 5, 5, :10] = 5.0  # dark while the guess is taken, then bright (on a face)
    return data


@pytest.mark.parametrize("noise", ["ols", "ar1", "arp"])
def test_one_pass_map_equals_the_two_pass_map(tmp_path, noise, monkeypatch):
    """A plain .nii whose mask is still to be decided is read once: the summary gathered
    while fitting equals the run's own summary pass bit for bit (mean image, NaN and
    constant flags), so the mask equals that of the map fitted after the mask (the two-pass
    way) exactly, and every statistic to the last digits (a mask voxel the first volumes
    missed is fitted afterwards, among other voxels)."""
    from voxelscope.core import maps

    data = _one_pass_run(np.random.default_rng(21))
    path = _write(tmp_path, data)
    a, s = _analysis(), ModelSettings(noise=noise)
    calls = []
    real = maps._one_pass
    monkeypatch.setattr(maps, "_one_pass", lambda *args: calls.append(1) or real(*args))
    once = open_run(path, use_cache=False)
    assert once.mask_pending()
    assert not once.likely_mask(maps.GUESS_VOLUMES)[0, 5, 5]  # the guess misses it
    m1 = compute_map(once, a, s, "double-gamma", chunk_voxels=64)
    assert calls == [1] and not once.mask_pending()
    twice = open_run(path, use_cache=False)
    m2 = compute_map(twice, a, s, "double-gamma", mask=twice.mask(), chunk_voxels=64)
    for name in ("mean", "nonfinite", "constant"):
        np.testing.assert_array_equal(
            getattr(once.summary(), name), getattr(twice.summary(), name), err_msg=name
        )
    np.testing.assert_array_equal(once.mask(), twice.mask())
    assert once.mask()[0, 5, 5] and m1.mask[0, 5, 5]
    assert not once.mask()[2, 2, 2] and not once.mask()[3, 3, 3] and not once.mask()[0, 0, 0]
    for name in ("t", "estimate", "variance", "z", "p", "neglog10p"):
        a1, a2 = m1.stat(name), m2.stat(name)
        # the same arithmetic per voxel; only a block of other voxels around it may change
        # the product's last float64 digits (one float32 rounding at most)
        rtol = 1e-12 if a1.dtype == np.float64 else 2.5e-7
        np.testing.assert_allclose(a1, a2, rtol=rtol, atol=0, err_msg=name)
    np.testing.assert_array_equal(m1.mask, m2.mask)
    np.testing.assert_array_equal(m1.degenerate, m2.degenerate)
    if noise == "arp":  # the smoothed AR coefficients every voxel was prewhitened with
        np.testing.assert_allclose(m1.ar, m2.ar, rtol=2.5e-7, atol=1e-12)
    assert np.all(m1.t[~once.mask()] == 0) and np.all(m1.p[~once.mask()] == 1)
    # the NaN voxel is said once, as by the summary pass
    assert sum("NaN" in w for w in once.warnings) == 1


def test_runs_with_much_background_keep_the_summary_pass(tmp_path, monkeypatch):
    """When the guess holds less than ONE_PASS_SHARE of the grid, the run's own summary
    pass decides the mask first (cheaper for the background); the map is the same."""
    from voxelscope.core import maps

    rng = np.random.default_rng(22)
    data = _data(rng, shape=(12, 10, 8))
    data[:6] = rng.uniform(20, 60, (6, 10, 8, T)).astype(np.float32)  # half dim
    path = _write(tmp_path, data)
    monkeypatch.setattr(maps, "_one_pass", lambda *a: pytest.fail("one pass with background"))
    a, s = _analysis(), ModelSettings(noise="ols")
    m1 = compute_map(open_run(path, use_cache=False), a, s, "double-gamma")
    run = open_run(path, use_cache=False)
    m2 = compute_map(run, a, s, "double-gamma", mask=run.mask())
    np.testing.assert_array_equal(m1.t, m2.t)
    np.testing.assert_array_equal(m1.mask, m2.mask)
