"""Tests of voxelscope.core.agreement.

References: scipy.stats.pearsonr and scipy.stats.linregress (correlation, OLS slope);
statsmodels RLM with HuberT (robust slope, reference library). The explanation tests plant
a known cause (an onset shift of one TR, a kernel, a pure scale factor) in "their" map on a
small synthetic grid and check that it is the one reported.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from voxelscope.core.agreement import compare_maps, explain, huber_fit
from voxelscope.core.errors import InputError
from voxelscope.core.events import Condition
from voxelscope.core.maps import ArrayRun, compute_map
from voxelscope.core.model import Analysis, ModelSettings

TR = 1.25
T = 160
SHAPE = (6, 6, 3)


def _setup(seed=0):
    rng = np.random.default_rng(seed)
    conds = [
        Condition("tone", [6.0, 50.0, 93.0, 140.0, 181.0], [15.0] * 5),
        Condition("tap", [28.0, 71.0, 117.0, 160.0], [15.0] * 4),
    ]
    a = Analysis(conds, n_volumes=T, tr=TR)
    x = a.design("double-gamma", ModelSettings()).column("tone")
    amp = rng.uniform(-30, 60, SHAPE)
    data = 1000 + amp[..., None] * x + 10 * rng.standard_normal((*SHAPE, T))
    return ArrayRun(data.astype(np.float32), tr=TR), a


def test_statistics_match_scipy_and_statsmodels():
    sm = pytest.importorskip("statsmodels.api")
    rng = np.random.default_rng(1)
    ours = rng.standard_normal((8, 7, 5)) * 3
    theirs = 1.7 * ours + 0.4 + rng.standard_normal(ours.shape) * 0.5
    theirs[0, 0, :3] = 40.0  # outliers
    theirs[1, 1, 1] = np.nan  # no value there
    mask = np.ones(ours.shape, dtype=bool)
    mask[7] = False
    a = compare_maps(ours, theirs, mask=mask, tolerance=2.0)
    sel = mask & np.isfinite(theirs)
    x, y = ours[sel], theirs[sel]
    assert a.n_voxels == sel.sum()
    assert a.r == pytest.approx(stats.pearsonr(x, y)[0], rel=1e-12)
    lr = stats.linregress(x, y)
    assert a.slope == pytest.approx(lr.slope, rel=1e-12)
    assert a.intercept == pytest.approx(lr.intercept, rel=1e-10)
    rlm = sm.RLM(y, sm.add_constant(x), M=sm.robust.norms.HuberT()).fit()
    assert a.robust_slope == pytest.approx(rlm.params[1], rel=1e-6)
    assert a.robust_intercept == pytest.approx(rlm.params[0], rel=1e-5)
    assert abs(a.robust_slope - 1.7) < abs(a.slope - 1.7)  # the outliers pull OLS away
    np.testing.assert_array_equal(a.disagree, sel & (np.abs(theirs - ours) > 2.0))
    assert a.value_at((1, 1, 1)) == (float(ours[1, 1, 1]), None, False)
    o, t, inside = a.value_at((0, 0, 0))
    assert (o, t, inside) == (float(ours[0, 0, 0]), 40.0, True)
    with pytest.raises(InputError, match="outside the grid"):
        a.value_at((9, 0, 0))
    assert "r " in a.describe()


def test_huber_fit_against_statsmodels_rlm():
    sm = pytest.importorskip("statsmodels.api")
    rng = np.random.default_rng(2)
    x = rng.standard_normal(300)
    y = -0.8 * x + 2 + rng.standard_t(2, 300)
    b0, b1 = huber_fit(x, y)
    ref = sm.RLM(y, sm.add_constant(x), M=sm.robust.norms.HuberT()).fit().params
    assert (b0, b1) == pytest.approx(tuple(ref), rel=1e-6)


def test_shape_and_tolerance_errors():
    with pytest.raises(InputError, match="resample"):
        compare_maps(np.zeros((2, 2, 2)), np.zeros((2, 2, 3)))
    with pytest.raises(InputError, match="tolerance"):
        compare_maps(np.zeros((2, 2, 2)), np.zeros((2, 2, 2)), tolerance=-1)
    a = compare_maps(np.ones((2, 2, 2)), np.arange(8.0).reshape(2, 2, 2))
    assert np.isnan(a.r)  # our map is constant: no correlation


def test_explain_finds_an_onset_shift_of_one_tr():
    """Their map made with onsets one TR late: the statement names +1.25 s and the r rises."""
    run, a = _setup(3)
    s = ModelSettings(contrast="tone")
    theirs = compute_map(run, a, s.with_(onset_shift_s=TR), "double-gamma").t
    ex = explain(run, a, s, theirs, kernel="double-gamma")
    assert ex.best.kind == "shift" and ex.best.settings.onset_shift_s == pytest.approx(TR)
    assert ex.best.r == pytest.approx(1.0, abs=1e-6) and ex.best.r > ex.baseline.r
    assert "+1.25 s" in ex.statement and "one TR" in ex.statement
    assert "-> 1.00" in ex.statement and "(r 0.99" in ex.statement
    assert [alt.kind for alt in ex.alternatives].count("shift") == 2


def test_explain_finds_a_kernel_and_a_scale_factor():
    run, a = _setup(4)
    s = ModelSettings(contrast="tone")
    theirs = compute_map(run, a, s, "boxcar").t
    ex = explain(run, a, s, theirs, kernel="double-gamma", other_noise=False)
    assert ex.best.kind == "kernel" and ex.best.kernel == "boxcar"
    assert "boxcar kernel" in ex.statement
    ours = compute_map(run, a, s, "double-gamma")
    ex2 = explain(run, a, s, 2.5 * ours.t, kernel="double-gamma", ours=ours, shifts_s=())
    assert ex2.best.kind == "as given" and ex2.baseline.r == pytest.approx(1.0)
    assert ex2.baseline.robust_slope == pytest.approx(2.5, rel=1e-6)
    assert "2.50 times ours" in ex2.statement  # 3 significant digits (core/numfmt.py)
    ex3 = explain(run, a, s, ours.t, kernel="double-gamma", ours=ours, shifts_s=(), kernels=())
    assert ex3.statement.startswith("The maps agree")


def test_explain_says_when_nothing_helps():
    run, a = _setup(5)
    s = ModelSettings(contrast="tone")
    noise = np.random.default_rng(0).standard_normal(SHAPE)
    ex = explain(run, a, s, noise, kernel="double-gamma", kernels=("gamma",), other_noise=False)
    if ex.best.kind == "as given" or ex.best.r - ex.baseline.r < 0.05:
        assert ex.statement.startswith("None of the tested changes")


def test_explain_finds_two_causes_together():
    """Their map made without our confounds and with onsets one TR late: the search keeps the
    best single change, then finds the second one from there (planted, so the truth is known).
    """
    from voxelscope.core.confounds import Confounds

    rng = np.random.default_rng(6)
    conds = [
        Condition("tone", [6.0, 50.0, 93.0, 140.0, 181.0], [15.0] * 5),
        Condition("tap", [28.0, 71.0, 117.0, 160.0], [15.0] * 4),
    ]
    plain = Analysis(conds, n_volumes=T, tr=TR)
    x = plain.design("double-gamma", ModelSettings()).column("tone")
    # a confound that shares much of the tone regressor, as block-locked motion would
    motion = x + 0.25 * rng.standard_normal(T)
    a = Analysis(conds, T, TR, Confounds(("motion",), motion[:, None]))
    amp = rng.uniform(-30, 60, SHAPE)
    data = 1000 + amp[..., None] * x + 10 * rng.standard_normal((*SHAPE, T))
    run = ArrayRun(data.astype(np.float32), tr=TR)
    s = ModelSettings(contrast="tone")
    theirs = compute_map(run, a, s.with_(onset_shift_s=TR, confound_columns=()), "double-gamma").t
    ex = explain(run, a, s, theirs, kernel="double-gamma", other_noise=False)
    assert {alt.kind for alt in ex.alternatives} >= {"confounds", "shift", "kernel"}
    assert ex.best.settings.onset_shift_s == pytest.approx(TR)
    assert ex.best.settings.confound_columns == ()
    assert ex.best.r == pytest.approx(1.0, abs=1e-6)
    assert "confound columns are left out" in ex.statement and "+1.25 s" in ex.statement
    # the second round says what it builds on: the first round's kept change
    first = [alt for alt in ex.alternatives if alt.round == 1]
    second = [alt for alt in ex.alternatives if alt.round == 2]
    assert first and second and ex.alternatives[0].round == 0
    assert all(alt.builds_on == () for alt in first)
    kept = max(first, key=lambda a: a.r).label
    assert all(alt.builds_on == (kept,) for alt in second)
