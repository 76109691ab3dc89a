"""Timing checks at one voxel: the onset-shift scan and the FIR estimate of the response.

Both go through the same :class:`~voxelscope.core.model.Analysis` design cache and the same
:func:`voxelscope.core.glm.fit` as the Fits table, so a t shown here is the t the Fits table
would show with the onsets moved.

* :func:`shift_scan` - the contrast's t with every onset moved by each of :data:`SHIFTS_S`
  (``-4 .. +8 s`` in steps of 0.25 s, relative to the settings' own ``onset_shift_s``).
  The best shift maximises t in the direction of the t at zero shift (``direction`` = its
  sign), so a well-timed deactivation, or ``A - B`` where B wins, is best where it is,
  not where its t happens to be least negative; the response's peak latency is the
  kernel's own time to peak plus that shift.
* :func:`fir_estimate` - a finite impulse response model with the settings' FIR bins
  (``fir_bin_s``, one TR by default, over ``fir_window_s``, 24 s by default: the same
  kernel as FIR in the Fits table), with the settings' confounds, drift and noise model;
  standard errors ``sqrt(sigma2 * diag(cov_unscaled))``. Each bin's time is the mean time
  after onset of the samples that fall in it (the bin centre when no sample does), so
  onsets locked to the volume grid are not drawn half a TR late. Each kernel's fitted
  response to one event of the condition (its median duration) comes with it, for drawing
  over the estimate.

Examples
--------
>>> import numpy as np
>>> from voxelscope.core.events import Condition
>>> from voxelscope.core.model import Analysis, ModelSettings
>>> on = np.arange(6.0, 290.0, 14.0)
>>> a = Analysis([Condition("tone", on, np.zeros(on.size))], 240, 1.25)
>>> s = ModelSettings(kernels=("double-gamma",))
>>> late = s.with_(onset_shift_s=2.0)
>>> y = 100 + 20 * a.design("double-gamma", late).column("tone")
>>> y = y + np.random.default_rng(0).standard_normal(240)
>>> scan = shift_scan(a, s, "double-gamma", y)
>>> scan.best_shift_s, scan.peak_latency_s
(2.0, 7.0)
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import signal

from .design import event_lengths, fine_step, stimulus_regressor
from .errors import ModelError
from .events import Condition
from .glm import fit
from .hrf import Kernel
from .model import Analysis, ModelSettings

__all__ = [
    "FIR_SPAN_S",
    "PERIODIC_MIN_CYCLES",
    "PERIODIC_MIN_SHARE",
    "SHIFTS_S",
    "FirEstimate",
    "ShiftScan",
    "fir_estimate",
    "shift_scan",
    "task_periodicity",
]

#: Onset shifts of the timing scan, seconds: -4 .. +8 in steps of 0.25 (exact binary values,
#: so the cached designs are found again on the next click).
SHIFTS_S: tuple[float, ...] = tuple(float(k) * 0.25 for k in range(-16, 33))
#: Default span of the FIR estimate in seconds (``ModelSettings.fir_window_s``).
FIR_SPAN_S = 24.0
_FINE_DT = 0.25  # s, grid of the drawn kernel responses
#: A regressor is periodic when its strongest frequency repeats at least this often in the
#: run ...
PERIODIC_MIN_CYCLES = 3.0
#: ... and that frequency (with its two neighbouring periodogram bins) holds at least this
#: share of the regressor's power. (Our own rule: blocks of equal length with jittered rests
#: give 0.65-0.9; random event-related designs peak at one cycle per run, the slow rise
#: and fall of the response, and are never called periodic.)
PERIODIC_MIN_SHARE = 0.4


def task_periodicity(x: np.ndarray, tr: float) -> tuple[float | None, float, float]:
    """Is a condition's regressor periodic? Its strongest period, cycles and power share.

    ``scipy.signal.periodogram`` of the demeaned regressor (``fs = 1 / tr``); the peak
    (above zero frequency) and its two neighbouring bins give the share of the power.

    Returns
    -------
    period_s : float or None
        The strongest period when the design is periodic (see :data:`PERIODIC_MIN_CYCLES`
        and :data:`PERIODIC_MIN_SHARE`), else None.
    cycles : float
        How many times that period fits in the run.
    share : float
        Share of the power at the peak (NaN for a constant regressor).

    >>> tr, n = 2.0, 150
    >>> t = np.arange(n) * tr
    >>> period, cycles, share = task_periodicity(((t % 60) < 30).astype(float), tr)
    >>> period, cycles
    (60.0, 5.0)
    """
    x = np.asarray(x, dtype=float).reshape(-1)
    f, p = signal.periodogram(x - x.mean(), fs=1.0 / tr)
    total = float(np.sum(p[1:]))
    if x.size < 4 or not total > 0:
        return None, math.nan, math.nan
    i = 1 + int(np.argmax(p[1:]))
    share = float(np.sum(p[max(1, i - 1) : i + 2]) / total)
    cycles = float(f[i] * x.size * tr)
    periodic = cycles >= PERIODIC_MIN_CYCLES - 1e-9 and share >= PERIODIC_MIN_SHARE
    return (float(1.0 / f[i]) if periodic else None), cycles, share


@dataclass(frozen=True, eq=False)
class ShiftScan:
    """The contrast's t against an onset shift.

    Attributes
    ----------
    shifts_s, t : ndarray
        Shifts (s) and the t at each (NaN where the shifted design cannot be fitted).
    t_at_zero : float
        t with the onsets as the settings give them.
    best_shift_s : float or None
        Shift of the largest ``direction * t``.
    direction : float
        Sign of ``t_at_zero`` (+1 when it is 0 or undefined): the contrast's direction.
    kernel_peak_s : float
        The kernel's own time to peak.
    peak_latency_s : float or None
        ``kernel_peak_s + best_shift_s``.
    """

    shifts_s: np.ndarray
    t: np.ndarray
    t_at_zero: float
    best_shift_s: float | None
    kernel_peak_s: float
    peak_latency_s: float | None
    direction: float = 1.0

    @property
    def t_best(self) -> float:
        """The t of the best shift, signed (NaN when none is finite)."""
        if not np.isfinite(self.t).any():
            return math.nan
        return float(self.direction * np.nanmax(self.direction * self.t))


def shift_scan(
    analysis: Analysis,
    settings: ModelSettings,
    kernel: str | Kernel,
    y: np.ndarray,
    shifts: Sequence[float] = SHIFTS_S,
    ar: np.ndarray | None = None,
) -> ShiftScan:
    """The contrast's t at one voxel with every onset moved by each shift.

    Parameters
    ----------
    analysis, settings, kernel
        As for :meth:`Analysis.fit_voxel`; the settings' noise model is used.
    y : ndarray (n_volumes,)
    shifts : sequence of float
        Seconds added to the settings' ``onset_shift_s``; must include 0 for ``t_at_zero``.

    Returns
    -------
    ShiftScan
    """
    y = np.asarray(y, dtype=float).reshape(-1)
    sh = np.asarray(shifts, dtype=float)
    t = np.array([_shift_t(analysis, settings, kernel, y, float(s), ar) for s in sh])
    zero = np.flatnonzero(sh == 0.0)
    t0 = float(t[zero[0]]) if zero.size else math.nan
    sign = -1.0 if (math.isfinite(t0) and t0 < 0) else 1.0
    best = float(sh[int(np.nanargmax(sign * t))]) if np.isfinite(t).any() else None
    k_peak = float(analysis.kernel(kernel, settings).peak_s())
    return ShiftScan(sh, t, t0, best, k_peak, None if best is None else k_peak + best, sign)


def _shift_t(
    analysis: Analysis,
    settings: ModelSettings,
    kernel: str | Kernel,
    y: np.ndarray,
    s: float,
    ar: np.ndarray | None = None,
) -> float:
    moved = settings.with_(onset_shift_s=float(settings.onset_shift_s) + s)
    try:
        _d, prep = analysis.prepared(kernel, moved)
        w = analysis.contrast_weights(kernel, moved)
    except ModelError:
        return math.nan  # e.g. every event of a condition moved out of the run
    return float(fit(prep, y, w, noise=settings.noise, ar=ar).t[0])


@dataclass(frozen=True, eq=False)
class FirEstimate:
    """The FIR estimate of one condition's response, with each kernel's fitted response.

    Attributes
    ----------
    condition : str
    times : ndarray (n_bins,)
        Mean time after onset of the samples in each bin (s).
    estimate, se : ndarray (n_bins,)
        FIR betas (data units) and their standard errors.
    bin_s : float
    peak_s : float or None
        Time of the largest estimate (of the smallest when the response is negative overall).
    kernels : dict
        Kernel name -> its fitted response at ``times``.
    kernel_times : ndarray
        A fine grid (0.25 s) for drawing the kernels' responses.
    kernels_fine : dict
        Kernel name -> its fitted response at ``kernel_times``.
    """

    condition: str
    times: np.ndarray
    estimate: np.ndarray
    se: np.ndarray
    bin_s: float
    peak_s: float | None
    kernels: dict[str, np.ndarray] = field(default_factory=dict)
    kernel_times: np.ndarray = field(default_factory=lambda: np.zeros(0))
    kernels_fine: dict[str, np.ndarray] = field(default_factory=dict)

    def to_json(self) -> dict[str, Any]:
        """Plain lists and floats (NaN left in; the caller cleans them)."""
        return {
            "condition": self.condition,
            "times": self.times.tolist(),
            "estimate": self.estimate.tolist(),
            "se": self.se.tolist(),
            "bin_s": self.bin_s,
            "peak_s": self.peak_s,
            "kernels": {k: v.tolist() for k, v in self.kernels.items()},
            "kernel_times": self.kernel_times.tolist(),
            "kernels_fine": {k: v.tolist() for k, v in self.kernels_fine.items()},
        }


def fir_estimate(
    analysis: Analysis,
    settings: ModelSettings,
    y: np.ndarray,
    condition: str,
    span_s: float | None = None,
    ar: np.ndarray | None = None,
) -> FirEstimate:
    """FIR estimate of a condition's response at one voxel, with the settings' FIR bins.

    ``span_s`` overrides ``settings.fir_window_s``; bins are ``settings.fir_bin_s`` wide
    (one TR when None), as for the FIR kernel of the Fits table.

    Every condition gets its FIR bins (the model stays complete); the settings' confounds,
    drift and noise model are kept, derivatives are not used. Each kernel in
    ``settings.kernels`` (except FIR) adds its fitted response for drawing.

    Raises
    ------
    ModelError
        The FIR design cannot be fitted (too few volumes for the bins).
    """
    y = np.asarray(y, dtype=float).reshape(-1)
    fir_settings = settings if span_s is None else settings.with_(fir_window_s=float(span_s))
    fk = analysis.fir_kernel(fir_settings)
    n_bins, bin_s = fk.n_bins, fk.bin_s  # type: ignore[attr-defined]
    d, prep = analysis.prepared(fk, settings.with_(derivatives=0))
    cols = list(d.condition_columns[condition])
    w = np.zeros(d.n_columns)
    w[cols] = 1.0 / len(cols)
    res = fit(prep, y, w, noise=settings.noise, ar=ar)
    est = res.betas[cols, 0].copy()
    cov = res.cov_unscaled[int(res.group[0])]
    se = np.sqrt(float(res.sigma2[0]) * np.diag(cov)[cols])
    times = _bin_times(analysis, settings, condition, n_bins, bin_s, d.volume_times)
    fine = np.arange(0.0, n_bins * bin_s + 1e-9, _FINE_DT)
    at_bins: dict[str, np.ndarray] = {}
    at_fine: dict[str, np.ndarray] = {}
    for name in settings.kernels:
        if isinstance(name, str) and name.lower() == "fir":
            continue
        try:
            both = _kernel_response(analysis, settings, name, y, condition, np.r_[times, fine], ar)
        except ModelError:
            # a kernel whose design cannot be fitted under these settings (rank, too few
            # volumes) is not drawn; anything else is a bug and surfaces
            continue
        at_bins[str(name)], at_fine[str(name)] = both[: times.size], both[times.size :]
    sign = 1.0 if float(np.sum(est)) >= 0 else -1.0
    peak = float(times[int(np.argmax(sign * est))]) if est.size else None
    return FirEstimate(condition, times, est, se, float(bin_s), peak, at_bins, fine, at_fine)


def _bin_times(
    analysis: Analysis,
    settings: ModelSettings,
    condition: str,
    n_bins: int,
    bin_s: float,
    volume_times: np.ndarray,
) -> np.ndarray:
    c = next(c for c in analysis.conditions if c.name == condition)
    lag = volume_times[:, None] - (c.onsets + float(settings.onset_shift_s))[None, :]
    b = np.floor(lag / bin_s + 1e-9).astype(int)
    inside = lag >= -1e-9
    out = (np.arange(n_bins) + 0.5) * bin_s
    for k in range(n_bins):
        sel = inside & (b == k)
        if sel.any():
            out[k] = float(lag[sel].mean())
    return out


def _kernel_response(
    analysis: Analysis,
    settings: ModelSettings,
    name: str | Kernel,
    y: np.ndarray,
    condition: str,
    times: np.ndarray,
    ar: np.ndarray | None = None,
) -> np.ndarray:
    """A kernel's fitted response (all its basis columns) to one event at time 0."""
    d, prep = analysis.prepared(name, settings)
    w = analysis.contrast_weights(name, settings)
    res = fit(prep, y, w, noise=settings.noise, ar=ar)
    k = d.kernel
    c = next(c for c in analysis.conditions if c.name == condition)
    dur = float(np.median(c.durations)) if c.n_events else 0.0
    one = Condition(condition, [0.0], [dur])
    dt = fine_step(analysis.tr)
    total = np.zeros(times.size)
    if k.name == "boxcar":
        # the stimulus itself: height 1 during the event (a brief event lasts 1 s)
        col = d.names.index(condition)
        box = (times >= 0) & (times < float(event_lengths(np.array([dur]))[0]))
        return res.betas[col, 0] * box.astype(float)
    for suffix, h in k.basis(dt, settings.derivatives):
        col = d.names.index(condition + suffix)
        reg = stimulus_regressor(one, h, times, dt, use_durations=k.uses_durations)
        total += res.betas[col, 0] * reg
    return total
