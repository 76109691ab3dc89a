"""Is it real? Diagnostics of one kernel's fit at one clicked voxel.

:func:`voxel_checks` answers, at a single voxel, the questions a careful reader asks before
believing an activation: are the residuals white, does one volume drive the t, is the
timing of the events right, does the response look like the kernel, does the task line up
with the confounds, is the voxel at the edge of the brain. Each finding that crosses a
documented threshold (:mod:`voxelscope.core.flags`, the plain-language rules) becomes a
:class:`~voxelscope.core.flags.Flag`: one plain sentence plus the name of the plot that
shows the evidence (``acf``, ``influence``, ``shift_scan``, ``fir``, ``spectrum``,
``confounds`` or ``edge``).

What is computed, and how
-------------------------
Residual diagnostics and influence measures use the ordinary least squares (OLS) fit of the
chosen kernel's full design (the quantities the reference definitions describe); every
*t* that is reported (``t``, ``t_without_influential``, the timing scan) uses the settings'
noise model and goes through :func:`voxelscope.core.glm.fit`, the same code path as the
Fits table and the maps.

* **Autocorrelation** (:mod:`voxelscope.core.diagnostics`): ``acf`` at lags 0..20;
  ``ar1`` is :func:`voxelscope.core.glm.ar1_rho` of the OLS residuals (the estimate the
  AR(1) model uses); Durbin-Watson (Durbin & Watson, 1950); Ljung-Box p at 10 lags
  (Ljung & Box, 1978). Under AR(1), ``ar1_whitened`` is the lag-1 estimate left in the
  prewhitened residuals. The flag judges the residuals the model's t assumes to be white
  (OLS: the OLS residuals; AR(1): the Prais-Winsten whitened residuals; AR(p): the AR(p)
  whitened residuals): ``whitened_acf`` (lags 0..20) and ``whitened_ljung_box_q`` /
  ``whitened_ljung_box_p`` (10 lags) of those, and it is raised when that Ljung-Box p is
  below ``LJUNG_BOX_ALPHA``, whatever the lag-1 value (AR(2) noise can leave lag 1 small).
* **Outlier volumes**: externally studentized residuals beyond the Bonferroni-corrected
  two-sided quantile ``t_{df-1}(1 - OUTLIER_ALPHA / (2 n))`` (the classical outlier test),
  together with the run's spikes: volumes whose volume-to-volume RMS change over the brain
  mask exceeds ``median + RMS_SPIKE_K * 1.4826 * MAD`` (see
  :class:`~voxelscope.core.diagnostics.RunSummary`).
* **Influence**: leverage and Cook's distance (Cook, 1977) per volume. The influential
  volumes are the (at most ``INFLUENTIAL_MAX``) volumes of largest Cook's distance above
  ``4 / n`` (common practice); ``t_without_influential`` refits without all of them and
  ``t_dropping[m]`` without the ``m + 1`` most influential.
* **VIF** of every column of the full design, the constant included: ``1 / (1 - R^2_j)``
  with ``R^2_j`` from regressing column ``j`` on all the others, columns centred first (so
  a regressor's VIF is the usual one of a model with an intercept, and the constant's is 1;
  :func:`~voxelscope.core.diagnostics.variance_inflation`).
* **Confound correlation**: Pearson r of each condition's regressor with every column of
  the confounds file (whether or not the model uses it).
* **tSNR**: mean of the voxel over the run divided by the residual SD (``sqrt(RSS / df)``)
  of a fit of the drift (discrete cosine, the settings' cutoff) and constant columns only.
* **Edge distance**: ``scipy.ndimage.distance_transform_edt`` of the brain mask with
  ``sampling=voxel_size``, the grid border counting as outside; a voxel on the edge is one
  voxel size away; 0.0 outside the mask.
* **Timing** (:mod:`voxelscope.core.timing`): the t against an onset shift of -4..+8 s,
  ``best_shift_s`` (largest t in the direction of the t as given) and
  ``peak_latency_s = kernel.peak_s() + best_shift_s``; the FIR estimate (the settings'
  FIR bins, one TR over 24 s by default) with each kernel's fitted response.
* **Spectrum**: ``scipy.signal.periodogram`` of the demeaned voxel with ``fs = 1 / TR``;
  ``task_hz`` is the peak of the condition regressor's periodogram, ``task_periodic``
  says whether the design truly repeats (:func:`voxelscope.core.timing.task_periodicity`;
  only then can the task be "close to the high-pass cutoff"), ``highpass_hz`` is
  ``1 / highpass_s``; ``drift_fraction`` is the share of the voxel's power below it.

Examples
--------
>>> import numpy as np
>>> from voxelscope.core.events import Condition
>>> from voxelscope.core.model import Analysis, ModelSettings
>>> a = Analysis([Condition("tone", np.arange(10.0, 280.0, 30.0), [15.0] * 9)], 240, 1.25)
>>> s = ModelSettings(kernels=("double-gamma",))
>>> rng = np.random.default_rng(1)
>>> y = 100 + 2 * a.design("double-gamma", s).column("tone") + rng.standard_normal(240)
>>> c = voxel_checks(a, s, "double-gamma", y)
>>> 1.6 < c.durbin_watson < 2.4, c.flag_ids()
(True, [])
>>> sorted(c.to_json())[:4]
['acf', 'ar1', 'ar1_whitened', 'best_shift_s']
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from scipy import signal, stats

from .design import DesignMatrix, dct_drift
from .diagnostics import (
    ACF_LAGS,
    LJUNG_BOX_LAGS,
    RMS_SPIKE_K,
    acf,
    durbin_watson,
    influence,
    ljung_box,
    pearson_r,
    robust_spikes,
    run_summary,
    variance_inflation,
)
from .errors import InputError, ModelError
from .flags import Flag, edge_flags, flags_for
from .glm import PreparedDesign, ar1_rho, fit, prais_winsten, prepare
from .hrf import Kernel
from .jsonsafe import json_safe
from .model import Analysis, ModelSettings
from .response import peri_event_response
from .timing import SHIFTS_S, fir_estimate, shift_scan, task_periodicity

__all__ = [
    "INFLUENTIAL_MAX",
    "OUTLIER_ALPHA",
    "VoxelChecks",
    "confound_spikes",
    "voxel_checks",
]

# ----------------------------------------------------------------------------- thresholds

#: Family-wise level of the Bonferroni outlier test on externally studentized residuals.
OUTLIER_ALPHA = 0.01
#: Drop at most this many influential volumes (largest Cook's distance above 4/n).
INFLUENTIAL_MAX = 3


# ----------------------------------------------------------------------------- results


def _nan_array(n: int = 0) -> np.ndarray:
    return np.full(n, np.nan)


@dataclass(frozen=True, eq=False)
class VoxelChecks:
    """Every check of one kernel's fit at one voxel (see the module text for definitions).

    Volume indices are 0-based. Undefined scalars are NaN or None; :meth:`to_json` turns
    NaN and infinities into None.

    Attributes
    ----------
    t, df : the contrast's t (settings' noise model) and its degrees of freedom
    durbin_watson, ar1, ljung_box_q, ljung_box_p, acf : residual autocorrelation (OLS)
    ar1_whitened : lag-1 estimate left after AR(1) prewhitening (AR(1) settings only)
    whitened_acf, whitened_ljung_box_q, whitened_ljung_box_p : autocorrelation (lags
        0..20) and Ljung-Box test (10 lags) of the residuals the model's t assumes white
        (the OLS residuals under OLS, the prewhitened residuals otherwise)
    outlier_volumes : studentized outliers and run spikes together, sorted
    studentized_outliers, outlier_threshold : the studentized part and its threshold
    leverage, cooks, studentized : per volume, for the influence plot
    cooks_distance_max, cooks_volume : the largest Cook's distance and its volume
    influential_volumes, t_dropping, t_without_influential : the refits without them
    volume_rms_change, rms_spikes, rms_threshold : run-level (None without a run)
    vif, confound_correlation : design checks
    confound_spikes : confound column -> volumes where its volume-to-volume change is a spike
        (above the median + RMS_SPIKE_K MAD of that change), from the motion columns of the
        confounds file (see :func:`confound_spikes`), in the model or not
    confound_jumps : the same jumps with their size (column units) and size / threshold
    excluded_volumes : volumes left out of the fit (non-steady-state, censored); every
        check uses the kept volumes only (the autocorrelation reads them as consecutive, the
        spectrum gives left-out volumes their fitted value), and per-volume arrays hold NaN
        at left-out volumes
    tsnr, edge_distance_mm, in_mask : signal quality and place (None without a run/ijk)
    shifts_s, shift_t, t_at_zero_shift, best_shift_s, kernel_peak_s, peak_latency_s : timing
    fir : dict with times, estimate, se, bin_s, peak_s, kernels, kernel_times, kernels_fine
    response : dict with times, mean, ci_low, ci_high, n_events, bin_s, baseline_s,
        window_s, predictions, note: the data averaged around the condition's onsets
        (:func:`voxelscope.core.response.peri_event_response`)
    spectrum : dict with freqs_hz, power, task_hz, highpass_hz
    drift_fraction : share of the voxel's power below the high-pass cutoff
    flags : tuple of Flag
    warnings : notes (e.g. why there is no FIR estimate)
    """

    kernel: str
    condition: str
    contrast: str
    noise: str
    n_volumes: int
    tr: float
    t: float = math.nan
    df: int = 0
    # residual autocorrelation (OLS residuals)
    durbin_watson: float = math.nan
    ar1: float = math.nan
    ljung_box_q: float = math.nan
    ljung_box_p: float = math.nan
    acf: np.ndarray = field(default_factory=_nan_array)
    ar1_whitened: float | None = None
    whitened_acf: np.ndarray = field(default_factory=_nan_array)
    whitened_ljung_box_q: float = math.nan
    whitened_ljung_box_p: float = math.nan
    # outliers and influence
    outlier_volumes: tuple[int, ...] = ()
    studentized_outliers: tuple[int, ...] = ()
    outlier_threshold: float = math.nan
    leverage: np.ndarray = field(default_factory=_nan_array)
    cooks: np.ndarray = field(default_factory=_nan_array)
    studentized: np.ndarray = field(default_factory=_nan_array)
    cooks_threshold: float = math.nan
    cooks_distance_max: float = math.nan
    cooks_volume: int | None = None
    influential_volumes: tuple[int, ...] = ()
    t_without_influential: float = math.nan
    t_dropping: tuple[float, ...] = ()
    # run-level spikes (None without a run)
    volume_rms_change: np.ndarray | None = None
    rms_spikes: tuple[int, ...] | None = None
    rms_threshold: float | None = None
    # design
    vif: dict[str, float] = field(default_factory=dict)
    confound_correlation: dict[str, dict[str, float]] = field(default_factory=dict)
    confound_jumps: dict[str, dict[int, tuple[float, float]]] = field(default_factory=dict)
    confounds_in_model: tuple[str, ...] = ()
    excluded_volumes: tuple[int, ...] = ()
    # signal quality and place
    tsnr: float = math.nan
    edge_distance_mm: float | None = None
    in_mask: bool | None = None
    # timing
    shifts_s: np.ndarray = field(default_factory=lambda: np.array(SHIFTS_S))
    shift_t: np.ndarray = field(default_factory=lambda: _nan_array(len(SHIFTS_S)))
    t_at_zero_shift: float = math.nan
    best_shift_s: float | None = None
    kernel_peak_s: float = math.nan
    peak_latency_s: float | None = None
    # shape and spectrum
    fir: dict[str, Any] = field(default_factory=lambda: {"times": [], "estimate": [], "se": []})
    response: dict[str, Any] = field(default_factory=lambda: {"times": [], "mean": []})
    spectrum: dict[str, Any] = field(default_factory=dict)
    drift_fraction: float | None = None
    flags: tuple[Flag, ...] = ()
    warnings: tuple[str, ...] = ()

    @property
    def confound_spikes(self) -> dict[str, tuple[int, ...]]:
        """Column -> volumes where it jumps (see :func:`confound_spikes`)."""
        return {n: tuple(v) for n, v in self.confound_jumps.items()}

    def flag_ids(self) -> list[str]:
        """Identifiers of the raised flags, in order."""
        return [f.id for f in self.flags]

    def to_json(self) -> dict[str, Any]:
        """Plain, strict-JSON-safe data (``json.dumps(..., allow_nan=False)`` works).

        Keys: every field, with the timing scan as ``shift_scan: {shifts_s, t}`` and the
        flags as ``{id, text, figure}`` dicts.
        """
        out: dict[str, Any] = {}
        for name in self.__dataclass_fields__:
            if name in ("shifts_s", "shift_t"):
                continue
            out[name] = getattr(self, name)
        out["confound_spikes"] = self.confound_spikes
        out["shift_scan"] = {"shifts_s": self.shifts_s, "t": self.shift_t}
        out["flags"] = [f.to_json() for f in self.flags]
        return json_safe(out)


# ----------------------------------------------------------------------------- the checks


def voxel_checks(
    analysis: Analysis,
    settings: ModelSettings,
    kernel: str | Kernel,
    y: np.ndarray,
    *,
    run: Any = None,
    ijk: Sequence[int] | None = None,
    condition: str | None = None,
    ar: np.ndarray | None = None,
) -> VoxelChecks:
    """Run every check of one kernel's fit at one voxel.

    Parameters
    ----------
    analysis : Analysis
        Conditions and confounds of the run. Designs are cached there, including the 49
        shifted designs of the timing scan and the FIR design, so the next click is fast.
    settings : ModelSettings
        Contrast, noise model, drift, confounds, derivatives and onset shift.
    kernel : str or Kernel
        The kernel whose fit is checked.
    y : ndarray (n_volumes,)
        The voxel's time series.
    run : Run, optional
        For the edge distance and the run's volume-to-volume spikes (computed once per run,
        see :func:`voxelscope.core.diagnostics.run_summary`); None skips both (None fields).
    ijk : sequence of 3 int, optional
        The voxel's index, for the edge distance.
    condition : str, optional
        Condition of the FIR estimate, the task frequency and the kernel responses;
        default: the condition with the largest weight in the contrast.

    Returns
    -------
    VoxelChecks
        A constant or non-finite series gives a result with only the design and run parts
        filled and one ``no-signal`` flag.

    Raises
    ------
    InputError
        The series length differs from the number of volumes, an unknown condition, or a
        voxel outside the grid.
    ModelError
        The design cannot be fitted (as for the Fits table).

    Examples
    --------
    >>> from voxelscope.core.events import Condition
    >>> a = Analysis([Condition("tap", [20.0, 80.0, 140.0], [15.0] * 3)], 160, 1.25)
    >>> y = np.random.default_rng(3).standard_normal(160) + 50
    >>> y[60] += 40
    >>> c = voxel_checks(a, ModelSettings(kernels=("gamma",)), "gamma", y)
    >>> 60 in c.outlier_volumes, c.cooks_volume
    (True, 60)
    """
    y = np.asarray(y, dtype=float).reshape(-1)
    n = analysis.n_volumes
    if y.size != n:
        raise InputError(f"the voxel's time series has {y.size} points but the run has {n} volumes")
    if run is not None and int(run.n_volumes) != n:
        raise InputError(
            f"the run has {run.n_volumes} volumes but the model was set up for {n}; "
            "open the run together with its own events"
        )
    k_obj = analysis.kernel(kernel, settings)
    d, prep = analysis.prepared(kernel, settings)
    keep = prep.keep  # left-out volumes (non-steady-state, censored) leave every check
    X_kept = d.X if keep is None else d.X[keep]
    w = analysis.contrast_weights(kernel, settings)
    cond = _pick_condition(analysis, d, w, condition)
    tr = analysis.tr
    base = VoxelChecks(
        kernel=str(kernel) if isinstance(kernel, str) else k_obj.name,
        condition=cond,
        contrast=settings.contrast or analysis.default_contrast(),
        noise=settings.noise,
        n_volumes=n,
        tr=tr,
        vif=variance_inflation(X_kept, d.names),
        excluded_volumes=() if keep is None else tuple(int(v) for v in np.flatnonzero(~keep)),
        confound_correlation=_confound_correlation(analysis, d),
        confound_jumps=_confound_jumps(analysis),
        confounds_in_model=tuple(n for n, k in zip(d.names, d.kinds) if k == "confound"),
        kernel_peak_s=float(k_obj.peak_s()),
        **_run_part(run, ijk),
    )
    if not np.all(np.isfinite(y)) or np.ptp(y) == 0:
        text = "The voxel's signal is constant or has missing values, so there is nothing to check."
        flags = (*edge_flags(base, d), Flag("no-signal", text, "edge"))
        return replace(base, outlier_volumes=base.rms_spikes or (), flags=flags)

    parts: dict[str, Any] = {}
    notes: list[str] = []
    if settings.noise == "arp" and ar is None and run is not None and ijk is not None:
        from .noise import voxel_ar  # the whitening of the map and the Fits table

        ar = voxel_ar(run, prep, ijk).phi
    if settings.noise != "arp":
        ar = None
    main = fit(prep, y, w, noise=settings.noise, ar=ar)
    ar = main.ar  # under AR(p): what the fit used (its own estimate when none was given)
    parts.update(t=float(main.t[0]), df=int(main.df))
    ols = main if settings.noise == "ols" else fit(prep, y, w, noise="ols")
    kept = np.arange(n) if keep is None else np.flatnonzero(keep)
    r = ols.residuals[kept, 0]  # kept volumes, read as consecutive for the autocorrelation
    parts.update(_autocorrelation(r))
    rw = r
    if settings.noise == "ar1" and main.rho is not None:
        rw = prais_winsten(main.residuals[kept, 0], float(main.rho[0]), prep.steps)
        parts["ar1_whitened"] = float(ar1_rho(rw)[0])
    if settings.noise == "arp" and main.whitened_residuals is not None:
        rw = main.whitened_residuals[:, 0]
    parts.update(_whitened_part(rw))
    infl = _influence_part(prep, y[kept], r, w, settings.noise, None, parts["t"], ar)
    parts.update(_on_all_volumes(infl, kept, n, base.rms_spikes))
    parts["tsnr"] = _tsnr(y, n, tr, settings.highpass_s, keep)

    scan = shift_scan(analysis, settings, kernel, y, ar=ar)
    parts.update(
        shifts_s=scan.shifts_s,
        shift_t=scan.t,
        t_at_zero_shift=scan.t_at_zero,
        best_shift_s=scan.best_shift_s,
        peak_latency_s=scan.peak_latency_s,
    )
    try:
        parts["fir"] = fir_estimate(analysis, settings, y, cond, ar=ar).to_json()
    except ModelError as exc:
        notes.append(f"no FIR estimate: {exc}")
    by_kernel = None if ar is None else {str(kernel): ar}
    parts["response"] = peri_event_response(
        analysis, settings, y, cond, ar_by_kernel=by_kernel
    ).to_json()
    # the spectrum needs every volume: left-out ones take their fitted value
    y_spec = y if keep is None else np.where(keep, y, ols.fitted[:, 0])
    parts.update(_spectrum_part(y_spec, d, cond, tr, settings.highpass_s))
    checks = replace(base, warnings=tuple(notes), **parts)
    return replace(checks, flags=tuple(flags_for(checks, d)))


def _jump_columns(conf) -> tuple[str, ...]:
    """Columns whose steps can show head motion: the six motion parameters when the table
    has them, else every file column that is not already a difference, a square, a drift
    or an outlier marker."""
    from .confounds import MOTION6

    base = tuple(n for n in MOTION6 if n in conf.file_columns)
    if base:
        return base
    skip = ("_derivative1", "_power2", "cosine", "outlier", "comp_cor")
    return tuple(n for n in conf.file_columns if not any(k in n for k in skip))


def _steps(conf, name: str) -> np.ndarray:
    """``|x_v - x_{v-1}|`` at index ``v - 1``; NaN where ``x_{v-1}`` was a leading empty
    cell (read as 0), so the first real value is never a jump."""
    x = conf.column(name)
    step = np.abs(np.diff(x))
    lead = conf.leading_missing[conf.names.index(name)] if conf.leading_missing else 0
    step[: max(lead, 0)] = np.nan
    return step


def confound_spikes(analysis: Analysis, k: float = RMS_SPIKE_K) -> dict[str, tuple[int, ...]]:
    """Volumes where a confound column jumps: its absolute volume-to-volume change exceeds
    ``median + k * 1.4826 * MAD`` of that change (the rule of the run's RMS spikes).

    A jump between volumes ``v - 1`` and ``v`` is reported at ``v``, the volume where the
    column has its new value. Leading empty cells (read as 0) never make a jump. The columns
    are the six motion parameters when the table has them, else every column that is not a
    difference, square, drift or outlier marker, whether or not the model includes it.

    >>> from voxelscope.core.confounds import Confounds
    >>> from voxelscope.core.events import Condition
    >>> col = np.sin(np.arange(60) / 5.0) * 0.1
    >>> col[30:] += 2.0  # the head moves between volumes 29 and 30
    >>> conf = Confounds(("move_z",), col[:, None])
    >>> a = Analysis([Condition("tap", [10.0], [15.0])], 60, 2.0, conf)
    >>> confound_spikes(a)
    {'move_z': (30,)}
    """
    return {n: tuple(v) for n, v in _confound_jumps(analysis, k).items()}


def _confound_jumps(analysis: Analysis, k: float = RMS_SPIKE_K) -> dict[str, dict[int, tuple]]:
    """Column -> {jump volume: (size, size / threshold)}."""
    conf = analysis.confounds
    if conf is None:
        return {}
    out: dict[str, dict[int, tuple]] = {}
    for name in _jump_columns(conf):
        step = _steps(conf, name)
        idx, thr = robust_spikes(step, k)
        if idx:
            out[name] = {i + 1: (float(step[i]), float(step[i] / thr)) for i in idx}
    return out


def _pick_condition(
    analysis: Analysis, d: DesignMatrix, w: np.ndarray, condition: str | None
) -> str:
    names = analysis.condition_names
    if condition is not None:
        if condition not in names:
            raise InputError(f"unknown condition '{condition}'; use {', '.join(names)}")
        return condition
    weight = {c: float(np.sum(np.abs(w[list(d.condition_columns[c])]))) for c in names}
    best = max(names, key=lambda c: weight[c])
    return best if weight[best] > 0 else names[0]


def _run_part(run: Any, ijk: Sequence[int] | None) -> dict[str, Any]:
    if run is None:
        return {}
    rs = run_summary(run)
    out: dict[str, Any] = {
        "volume_rms_change": rs.volume_rms_change,
        "rms_spikes": tuple(rs.rms_spikes),
        "rms_threshold": rs.rms_threshold,
    }
    if ijk is not None:
        i, j, k = (int(v) for v in ijk)
        shape = rs.mask.shape
        if not all(0 <= a < s for a, s in zip((i, j, k), shape)):
            raise InputError(
                f"voxel ({i}, {j}, {k}) is outside the run's grid {shape}; click inside the run"
            )
        out["in_mask"] = bool(rs.mask[i, j, k])
        out["edge_distance_mm"] = float(rs.edge_distance[i, j, k])
    return out


def _autocorrelation(r: np.ndarray) -> dict[str, Any]:
    q, p = ljung_box(r, LJUNG_BOX_LAGS)
    return {
        "acf": acf(r, ACF_LAGS),
        "ar1": float(ar1_rho(r)[0]),
        "durbin_watson": durbin_watson(r),
        "ljung_box_q": q,
        "ljung_box_p": p,
    }


def _whitened_part(rw: np.ndarray) -> dict[str, Any]:
    q, p = ljung_box(rw, LJUNG_BOX_LAGS)
    return {"whitened_acf": acf(rw, ACF_LAGS), "whitened_ljung_box_q": q, "whitened_ljung_box_p": p}


def _influence_part(
    prep: PreparedDesign,
    y: np.ndarray,
    r: np.ndarray,
    w: np.ndarray,
    noise: str,
    spikes: Sequence[int] | None,
    t_full: float,
    ar: np.ndarray | None = None,
) -> dict[str, Any]:
    n = y.size
    inf = influence(prep, r)
    thr = float(stats.t.isf(OUTLIER_ALPHA / (2.0 * n), inf.df - 1)) if inf.df > 1 else math.nan
    big = np.abs(np.nan_to_num(inf.studentized)) > thr
    stud_out = tuple(int(v) for v in np.flatnonzero(big))
    cooks = np.where(np.isfinite(inf.cooks), inf.cooks, -np.inf)
    c_i = int(np.argmax(cooks)) if np.isfinite(cooks).any() else None
    order = [int(v) for v in np.argsort(-cooks, kind="stable") if cooks[v] > 4.0 / n]
    infl = tuple(order[:INFLUENTIAL_MAX])
    t_drop = tuple(_t_without(prep, y, w, noise, infl[: m + 1], ar) for m in range(len(infl)))
    return {
        "outlier_volumes": tuple(sorted(set(stud_out) | set(spikes or ()))),
        "studentized_outliers": stud_out,
        "outlier_threshold": thr,
        "leverage": inf.leverage,
        "cooks": inf.cooks,
        "studentized": inf.studentized,
        "cooks_threshold": 4.0 / n,
        "cooks_distance_max": math.nan if c_i is None else float(inf.cooks[c_i]),
        "cooks_volume": c_i,
        "influential_volumes": infl,
        "t_dropping": t_drop,
        "t_without_influential": t_drop[-1] if t_drop else t_full,
    }


def _on_all_volumes(
    part: dict[str, Any], kept: np.ndarray, n: int, spikes: Sequence[int] | None
) -> dict[str, Any]:
    """Influence results on the kept volumes, re-indexed to volumes of the run (left-out
    volumes get NaN leverage, Cook's distance and studentized residual)."""
    out = dict(part)
    for key in ("studentized_outliers", "influential_volumes"):
        out[key] = tuple(int(kept[i]) for i in part[key])
    for key in ("leverage", "cooks", "studentized"):
        full = np.full(n, np.nan)
        full[kept] = part[key]
        out[key] = full
    if part["cooks_volume"] is not None:
        out["cooks_volume"] = int(kept[part["cooks_volume"]])
    out["outlier_volumes"] = tuple(sorted(set(out["studentized_outliers"]) | set(spikes or ())))
    return out


def _t_without(
    prep: PreparedDesign,
    y: np.ndarray,
    w: np.ndarray,
    noise: str,
    drop: Sequence[int],
    ar: np.ndarray | None = None,
) -> float:
    """The contrast's t with some volumes left out, through the same glm.fit path.

    Columns that are all zero on the kept rows (a one-volume spike regressor, say) are left
    out when the contrast does not weight them. Under AR(1) the kept rows are treated as
    consecutive (an approximation next to the dropped volumes), and so under AR(p), whose
    coefficients (``ar``) are those of the full fit.
    """
    keep = np.ones(y.size, dtype=bool)
    keep[list(drop)] = False
    X = prep.X[keep]
    cols = np.flatnonzero(np.any(X != 0, axis=0) | (w != 0))
    try:
        reduced = prepare(X[:, cols], [prep.names[c] for c in cols])
        return float(fit(reduced, y[keep], w[cols], noise=noise, ar=ar).t[0])
    except ModelError:
        return math.nan


def _tsnr(
    y: np.ndarray, n: int, tr: float, highpass_s: float | None, keep: np.ndarray | None = None
) -> float:
    X = np.column_stack([dct_drift(n, tr, highpass_s), np.ones(n)])
    c = np.zeros(X.shape[1])
    c[-1] = 1.0
    try:
        s2 = float(fit(prepare(X, keep=keep), y, c).sigma2[0])
    except ModelError:
        return math.nan
    mean = float(np.mean(y if keep is None else y[keep]))
    return mean / math.sqrt(s2) if s2 > 0 else math.nan


def _confound_correlation(analysis: Analysis, d: DesignMatrix) -> dict[str, dict[str, float]]:
    conf = analysis.confounds
    out: dict[str, dict[str, float]] = {}
    for cond, idx in d.condition_columns.items():
        x = d.X[:, idx[0]]
        row: dict[str, float] = {}
        if conf is not None:
            for name in conf.file_columns:
                row[name] = pearson_r(x, conf.column(name))
        out[cond] = row
    return out


def _spectrum_part(
    y: np.ndarray, d: DesignMatrix, cond: str, tr: float, highpass_s: float | None
) -> dict[str, Any]:
    freqs, power = signal.periodogram(y - y.mean(), fs=1.0 / tr)
    x = d.X[:, d.condition_columns[cond][0]]
    fx, px = signal.periodogram(x - x.mean(), fs=1.0 / tr)
    task_hz = float(fx[1 + int(np.argmax(px[1:]))]) if np.any(px[1:] > 0) else None
    period, _cycles, _share = task_periodicity(x, tr)
    hp_hz = None if highpass_s is None else 1.0 / float(highpass_s)
    drift = None
    total = float(np.sum(power[1:]))
    if hp_hz is not None and total > 0:
        drift = float(np.sum(power[(freqs > 0) & (freqs < hp_hz)]) / total)
    spectrum = {
        "freqs_hz": freqs,
        "power": power,
        "task_hz": task_hz,
        "task_periodic": period is not None,
        "highpass_hz": hp_hz,
    }
    return {"spectrum": spectrum, "drift_fraction": drift}
