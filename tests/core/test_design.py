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
from voxelscope.core.design import build_design, dct_drift, frame_times
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
    assert_allclose(d.frame_times, np.arange(n) * tr)
    assert not d.X.flags.writeable


def test_highpass_none_removes_drift():
    d = build_design([TONE, TAP], 150, 1.25, highpass_s=None)
    assert d.names == ("tone", "tap", "constant")


def test_frame_times_reference():
    assert_allclose(frame_times(4, 2.0, 0.75), [0.75, 2.75, 4.75, 6.75])


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
    centre; the sampled regressor is the linear interpolation at the frame times (the
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
    """Boxcar: the stimulus itself; a brief event becomes one TR long (hrf docstring)."""
    tr = 2.0
    d = build_design([Condition("c", [11.0], [6.0])], 20, tr, kernel="boxcar", highpass_s=None)
    x = d.column("c")
    t = np.arange(20) * tr
    assert_allclose(x[(t > 11.0) & (t < 17.0)], 1.0)
    assert_allclose(x[(t < 11.0) | (t > 17.0)], 0.0)
    brief = build_design([Condition("c", [11.0], [0.0])], 20, tr, kernel="boxcar")
    assert brief.column("c").sum() == pytest.approx(1.0)  # one TR of height 1
    assert brief.column("c")[6] == pytest.approx(1.0)  # the volume at 12 s sees it


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

    Expected values written from that definition (hrf.FIR docstring) at the frame times.
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
