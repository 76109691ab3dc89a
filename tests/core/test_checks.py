"""Tests of voxelscope.core.checks: every check at one voxel, and the flags.

References (named beside each test):
* statsmodels on the same design and data: ``OLS`` (t, residuals, t_test on the rows left
  after dropping volumes), ``stats.stattools.durbin_watson``,
  ``stats.diagnostic.acorr_ljungbox`` (lags=10), ``tsa.stattools.acf``,
  ``stats.outliers_influence.OLSInfluence`` and ``variance_inflation_factor``;
* numpy.corrcoef for the confound correlations, scipy.signal.periodogram conventions for
  the spectrum, a brute-force search for the edge distance;
* planted artifacts in simulated data: our own double-gamma response from
  scipy.stats.gamma (shapes 6 and 16, undershoot 1/6; Friston et al. 1998, parameters from
  memory), an AR(1) noise process, a one-volume spike, a confound that follows the task.
"""

from __future__ import annotations

import functools
import io
import json
import math

import numpy as np
import pytest
from scipy import stats
from statsmodels.regression.linear_model import OLS
from statsmodels.stats.diagnostic import acorr_ljungbox
from statsmodels.stats.outliers_influence import OLSInfluence, variance_inflation_factor
from statsmodels.stats.stattools import durbin_watson
from statsmodels.tsa.stattools import acf as sm_acf

from voxelscope.core.checks import VoxelChecks, voxel_checks
from voxelscope.core.confounds import Confounds, parse_confounds
from voxelscope.core.design import dct_drift
from voxelscope.core.errors import InputError
from voxelscope.core.events import Condition
from voxelscope.core.flags import CONFOUND_R_LIMIT, EDGE_LIMIT_MM
from voxelscope.core.model import Analysis, ModelSettings

TR = 1.25
N = 240
DT = 0.05
KERNEL = "double-gamma"

REQUIRED_KEYS = {
    "durbin_watson", "ar1", "ljung_box_p", "acf", "outlier_volumes", "cooks_distance_max",
    "cooks_volume", "t_without_influential", "vif", "confound_correlation", "tsnr",
    "edge_distance_mm", "best_shift_s", "peak_latency_s", "fir", "spectrum", "flags",
    "shift_scan", "leverage", "cooks", "studentized", "volume_rms_change", "rms_spikes",
}  # fmt: skip


# ----------------------------------------------------------------------------- simulation


def response(t: np.ndarray, a1: float = 6.0) -> np.ndarray:
    """Our own double-gamma (scipy.stats.gamma densities, scale 1 s), unscaled."""
    return stats.gamma.pdf(t, a1) - stats.gamma.pdf(t, 16.0) / 6.0


def simulate(onsets, durations, n=N, tr=TR, shift_s=0.0, a1=6.0) -> np.ndarray:
    """Blocks or brief events convolved (numpy.convolve) with the unit-area response."""
    grid = np.arange(0.0, n * tr + 40.0, DT)
    stim = np.zeros(grid.size)
    for on, du in zip(np.asarray(onsets) + shift_s, durations):
        if du > 0:
            stim[(grid >= on) & (grid < on + du)] = 1.0
        else:
            stim[round(on / DT)] += 1.0 / DT
    h = response(np.arange(0.0, 32.0, DT), a1)
    h /= h.sum() * DT
    return np.interp(np.arange(n) * tr, grid, np.convolve(stim, h)[: grid.size] * DT)


def block_onsets(rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Our demo-like scenario: tone and tap blocks of 15 s, 12-18 s of rest between them."""
    tone, tap, t, k = [], [], 8.0, 0
    while t < N * TR - 25:
        (tone if k % 2 == 0 else tap).append(round(t, 2))
        k += 1
        t += 15.0 + float(rng.uniform(12.0, 18.0))
    return np.array(tone), np.array(tap)


@functools.cache
def blocks(seed: int):
    """A cached block analysis (its designs, shifted and FIR ones included, are reused)."""
    return block_analysis(np.random.default_rng(1000 + seed))


def block_analysis(rng, confounds: Confounds | None = None):
    tone, tap = block_onsets(rng)
    conds = [
        Condition("tone", tone, np.full(tone.size, 15.0)),
        Condition("tap", tap, np.full(tap.size, 15.0)),
    ]
    a = Analysis(conds, N, TR, confounds=confounds)
    signal = 2.0 * simulate(tone, conds[0].durations) + 1.0 * simulate(tap, conds[1].durations)
    return a, signal


def event_analysis(rng):
    onsets, t = [], 4.0
    while t < N * TR - 30:
        onsets.append(round(t, 3))
        t += float(rng.uniform(5.0, 11.0))
    on = np.array(onsets)
    return Analysis([Condition("tone", on, np.zeros(on.size))], N, TR), on


def ar1_noise(rng, n, rho):
    e = rng.standard_normal(n)
    out = np.empty(n)
    out[0] = e[0] / math.sqrt(1 - rho**2)
    for t in range(1, n):
        out[t] = rho * out[t - 1] + e[t]
    return out


class FakeRun:
    """Stand-in with the Run contract the checks use (mask, voxel_size, iter_rows, ...)."""

    def __init__(self, data: np.ndarray, mask: np.ndarray, voxel_size=(3.0, 3.0, 3.0)):
        self.data = np.asarray(data, dtype=np.float32)
        self._mask = mask
        self.shape = mask.shape
        self.n_volumes = data.shape[-1]
        self.voxel_size = tuple(voxel_size)
        self.affine = np.diag([*voxel_size, 1.0])
        self.chunk_calls = 0

    def mask(self):
        return self._mask

    def iter_rows(self, mask=None, chunk_voxels=64):
        self.chunk_calls += 1
        flat = np.flatnonzero(self._mask if mask is None else mask)
        rows = self.data.reshape(-1, self.n_volumes)
        for i in range(0, flat.size, chunk_voxels):
            yield flat[i : i + chunk_voxels], rows[flat[i : i + chunk_voxels]]

    def volume(self, t):
        return self.data[..., t]


def box_run(rng, n=N, spike_at: int | None = None) -> FakeRun:
    """A 10x10x10 grid (3 mm) with a 6x6x6 'brain' box; optional whole-brain jump."""
    mask = np.zeros((10, 10, 10), bool)
    mask[2:8, 2:8, 2:8] = True
    data = np.where(mask[..., None], 500.0, 5.0) + rng.standard_normal((10, 10, 10, n))
    if spike_at is not None:
        data[mask, spike_at] += 30.0
    return FakeRun(data, mask)


# ----------------------------------------------------------------------------- reference checks


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_residual_and_influence_measures_match_statsmodels(seed):
    """Reference: statsmodels OLS on the same design matrix and data, then durbin_watson,
    acorr_ljungbox(lags=10) p, acf(nlags=20), OLSInfluence (hat_matrix_diag,
    cooks_distance[0], resid_studentized_external) and variance_inflation_factor."""
    rng = np.random.default_rng(seed)
    conf = Confounds(("move_x", "move_z"), rng.standard_normal((N, 2)), "c.tsv")
    a, sig = block_analysis(rng, conf)
    s = ModelSettings(noise="ols", kernels=(KERNEL,))
    y = 100 + sig + ar1_noise(rng, N, float(rng.uniform(0, 0.4)))
    c = voxel_checks(a, s, KERNEL, y)
    d = a.design(KERNEL, s)
    res = OLS(y, d.X).fit()
    ref = OLSInfluence(res)
    assert c.t == pytest.approx(res.t_test(np.eye(d.n_columns)[0]).tvalue.item(), rel=1e-9)
    assert c.durbin_watson == pytest.approx(durbin_watson(res.resid), rel=1e-9)
    lb = acorr_ljungbox(res.resid, lags=[10])
    assert c.ljung_box_p == pytest.approx(float(lb["lb_pvalue"].iloc[0]), rel=1e-7)
    np.testing.assert_allclose(c.acf, sm_acf(res.resid, nlags=20, fft=False), atol=1e-10)
    np.testing.assert_allclose(c.leverage, ref.hat_matrix_diag, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(c.cooks, ref.cooks_distance[0], rtol=1e-7, atol=1e-12)
    np.testing.assert_allclose(c.studentized, ref.resid_studentized_external, rtol=1e-8, atol=1e-10)
    assert c.cooks_distance_max == pytest.approx(float(np.max(ref.cooks_distance[0])))
    assert c.cooks_volume == int(np.argmax(ref.cooks_distance[0]))
    assert list(c.vif) == list(d.names)
    for j, name in enumerate(d.names):
        assert c.vif[name] == pytest.approx(variance_inflation_factor(d.X, j), rel=1e-7)


def test_t_without_influential_matches_statsmodels_on_kept_rows():
    """Reference: statsmodels OLS t_test of the contrast on the rows left after dropping the
    influential volumes (the checks' own list: at most 3, Cook's distance above 4/n)."""
    rng = np.random.default_rng(21)
    a, sig = blocks(0)
    s = ModelSettings(noise="ols", kernels=(KERNEL,))
    y = 100 + sig + rng.standard_normal(N)
    y[[30, 100]] += [7.0, -6.0]
    c = voxel_checks(a, s, KERNEL, y)
    ref_cooks = OLSInfluence(OLS(y, a.design(KERNEL, s).X).fit()).cooks_distance[0]
    top = [int(i) for i in np.argsort(-ref_cooks) if ref_cooks[i] > 4 / N][:3]
    assert list(c.influential_volumes) == top
    X = a.design(KERNEL, s).X
    keep = np.setdiff1d(np.arange(N), top)
    ref = OLS(y[keep], X[keep]).fit().t_test(np.eye(X.shape[1])[0]).tvalue.item()
    assert c.t_without_influential == pytest.approx(ref, rel=1e-9)


def test_tsnr_matches_drift_only_fit():
    """Reference: mean(y) / sqrt(scale) of statsmodels OLS on the discrete cosine drift
    (128 s) and a constant only."""
    rng = np.random.default_rng(3)
    a, sig = blocks(0)
    y = 400 + 5 * sig + 3 * rng.standard_normal(N)
    c = voxel_checks(a, ModelSettings(kernels=(KERNEL,)), KERNEL, y)
    X0 = np.column_stack([dct_drift(N, TR, 128.0), np.ones(N)])
    assert c.tsnr == pytest.approx(np.mean(y) / math.sqrt(OLS(y, X0).fit().scale), rel=1e-10)


def test_confound_correlation_matches_numpy():
    """Reference: numpy.corrcoef of each condition's design column with each confound."""
    rng = np.random.default_rng(4)
    tone, tap = block_onsets(rng)
    conf = Confounds(("a", "b", "c"), rng.standard_normal((N, 3)), "c.tsv")
    conds = [Condition("tone", tone, [15.0] * tone.size), Condition("tap", tap, [15.0] * tap.size)]
    a = Analysis(conds, N, TR, confounds=conf)
    s = ModelSettings(kernels=(KERNEL,), confound_columns=("a",))  # the model uses only 'a'
    c = voxel_checks(a, s, KERNEL, 100 + rng.standard_normal(N))
    d = a.design(KERNEL, s)
    for cond in ("tone", "tap"):
        assert set(c.confound_correlation[cond]) == {"a", "b", "c"}
        for j, name in enumerate("abc"):
            r = np.corrcoef(d.column(cond), conf.values[:, j])[0, 1]
            assert c.confound_correlation[cond][name] == pytest.approx(r, rel=1e-10)


def test_spectrum_marks_task_and_highpass():
    """Fact (common practice): a block design repeating every P seconds has its main power
    at 1/P; the periodogram (scipy.signal.periodogram, fs = 1/TR) has N/2 + 1 frequencies up
    to the Nyquist 1/(2 TR). Here tone blocks repeat every 60 s exactly."""
    tone = np.arange(10.0, N * TR - 20, 60.0)
    tap = tone + 30.0
    conds = [Condition("tone", tone, [15.0] * tone.size), Condition("tap", tap, [15.0] * tap.size)]
    a = Analysis(conds, N, TR)
    y = 100 + simulate(tone, [15.0] * tone.size) + np.random.default_rng(0).standard_normal(N)
    c = voxel_checks(a, ModelSettings(kernels=(KERNEL,)), KERNEL, y)
    sp = c.spectrum
    freqs = np.asarray(sp["freqs_hz"])
    assert freqs.size == N // 2 + 1 and freqs[-1] == pytest.approx(1 / (2 * TR))
    assert sp["task_hz"] == pytest.approx(1 / 60.0, abs=freqs[1])
    assert sp["highpass_hz"] == pytest.approx(1 / 128.0)


# ----------------------------------------------------------------------------- planted artifacts


def test_clean_voxels_raise_no_flags():
    """White noise plus our own canonical response (blocks): no flag at all, for several
    seeds, with a run whose voxel lies deep inside the mask and has no spikes."""
    for seed in range(4):  # two designs, two noise draws each
        rng = np.random.default_rng(seed)
        a, sig = blocks(seed % 2)
        y = 100 + sig + rng.standard_normal(N)
        run = box_run(rng)
        c = voxel_checks(a, ModelSettings(), KERNEL, y, run=run, ijk=(4, 4, 4))
        assert c.flags == (), [f.text for f in c.flags]
        assert c.outlier_volumes == () and c.rms_spikes == ()


def test_planted_spike_is_found_and_drives_t():
    """One volume inside a tone block jumps by 30 noise SDs at a voxel with no response:
    it is an outlier, the most influential volume, and dropping it changes t (reference:
    statsmodels OLS t on the data without that volume)."""
    rng = np.random.default_rng(8)
    a, _sig = blocks(0)
    s = ModelSettings(noise="ols", kernels=(KERNEL,))
    d = a.design(KERNEL, s)
    vol = int(np.argmax(d.column("tone")))
    y = 100 + rng.standard_normal(N)
    y[vol] += 30.0
    c = voxel_checks(a, s, KERNEL, y)
    assert vol in c.outlier_volumes and vol in c.studentized_outliers
    assert c.cooks_volume == vol and c.influential_volumes[0] == vol
    keep = np.delete(np.arange(N), vol)
    t_ref = OLS(y[keep], d.X[keep]).fit().t_test(np.eye(d.n_columns)[0]).tvalue.item()
    assert c.t_dropping[0] == pytest.approx(t_ref, rel=1e-9)
    assert c.t - c.t_dropping[0] > 1.0 and c.t != c.t_without_influential
    assert {"outliers", "influence"} <= set(c.flag_ids())
    text = next(f.text for f in c.flags if f.id == "influence")
    assert text == f"One volume ({vol}) alone raises t from {t_ref:.2f} to {c.t:.2f}."


def test_two_spikes_in_two_blocks_are_named_together():
    """Motion-like spikes in two different tone blocks (our demo's rim artifact): the flag
    names both volumes and the t without them (statsmodels OLS on the kept rows)."""
    rng = np.random.default_rng(9)
    a, _sig = blocks(1)
    s = ModelSettings(noise="ols", kernels=(KERNEL,))
    d = a.design(KERNEL, s)
    inside = np.flatnonzero(d.column("tone") > 0.9)
    vols = [int(inside[3]), int(inside[-3])]
    y = 100 + rng.standard_normal(N)
    y[vols] += 15.0
    c = voxel_checks(a, s, KERNEL, y)
    assert set(c.influential_volumes[:2]) == set(vols)
    keep = np.setdiff1d(np.arange(N), vols)
    t_ref = OLS(y[keep], d.X[keep]).fit().t_test(np.eye(d.n_columns)[0]).tvalue.item()
    text = next(f.text for f in c.flags if f.id == "influence")
    named = ", ".join(str(v) for v in c.influential_volumes[:2])
    assert text == f"2 volumes ({named}) raise t from {t_ref:.2f} to {c.t:.2f}."


def test_late_response_is_flagged():
    """The voxel responds 3 s later than the events say: the timing flag names the later
    peak (kernel peak 5 s + about 3 s)."""
    rng = np.random.default_rng(12)
    a, on = event_analysis(rng)
    y = 100 + 25 * simulate(on, np.zeros(on.size), shift_s=3.0) + rng.standard_normal(N)
    c = voxel_checks(a, ModelSettings(kernels=(KERNEL,)), KERNEL, y)
    assert c.best_shift_s == pytest.approx(3.0, abs=0.5)
    assert c.peak_latency_s == pytest.approx(8.0, abs=0.5)
    flag = next(f for f in c.flags if f.id == "timing")
    assert flag.figure == "shift_scan" and "later than the kernel's 5 s" in flag.text


def test_autocorrelated_noise_is_flagged_and_ar1_answers_it():
    """AR(1) noise with rho 0.7 (common practice: OLS t is then inflated): flagged under OLS
    with a lag-1 estimate near 0.7; under the AR(1) model the prewhitened residuals are
    nearly white and the flag goes away."""
    rng = np.random.default_rng(13)
    a, sig = blocks(0)
    y = 100 + sig + ar1_noise(rng, N, 0.7)
    c = voxel_checks(a, ModelSettings(noise="ols", kernels=(KERNEL,)), KERNEL, y)
    assert c.ar1 == pytest.approx(0.7, abs=0.12)
    assert c.durbin_watson < 1.0 and c.ljung_box_p < 1e-6
    assert "autocorrelation" in c.flag_ids()
    c_ar = voxel_checks(a, ModelSettings(kernels=(KERNEL,), noise="ar1"), KERNEL, y)
    assert abs(c_ar.ar1_whitened) < 0.2
    assert "autocorrelation" not in c_ar.flag_ids()


def test_confound_locked_to_the_task_is_flagged():
    """A motion column that follows the tone regressor (r about 0.8 by construction) is
    flagged under the confound figure; the r is numpy.corrcoef's."""
    rng = np.random.default_rng(14)
    tone, tap = block_onsets(rng)
    tone_reg = simulate(tone, [15.0] * tone.size)
    move = np.column_stack([tone_reg / tone_reg.std() + 0.7 * rng.standard_normal(N),
                            rng.standard_normal(N)])  # fmt: skip
    conf = Confounds(("move_z", "move_x"), move, "c.tsv")
    conds = [Condition("tone", tone, [15.0] * tone.size), Condition("tap", tap, [15.0] * tap.size)]
    a = Analysis(conds, N, TR, confounds=conf)
    y = 100 + 2 * tone_reg + 0.5 * move[:, 0] + rng.standard_normal(N)
    c = voxel_checks(a, ModelSettings(kernels=(KERNEL,)), KERNEL, y)
    r = np.corrcoef(a.design(KERNEL, ModelSettings()).column("tone"), move[:, 0])[0, 1]
    assert r > CONFOUND_R_LIMIT
    flag = next(f for f in c.flags if f.id == "confound")
    assert flag.figure == "confounds"
    assert flag.text == f"The tone regressor correlates {r:.3f} with confound column move_z."


def test_edge_voxel_and_outside_voxel():
    """Brute-force reference: a voxel on the face of the box mask is one voxel (3 mm) from
    the outside, one layer in is 6 mm, the centre is farther; outside voxels say so."""
    rng = np.random.default_rng(15)
    a, sig = blocks(0)
    y = 100 + sig + rng.standard_normal(N)
    run = box_run(rng)
    s = ModelSettings(kernels=(KERNEL,))
    rim = voxel_checks(a, s, KERNEL, y, run=run, ijk=(2, 4, 4))
    assert rim.edge_distance_mm == pytest.approx(3.0) and rim.in_mask
    assert rim.flag_ids() == ["edge"]
    assert "3.0 mm from the brain edge" in rim.flags[0].text and rim.flags[0].figure == "edge"
    inner = voxel_checks(a, s, KERNEL, y, run=run, ijk=(3, 4, 4))
    assert inner.edge_distance_mm == pytest.approx(6.0)
    assert (inner.edge_distance_mm <= EDGE_LIMIT_MM) == ("edge" in inner.flag_ids())
    centre = voxel_checks(a, s, KERNEL, y, run=run, ijk=(4, 4, 4))
    assert centre.edge_distance_mm == pytest.approx(9.0) and "edge" not in centre.flag_ids()
    out = voxel_checks(a, s, KERNEL, y, run=run, ijk=(0, 0, 0))
    assert out.in_mask is False and "outside-mask" in out.flag_ids()


def test_run_spike_is_found_once_per_run():
    """A whole-brain jump at volume 90 shows in the volume-to-volume RMS change at 90 and 91
    (change into and out of the bad volume), joins the outlier volumes, raises the
    run-spikes flag, and the run is read only once for several clicks."""
    rng = np.random.default_rng(16)
    a, sig = blocks(0)
    run = box_run(rng, spike_at=90)
    s = ModelSettings(kernels=(KERNEL,))
    y = 100 + sig + rng.standard_normal(N)
    c1 = voxel_checks(a, s, KERNEL, y, run=run, ijk=(4, 4, 4))
    c2 = voxel_checks(a, s, KERNEL, y + 1, run=run, ijk=(5, 4, 4))
    assert run.chunk_calls == 1
    assert c1.rms_spikes == (90, 91) and {90, 91} <= set(c2.outlier_volumes)
    masked = run.data.astype(float)[run.mask()]
    expect = np.sqrt(np.mean(np.diff(masked, axis=1) ** 2, axis=0))
    np.testing.assert_allclose(c1.volume_rms_change[1:], expect, rtol=1e-10)
    assert "run-spikes" in c1.flag_ids()


# ----------------------------------------------------------------------------- output and input


def test_to_json_is_strict_and_complete():
    """json.dumps(allow_nan=False) succeeds; the documented keys are all there; lists have
    the documented lengths (acf lags 0..20, one entry per volume, 49 shifts)."""
    rng = np.random.default_rng(17)
    a, sig = blocks(0)
    c = voxel_checks(a, ModelSettings(), KERNEL, 100 + sig + rng.standard_normal(N))
    out = c.to_json()
    json.dumps(out, allow_nan=False)
    assert REQUIRED_KEYS <= set(out)
    assert len(out["acf"]) == 21 and len(out["leverage"]) == N and len(out["cooks"]) == N
    assert len(out["shift_scan"]["shifts_s"]) == len(out["shift_scan"]["t"]) == 49
    assert out["shift_scan"]["shifts_s"][0] == -4.0 and out["shift_scan"]["shifts_s"][-1] == 8.0
    assert {"times", "estimate", "se"} <= set(out["fir"])
    assert {"freqs_hz", "power", "task_hz", "highpass_hz"} <= set(out["spectrum"])
    assert out["edge_distance_mm"] is None and out["rms_spikes"] is None  # no run given
    assert set(out["confound_correlation"]) == {"tone", "tap"}


def test_constant_voxel_gives_a_clear_empty_result():
    """A constant voxel (outside the head) cannot be checked: one no-signal flag, NaN -> null
    in JSON, and no exception."""
    a, _ = blocks(0)
    c = voxel_checks(a, ModelSettings(kernels=(KERNEL,)), KERNEL, np.full(N, 7.0))
    assert isinstance(c, VoxelChecks) and c.flag_ids() == ["no-signal"]
    out = c.to_json()
    json.dumps(out, allow_nan=False)
    assert out["durbin_watson"] is None and out["t_without_influential"] is None


def test_bad_inputs_are_one_line_errors():
    """Wrong series length, unknown condition and a voxel outside the grid: InputError with
    one line naming what to do."""
    rng = np.random.default_rng(19)
    a, sig = blocks(0)
    s = ModelSettings(kernels=(KERNEL,))
    y = 100 + sig + rng.standard_normal(N)
    with pytest.raises(InputError, match="240 volumes"):
        voxel_checks(a, s, KERNEL, y[:-1])
    with pytest.raises(InputError, match="unknown condition 'hum'"):
        voxel_checks(a, s, KERNEL, y, condition="hum")
    with pytest.raises(InputError, match="outside the run's grid"):
        voxel_checks(a, s, KERNEL, y, run=box_run(rng), ijk=(10, 0, 0))
    for exc in (InputError,):
        try:
            voxel_checks(a, s, KERNEL, y[:10])
        except exc as err:
            assert "\n" not in str(err)


# ----------------------------------------------------------------------------- with a real Run


def test_with_a_real_run_on_disk(tmp_path, monkeypatch):
    """voxelscope.core.run.open_run on a small NIfTI written with nibabel: the edge distance
    matches a brute-force search over run.mask() (voxel sizes 3 x 3 x 3.5 mm from the
    affine) and the volume-to-volume RMS change matches numpy on the stored data."""
    nib = pytest.importorskip("nibabel")
    from voxelscope.core.run import open_run

    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "cache"))
    rng = np.random.default_rng(30)
    shape = (12, 12, 10)
    g = np.indices(shape).astype(float)
    head = ((g[0] - 5.5) / 4.5) ** 2 + ((g[1] - 5.5) / 4.5) ** 2 + ((g[2] - 4.5) / 3.6) ** 2 <= 1
    data = np.where(head[..., None], 600.0, 2.0) + rng.standard_normal((*shape, N))
    data = data.astype(np.float32)
    data[head, 150] += 40.0
    img = nib.Nifti1Image(data, np.diag([3.0, 3.0, 3.5, 1.0]))
    img.header.set_zooms((3.0, 3.0, 3.5, TR))
    img.header.set_xyzt_units("mm", "sec")
    path = tmp_path / "sub-x_task-y_bold.nii"
    nib.save(img, str(path))
    run = open_run(path, tr=TR, use_cache=False)
    a, _sig = blocks(0)
    mask = np.asarray(run.mask())
    ijk = tuple(int(v) for v in np.argwhere(mask)[0])  # the first mask voxel: on the rim
    y = run.timeseries(ijk)
    c = voxel_checks(a, ModelSettings(kernels=(KERNEL,)), KERNEL, y, run=run, ijk=ijk)
    outside = np.argwhere(~np.pad(mask, 1)).astype(float) * (3.0, 3.0, 3.5)
    p = (np.array(ijk) + 1.0) * (3.0, 3.0, 3.5)
    assert c.edge_distance_mm == pytest.approx(np.sqrt(((outside - p) ** 2).sum(1)).min())
    assert "edge" in c.flag_ids()
    expect = np.sqrt(np.mean(np.diff(data[mask].astype(float), axis=1) ** 2, axis=0))
    np.testing.assert_allclose(c.volume_rms_change[1:], expect, rtol=1e-6)
    assert c.rms_spikes == (150, 151)


def test_real_short_run_from_nibabel():
    """nibabel's functional.nii (a real run: 20 volumes, TR 2 s, L-A-S) with a made-up
    condition: the checks run end to end and give strict JSON (the FIR model of 12 bins
    still fits 20 volumes)."""
    nib = pytest.importorskip("nibabel")
    from nibabel.testing import data_path

    img = nib.load(f"{data_path}/functional.nii")
    vol = np.asarray(img.dataobj, dtype=float)
    ijk = tuple(int(v) for v in np.argwhere(vol.std(axis=-1) > 0)[len(vol) // 2])
    y = vol[ijk]
    a = Analysis([Condition("hum", [4.0, 22.0], [8.0, 8.0])], 20, 2.0)
    c = voxel_checks(a, ModelSettings(kernels=("gamma", "double-gamma")), "gamma", y)
    json.dumps(c.to_json(), allow_nan=False)
    assert len(c.fir["times"]) == 12 and c.df == 18


@pytest.mark.parametrize(
    "kernel, changes",
    [
        ("boxcar", {}),
        ("gaussian", {"derivatives": 1}),
        ("double-gamma", {"derivatives": 2, "noise": "ar1"}),
        ("fir", {"fir_window_s": 20.0}),
        ("gamma", {"highpass_s": None, "contrast": "2 tap - tone"}),
    ],
)
def test_every_kernel_and_setting_gives_consistent_results(kernel, changes):
    """Under each kernel and model setting the checks' t is the Fits table's t (the same
    glm.fit path), the timing scan's t at zero shift equals it, and the JSON is strict."""
    rng = np.random.default_rng(40)
    a, sig = blocks(1)
    s = ModelSettings(kernels=("boxcar", "gamma", "double-gamma")).with_(**changes)
    y = 100 + sig + rng.standard_normal(N)
    c = voxel_checks(a, s, kernel, y)
    fits = a.fit_voxel(y, s.with_(kernels=(kernel,)))
    assert c.t == pytest.approx(fits.fits[0].t, rel=1e-12)
    assert c.t_at_zero_shift == pytest.approx(c.t, rel=1e-12)
    assert c.condition == ("tap" if changes.get("contrast") else "tone")
    json.dumps(c.to_json(), allow_nan=False)
    assert {"gamma", "double-gamma"} <= set(c.fir["kernels"]) <= {"boxcar", "gamma", "double-gamma"}


def _motion_case(spike_in_voxel: bool, include: bool):
    """A block-design voxel; the confounds jump at volume 70 (head moves and comes back);
    optionally the voxel jumps there too (planted, so the truth is known)."""
    from voxelscope.core.checks import confound_spikes, voxel_checks

    rng = np.random.default_rng(21)
    n, tr = 160, 1.25
    conds = [Condition("tap", [12.0, 60.0, 110.0, 160.0], [15.0] * 4)]
    move = np.cumsum(rng.standard_normal(n)) * 0.005
    move[70:73] += 1.5  # a jolt lasting three volumes
    conf = Confounds(("move_y",), move[:, None])
    a = Analysis(conds, n, tr, conf)
    s = ModelSettings(kernels=("double-gamma",), confound_columns=("move_y",) if include else ())
    x = a.design("double-gamma", ModelSettings(confound_columns=())).column("tap")
    y = 1000 + 8 * x + rng.standard_normal(n) * 2
    if spike_in_voxel:
        y[70:73] += 25
    return confound_spikes(a), voxel_checks(a, s, "double-gamma", y)


def test_confound_jumps_are_found_by_the_run_spike_rule():
    """The jump's start and end are spikes of the volume-to-volume change (median + 5 MAD,
    checked against scipy.stats.median_abs_deviation(scale='normal'))."""
    spikes, _ = _motion_case(False, False)
    assert set(spikes["move_y"]) == {70, 73}
    rng = np.random.default_rng(21)
    move = np.cumsum(rng.standard_normal(160)) * 0.005
    move[70:73] += 1.5
    step = np.abs(np.diff(move))
    thr = np.median(step) + 5 * stats.median_abs_deviation(step, scale="normal")
    assert set(np.flatnonzero(step > thr) + 1) == {70, 73}


def test_motion_flag_when_voxel_outliers_sit_on_confound_jumps():
    _, c = _motion_case(True, include=False)
    assert "motion" in c.flag_ids()
    text = next(f.text for f in c.flags if f.id == "motion")
    assert "move_y" in text and "volumes 70, 73" in text and "not in the model" in text
    _, c_in = _motion_case(True, include=True)
    motion = [f.text for f in c_in.flags if f.id == "motion"]
    assert motion and all("these columns are in the model" in t for t in motion)
    assert all("not in the model" not in t for t in motion)


def _pipeline_motion_case(spike_at: int):
    """Six pipeline-named motion columns (translations in mm, rotations in radians); five of
    them jump between volumes 79 and 80; the voxel stands out at ``spike_at`` only."""
    from voxelscope.core.checks import voxel_checks

    rng = np.random.default_rng(5)
    n, tr = 160, 1.25
    names = ("trans_x", "trans_y", "trans_z", "rot_x", "rot_y", "rot_z", "dvars")
    vals = np.cumsum(rng.standard_normal((n, 7)), axis=0) * 0.002
    vals[80:, 0] += 0.9  # mm
    vals[80:, 1] += 0.1
    vals[80:, 2] += 0.08
    vals[80:, 3] += 0.2  # radians: 11 degrees
    vals[80:, 4] += 0.3
    vals[:, 6] = 20 + rng.standard_normal(n)
    text = "\t".join(names) + "\n"
    for i in range(n):
        cells = [f"{v:.6g}" for v in vals[i]]
        if i == 0:
            cells[6] = "n/a"
        text += "\t".join(cells) + "\n"
    conf = parse_confounds(io.StringIO(text), "c.tsv")
    conds = [Condition("tap", [12.0, 60.0, 110.0, 160.0], [15.0] * 4)]
    a = Analysis(conds, n, tr, conf)
    s = ModelSettings(kernels=("double-gamma",), confound_columns=("trans_y", "rot_x"))
    x = a.design("double-gamma", s).column("tap")
    y = 1000 + 8 * x + rng.standard_normal(n) * 2
    y[spike_at] += 30
    return a, voxel_checks(a, s, "double-gamma", y)


def test_motion_flag_names_the_jump_volume_three_columns_and_sizes():
    """The flag names volume 80, where the columns take their new values, even when the
    voxel stands out one volume later; the three largest jumps relative to each column's
    threshold, translations in mm and rotations converted from radians to degrees; and says
    which of them the model has."""
    from voxelscope.core.checks import confound_spikes

    a, c = _pipeline_motion_case(spike_at=81)
    assert 81 in c.studentized_outliers
    assert confound_spikes(a) == {
        n: (80,) for n in ("trans_x", "trans_y", "trans_z", "rot_x", "rot_y")
    }
    (text,) = [f.text for f in c.flags if f.id == "motion"]
    assert text.startswith("The confounds jump at volume 80 (")
    assert "volume 81" not in text and "volume 79" not in text
    assert "and 2 more" in text
    assert "(trans_x 0.9 mm, rot_y 17°, rot_x 11° and 2 more)" in text
    assert "; rot_x is in the model, trans_x, rot_y are not." in text
    assert "dvars" not in text  # not a motion column, and its n/a first row is no jump


def test_first_rows_are_never_jumps():
    """A column whose first cells are n/a (read as 0) does not jump at its first value."""
    from voxelscope.core.checks import confound_spikes

    rng = np.random.default_rng(8)
    n = 80
    v = 20 + rng.standard_normal(n)
    text = "dvars\tstd_dvars\n" + "n/a\tn/a\n" + "".join(f"{a:.6g}\t{a / 20:.6g}\n" for a in v[1:])
    conf = parse_confounds(io.StringIO(text), "c.tsv")
    a = Analysis([Condition("tap", [10.0], [15.0])], n, 2.0, conf)
    assert confound_spikes(a) == {}


def test_no_motion_flag_for_a_clean_voxel_during_motion():
    _, c = _motion_case(False, include=False)
    assert "motion" not in c.flag_ids()
    assert c.to_json()["confound_spikes"] == {"move_y": [70, 73]}


def _ar2_noise(rng, n, phi1, phi2, burn=200):
    e = rng.standard_normal(n + burn)
    out = np.zeros(n + burn)
    for t in range(2, n + burn):
        out[t] = phi1 * out[t - 1] + phi2 * out[t - 2] + e[t]
    return out[burn:]


def test_ljung_box_is_on_the_models_whitened_residuals():
    """Under AR(1) the Ljung-Box test and ACF are of the Prais-Winsten whitened residuals
    (Prais & Winsten 1954, written out here), equal to statsmodels ``acorr_ljungbox``
    (lags=10) and ``tsa.stattools.acf`` on them; under OLS they are of the OLS residuals."""
    from voxelscope.core.glm import fit

    rng = np.random.default_rng(41)
    a, sig = blocks(1)
    y = 100 + sig + ar1_noise(rng, N, 0.5)
    s = ModelSettings(kernels=(KERNEL,), noise="ar1")
    c = voxel_checks(a, s, KERNEL, y)
    _d, prep = a.prepared(KERNEL, s)
    res = fit(prep, y, a.contrast_weights(KERNEL, s), noise="ar1")
    rho, r = float(res.rho[0]), res.residuals[:, 0]
    rw = np.concatenate([[math.sqrt(1 - rho**2) * r[0]], r[1:] - rho * r[:-1]])
    lb = acorr_ljungbox(rw, lags=[10])
    assert c.whitened_ljung_box_p == pytest.approx(float(lb["lb_pvalue"].iloc[0]), rel=1e-7)
    assert c.whitened_ljung_box_q == pytest.approx(float(lb["lb_stat"].iloc[0]), rel=1e-9)
    np.testing.assert_allclose(c.whitened_acf, sm_acf(rw, nlags=20, fft=False), atol=1e-10)
    c_ols = voxel_checks(a, s.with_(noise="ols"), KERNEL, y)
    assert c_ols.whitened_ljung_box_p == c_ols.ljung_box_p


def test_ar2_noise_is_flagged_after_ar1_prewhitening():
    """The issue's case: AR(2) noise (phi 0.2, 0.5) leaves the residuals autocorrelated
    after AR(1) prewhitening; lag 1 alone would miss it, Ljung-Box does not. Several draws."""
    flagged = 0
    for seed in range(5):
        rng = np.random.default_rng(500 + seed)
        a, sig = blocks(seed % 2)
        y = 100 + sig + _ar2_noise(rng, N, 0.2, 0.5)
        c = voxel_checks(a, ModelSettings(kernels=(KERNEL,), noise="ar1"), KERNEL, y)
        if "autocorrelation" in c.flag_ids():
            flagged += 1
            text = next(f.text for f in c.flags if f.id == "autocorrelation")
            assert "after AR(1) prewhitening" in text and "AR(p)" in text
    assert flagged == 5


def test_moderate_lag1_with_small_ljung_box_p_is_flagged():
    """The issue's demo case: lag-1 near 0.27 with a Ljung-Box p near 1e-4 must not pass
    silently under OLS (the old rule needed lag-1 above 0.3)."""
    rng = np.random.default_rng(77)
    hits = []
    for seed in range(6):
        a, sig = blocks(seed % 2)
        y = 100 + sig + ar1_noise(rng, N, 0.3)
        c = voxel_checks(a, ModelSettings(kernels=(KERNEL,), noise="ols"), KERNEL, y)
        if c.ar1 < 0.3 and c.whitened_ljung_box_p < 1e-3:
            hits.append("autocorrelation" in c.flag_ids())
    assert hits and all(hits)


def test_task_repeats_only_for_periodic_designs():
    """Issue 13: an event-related run with a quiet ending (random gaps, the last 150 s
    empty) is not called periodic and gets no 'task repeats' flag; blocks every 160 s with
    a 128 s high-pass get it (period near the cutoff, common practice says it removes part
    of the response)."""
    from voxelscope.core.checks import voxel_checks

    rng = np.random.default_rng(17)
    n, tr = 300, 2.0
    on = np.cumsum(rng.uniform(4.0, 10.0, 120))
    on = on[on < n * tr - 150]
    a = Analysis([Condition("cue", on, np.full(on.size, 1.0))], n, tr)
    s = ModelSettings(kernels=("double-gamma",))
    y = 100 + 3 * a.design("double-gamma", s).column("cue") + rng.standard_normal(n)
    c = voxel_checks(a, s, "double-gamma", y)
    assert c.spectrum["task_periodic"] is False and "slow-task" not in c.flag_ids()
    b = Analysis([Condition("blk", np.arange(10.0, 590.0, 160.0), [80.0] * 4)], n, tr)
    yb = 100 + 3 * b.design("double-gamma", s).column("blk") + rng.standard_normal(n)
    cb = voxel_checks(b, s, "double-gamma", yb)
    assert cb.spectrum["task_periodic"] is True and "slow-task" in cb.flag_ids()
