"""The peri-event response at one voxel: the data averaged around a condition's onsets.

For each event of the condition, the voxel's samples are grouped by their time since the
onset into bins of ``settings.fir_bin_s`` (one TR by default), from :data:`BASELINE_S`
seconds before the onset to the end of the window (``settings.fir_window_s``, or the
median event duration plus :data:`AFTER_BLOCK_S` for blocks, whichever is longer). Each
event's values are taken relative to its own baseline, the mean of its samples in the
``BASELINE_S`` seconds before its onset (events without such samples are left out). The
mean over events in each bin comes with a 95% confidence band, ``mean +- t_{0.975, n-1}
* sd / sqrt(n)`` (the t interval of a mean, as in ``scipy.stats.t.interval``; NaN where
fewer than two events reach a bin).

Beside the data, each kernel's prediction goes through exactly the same averaging: the
kernel's fitted task part (its condition, modulator, derivative or FIR columns times their
betas, drift and confounds left out), so overlapping events, the baseline and the
sampling shape the data and the prediction alike. Volumes left out of the fit (see
:meth:`voxelscope.core.model.Analysis.excluded_volumes`) are left out here too. The FIR
estimate of
:func:`voxelscope.core.timing.fir_estimate` is the model-based counterpart.

Examples
--------
>>> from voxelscope.core.events import Condition
>>> from voxelscope.core.model import Analysis, ModelSettings
>>> on = np.arange(20.0, 560.0, 30.0)
>>> a = Analysis([Condition("tone", on, np.full(on.size, 2.0))], 300, 2.0)
>>> s = ModelSettings(kernels=("double-gamma",))
>>> y = 100 + 5 * a.design("double-gamma", s).column("tone")
>>> r = peri_event_response(a, s, y, "tone")
>>> int(r.n_events.max()), r.times[r.times < 0].size
(18, 2)
>>> bool(np.allclose(r.mean, r.predictions["double-gamma"], atol=1e-9))  # noiseless
True
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import stats

from .design import volume_times
from .errors import InputError, ModelError
from .glm import fit
from .model import Analysis, ModelSettings

__all__ = ["AFTER_BLOCK_S", "BASELINE_S", "PeriEventResponse", "peri_event_response"]

#: Seconds before each onset that form its baseline (our own choice: two to four volumes at
#: common TRs, short enough to sit between events of a fast design).
BASELINE_S = 4.0
#: For blocks, the window reaches this long past the median block's end (the response's
#: return to baseline, common practice puts it 15-20 s after a stimulus ends).
AFTER_BLOCK_S = 20.0
_TASK_KINDS = ("condition", "modulator", "derivative", "fir")


@dataclass(frozen=True, eq=False)
class PeriEventResponse:
    """The data and each kernel's prediction averaged around one condition's onsets.

    Attributes
    ----------
    condition : str
    times : ndarray (n_bins,)
        Mean time since onset of the samples in each bin (the bin centre where none fall).
    mean, ci_low, ci_high : ndarray (n_bins,)
        Baseline-corrected mean of the data over events and its 95% confidence band.
    n_events : ndarray of int (n_bins,)
        Events that reach each bin.
    bin_s, baseline_s, window_s : float
    predictions : dict
        Kernel name -> its fitted task part, averaged the same way.
    note : str
        Why the view is empty or partial ("" when it is complete).
    """

    condition: str
    times: np.ndarray
    mean: np.ndarray
    ci_low: np.ndarray
    ci_high: np.ndarray
    n_events: np.ndarray
    bin_s: float
    baseline_s: float
    window_s: float
    predictions: dict[str, np.ndarray] = field(default_factory=dict)
    note: str = ""

    def to_json(self) -> dict[str, Any]:
        """Plain lists and floats (NaN left in; the caller cleans them)."""
        return {
            "condition": self.condition,
            "times": self.times.tolist(),
            "mean": self.mean.tolist(),
            "ci_low": self.ci_low.tolist(),
            "ci_high": self.ci_high.tolist(),
            "n_events": [int(n) for n in self.n_events],
            "bin_s": self.bin_s,
            "baseline_s": self.baseline_s,
            "window_s": self.window_s,
            "predictions": {k: v.tolist() for k, v in self.predictions.items()},
            "note": self.note,
        }


def _epochs(
    y: np.ndarray, volume_times: np.ndarray, onsets: np.ndarray, edges: np.ndarray, base_s: float
) -> tuple[np.ndarray, np.ndarray]:
    """Per event and bin: mean of the samples in the bin minus the event's baseline (NaN
    where no sample falls); and the summed lags and counts for the bin times."""
    n_bins = edges.size - 1
    out = np.full((onsets.size, n_bins), np.nan)
    lag_sum = np.zeros(n_bins)
    lag_n = np.zeros(n_bins)
    finite = np.isfinite(y)  # left-out volumes come as NaN
    for e, on in enumerate(onsets):
        lag = volume_times - on
        base = (lag >= -base_s - 1e-9) & (lag < -1e-9) & finite
        if not base.any():
            continue
        b0 = float(y[base].mean())
        k = np.searchsorted(edges, lag + 1e-9, side="right") - 1
        ok = (k >= 0) & (k < n_bins) & finite
        for j in np.unique(k[ok]):
            sel = ok & (k == j)
            out[e, j] = float(y[sel].mean()) - b0
            lag_sum[j] += float(lag[sel].sum())
            lag_n[j] += int(sel.sum())
    return out, np.divide(lag_sum, lag_n, out=np.full(n_bins, np.nan), where=lag_n > 0)


def peri_event_response(
    analysis: Analysis,
    settings: ModelSettings,
    y: np.ndarray,
    condition: str,
    baseline_s: float = BASELINE_S,
    ar_by_kernel: Mapping[str, np.ndarray] | None = None,
) -> PeriEventResponse:
    """Average the voxel around a condition's onsets, with each kernel's prediction.

    Parameters
    ----------
    analysis, settings
        As for :meth:`Analysis.fit_voxel`; the settings' onset shift, FIR bin width and
        window, kernels, modulators and noise model are used.
    y : ndarray (n_volumes,)
    condition : str
    baseline_s : float
        Seconds before each onset that form its baseline.

    Raises
    ------
    InputError
        Unknown condition or a series of the wrong length.
    """
    y = np.asarray(y, dtype=float).reshape(-1)
    if y.size != analysis.n_volumes:
        raise InputError(
            f"the voxel's time series has {y.size} points but the run has "
            f"{analysis.n_volumes} volumes"
        )
    names = analysis.condition_names
    if condition not in names:
        raise InputError(f"unknown condition '{condition}'; use {', '.join(names)}")
    c = analysis.conditions[names.index(condition)]
    onsets = c.onsets + float(settings.onset_shift_s)
    bin_s = float(settings.fir_bin_s or analysis.tr)
    dur = float(np.median(c.durations)) if c.n_events else 0.0
    window = max(float(settings.fir_window_s), dur + AFTER_BLOCK_S if dur > 0 else 0.0)
    n_pre = max(1, math.ceil(baseline_s / bin_s - 1e-9))
    n_post = max(1, math.ceil(window / bin_s - 1e-9))
    edges = np.arange(-n_pre, n_post + 1) * bin_s
    centres = (edges[:-1] + edges[1:]) / 2
    times_s = volume_times(analysis.n_volumes, analysis.tr, analysis.reference_time_s)
    keep = analysis.keep_mask(settings)  # volumes left out of the fit leave the average too
    gone = np.zeros(y.size, dtype=bool) if keep is None else ~keep
    data, lag_mean = _epochs(np.where(gone, np.nan, y), times_s, onsets, edges, baseline_s)
    times = np.where(np.isfinite(lag_mean), lag_mean, centres)
    n = np.sum(np.isfinite(data), axis=0)
    mean = np.full(times.size, np.nan)
    lo = np.full(times.size, np.nan)
    hi = np.full(times.size, np.nan)
    for j in range(times.size):
        v = data[np.isfinite(data[:, j]), j]
        if v.size:
            mean[j] = float(v.mean())
        if v.size >= 2:
            half = stats.t.ppf(0.975, v.size - 1) * float(v.std(ddof=1)) / math.sqrt(v.size)
            lo[j], hi[j] = mean[j] - half, mean[j] + half
    note = ""
    if not n.any():
        note = (
            f"no event of '{condition}' has volumes in the {baseline_s:g} s before its onset "
            "inside the run, so there is no baseline to average from"
        )
    predictions: dict[str, np.ndarray] = {}
    for kernel in settings.kernels:
        try:
            d, prep = analysis.prepared(kernel, settings)
            w = analysis.contrast_weights(kernel, settings)
        except (ModelError, InputError, ValueError):
            continue
        # under AR(p): the kernel's coefficients from the Fits table when given (the map's
        # whitening), else the voxel's own estimate
        ar = None if ar_by_kernel is None else ar_by_kernel.get(str(kernel))
        res = fit(prep, y, w, noise=settings.noise, ar=ar)
        cols = [i for i, k in enumerate(d.kinds) if k in _TASK_KINDS]
        task = d.X[:, cols] @ res.betas[cols, 0]
        pred, _ = _epochs(np.where(gone, np.nan, task), times_s, onsets, edges, baseline_s)
        with np.errstate(invalid="ignore"):
            predictions[str(kernel)] = np.array(
                [
                    float(np.mean(p[np.isfinite(p)])) if np.isfinite(p).any() else np.nan
                    for p in pred.T
                ]
            )
    return PeriEventResponse(
        condition,
        times,
        mean,
        lo,
        hi,
        n.astype(int),
        bin_s,
        float(baseline_s),
        window,
        predictions,
        note,
    )
