"""Residual, influence and run-level diagnostics used by :mod:`voxelscope.core.checks`.

Small flat functions on plain arrays, each with its published definition:

* :func:`acf` - sample autocorrelation (demeaned, divided by the lag-0 sum);
* :func:`durbin_watson` - Durbin & Watson (1950);
* :func:`ljung_box` - Ljung & Box (1978) portmanteau test;
* :func:`influence` - leverage, externally studentized residuals, Cook (1977) distance;
* :func:`variance_inflation` - VIF of every design column;
* :func:`pearson_r` - Pearson correlation of two series;
* :func:`robust_spikes` - values above ``median + k * 1.4826 * MAD``;
* :class:`RunSummary` / :func:`run_summary` - per-run brain-edge distances and the
  volume-to-volume RMS change over the mask, computed once per open run.

Examples
--------
>>> r = np.random.default_rng(0).standard_normal(300)
>>> a = acf(r, 20)
>>> a.shape, float(a[0])
((21,), 1.0)
>>> bool(abs(durbin_watson(r) - 2 * (1 - a[1])) < 0.05)
True
"""

from __future__ import annotations

import math
import weakref
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .errors import InputError
from .glm import PreparedDesign, prepare

__all__ = [
    "ACF_LAGS",
    "LJUNG_BOX_LAGS",
    "RMS_SPIKE_K",
    "Influence",
    "RunSummary",
    "acf",
    "durbin_watson",
    "influence",
    "ljung_box",
    "pearson_r",
    "robust_spikes",
    "run_summary",
    "variance_inflation",
]

#: Autocorrelation lags kept for the plot (0..20).
ACF_LAGS = 20
#: Lags of the Ljung-Box test.
LJUNG_BOX_LAGS = 10
#: Run spikes: volume-to-volume RMS change above median + K * 1.4826 * MAD.
RMS_SPIKE_K = 5.0
_MAD_SCALE = 1.4826  # MAD -> SD for normal data (common practice)


def pearson_r(a: np.ndarray, b: np.ndarray) -> float:
    """Pearson correlation of two equally long series; NaN when either is constant.

    The cross-product of the centred series over the square root of the product of their
    centred sums of squares (the published definition).

    >>> pearson_r(np.array([1.0, 2.0, 3.0]), np.array([2.0, 4.0, 7.0]))  # doctest: +ELLIPSIS
    0.99339...
    >>> pearson_r(np.ones(3), np.arange(3.0))
    nan
    """
    a = np.asarray(a, dtype=np.float64).reshape(-1)
    b = np.asarray(b, dtype=np.float64).reshape(-1)
    a = a - a.mean()
    b = b - b.mean()
    den = math.sqrt(float(a @ a) * float(b @ b))
    return float(a @ b) / den if den > 0 else math.nan


def acf(r: np.ndarray, nlags: int = ACF_LAGS) -> np.ndarray:
    """Sample autocorrelation of a series at lags ``0..nlags`` (demeaned, biased form).

    Parameters
    ----------
    r : ndarray (n,)
    nlags : int
        Largest lag; at most ``n - 1`` lags are returned.

    Returns
    -------
    ndarray (min(nlags, n - 1) + 1,)
        ``acf[0] == 1``; NaN everywhere for a constant series.

    Examples
    --------
    >>> acf(np.array([1.0, -1.0, 1.0, -1.0]), 2).tolist()
    [1.0, -0.75, 0.5]
    """
    r = np.asarray(r, dtype=float).reshape(-1)
    n = r.size
    d = r - r.mean()
    den = float(d @ d)
    m = max(0, min(int(nlags), n - 1))
    if den <= 0:
        return np.full(m + 1, np.nan)
    return np.array([float(d[k:] @ d[: n - k]) / den for k in range(m + 1)])


def durbin_watson(r: np.ndarray) -> float:
    """Durbin-Watson statistic ``sum (r_t - r_{t-1})^2 / sum r_t^2`` (Durbin & Watson, 1950).

    About ``2 (1 - rho)`` for AR(1) residuals: 2 for white residuals, towards 0 for positive
    autocorrelation.

    >>> durbin_watson(np.array([1.0, -1.0, 1.0, -1.0]))
    3.0
    """
    r = np.asarray(r, dtype=float).reshape(-1)
    den = float(r @ r)
    if den <= 0:
        return math.nan
    return float(np.sum(np.diff(r) ** 2) / den)


def ljung_box(r: np.ndarray, lags: int = LJUNG_BOX_LAGS) -> tuple[float, float]:
    """Ljung-Box portmanteau statistic and p value (Ljung & Box, 1978).

    ``Q = n (n + 2) sum_{k=1}^{lags} acf_k^2 / (n - k)``, compared with chi-squared on
    ``lags`` degrees of freedom.

    Returns
    -------
    (Q, p) : tuple of float
        NaN for a constant series or one too short for ``lags``.

    >>> q, p = ljung_box(np.random.default_rng(0).standard_normal(500))
    >>> p > 0.01
    True
    """
    r = np.asarray(r, dtype=float).reshape(-1)
    n = r.size
    if n <= lags + 1:
        return math.nan, math.nan
    autocorr = acf(r, lags)
    if not np.all(np.isfinite(autocorr)):
        return math.nan, math.nan
    k = np.arange(1, lags + 1)
    q = float(n * (n + 2) * np.sum(autocorr[1:] ** 2 / (n - k)))
    from scipy import stats  # here, not at start-up

    return q, float(stats.chi2.sf(q, lags))


@dataclass(frozen=True, eq=False)
class Influence:
    """Per-volume influence measures of an OLS fit (all arrays have shape ``(n,)``).

    Attributes
    ----------
    leverage : hat-matrix diagonal ``h_i``
    studentized : externally studentized residuals
        ``e_i / (s_(i) sqrt(1 - h_i))`` with ``s_(i)^2 = (RSS - e_i^2 / (1 - h_i)) / (df - 1)``.
    cooks : Cook's distance ``e_i^2 h_i / (p s^2 (1 - h_i)^2)`` (Cook, 1977)
    df : residual degrees of freedom ``n - p``
    """

    leverage: np.ndarray
    studentized: np.ndarray
    cooks: np.ndarray
    df: int


def influence(design: PreparedDesign | np.ndarray, residuals: np.ndarray) -> Influence:
    """Leverage, externally studentized residuals and Cook's distance of an OLS fit.

    Parameters
    ----------
    design : PreparedDesign or ndarray (n, p)
        The full design (constant included).
    residuals : ndarray (n,)
        OLS residuals ``y - X b`` of that design.

    Volumes with leverage 1 (a column that is non-zero at one volume only) get NaN.

    >>> X = np.column_stack([np.arange(6.0), np.ones(6)])
    >>> inf = influence(X, np.array([0.1, -0.2, 0.1, 0.05, -0.1, 0.05]))
    >>> round(float(inf.leverage.sum()), 6)
    2.0
    """
    prep = design if isinstance(design, PreparedDesign) else prepare(np.asarray(design, float))
    e = np.asarray(residuals, dtype=float).reshape(-1)
    n, p = prep.X.shape
    h = np.einsum("ij,ji->i", prep.X, prep.pinv)
    df = n - p
    rss = float(e @ e)
    with np.errstate(invalid="ignore", divide="ignore"):
        one_minus_h = np.where(h < 1.0 - 1e-10, 1.0 - h, np.nan)
        s2 = rss / df if df > 0 else math.nan
        s2_i = (rss - e**2 / one_minus_h) / (df - 1) if df > 1 else np.full(n, np.nan)
        s2_i = np.where(s2_i > 0, s2_i, np.nan)
        stud = e / np.sqrt(s2_i * one_minus_h)
        cooks = e**2 * h / (p * s2 * one_minus_h**2) if s2 > 0 else np.full(n, np.nan)
    return Influence(h, stud, cooks, int(df))


def variance_inflation(
    X: np.ndarray, names: Sequence[str] | None = None, standardize: bool = True
) -> dict[str, float]:
    """Variance inflation factor of every design column: ``1 / (1 - R^2_j)``.

    ``R^2_j`` comes from regressing column ``j`` on all the other columns. It is centred
    when the other columns include a constant column and uncentred otherwise, and clipped
    to ``[0, 1 - 1e-15]``. With ``standardize`` (the default) every non-constant column is
    first centred, so each regressor's VIF is the usual one of a model with an intercept and
    the constant's own VIF is 1; without it the raw columns are used (the constant's VIF is
    then ``n / RSS_j``). Computed as ``1 - RSS_j / TSS_j`` with
    ``RSS_j = 1 / [(X'X)^-1]_jj``.

    Parameters
    ----------
    X : ndarray (n, p)
        The full design, constant included.
    names : sequence of str, optional
    standardize : bool

    Returns
    -------
    dict
        Column name -> VIF.

    >>> X = np.column_stack([[1.0, 2, 3, 4, 5], [2.0, 1, 4, 3, 6], np.ones(5)])
    >>> v = variance_inflation(X, ["a", "b", "constant"])
    >>> round(v["a"], 3), round(v["b"], 3), round(v["constant"], 3)
    (3.083, 3.083, 1.0)
    """
    X = np.array(X, dtype=float)
    p = X.shape[1]
    names = list(names) if names is not None else [f"x{i}" for i in range(p)]
    if standardize:
        sd = X.std(axis=0)
        moving = sd > 1e-10
        X[:, moving] = (X[:, moving] - X[:, moving].mean(axis=0)) / sd[moving]
    r = np.linalg.qr(X, mode="r")
    r_inv = np.linalg.solve(r, np.eye(p))
    diag = np.einsum("ij,ij->i", r_inv, r_inv)  # diag((X'X)^-1)
    const = [j for j in range(p) if np.ptp(X[:, j]) == 0 and X[0, j] != 0]
    out = {}
    for j in range(p):
        x = X[:, j]
        others_const = any(c != j for c in const)
        tss = float(np.sum((x - x.mean()) ** 2)) if others_const else float(x @ x)
        r2 = 1.0 - 1.0 / (diag[j] * tss) if tss > 0 else 0.0
        out[names[j]] = float(1.0 / (1.0 - min(max(r2, 0.0), 1.0 - 1e-15)))
    return out


def robust_spikes(series: np.ndarray, k: float = RMS_SPIKE_K) -> tuple[list[int], float]:
    """Indices where a series exceeds ``median + k * 1.4826 * MAD`` (NaN ignored).

    Returns
    -------
    (indices, threshold)

    >>> idx, thr = robust_spikes(np.array([np.nan, 1.0, 1.1, 0.9, 1.0, 9.0, 1.05]))
    >>> idx, round(thr, 5)
    ([5], 1.39565)
    """
    s = np.asarray(series, dtype=float).reshape(-1)
    ok = np.isfinite(s)
    if ok.sum() < 3:
        return [], math.nan
    med = float(np.median(s[ok]))
    mad = float(np.median(np.abs(s[ok] - med)))
    thr = med + k * _MAD_SCALE * mad
    idx = [int(i) for i in np.flatnonzero(ok & (s > thr))] if mad > 0 else []
    return idx, thr


# ----------------------------------------------------------------------------- run-level summary


class RunSummary:
    """Whole-run quantities the checks need, computed once per run and kept.

    Parameters
    ----------
    run : Run-like
        Needs ``mask()``, ``voxel_size``, ``n_volumes`` and either ``iter_rows(mask)`` or
        ``volume(t)``.

    Attributes
    ----------
    Each is computed on first use and kept.

    mask : bool (X, Y, Z)
    edge_distance : float (X, Y, Z)
        mm to the nearest voxel outside the mask (0 outside); the grid border is outside.
    volume_rms_change : float (T,)
        ``sqrt(mean over the mask of (v_t - v_{t-1})^2)`` for ``t >= 1``; NaN at ``t = 0``.
        A single corrupted volume ``t`` raises the change at ``t`` and at ``t + 1``.
    rms_spikes : list of int
        Volumes whose change exceeds ``median + RMS_SPIKE_K * 1.4826 * MAD``.
    rms_threshold : float
        That threshold, in data units.

    Notes
    -----
    The summary refers to its run weakly (it does not keep a closed run's data alive), so
    keep the run while using it. The volume-to-volume change reads the whole run once; a front
    end may compute it off the GUI thread (``run_summary(run).volume_rms_change``) so that
    the first click is quick.
    """

    def __init__(self, run: Any) -> None:
        self._run = weakref.ref(run) if _weakrefable(run) else (lambda: run)
        self.voxel_size = tuple(float(v) for v in run.voxel_size)
        self.n_volumes = int(run.n_volumes)
        self._mask: np.ndarray | None = None
        self._edge: np.ndarray | None = None
        self._rms: np.ndarray | None = None
        self._spikes: tuple[list[int], float] | None = None

    def _get_run(self) -> Any:
        run = self._run()
        if run is None:
            raise InputError("the run behind these checks has been closed; open it again")
        return run

    @property
    def mask(self) -> np.ndarray:
        if self._mask is None:
            self._mask = np.asarray(self._get_run().mask(), dtype=bool)
        return self._mask

    @property
    def edge_distance(self) -> np.ndarray:
        if self._edge is None:
            padded = np.pad(self.mask, 1, constant_values=False)
            from scipy import ndimage

            d = ndimage.distance_transform_edt(padded, sampling=self.voxel_size)
            self._edge = np.asarray(d[1:-1, 1:-1, 1:-1], dtype=float)
        return self._edge

    @property
    def volume_rms_change(self) -> np.ndarray:
        if self._rms is None:
            self._rms = _volume_rms_change(self._get_run(), self.mask, self.n_volumes)
        return self._rms

    @property
    def rms_spikes(self) -> list[int]:
        return list(self._spike_info()[0])

    @property
    def rms_threshold(self) -> float:
        return self._spike_info()[1]

    def _spike_info(self) -> tuple[list[int], float]:
        if self._spikes is None:
            self._spikes = robust_spikes(self.volume_rms_change, RMS_SPIKE_K)
        return self._spikes


def _weakrefable(obj: Any) -> bool:
    try:
        weakref.ref(obj)
    except TypeError:
        return False
    return True


def _volume_rms_change(run: Any, mask: np.ndarray, n_volumes: int) -> np.ndarray:
    out = np.full(n_volumes, np.nan)
    if n_volumes < 2 or not mask.any():
        return out
    sumsq = np.zeros(n_volumes - 1)
    count = 0
    if hasattr(run, "iter_rows"):
        for _idx, data in run.iter_rows(mask=mask):
            d = np.diff(np.asarray(data, dtype=np.float64), axis=1)
            sumsq += np.einsum("ij,ij->j", d, d)
            count += d.shape[0]
    else:
        prev = np.asarray(run.volume(0), dtype=np.float64)[mask]
        count = prev.size
        for t in range(1, n_volumes):
            cur = np.asarray(run.volume(t), dtype=np.float64)[mask]
            sumsq[t - 1] = float(np.sum((cur - prev) ** 2))
            prev = cur
    if count:
        out[1:] = np.sqrt(sumsq / count)
    return out


_SUMMARIES: dict[int, RunSummary] = {}
_STRONG: list[Any] = []  # runs that cannot be weakly referenced (kept, at most a few)


def run_summary(run: Any) -> RunSummary:
    """The cached :class:`RunSummary` of a run (one per open run object).

    >>> class _Fake:
    ...     voxel_size = (2.0, 2.0, 2.0)
    ...     n_volumes = 3
    ...     def mask(self):
    ...         return np.ones((3, 3, 3), bool)
    >>> f = _Fake()
    >>> run_summary(f) is run_summary(f), float(run_summary(f).edge_distance[1, 1, 1])
    (True, 4.0)
    """
    key = id(run)
    hit = _SUMMARIES.get(key)
    if hit is not None:
        try:
            same = hit._get_run() is run
        except InputError:
            same = False
        if same:
            return hit
    for k in [k for k, s in _SUMMARIES.items() if s._run() is None]:
        del _SUMMARIES[k]
    summary = RunSummary(run)
    _SUMMARIES[key] = summary
    if not _weakrefable(run):
        _STRONG.append(run)
        if len(_STRONG) > 4:
            old = _STRONG.pop(0)
            _SUMMARIES.pop(id(old), None)
    return summary
