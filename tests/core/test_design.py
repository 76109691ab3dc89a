"""Tests of voxelscope.core.design against published formulas and independent computations.

References (see /work/shared/references.md):

* Discrete cosine high-pass basis: ``cos(pi k (2n+1) / (2N))``, ``K = floor(2 N TR / cutoff)``.
* Convolution: ``numpy.convolve`` of a fine-grid boxcar built here (kernel samples from
  ``scipy.stats.gamma.pdf`` / the Gaussian formula, scaled to unit area), and the exact
  convolution of a block with a gamma density, a difference of ``scipy.stats.gamma.cdf``.
* Unit-area convention (hrf module docstring): a sustained block reaches a plateau of 1.
* A 128 s high-pass cutoff is a common default (common practice).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from numpy.testing import assert_allclose
from scipy import stats

from voxelscope.core.confounds import Confounds
from voxelscope.core.design import (
    boxcar_regressor,
    build_design,
    dct_drift,
    task_cycle,
    task_cycle_warning,
    volume_times,
)
from voxelscope.core.errors import InputError, ModelError
from voxelscope.core.events import Condition, check_events_in_run, shift_conditions
from voxelscope.core.glm import prepare
from voxelscope.core.hrf import FIR, Gamma
from voxelscope.core.model import Analysis, ModelSettings

TONE = Condition("tone", [10.0, 70.0, 130.0], [20.0, 20.0, 20.0])
TAP = Condition("tap", [40.0, 100.0, 160.0], [20.0, 20.0, 20.0])


def _kernel_reference(name: str, t: np.ndarray) -> np.ndarray:
    """Kernel shapes from their published formulas (defaults from the hrf docstrings)."""
    if name == "gamma":  # Boynton et al. (1996), from memory: n=3, tau=1.2, delay=2.5
        return stats.gamma.pdf(t - 2.5, 3.0, scale=1.2)
    if name == "double-gamma":  # Friston et al. (1998), from memory: 6, 16, 1 s, 1/6
        return stats.gamma.pdf(t, 6.0) - stats.gamma.pdf(t, 16.0) / 6.0
    if name == "gaussian":  # our own defaults: peak 5 s, sigma 1.5 s
        return np.exp(-0.5 * ((t - 5.0) / 1.5) ** 2)
    raise AssertionError(name)


LENGTH = {"gamma": 24.0, "double-gamma": 32.0, "gaussian": 16.0}


# ----------------------------------------------------------------------------- drift


@given(st.integers(20, 400), st.floats(0.5, 3.0), st.floats(40.0, 300.0))
def test_dct_drift_matches_published_formula(n, tr, cutoff):
    """Columns cos(pi k (2n+1)/(2N)), k = 1..K, K = floor(2 N TR / cutoff) (references.md)."""
    K = math.floor(2 * n * tr / cutoff)
    D = dct_drift(n, tr, cutoff)
    assert D.shape == (n, min(K, n - 1))
    idx = np.arange(n)
    for k in range(1, D.shape[1] + 1):
        assert_allclose(D[:, k - 1], np.cos(np.pi * k * (2 * idx + 1) / (2 * n)), atol=1e-12)


def test_default_model_is_conditions_drift_constant():
    """Default model: exactly the conditions, K drift columns (128 s, common practice), constant."""
    n, tr = 150, 1.25
    d = build_design([TONE, TAP], n, tr)
    K = math.floor(2 * n * tr / 128.0)
    assert K == 2
    assert d.names == ("tone", "tap", "drift_1", "drift_2", "constant")
    assert d.kinds == ("condition", "condition", "drift", "drift", "constant")
    assert d.X.shape == (n, 5) and d.X.dtype == np.float64
    assert d.condition_columns == {"tone": (0,), "tap": (1,)}
    assert_allclose(d.column("constant"), 1.0)
    assert_allclose(d.volume_times, np.arange(n) * tr)
    assert not d.X.flags.writeable


def test_highpass_none_removes_drift():
    d = build_design([TONE, TAP], 150, 1.25, highpass_s=None)
    assert d.names == ("tone", "tap", "constant")


def test_volume_times_reference():
    assert_allclose(volume_times(4, 2.0, 0.75), [0.75, 2.75, 4.75, 6.75])


# ----------------------------------------------------------------------------- convolution


@given(
    st.sampled_from(["gamma", "double-gamma", "gaussian"]),
    st.lists(st.tuples(st.integers(0, 1500), st.integers(1, 400)), min_size=1, max_size=5),
    st.sampled_from([1.0, 1.25, 2.0]),
    st.floats(0.5, 3.0),
)
def test_convolution_equals_numpy_convolve(kernel, events, tr, amp):
    """Blocks on the fine grid (dt = TR/16): regressor = numpy.convolve(boxcar, kernel) * dt.

    The fine-grid boxcar is built here: bin j covers [j dt, (j+1) dt) and is read at its
    centre; the sampled regressor is the linear interpolation at the volume times (the
    module's documented convention). Kernel samples from the published formulas above.
    """
    n = 120
    dt = tr / 16
    onsets = np.array([i for i, _ in events]) * dt
    durs = np.array([j for _, j in events]) * dt
    cond = Condition("c", onsets, durs, np.full(onsets.size, amp))
    d = build_design([cond], n, tr, kernel=kernel, highpass_s=None)

    m = 16 * n + 2
    stim = np.zeros(m + 1)  # index 0 is the bin [-dt, 0)
    for i, j in events:
        stim[1 + i : 1 + i + j] += amp
    th = np.arange(math.ceil(LENGTH[kernel] / dt) + 1) * dt
    h = _kernel_reference(kernel, th)
    h = h / (h.sum() * dt)
    conv = np.convolve(stim, h)[: m + 1] * dt
    centres = (np.arange(m + 1) - 0.5) * dt
    ref = np.interp(np.arange(n) * tr, centres, conv)
    assert_allclose(d.column("c"), ref, rtol=1e-9, atol=1e-10)


@given(st.floats(0.0, 100.0), st.floats(1.0, 40.0))
def test_block_under_gamma_equals_exact_convolution(onset, duration):
    """A block convolved with the gamma density, exactly: G(t-on-d) - G(t-on-du-d).

    G is scipy.stats.gamma.cdf (n=3, tau=1.2 s, delay d=2.5 s); the engine's fine grid and
    truncation at 24 s agree with the continuous result to about 1e-3.
    """
    tr, n = 2.0, 90
    cond = Condition("c", [onset], [duration])
    d = build_design([cond], n, tr, kernel=Gamma(), highpass_s=None)
    t = np.arange(n) * tr
    G = stats.gamma(3.0, scale=1.2).cdf
    exact = G(t - onset - 2.5) - G(t - onset - duration - 2.5)
    assert_allclose(d.column("c"), exact, atol=2e-3)


@pytest.mark.parametrize("kernel", ["gamma", "double-gamma", "gaussian"])
def test_brief_event_follows_the_kernel(kernel):
    """A brief event (duration 0) of area 1 gives the unit-area kernel itself after onset."""
    tr, n, onset = 1.0, 60, 7.0
    d = build_design([Condition("c", [onset], [0.0])], n, tr, kernel=kernel, highpass_s=None)
    t = np.arange(n) * tr
    dt = tr / 16
    th = np.arange(math.ceil(LENGTH[kernel] / dt) + 1) * dt
    area = _kernel_reference(kernel, th).sum() * dt
    lag = t - onset
    ref = np.where((lag >= 0) & (lag <= LENGTH[kernel]), _kernel_reference(kernel, lag), 0.0)
    assert_allclose(d.column("c"), ref / area, atol=2e-3 * np.abs(ref / area).max())


@pytest.mark.parametrize("kernel", ["boxcar", "gaussian", "gamma", "double-gamma"])
def test_long_block_plateau_is_one(kernel):
    """Unit-area convention: a 60 s block reaches 1.0 (within 1e-3) under every kernel."""
    tr, n = 1.5, 100
    d = build_design([Condition("c", [12.0], [60.0])], n, tr, kernel=kernel, highpass_s=None)
    t = np.arange(n) * tr
    plateau = (t >= 12.0 + 33.0) & (t < 12.0 + 60.0)  # the volume at the block's end sees half
    assert plateau.sum() >= 15
    assert_allclose(d.column("c")[plateau], 1.0, atol=1e-3)


def test_amplitude_scales_the_regressor():
    a = build_design([Condition("c", [10.0, 50.0], [5.0, 5.0])], 60, 2.0, highpass_s=None)
    b = build_design(
        [Condition("c", [10.0, 50.0], [5.0, 5.0], [2.0, -0.5])], 60, 2.0, highpass_s=None
    )
    one = build_design([Condition("c", [10.0], [5.0])], 60, 2.0, highpass_s=None)
    two = build_design([Condition("c", [50.0], [5.0])], 60, 2.0, highpass_s=None)
    assert_allclose(a.column("c"), one.column("c") + two.column("c"), atol=1e-12)
    assert_allclose(b.column("c"), 2 * one.column("c") - 0.5 * two.column("c"), atol=1e-12)


def test_boxcar_regressor_and_brief_events():
    """Boxcar: the covered fraction of each TR window; a brief event lasts 1 s (issue 13)."""
    tr = 2.0
    d = build_design([Condition("c", [11.0], [6.0])], 20, tr, kernel="boxcar", highpass_s=None)
    x = d.column("c")
    # volume n covers [2n, 2n + 2) s; the event [11, 17) covers half of volume 5's window,
    # all of 6 and 7 and half of 8 (written from the definition)
    expected = np.zeros(20)
    expected[5:9] = [0.5, 1.0, 1.0, 0.5]
    assert_allclose(x, expected, atol=1e-12)
    brief = build_design([Condition("c", [11.0], [0.0])], 20, tr, kernel="boxcar")
    assert brief.column("c").sum() * tr == pytest.approx(1.0)  # 1 s of stimulation
    assert brief.column("c")[5] == pytest.approx(0.5)  # half of the volume's [10, 12) window


# ----------------------------------------------------------------------------- derivatives, FIR


def test_derivative_columns():
    d1 = build_design([TONE, TAP], 150, 1.25, kernel="gamma", derivatives=1, highpass_s=None)
    assert d1.names == ("tone", "tone_dt", "tap", "tap_dt", "constant")
    assert d1.kinds == ("condition", "derivative", "condition", "derivative", "constant")
    assert d1.condition_columns == {"tone": (0, 1), "tap": (2, 3)}
    d2 = build_design([TONE], 150, 1.25, kernel="double-gamma", derivatives=2, highpass_s=None)
    assert d2.names == ("tone", "tone_dt", "tone_dd", "constant")
    with pytest.raises(InputError):
        build_design([TONE], 150, 1.25, derivatives=3)


@pytest.mark.parametrize(("tr", "bin_s", "onsets"), [(2.0, 2.0, [10.0, 50.0]), (2.0, 4.0, [9.0])])
def test_fir_columns_are_indicator_boxes(tr, bin_s, onsets):
    """FIR column k is 1 while the time since an onset is in [k bin_s, (k+1) bin_s).

    Expected values written from that definition (hrf.FIR docstring) at the volume times.
    """
    n, n_bins = 60, 6
    cond = Condition("c", onsets, np.zeros(len(onsets)))
    d = build_design([cond], n, tr, kernel=FIR(n_bins=n_bins, bin_s=bin_s), highpass_s=None)
    assert d.names[:n_bins] == tuple(f"c_fir{k}" for k in range(n_bins))
    assert d.kinds[:n_bins] == ("fir",) * n_bins
    t = np.arange(n) * tr
    for k in range(n_bins):
        expected = np.zeros(n)
        for on in onsets:
            lag = t - on
            expected += (lag >= k * bin_s) & (lag < (k + 1) * bin_s)
        assert_allclose(d.X[:, k], expected, atol=1e-12, err_msg=f"bin {k}")


# ----------------------------------------------------------------------------- confounds


def test_confounds_added_in_order():
    rng = np.random.default_rng(4)
    vals = rng.standard_normal((150, 2))
    conf = Confounds(("motion_x", "csf"), vals, "run_confounds.tsv")
    d = build_design([TONE, TAP], 150, 1.25, confounds=conf)
    assert d.names == ("tone", "tap", "motion_x", "csf", "drift_1", "drift_2", "constant")
    assert d.kinds[2:4] == ("confound", "confound")
    assert_allclose(d.column("motion_x"), vals[:, 0])
    assert_allclose(d.column("csf"), vals[:, 1])


def test_confound_row_mismatch():
    conf = Confounds(("a",), np.zeros((149, 1)), "sub_confounds.tsv")
    with pytest.raises(InputError) as err:
        build_design([TONE], 150, 1.25, confounds=conf)
    assert "sub_confounds.tsv" in str(err.value) and "149" in str(err.value)
    with pytest.raises(InputError):
        Analysis([TONE], 150, 1.25, confounds=conf)


def test_duplicate_confound_is_rank_deficient():
    """A confound duplicating another: ModelError naming the collinear columns."""
    rng = np.random.default_rng(5)
    a = rng.standard_normal(150)
    conf = Confounds(("rot_y", "other", "rot_y_again"), np.column_stack([a, rng.random(150), a]))
    d = build_design([TONE], 150, 1.25, confounds=conf)
    with pytest.raises(ModelError) as err:
        prepare(d.X, d.names)
    msg = str(err.value)
    assert "'rot_y'" in msg and "'rot_y_again'" in msg and "'other'" not in msg
    assert "\n" not in msg


def test_constant_confound_is_rank_deficient():
    conf = Confounds(("scanner_on",), np.full((150, 1), 3.0))
    analysis = Analysis([TONE], 150, 1.25, confounds=conf)
    with pytest.raises(ModelError) as err:
        analysis.prepared("double-gamma", ModelSettings())
    assert "'scanner_on'" in str(err.value) and "'constant'" in str(err.value)


def test_fewer_volumes_than_regressors():
    conf = Confounds(tuple(f"m{i}" for i in range(6)), np.random.default_rng(0).random((6, 6)))
    with pytest.raises(ModelError, match="6 volumes"):
        build_design([Condition("a", [0.0], [4.0])], 6, 2.0, confounds=conf)


# ----------------------------------------------------------------------------- timing


def test_onset_shift_moves_the_regressor():
    """Shifting every onset by 2 TR moves the regressor 2 rows later (shift_conditions)."""
    tr, n = 1.25, 150
    base = build_design([TONE], n, tr, highpass_s=None).column("tone")
    moved = build_design(shift_conditions([TONE], 2 * tr), n, tr, highpass_s=None)
    assert_allclose(moved.column("tone")[2:], base[:-2], atol=1e-12)
    a = Analysis([TONE], n, tr)
    via = a.design("double-gamma", ModelSettings(onset_shift_s=2 * tr, highpass_s=None))
    assert_allclose(via.column("tone"), moved.column("tone"), atol=1e-15)
    # a half-second shift moves the regressor's centre of mass by half a second
    half = build_design(shift_conditions([TONE], 0.5), n, tr, highpass_s=None).column("tone")
    t = np.arange(n) * tr
    assert (t @ half) / half.sum() - (t @ base) / base.sum() == pytest.approx(0.5, abs=1e-3)


def test_events_past_the_end_warn():
    late = Condition("tone", [10.0, 200.0], [10.0, 10.0])
    over = Condition("tap", [180.0], [30.0])
    warnings = check_events_in_run([late, over], 150 * 1.25)
    assert len(warnings) == 2
    assert "'tone'" in warnings[0] and "after the run ends" in warnings[0]
    assert "'tap'" in warnings[1] and "past the end" in warnings[1]
    assert any("'tone'" in w for w in Analysis([late, over], 150, 1.25).warnings)


def test_empty_condition_is_a_clear_model_error():
    empty = Condition("rest", [], [])
    a = Analysis([TONE, empty], 150, 1.25)
    with pytest.raises(ModelError) as err:
        a.prepared("double-gamma", ModelSettings())
    assert "'rest'" in str(err.value) and "\n" not in str(err.value)


def test_condition_outside_the_run_is_a_clear_model_error():
    outside = Condition("tap", [400.0, 450.0], [10.0, 10.0])
    a = Analysis([TONE, outside], 150, 1.25)
    assert any("'tap'" in w for w in a.warnings)
    for kernel in ("boxcar", "double-gamma"):
        with pytest.raises(ModelError, match="'tap'"):
            a.prepared(kernel, ModelSettings())


def test_bad_arguments():
    with pytest.raises(InputError):
        build_design([TONE], 150, 0.0)
    with pytest.raises(InputError):
        build_design([], 150, 1.25)
    with pytest.raises(InputError):
        build_design([TONE], 150, 1.25, highpass_s=-5.0)
    with pytest.raises(InputError, match="repeat"):
        build_design([TONE, Condition("tone", [1.0], [1.0])], 150, 1.25)


@pytest.mark.parametrize("na, nb", [(1, 1), (7, 3), (100, 1), (480, 410), (4801, 257), (333, 999)])
def test_fft_convolution_equals_direct_convolution(na, nb):
    """The design's FFT convolution equals numpy.convolve (direct sums, reference library)
    on random signals, to rounding relative to the largest value."""
    from voxelscope.core.design import _convolve_head

    rng = np.random.default_rng(na * 1000 + nb)
    a, b = rng.standard_normal(na), rng.random(nb)
    ref = np.convolve(a, b)
    for n in (1, na, na + nb - 1):
        got = _convolve_head(a, b, n)
        assert got.shape == (n,)
        assert_allclose(got, ref[:n], rtol=0, atol=1e-13 * np.abs(ref).max())


# ----------------------------------------------------------------------------- issue 13


def _coverage_by_hand(onsets, durations, weights, n, tr):
    """Boxcar built here, independently: for each volume window [n TR, (n+1) TR), the
    seconds of each event inside it (a zero-duration event lasting 1 s), over TR."""
    x = np.zeros(n)
    for on, du, w in zip(onsets, durations, weights):
        du = du if du > 0 else 1.0
        for v in range(n):
            a, b = v * tr, (v + 1) * tr
            x[v] += w * max(0.0, min(b, on + du) - max(a, on)) / tr
    return x


@given(
    st.lists(
        st.tuples(st.floats(0.0, 180.0), st.sampled_from([0.0, 0.1, 0.5, 0.72, 1.3, 4.0, 15.0])),
        min_size=1,
        max_size=25,
    ),
    st.sampled_from([0.72, 1.25, 2.0, 3.0]),
)
def test_boxcar_area_equals_stimulation_time(events, tr):
    """Issue 13: sum(x) * TR equals the summed durations (0 s counting as 1 s) of events
    inside the run, whatever their length against the TR; no brief event vanishes."""
    n = math.ceil(200.0 / tr)  # the run lasts at least 200 s: every event ends inside it
    on = np.array([e[0] for e in events])
    du = np.array([e[1] for e in events])
    d = build_design([Condition("c", on, du)], n, tr, kernel="boxcar", highpass_s=None)
    x = d.column("c")
    assert x.sum() * tr == pytest.approx(np.where(du > 0, du, 1.0).sum(), rel=1e-9, abs=1e-9)
    assert_allclose(x, _coverage_by_hand(on, du, np.ones(on.size), n, tr), atol=1e-9)


def test_brief_events_never_vanish_under_boxcar():
    """The issue's cases: twenty 0.5 s events keep all 10 s; 0.5 s events every 9 s at
    TR 2 all appear (each volume that holds one has a non-zero value)."""
    on = np.arange(20) * 9.0 + 0.7
    d = build_design([Condition("c", on, np.full(20, 0.5))], 100, 2.0, kernel="boxcar")
    x = d.column("c")
    assert x.sum() * 2.0 == pytest.approx(10.0)
    assert all(x[int(o // 2.0)] > 0 for o in on)


def test_modulator_columns_names_kinds_and_groups():
    rng = np.random.default_rng(3)
    gain = rng.uniform(5, 40, 12)
    c = Condition("gamble", np.arange(12) * 12.0 + 4, np.full(12, 3.0), columns={"gain": gain})
    d = build_design([c, TAP], 150, 1.25, kernel="gamma", derivatives=1, modulators=("gain",))
    assert d.names[:6] == ("gamble", "gamble_dt", "gamble:gain", "gamble:gain_dt", "tap", "tap_dt")
    assert d.kinds[:4] == ("condition", "derivative", "modulator", "derivative")
    assert d.condition_columns["gamble:gain"] == (2, 3) and d.modulators == {
        "gamble:gain": "gamble"
    }
    with pytest.raises(InputError, match="'RT'"):
        build_design([c], 150, 1.25, modulators=("RT",))


def test_modulator_column_against_hand_built_regressors():
    """The modulator column equals the hand-built regressor: under boxcar, the covered
    fraction of each window times the event's centred value (built here); under
    double-gamma, the sum of one-event regressors weighted by the centred values
    (linearity of convolution). Centring over this condition's events only."""
    rng = np.random.default_rng(8)
    n, tr = 160, 2.0
    on = np.sort(rng.uniform(0, 300, 25))
    du = rng.choice([0.0, 0.5, 3.0], 25)
    gain = rng.uniform(-2, 9, 25)
    other = Condition("cue", [50.0], [1.0], columns={"gain": [1000.0]})  # not in the centring
    c = Condition("gamble", on, du, columns={"gain": gain})
    centred = gain - gain.mean()
    d = build_design([c, other], n, tr, kernel="boxcar", modulators=("gain",), highpass_s=None)
    assert_allclose(d.column("gamble:gain"), _coverage_by_hand(on, du, centred, n, tr), atol=1e-9)
    assert "cue:gain" not in d.names  # one event: constant, left out with a note
    assert any("'cue'" in w and "left out" in w for w in d.warnings)
    dg = build_design([c], n, tr, kernel="double-gamma", modulators=("gain",), highpass_s=None)
    by_event = np.zeros(n)
    for i in range(25):
        one = build_design([Condition("e", [on[i]], [du[i]])], n, tr, highpass_s=None)
        by_event += centred[i] * one.column("e")
    assert_allclose(dg.column("gamble:gain"), by_event, atol=1e-10)
    assert_allclose(dg.column("gamble"), by_event * 0 + dg.column("gamble"))  # main unchanged
    plain = build_design([Condition("gamble", on, du)], n, tr, highpass_s=None)
    assert_allclose(dg.column("gamble"), plain.column("gamble"), atol=1e-12)


def test_modulated_fit_equals_statsmodels_on_a_design_built_here():
    """t of 'gamble:gain' and 'gamble' equal statsmodels OLS t_test on a design built in
    this test (hand boxcar coverage, centred gain, constant); reference: statsmodels."""
    sm = pytest.importorskip("statsmodels.api")
    rng = np.random.default_rng(21)
    n, tr = 150, 2.0
    on = np.sort(rng.uniform(0, 280, 30))
    du = np.full(30, 3.0)
    gain = rng.uniform(1, 50, 30)
    gain[[3, 11]] = np.nan  # n/a: the condition's mean
    c = Condition("gamble", on, du, columns={"gain": gain})
    ok = np.isfinite(gain)
    centred = np.where(ok, gain - gain[ok].mean(), 0.0)
    X = np.column_stack(
        [
            _coverage_by_hand(on, du, np.ones(30), n, tr),
            _coverage_by_hand(on, du, centred, n, tr),
            np.ones(n),
        ]
    )
    y = 100 + X @ [2.0, 0.05, 0.0] + rng.standard_normal(n)
    m = sm.OLS(y, X).fit()
    a = Analysis([c], n, tr)
    for expr, w in (("gamble:gain", [0, 1, 0]), ("gamble", [1, 0, 0])):
        s = ModelSettings(
            noise="ols", kernels=("boxcar",), highpass_s=None, modulators=("gain",), contrast=expr
        )
        f = a.fit_voxel(y, s).fits[0]
        tt = m.t_test(np.array(w, dtype=float))
        assert f.t == pytest.approx(float(np.squeeze(tt.tvalue)), rel=1e-9)
        assert f.estimate == pytest.approx(float(np.squeeze(tt.effect)), rel=1e-9)
    notes = a.check_modulators(ModelSettings(modulators=("gain",)))
    assert notes == [
        "condition 'gamble': modulator 'gain' is n/a for 2 of 30 events; they keep the main "
        "regressor and take the condition's mean"
    ]
    with pytest.raises(InputError, match="numeric columns: gain"):
        a.check_modulators(ModelSettings(modulators=("gian",)))


@pytest.mark.parametrize(
    ("main", "slope"), [(2.0, 0.0), (0.0, 0.08), (2.0, 0.08)], ids=["main", "modulation", "both"]
)
def test_modulators_recovered_on_simulated_data(main, slope):
    """Planted responses (each event's height = main + slope * (gain - mean gain)) are
    recovered: the planted betas lie within 4 standard errors, an absent effect has
    |t| < 3.5 and a present one t > 5 (reference: the planted truth; statsmodels agrees
    with the fit, see the test above)."""
    rng = np.random.default_rng(int(main * 10 + slope * 100))
    n, tr = 300, 2.0
    on = np.sort(rng.uniform(5, 580, 60))
    gain = rng.uniform(0, 60, 60)
    c = Condition("gamble", on, np.full(60, 3.0), columns={"gain": gain})
    heights = main + slope * (gain - gain.mean())
    truth = build_design([Condition("gamble", on, np.full(60, 3.0), heights)], n, tr)
    y = 500 + truth.column("gamble") * 1.0 + rng.standard_normal(n) * 0.5
    a = Analysis([c], n, tr)
    for expr, planted in (("gamble", main), ("gamble:gain", slope)):
        s = ModelSettings(kernels=("double-gamma",), modulators=("gain",), contrast=expr)
        f = a.fit_voxel(y, s).fits[0]
        assert abs(f.estimate - planted) < 4 * math.sqrt(f.variance)
        if planted == 0:
            assert abs(f.t) < 3.5
        else:
            assert f.t > 5


# ------------------------------------------------ high-pass shorter than the task's cycle


def _blocks(cycle_s: float, n_cycles: int, name: str = "tap") -> Condition:
    return Condition(name, [cycle_s * k for k in range(n_cycles)], [cycle_s / 2] * n_cycles)


@pytest.mark.parametrize("cycle_s", [30.0, 40.0, 60.0])
def test_task_cycle_is_the_periodogram_peak(cycle_s):
    """The dominant period equals scipy.signal.periodogram's peak (outside reference)."""
    from scipy import signal

    tr, n = 2.0, int(8 * cycle_s / 2.0)
    x = boxcar_regressor(_blocks(cycle_s, 8), volume_times(n, tr), tr)
    f, p = signal.periodogram(x - x.mean(), fs=1.0 / tr)
    assert task_cycle(x, tr) == pytest.approx(1.0 / f[1 + np.argmax(p[1:])])
    assert task_cycle(x, tr) == pytest.approx(cycle_s)


def test_highpass_below_the_cycle_warns_with_the_share_removed():
    """The share removed equals statsmodels' uncentred R² of the centred boxcar on the
    DCT drift columns (OLS without a constant: statsmodels reports the uncentred R²)."""
    import statsmodels.api as sm

    tr, n = 2.0, 160
    cond = _blocks(40.0, 8)
    line = task_cycle_warning([cond], n, tr, 16.0)
    assert line is not None and "\n" not in line
    x = boxcar_regressor(cond, volume_times(n, tr), tr)
    r2 = sm.OLS(x - x.mean(), dct_drift(n, tr, 16.0)).fit().rsquared
    assert f"removes {100 * r2:.0f}% of tap's variation" in line
    assert "cut-off 16 s" in line and "about 40 s" in line and "e.g. 80 s" in line
    # above the cycle, or no high-pass: quiet
    assert task_cycle_warning([cond], n, tr, 128.0) is None
    assert task_cycle_warning([cond], n, tr, None) is None


def test_random_event_design_with_the_default_highpass_is_quiet():
    """Event-related designs have no strong cycle: the default 128 s never warns."""
    rng = np.random.default_rng(4)
    for _ in range(20):
        onsets = np.sort(rng.uniform(0, 580, 40))
        c = [Condition("a", onsets[::2], [1.0] * 20), Condition("b", onsets[1::2], [1.0] * 20)]
        assert task_cycle_warning(c, 300, 2.0, 128.0) is None


def test_the_warning_reaches_every_kernels_design_once():
    cond = _blocks(40.0, 8)
    a = Analysis([cond], n_volumes=160, tr=2.0)
    warnings = a.design_warnings(
        ModelSettings(kernels=("boxcar", "double-gamma", "fir"), highpass_s=16.0)
    )
    assert sum("shorter than the task's on/off cycle" in w for w in warnings) == 1
    assert not any("on/off cycle" in w for w in a.design_warnings(ModelSettings()))
