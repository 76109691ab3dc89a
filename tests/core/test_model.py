"""Tests of voxelscope.core.model.Analysis: per-kernel fits at a voxel and the design cache.

References:

* statsmodels OLS ``t_test`` / ``f_test`` on the Analysis' own design matrix.
* Fact of the trade (common practice; design.md and references.md): for a block design and a
  voxel with a real haemodynamic response, a regressor convolved with a smooth HRF gives a
  markedly larger t than the raw boxcar. The voxel is simulated here with our own
  double-gamma built from ``scipy.stats.gamma.pdf`` (Glover (1999) parameters a1=6, a2=12,
  b=0.9 s, c=0.35, from memory, in the simple difference-of-densities form), not with the
  engine's kernel.
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose
from scipy import stats

from voxelscope.core import model as model_mod
from voxelscope.core.confounds import Confounds
from voxelscope.core.errors import InputError
from voxelscope.core.events import Condition
from voxelscope.core.glm import fit
from voxelscope.core.model import Analysis, ModelSettings

TR, N = 2.0, 150
TONE = Condition("tone", np.arange(10.0, 300.0, 60.0), np.full(5, 20.0))
TAP = Condition("tap", np.arange(40.0, 300.0, 60.0), np.full(5, 20.0))


def _simulated_voxel(seed: int, amplitude: float = 3.0, noise_sd: float = 1.0) -> np.ndarray:
    """Block-design voxel: blocks convolved with our own double-gamma, plus white noise."""
    dt = 0.1
    t = np.arange(0, N * TR, dt)
    stim = np.zeros_like(t)
    for on, du in zip(TONE.onsets, TONE.durations):
        stim[(t >= on) & (t < on + du)] = 1.0
    th = np.arange(0, 32, dt)
    h = stats.gamma.pdf(th, 6, scale=0.9) - 0.35 * stats.gamma.pdf(th, 12, scale=0.9)
    resp = np.convolve(stim, h)[: t.size] * dt / (h.sum() * dt)
    at_volumes = np.interp(np.arange(N) * TR, t, resp)
    rng = np.random.default_rng(seed)
    return 800.0 + amplitude * at_volumes + rng.normal(0, noise_sd, N)


@pytest.mark.parametrize("seed", [1, 2, 3, 4, 5])
def test_smooth_kernels_beat_boxcar(seed):
    """Common practice: t under double-gamma and gaussian clearly exceeds t under boxcar."""
    a = Analysis([TONE, TAP], N, TR)
    fits = a.fit_voxel(
        _simulated_voxel(seed), ModelSettings(kernels=("boxcar", "gaussian", "double-gamma"))
    )
    t_box = fits.by_kernel("boxcar").t
    assert t_box > 0
    assert fits.by_kernel("double-gamma").t > 1.5 * t_box
    assert fits.by_kernel("gaussian").t > 1.5 * t_box
    assert fits.by_kernel("double-gamma").r2 > fits.by_kernel("boxcar").r2


def test_voxel_fit_matches_statsmodels_on_the_design():
    """Each KernelFit equals statsmodels OLS on that kernel's design: t_test, f_test."""
    y = _simulated_voxel(9)
    a = Analysis([TONE, TAP], N, TR)
    s = ModelSettings(
        noise="ols", kernels=("gamma", "double-gamma"), contrast="tone - tap", derivatives=1
    )
    fits = a.fit_voxel(y, s)
    for kf in fits.fits:
        d = kf.design
        ref = sm.OLS(y, d.X).fit()
        c = np.zeros(d.n_columns)
        c[d.names.index("tone")], c[d.names.index("tap")] = 1.0, -1.0
        tt = ref.t_test(c[None, :])
        assert_allclose(kf.estimate, tt.effect[0], rtol=1e-9)
        assert_allclose(kf.t, tt.tvalue[0, 0], rtol=1e-9)
        assert_allclose(kf.p, tt.pvalue, rtol=1e-7)
        assert kf.df == int(ref.df_resid)
        assert_allclose(kf.r2, ref.rsquared, rtol=1e-10)
        assert_allclose(kf.fitted, ref.fittedvalues, rtol=1e-10)
        assert_allclose(kf.residuals, ref.resid, atol=1e-9)
        assert_allclose(kf.betas["tone"], ref.params[d.names.index("tone")], rtol=1e-9)
        assert kf.f is None  # a difference of conditions has no single-condition F

    fits = a.fit_voxel(y, s.with_(contrast="tone"))
    for kf in fits.fits:
        d = kf.design
        C = np.zeros((2, d.n_columns))
        C[0, d.names.index("tone")] = C[1, d.names.index("tone_dt")] = 1.0
        ft = sm.OLS(y, d.X).fit().f_test(C)
        assert_allclose(kf.f, float(np.squeeze(ft.fvalue)), rtol=1e-9)
        assert_allclose(kf.f_p, float(ft.pvalue), rtol=1e-7)
        assert kf.f_df == (2, int(ft.df_denom))


def test_fir_fit_and_f_test():
    """FIR: betas follow the simulated response; F over all bins equals statsmodels f_test."""
    y = _simulated_voxel(4, amplitude=5.0, noise_sd=0.3)
    a = Analysis([TONE, TAP], N, TR)
    s = ModelSettings(
        noise="ols", kernels=("fir",), fir_window_s=32.0, fir_bin_s=4.0, highpass_s=None
    )
    kf = a.fit_voxel(y, s).fits[0]
    d = kf.design
    assert [n for n in d.names if n.startswith("tone_fir")] == [f"tone_fir{k}" for k in range(8)]
    bins = np.array([kf.betas[f"tone_fir{k}"] for k in range(8)])
    baseline = kf.betas["constant"]
    # the plateau of a 20 s block is reached in bins 2-4 (8-20 s after onset)
    assert np.all(bins[2:5] > 0.8 * 5.0)
    assert abs(bins[0]) < 0.3 * 5.0
    assert baseline == pytest.approx(800.0, abs=1.0)
    C = np.zeros((8, d.n_columns))
    C[np.arange(8), [d.names.index(f"tone_fir{k}") for k in range(8)]] = 1.0
    ft = sm.OLS(y, d.X).fit().f_test(C)
    assert_allclose(kf.f, float(np.squeeze(ft.fvalue)), rtol=1e-9)
    assert kf.f_df == (8, int(ft.df_denom))


def test_a_batch_of_voxels_equals_fit_voxel():
    """glm.fit on (T, V) with the analysis's prepared design and contrast (what a map does)
    equals fit_voxel per column, to ~1e-12."""
    Y = np.column_stack([_simulated_voxel(s) for s in range(4)]).astype(np.float32)
    a = Analysis([TONE, TAP], N, TR)
    for noise in ("ols", "ar1"):
        s = ModelSettings(kernels=("double-gamma",), noise=noise)
        _d, prep = a.prepared("double-gamma", s)
        many = fit(prep, Y, a.contrast_weights("double-gamma", s), noise=noise)
        for j in range(4):
            one = a.fit_voxel(Y[:, j], s).fits[0]
            assert_allclose(many.t[j], one.t, rtol=1e-12)
            assert_allclose(many.estimate[j], one.estimate, rtol=1e-12)
            assert_allclose(many.variance[j], one.variance, rtol=1e-12)
            if noise == "ar1":
                assert_allclose(many.rho[j], one.rho, rtol=1e-12)


@pytest.mark.parametrize(
    ("expr", "weights"),
    [
        ("tap", {"tap": 1.0}),
        ("tap - tone", {"tap": 1.0, "tone": -1.0}),
        ("0.5*tap + 0.5*tone", {"tap": 0.5, "tone": 0.5}),
        ("2 tap", {"tap": 2.0}),
        ("-tone", {"tone": -1.0}),
    ],
)
def test_contrast_expressions(expr, weights):
    a = Analysis([TONE, TAP], N, TR)
    s = ModelSettings(contrast=expr)
    d = a.design("double-gamma", s)
    expected = np.zeros(d.n_columns)
    for name, w in weights.items():
        expected[d.names.index(name)] = w
    assert_allclose(a.contrast_weights("double-gamma", s), expected)
    a.check_contrast(expr)


def test_unknown_contrast_lists_names():
    a = Analysis([TONE, TAP], N, TR)
    with pytest.raises(InputError) as err:
        a.check_contrast("tap - beep")
    msg = str(err.value)
    assert "'beep'" in msg and "tone" in msg and "tap" in msg and "\n" not in msg
    with pytest.raises(InputError):
        a.fit_voxel(np.zeros(N), ModelSettings(contrast="beep"))


def test_default_contrast_is_first_condition():
    a = Analysis([TONE, TAP], N, TR)
    kf = a.fit_voxel(_simulated_voxel(3), ModelSettings(kernels=("gamma",))).fits[0]
    assert kf.contrast == "tone"
    assert kf.result.weights[kf.design.names.index("tone")] == 1.0


def test_constant_voxel_nan_t_and_warning():
    """A constant voxel: t is NaN in the result (never inf), None in KernelFit, a warning."""
    a = Analysis([TONE, TAP], N, TR)
    fits = a.fit_voxel(np.full(N, 731.25), ModelSettings())
    assert len(fits.fits) == 4
    for kf in fits.fits:
        assert np.isnan(kf.result.t[0]) and not np.isinf(kf.result.t[0])
        assert kf.t is None and kf.p is None and kf.variance is None
    assert any("constant" in w for w in fits.warnings)
    assert fits.by_kernel("gamma").betas["constant"] == pytest.approx(731.25, rel=1e-14)


def test_wrong_length_and_unknown_kernel():
    a = Analysis([TONE, TAP], N, TR)
    with pytest.raises(InputError, match="149 points"):
        a.fit_voxel(np.zeros(N - 1), ModelSettings())
    with pytest.raises(InputError, match="wavelet"):
        a.fit_voxel(np.zeros(N), ModelSettings(kernels=("wavelet",)))


def test_second_fit_does_not_rebuild_the_design(monkeypatch):
    """Caching: a second fit_voxel with the same settings calls build_design no more."""
    calls = []
    real = model_mod.build_design

    def counting(*args, **kwargs):
        calls.append(kwargs.get("kernel"))
        return real(*args, **kwargs)

    monkeypatch.setattr(model_mod, "build_design", counting)
    a = Analysis([TONE, TAP], N, TR)
    s = ModelSettings()
    first = a.fit_voxel(_simulated_voxel(1), s)
    assert len(calls) == len(s.kernels)
    second = a.fit_voxel(_simulated_voxel(2), s)
    assert len(calls) == len(s.kernels)
    assert first.fits[0].design is second.fits[0].design
    a.fit_voxel(_simulated_voxel(2), s.with_(contrast="tap"))  # contrast only: same designs
    assert len(calls) == len(s.kernels)
    a.fit_voxel(_simulated_voxel(2), s.with_(highpass_s=None))  # a design setting: rebuilt
    assert len(calls) == 2 * len(s.kernels)


def test_check_settings_raises_what_a_fit_raises_and_keeps_the_designs(monkeypatch):
    """check_settings refuses exactly the settings a fit refuses (same error line), and
    builds the designs the fit then uses (no second build)."""
    a = Analysis([TONE, TAP], N, TR)
    bad = [
        ModelSettings(contrast="tap - beep"),
        ModelSettings(kernels=("wavelet",)),
        ModelSettings(contrast="tone +"),
    ]
    for s in bad:
        with pytest.raises(InputError) as checked:
            a.check_settings(s)
        with pytest.raises(InputError) as fitted:
            a.fit_voxel(_simulated_voxel(1), s)
        assert str(checked.value) == str(fitted.value)
    calls = []
    real = model_mod.build_design

    def counting(*args, **kwargs):
        calls.append(kwargs.get("kernel"))
        return real(*args, **kwargs)

    monkeypatch.setattr(model_mod, "build_design", counting)
    s = ModelSettings(highpass_s=100.0)
    a.check_settings(s)
    assert len(calls) == len(s.kernels)
    a.fit_voxel(_simulated_voxel(1), s)
    assert len(calls) == len(s.kernels)


def test_confound_columns_setting():
    rng = np.random.default_rng(8)
    conf = Confounds(("trans_x", "rot_z"), rng.standard_normal((N, 2)), "c.tsv")
    a = Analysis([TONE, TAP], N, TR, confounds=conf)
    assert a.confound_names == ("trans_x", "rot_z")
    all_cols = a.design("gamma", ModelSettings())
    one = a.design("gamma", ModelSettings(confound_columns=("rot_z",)))
    none = a.design("gamma", ModelSettings(confound_columns=()))
    assert "trans_x" in all_cols.names and "rot_z" in all_cols.names
    assert "trans_x" not in one.names and "rot_z" in one.names
    assert none.kinds.count("confound") == 0
    with pytest.raises(InputError, match="'motion'"):
        a.design("gamma", ModelSettings(confound_columns=("motion",)))


def test_the_contrast_estimate_keeps_its_earlier_name():
    """``estimate`` is the contrast's ``c'b`` (statsmodels OLS ``t_test(c).effect``, the
    outside reference); ``beta``, its earlier name, still gives the same number on both the
    per-voxel result and one kernel's fit, so that older scripts keep working."""
    sm = pytest.importorskip("statsmodels.api")
    a = Analysis([TONE, TAP], N, TR)
    s = ModelSettings(kernels=("double-gamma",), noise="ols")
    y = _simulated_voxel(7)
    kf = a.fit_voxel(y, s).fits[0]
    w = a.contrast_weights("double-gamma", s)
    effect = float(np.squeeze(sm.OLS(y, kf.design.X).fit().t_test(w).effect))
    assert_allclose(kf.estimate, effect, rtol=1e-9)
    assert kf.beta == kf.estimate
    assert_allclose(kf.result.beta, kf.result.estimate)
    assert kf.result.betas.shape[0] == kf.design.X.shape[1]  # betas: one per column


def test_noise_at_runs_blas_on_one_thread_and_restores_it(monkeypatch):
    """A clicked voxel's AR(p) estimate (many small products) runs with BLAS on one
    thread, as maps do, and leaves the thread counts as they were (read with
    threadpoolctl, an outside tool)."""
    from threadpoolctl import threadpool_info

    from voxelscope.core import noise
    from voxelscope.core.maps import ArrayRun

    def blas_threads():
        return [d["num_threads"] for d in threadpool_info() if d["user_api"] == "blas"]

    inside: list[list[int]] = []
    real = noise.voxel_ar

    def spy(*args, **kwargs):
        inside.append(blas_threads())
        return real(*args, **kwargs)

    monkeypatch.setattr(noise, "voxel_ar", spy)
    rng = np.random.default_rng(2)
    run = ArrayRun((1000 + rng.standard_normal((6, 6, 5, 60))).astype(np.float32))
    a = Analysis([Condition("x", [10.0, 50.0, 90.0], [10.0] * 3)], n_volumes=60, tr=2.0)
    before = blas_threads()
    est = a.noise_at(run, (3, 3, 2), ModelSettings())
    assert set(est) == set(ModelSettings().kernels)
    assert inside and all(all(n == 1 for n in counts) for counts in inside)
    assert blas_threads() == before
