"""Design matrices: conditions convolved with a kernel, plus confounds, drift and a constant.

Timing conventions
------------------
* Onsets and durations are in seconds from the start of the first volume's acquisition.
* Each volume ``n`` is sampled at ``n * TR + reference_time_s``. ``reference_time_s`` is 0
  by default; a run whose sidecar gives ``SliceTiming`` uses the median slice time, so the
  regressors are sampled when the middle of the volume was acquired (see
  :mod:`voxelscope.core.run`).
* The stimulus is built on a fine grid of ``TR / oversampling`` seconds (16 by default),
  convolved there with the kernel, and read at the volume times by linear interpolation.
  Partial overlap of an event with a fine bin counts in proportion. Boxcar and FIR
  columns are computed exactly instead: a boxcar value is the fraction of the volume's TR
  window ``[t, t + TR)`` (``t`` its sampling time; the acquisition window when
  ``reference_time_s`` is 0, and sampling later equals moving every onset earlier, as for
  the other kernels) that events cover (a
  brief event counts as :data:`BRIEF_EVENT_S` = 1 s, the area an impulse has under the
  unit-area kernels), so the regressor's area ``sum(x) * TR`` equals the stimulation time
  and no event vanishes between volumes; an FIR column is 1 where the time since an onset
  lies in its bin.

Parametric modulators
---------------------
With ``modulators=("gain",)`` every condition whose events carry a ``gain`` value gets,
after its main column (and its derivatives), a column ``CONDITION:gain`` built with the
same kernel from the same events, each scaled by its mean-centred ``gain``
(:func:`voxelscope.core.events.modulator_values`: ``n/a`` takes the mean, a constant
modulator is left out, serial orthogonalisation only when asked). Its kind is
``modulator``; contrasts and F tests name it like a condition.

Column order
------------
The default model is exactly: one regressor per condition (named as the condition, i.e. the
``trial_type`` value), then, when asked, derivative columns (``<name>_dt``, ``<name>_dd``)
after their condition and modulator columns (``<condition>:<modulator>``, each followed by
its own derivatives) after those, then confound columns (their file names), then discrete
cosine drift columns ``drift_1 .. drift_K`` and last ``constant``. Cosine columns chosen
from a confounds table (``cosine00`` ...) are drift columns already: they replace
``drift_1 .. drift_K`` (with a warning when a high-pass cutoff was set), so the drift never
enters twice.

Drift uses the discrete cosine basis ``cos(pi * k * (2 n + 1) / (2 N))`` for
``k = 1 .. K`` with ``K = floor(2 N TR / cutoff)``; a 128 s cutoff is a common default
(common practice).

Examples
--------
>>> from voxelscope.core.events import Condition
>>> c = [Condition("tone", [10.0], [15.0])]
>>> d = build_design(c, n_volumes=40, tr=1.25, kernel="boxcar", highpass_s=None)
>>> d.names
('tone', 'constant')
>>> float(d.X[10, 0]), float(d.X[7, 0])
(1.0, 0.0)
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from .confounds import Confounds
from .errors import InputError, ModelError
from .events import Condition, modulator_values
from .hrf import FIR, Boxcar, Kernel, get_kernel

__all__ = [
    "BRIEF_EVENT_S",
    "FINE_STEPS",
    "DesignMatrix",
    "boxcar_regressor",
    "build_design",
    "dct_drift",
    "event_lengths",
    "fine_step",
    "stimulus_regressor",
    "task_cycle",
    "task_cycle_warning",
    "volume_times",
]

#: Length given to a zero-duration event under the boxcar kernel (s): the area of the
#: impulse that the unit-area kernels give it.
BRIEF_EVENT_S = 1.0

#: Steps of the fine time grid per TR on which stimuli are convolved (at least this many).
FINE_STEPS = 16


def fine_step(tr: float) -> float:
    """The fine grid's step for a run of this TR: ``tr / FINE_STEPS`` seconds.

    >>> fine_step(2.0)
    0.125
    """
    return float(tr) / FINE_STEPS


def event_lengths(durations: np.ndarray) -> np.ndarray:
    """Durations with the brief-event rule: a zero duration counts as :data:`BRIEF_EVENT_S`.

    >>> event_lengths(np.array([0.0, 2.5])).tolist()
    [1.0, 2.5]
    """
    d = np.asarray(durations, dtype=np.float64)
    return np.where(d > 0, d, BRIEF_EVENT_S)


@dataclass(frozen=True, eq=False)
class DesignMatrix:
    """A design matrix with named columns.

    Attributes
    ----------
    X : ndarray, shape (n_volumes, n_columns)
        float64, read-only.
    names : tuple of str
        Column names.
    kinds : tuple of str
        For each column: ``condition``, ``modulator``, ``derivative``, ``fir``,
        ``confound``, ``drift`` or ``constant``.
    condition_columns : dict
        Condition name (or modulator column name ``condition:modulator``) -> indices of its
        columns (main column first); contrasts name these.
    modulators : dict
        Modulator column name -> its condition.
    kernel : Kernel
    tr : float
    volume_times : ndarray
        Sampling time of each volume in seconds.
    """

    X: np.ndarray
    names: tuple[str, ...]
    kinds: tuple[str, ...]
    condition_columns: dict[str, tuple[int, ...]]
    kernel: Kernel
    tr: float
    volume_times: np.ndarray
    warnings: tuple[str, ...] = field(default=())
    modulators: dict[str, str] = field(default_factory=dict)

    @property
    def n_volumes(self) -> int:
        return int(self.X.shape[0])

    @property
    def n_columns(self) -> int:
        return int(self.X.shape[1])

    @property
    def condition_names(self) -> tuple[str, ...]:
        return tuple(self.condition_columns)

    def column(self, name: str) -> np.ndarray:
        return self.X[:, self.names.index(name)]


def volume_times(n_volumes: int, tr: float, reference_time_s: float = 0.0) -> np.ndarray:
    """Sampling time of each volume: ``n * tr + reference_time_s``.

    >>> volume_times(3, 2.0, 0.5).tolist()
    [0.5, 2.5, 4.5]
    """
    return np.arange(n_volumes) * float(tr) + float(reference_time_s)


def dct_drift(n_volumes: int, tr: float, cutoff_s: float | None) -> np.ndarray:
    """Discrete cosine high-pass basis, shape ``(n_volumes, K)``.

    ``K = floor(2 * N * TR / cutoff)``; no columns when ``cutoff_s`` is None.

    >>> dct_drift(100, 2.0, 128.0).shape
    (100, 3)
    """
    if cutoff_s is None:
        return np.zeros((n_volumes, 0))
    if not cutoff_s > 0:
        raise InputError(f"high-pass cutoff must be a positive number of seconds, not {cutoff_s}")
    k_max = math.floor(2.0 * n_volumes * tr / cutoff_s)
    k_max = min(k_max, n_volumes - 1)
    n = np.arange(n_volumes)[:, None]
    k = np.arange(1, k_max + 1)[None, :]
    return np.cos(np.pi * k * (2 * n + 1) / (2 * n_volumes))


#: A cycle must fit this many times in the run to count as the task's on/off cycle.
CYCLE_MIN_REPEATS = 3
#: The high-pass warning needs the filter to remove at least this share of a condition's
#: variation (a cut-off a little below a weak cycle removes little).
CYCLE_MIN_LOSS = 0.25


def task_cycle(x: np.ndarray, tr: float) -> float | None:
    """The dominant period (s) of a regressor: the periodogram's peak among the periods
    that fit at least :data:`CYCLE_MIN_REPEATS` times in the run; None when it is flat.

    numpy's real FFT of the demeaned regressor (a periodogram up to a constant).

    >>> t = np.arange(120) * 2.0
    >>> task_cycle(((t % 40) < 20).astype(float), 2.0)
    40.0
    """
    x = np.asarray(x, dtype=float).reshape(-1)
    n = x.size
    if n < 2 * CYCLE_MIN_REPEATS:
        return None
    power = np.abs(np.fft.rfft(x - x.mean())) ** 2
    freq = np.fft.rfftfreq(n, tr)
    ok = freq * n * tr >= CYCLE_MIN_REPEATS - 1e-9
    if not ok.any() or not power[ok].max() > 0:
        return None
    i = int(np.flatnonzero(ok)[np.argmax(power[ok])])
    return float(1.0 / freq[i])


def task_cycle_warning(
    conditions: Sequence[Condition],
    n_volumes: int,
    tr: float,
    highpass_s: float | None,
    reference_time_s: float = 0.0,
) -> str | None:
    """One line when the high-pass cut-off is shorter than the task's on/off cycle.

    The DCT drift basis with cut-off ``C`` removes every period longer than ``C`` (common
    practice: a cut-off below the task's cycle removes the effect with the drift). Each
    condition's boxcar (the kernel does not move the cycle) gives its dominant period
    (:func:`task_cycle`) and the share of its variation the drift columns remove; the line
    names the longest cycle the cut-off falls below, when that condition loses at least
    :data:`CYCLE_MIN_LOSS` of its variation.

    >>> from voxelscope.core.events import Condition
    >>> c = [Condition("tap", [40.0 * k for k in range(7)], [20.0] * 7)]
    >>> task_cycle_warning(c, 140, 2.0, 128.0) is None
    True
    >>> print(task_cycle_warning(c, 140, 2.0, 10.0))  # doctest: +NORMALIZE_WHITESPACE
    the high-pass cut-off 10 s is shorter than the task's on/off cycle (about 40 s, tap):
    the drift filter removes 92% of tap's variation and with it the effect; use a
    cut-off above 40 s (e.g. 80 s) or none
    """
    if highpass_s is None or not conditions or n_volumes < 2 * CYCLE_MIN_REPEATS:
        return None
    times = volume_times(n_volumes, tr, reference_time_s)
    drift = dct_drift(n_volumes, tr, highpass_s)
    if drift.shape[1] == 0:
        return None
    q, _ = np.linalg.qr(drift)
    worst: tuple[float, float, str] | None = None
    for cond in conditions:
        x = boxcar_regressor(cond, times, tr)
        x = x - x.mean()
        total = float(x @ x)
        if not total > 0:
            continue
        period = task_cycle(x, tr)
        if period is None or not highpass_s < period:
            continue
        z = q.T @ x
        loss = float(z @ z) / total
        if loss >= CYCLE_MIN_LOSS and (worst is None or period > worst[0]):
            worst = (period, loss, cond.name)
    if worst is None:
        return None
    period, loss, name = worst
    return (
        f"the high-pass cut-off {highpass_s:g} s is shorter than the task's on/off cycle "
        f"(about {period:.0f} s, {name}): the drift filter removes {100 * loss:.0f}% of "
        f"{name}'s variation and with it the effect; use a cut-off above {period:.0f} s "
        f"(e.g. {math.ceil(2 * period):d} s) or none"
    )


def _fine_stimulus(
    onsets: np.ndarray,
    durations: np.ndarray,
    amplitudes: np.ndarray,
    grid0: float,
    dt: float,
    n_fine: int,
    use_durations: bool,
) -> np.ndarray:
    """Stimulus on the fine grid; bin ``i`` covers ``[grid0 + i dt, grid0 + (i+1) dt)``.

    Blocks contribute their overlap fraction with each bin (height ``amplitude``); brief
    events (or all events when ``use_durations`` is False) are impulses of area
    ``amplitude``, split linearly between the two nearest bin centres.
    """
    stim = np.zeros(n_fine)
    edges = grid0 + np.arange(n_fine + 1) * dt
    for on, du, amp in zip(onsets, durations, amplitudes):
        if use_durations and du > 0:
            # overlap of [on, on+du) with each bin, as a fraction of dt
            lo = np.clip(edges[:-1], on, on + du)
            hi = np.clip(edges[1:], on, on + du)
            stim += amp * (hi - lo) / dt
        else:
            pos = (on - grid0) / dt - 0.5  # in units of bin centres
            i0 = math.floor(pos)
            w1 = pos - i0
            for idx, w in ((i0, 1.0 - w1), (i0 + 1, w1)):
                if 0 <= idx < n_fine:
                    stim[idx] += amp * w / dt
    return stim


def stimulus_regressor(
    condition: Condition,
    kernel_samples: np.ndarray,
    times: np.ndarray,
    dt: float,
    use_durations: bool = True,
) -> np.ndarray:
    """One condition convolved with one sampled kernel, read at ``times`` (seconds).

    Parameters
    ----------
    condition : Condition
    kernel_samples : ndarray
        Kernel sampled at ``0, dt, 2 dt, ...`` (e.g. from :meth:`Kernel.basis`).
    times : ndarray
        Times at which to read the regressor.
    dt : float
        Fine-grid step in seconds.
    use_durations : bool
        False treats every event as an impulse at its onset (FIR).
    """
    if condition.n_events == 0:
        return np.zeros(times.shape)
    lead = max(0.0, -float(condition.onsets.min())) + dt
    grid0 = min(0.0, float(times.min())) - lead
    grid0 = math.floor(grid0 / dt) * dt
    n_fine = math.ceil((float(times.max()) - grid0) / dt) + 2
    stim = _fine_stimulus(
        condition.onsets,
        condition.durations,
        condition.amplitudes,
        grid0,
        dt,
        n_fine,
        use_durations,
    )
    if kernel_samples.size == 1:
        conv = stim * kernel_samples[0] * dt
    else:
        conv = _convolve_head(stim, kernel_samples, n_fine) * dt
        conv[np.abs(conv) < 1e-12 * max(1.0, float(np.abs(conv).max()))] = 0.0
    centres = grid0 + (np.arange(n_fine) + 0.5) * dt
    return np.interp(times, centres, conv)


def _convolve_head(a: np.ndarray, b: np.ndarray, n: int) -> np.ndarray:
    """The first ``n`` samples of the full linear convolution of ``a`` and ``b``.

    By FFT (numpy's real FFT, zero-padded to the full length, so nothing wraps around);
    equal to ``numpy.convolve(a, b)[:n]`` to rounding (checked in tests/core/test_design.py).
    scipy.signal is not used: importing it costs about a second at every start-up.

    >>> _convolve_head(np.array([1.0, 2.0, 3.0]), np.array([1.0, 1.0]), 3).round(12).tolist()
    [1.0, 3.0, 5.0]
    """
    size = a.size + b.size - 1
    nfft = 1 << max(0, (size - 1).bit_length())  # a power of two: fast for any length
    out = np.fft.irfft(np.fft.rfft(a, nfft) * np.fft.rfft(b, nfft), nfft)
    return out[:n]


def _fir_column(condition: Condition, fir: FIR, k: int, times: np.ndarray) -> np.ndarray:
    """FIR bin ``k`` at ``times``: summed amplitudes of the events whose time since onset
    lies in ``[k bin_s, (k + 1) bin_s)`` (durations ignored)."""
    lag = times[:, None] - condition.onsets[None, :]
    inside = (lag >= k * fir.bin_s - 1e-9) & (lag < (k + 1) * fir.bin_s - 1e-9)
    return inside.astype(float) @ condition.amplitudes


def boxcar_regressor(condition: Condition, times: np.ndarray, tr: float) -> np.ndarray:
    """Fraction of each volume's TR window covered by the condition's events.

    Volume ``n`` (sampled at ``times[n]``) stands for ``[times[n], times[n] + tr)``.
    Each event adds ``amplitude * overlap / tr``;
    a zero-duration event lasts :data:`BRIEF_EVENT_S`. So ``sum(x) * tr`` is the summed
    ``amplitude * duration`` of the events inside the run.

    >>> c = Condition("a", [1.0, 5.5], [0.0, 0.5])
    >>> boxcar_regressor(c, volume_times(4, 2.0), 2.0).tolist()
    [0.5, 0.0, 0.25, 0.0]
    """
    if condition.n_events == 0:
        return np.zeros(times.shape)
    lo = times[:, None]
    hi = lo + float(tr)
    du = event_lengths(condition.durations)
    on = condition.onsets[None, :]
    overlap = np.clip(np.minimum(hi, on + du[None, :]) - np.maximum(lo, on), 0.0, None)
    return (overlap / float(tr)) @ condition.amplitudes


def build_design(
    conditions: Sequence[Condition],
    n_volumes: int,
    tr: float,
    kernel: str | Kernel = "double-gamma",
    derivatives: int = 0,
    highpass_s: float | None = 128.0,
    confounds: Confounds | None = None,
    reference_time_s: float = 0.0,
    oversampling: int = FINE_STEPS,
    modulators: Sequence[str] = (),
    orthogonalize: bool = False,
) -> DesignMatrix:
    """Build the design matrix for one kernel.

    Parameters
    ----------
    conditions : sequence of Condition
    n_volumes : int
    tr : float
        Repetition time in seconds.
    kernel : str or Kernel
    derivatives : {0, 1, 2}
        Add temporal (1) and dispersion (2) derivative columns after each condition.
    highpass_s : float or None
        Discrete cosine drift cutoff in seconds; None for no drift columns.
    confounds : Confounds, optional
        Must have one row per volume.
    reference_time_s : float
        Time within each TR at which volumes are sampled.
    oversampling : int
        Fine-grid steps per TR (at least 16).
    modulators : sequence of str
        Events columns to add as parametric modulators (see the module notes).
    orthogonalize : bool
        Serially orthogonalise each condition's modulators, in the order given.
    """
    if not (tr > 0 and math.isfinite(tr)):
        raise InputError(f"TR must be a positive number of seconds, not {tr}")
    if n_volumes < 1:
        raise InputError("the run has no volumes")
    if derivatives not in (0, 1, 2):
        raise InputError(
            "derivatives must be 0 (none), 1 (temporal) or 2 (temporal and dispersion)"
        )
    if not conditions:
        raise InputError("the model has no conditions; the events file gave none")
    k = get_kernel(kernel)
    oversampling = max(int(oversampling), FINE_STEPS)
    dt = tr / oversampling
    times = volume_times(n_volumes, tr, reference_time_s)

    cols: list[np.ndarray] = []
    names: list[str] = []
    kinds: list[str] = []
    cond_cols: dict[str, tuple[int, ...]] = {}
    mod_of: dict[str, str] = {}
    notes: list[str] = []
    basis = k.basis(dt, derivatives)

    def add(cond: Condition, label: str, main_kind: str) -> None:
        idx = []
        for j, (suffix, h) in enumerate(basis):
            if isinstance(k, FIR):  # exact boxes at the volume times, no fine-grid smear
                cols.append(_fir_column(cond, k, j, times))
            elif isinstance(k, Boxcar):  # covered fraction of each volume's TR window
                cols.append(boxcar_regressor(cond, times, tr))
            else:
                cols.append(stimulus_regressor(cond, h, times, dt, use_durations=k.uses_durations))
            names.append(label + suffix)
            kinds.append("fir" if isinstance(k, FIR) else (main_kind if j == 0 else "derivative"))
            idx.append(len(cols) - 1)
        cond_cols[label] = tuple(idx)

    for cond in conditions:
        add(cond, cond.name, "condition")
        if not modulators:
            continue
        mods, mod_notes = modulator_values(cond, modulators, orthogonalize)
        notes.extend(mod_notes)
        for mod, values in mods:
            label = f"{cond.name}:{mod}"
            scaled = Condition(label, cond.onsets, cond.durations, cond.amplitudes * values)
            add(scaled, label, "modulator")
            mod_of[label] = cond.name
    if modulators:
        carried = {m for c in conditions for m in modulators if c.carries(m)}
        for m in modulators:
            if m not in carried:
                raise InputError(
                    f"modulator '{m}': no condition's events carry a number in that column; "
                    "name numeric columns of the events file"
                )

    warnings: list[str] = []
    file_drift: tuple[str, ...] = ()
    if confounds is not None:
        confounds.check_rows(n_volumes)
        file_drift = confounds.cosine_columns(confounds.names)
        for j, name in enumerate(confounds.names):
            label = name if name not in names else f"{name}_confound"
            cols.append(confounds.values[:, j].astype(float))
            names.append(label)
            kinds.append("drift" if name in file_drift else "confound")

    if file_drift:  # the table's own cosine drift columns replace ours, never both
        if highpass_s is not None:
            warnings.append(
                f"the confounds' cosine drift columns ({file_drift[0]} .. {file_drift[-1]}) "
                f"replace the model's own drift columns (high-pass {highpass_s:g} s not used)"
            )
        highpass_s = None
    drift = dct_drift(n_volumes, tr, highpass_s)
    cycle = task_cycle_warning(conditions, n_volumes, tr, highpass_s, reference_time_s)
    if cycle is not None:
        warnings.append(cycle)
    for j in range(drift.shape[1]):
        cols.append(drift[:, j])
        names.append(f"drift_{j + 1}")
        kinds.append("drift")
    cols.append(np.ones(n_volumes))
    names.append("constant")
    kinds.append("constant")

    if len(set(names)) != len(names):
        dup = sorted({n for n in names if names.count(n) > 1})
        raise InputError(
            f"design column names repeat: {', '.join(dup)}; rename the conditions or confounds"
        )
    X = np.column_stack(cols)
    X.setflags(write=False)
    if X.shape[1] > n_volumes:
        raise ModelError(
            f"the run has {n_volumes} volumes but the model has {X.shape[1]} columns; "
            "use fewer regressors (drop confounds, a longer high-pass cutoff or no derivatives)"
        )
    return DesignMatrix(
        X,
        tuple(names),
        tuple(kinds),
        cond_cols,
        k,
        float(tr),
        times,
        tuple(notes) + tuple(warnings),
        mod_of,
    )
