"""Tests of voxelscope.core.response: the peri-event average with its 95% band.

References: statsmodels ``DescrStatsW.tconfint_mean`` (the t interval of a mean) on epochs
cut by hand in the tests; the planted (noiseless) responses for the predictions.
"""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose
from statsmodels.stats.weightstats import DescrStatsW

from voxelscope.core.errors import InputError
from voxelscope.core.events import Condition
from voxelscope.core.model import Analysis, ModelSettings
from voxelscope.core.response import AFTER_BLOCK_S, peri_event_response

TR = 2.0
N = 240


def test_mean_and_band_against_statsmodels_on_hand_cut_epochs():
    """Onsets on the volume grid: every bin holds one sample per event. Epochs are cut here
    by index (baseline = the two volumes before the onset, 4 s at TR 2), and each bin's
    mean and 95% interval come from statsmodels."""
    rng = np.random.default_rng(31)
    idx = np.arange(6, 220, 13)  # onset volumes
    on = idx * TR
    a = Analysis([Condition("tone", on, np.full(idx.size, 1.0))], N, TR)
    y = 50 + rng.standard_normal(N) * 3
    r = peri_event_response(a, ModelSettings(kernels=("gamma",)), y, "tone")
    lags = np.arange(-2, 12)  # -4 s .. 22 s in volumes
    assert_allclose(r.times, lags * TR, atol=1e-12)
    for j, k in enumerate(lags):
        vals = [y[i + k] - y[i - 2 : i].mean() for i in idx if 0 <= i + k < N]
        ci = DescrStatsW(np.array(vals)).tconfint_mean(alpha=0.05)
        assert r.n_events[j] == len(vals)
        assert r.mean[j] == pytest.approx(np.mean(vals), abs=1e-12)
        assert (r.ci_low[j], r.ci_high[j]) == pytest.approx(ci, abs=1e-10)


def test_predictions_follow_the_data_when_the_model_is_right():
    """Noiseless data made by the model: each kernel's prediction equals the data average
    (reference: the planted response); a wrong kernel differs."""
    on = np.arange(10.0, 440.0, 17.0)
    a = Analysis([Condition("tap", on, np.zeros(on.size))], N, TR)
    s = ModelSettings(kernels=("double-gamma", "boxcar"))
    y = 200 + 8 * a.design("double-gamma", s).column("tap")
    r = peri_event_response(a, s, y, "tap")
    assert_allclose(r.predictions["double-gamma"], r.mean, atol=1e-9)
    assert np.nanmax(np.abs(r.predictions["boxcar"] - r.mean)) > 0.5
    peak = r.times[np.nanargmax(r.mean)]
    assert 3.0 <= peak <= 7.0


def test_blocks_get_a_window_past_their_end():
    on = np.arange(10.0, 400.0, 60.0)
    a = Analysis([Condition("block", on, np.full(on.size, 30.0))], N, TR)
    r = peri_event_response(a, ModelSettings(kernels=()), np.zeros(N) + 1.0, "block")
    assert r.window_s == 30.0 + AFTER_BLOCK_S and r.times.max() >= 48.0
    # a constant voxel: mean 0, a band of zero width, never inf
    assert np.all(np.isfinite(r.mean)) and np.allclose(r.mean, 0.0)
    assert np.allclose(r.ci_high - r.ci_low, 0.0)


def test_degenerate_conditions_say_why():
    """No baseline before the only event: an empty view with a note; one event: a mean but
    no band (NaN, not inf); an unknown condition is one clear line."""
    a = Analysis([Condition("first", [0.0], [1.0]), Condition("one", [100.0], [1.0])], N, TR)
    y = np.random.default_rng(2).standard_normal(N)
    r = peri_event_response(a, ModelSettings(kernels=()), y, "first")
    assert "no baseline" in r.note and np.all(np.isnan(r.mean)) and not r.n_events.any()
    r1 = peri_event_response(a, ModelSettings(kernels=()), y, "one")
    assert np.isfinite(r1.mean).any() and np.all(np.isnan(r1.ci_low))
    assert not np.isinf(r1.mean).any()
    with pytest.raises(InputError, match="'nope'"):
        peri_event_response(a, ModelSettings(), y, "nope")


def test_band_covers_zero_at_its_nominal_rate_under_the_null():
    """Null simulation: white noise, events far enough apart that their windows never
    overlap, so each bin's values over events are independent draws around 0; the 95% band
    must cover 0 in 95% of bins (400 runs x 16 bins; binomial SE about 0.5% per run set,
    the band 0.93-0.97 allows for bins of one run sharing the baseline)."""
    rng = np.random.default_rng(123)
    on = np.arange(10.0, 440.0, 36.0)  # 12 events, windows of 4 s + 24 s never overlap
    a = Analysis([Condition("tone", on, np.zeros(on.size))], N, TR)
    s = ModelSettings(kernels=())
    covered = total = 0
    for _ in range(400):
        r = peri_event_response(a, s, rng.standard_normal(N), "tone")
        ok = np.isfinite(r.ci_low)
        covered += int(np.sum((r.ci_low[ok] <= 0) & (r.ci_high[ok] >= 0)))
        total += int(ok.sum())
    assert 0.93 <= covered / total <= 0.97, covered / total
