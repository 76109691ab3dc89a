"""The default noise model: bias-corrected AR(p) prewhitening, regularised in space.

The method is that of Worsley, Liao, Aston, Petre, Duncan, Morales & Evans (2002), A general
statistical analysis for fMRI data, NeuroImage 15:1-15 (the steps below are our own
derivation of what the paper describes; details from memory are marked):

1. **OLS residuals** ``r = R y`` of the kernel's design, with the residual-forming matrix
   ``R = I - X (X'X)^-1 X'``.
2. **Sample autocovariances** ``a_j = sum_t r_t r_{t-j} = r' L_j r`` for lags
   ``j = 0..AR_ORDER``, with ``L_j`` the lag-``j`` shift matrix (``(L_j)_{t, t-j} = 1``).
3. **Bias correction for the design.** If the noise covariance is
   ``V = sum_k v_k S_k`` (``S_0 = I``, ``S_k = L_k + L_k'``: autocovariances ``v_k`` up to
   lag ``AR_ORDER``, zero beyond), then ``E a_j = tr(L_j R V R) = sum_k M_jk v_k`` with
   ``M_jk = tr(L_j R S_k R)``. The residuals of a design with drift columns are strongly
   biased toward negative autocorrelation; solving ``M v = a`` removes that bias
   (:func:`bias_matrix`, tested against the trace formula computed with dense matrices).
   The autocorrelations are ``rho_k = v_k / v_0``.
4. **Regularisation in space.** The ``rho_k`` maps are smoothed with a Gaussian of
   :data:`FWHM_MM` (15 mm, the paper's choice, from memory), within the mask only
   (normalised convolution: ``G*(m rho) / G*(m)``), truncated at :data:`TRUNCATE_SIGMA`
   standard deviations so that a voxel's value depends on a finite box of neighbours only.
   A clicked voxel computes exactly that box (:func:`voxel_ar`), so it gets the value the
   map uses without a whole-volume pass.
5. **AR(p) coefficients** from ``1, rho_1..rho_p`` by the Levinson-Durbin recursion
   (Yule-Walker equations), each reflection coefficient clipped to
   ``[-REFLECTION_LIMIT, REFLECTION_LIMIT]`` so the process is stationary.
6. **Prewhitening** with the exact inverse Cholesky factor of the AR(p) covariance (the
   innovations form): row ``t >= p`` is ``x_t - sum_k phi_k x_{t-k}``; the first ``p``
   rows use the lower-order predictors of the same recursion, scaled by
   ``sqrt(v_p / v_t)`` (for p = 1 this is Prais-Winsten). Then GLS per voxel, through
   :func:`voxelscope.core.glm.fit` (``noise="arp"``), exact (statsmodels GLS agrees).

Steps 2-6 need only a few sums of each voxel's series (:class:`ArpSums`, "one pass"
below), so a map reads the data once: the sums give the residual autocovariances, the
smoothing gives every voxel's coefficients, and the same sums give the GLS. A single fit
with its data goes through the same sums.
7. **Degrees of freedom: effective, per voxel** (:func:`arp_effective_df`; the paper's
   form, recalled from memory and rederived in the "effective df" section below):
   ``1 / nu_eff = 1 / nu + 2 sum_j tau_j^2 / nu_rho`` with ``nu = n - rank``, ``tau_j``
   the lag-j autocorrelation of the voxel's whitened contrast weights and ``nu_rho`` the
   df of its smoothed autocorrelations, from the run's smoothness
   (:func:`run_smoothness`, a seeded sample of neighbouring OLS residuals), the kernel
   (:func:`rho_df`) and the voxel's share at the edge of the mask (:func:`edge_share`).
   p, z and -log10 p of maps and fits use it; F tests keep ``n - rank``; a fit without a
   neighbourhood (no ``nu_rho``) uses ``n - rank``. Measured, not argued
   (``tests/benchmarks/calibration.py``, DEVELOPERS.md "Noise model calibration"): with
   spatially independent noise it moves the false-positive rates by at most .001 and
   keeps every AR cell inside the binomial interval; with noise smoothed in space (6 mm)
   and a block design, ``n - rank`` is liberal (.0524 at .05, outside the interval) and
   the effective df is not (.0488).

Examples
--------
>>> X = np.column_stack([np.ones(100), np.linspace(-1, 1, 100)])
>>> M = bias_matrix(X, 2)
>>> M.shape, round(float(M[0, 0]), 6)
((3, 3), 98.0)
>>> phi = ar_from_autocorr(np.array([[0.5], [0.25]]))
>>> np.round(phi[:, 0], 6).tolist()
[0.5, 0.0]
"""

from __future__ import annotations

import math
import threading
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .errors import InputError
from .workcopy import RSS_GUARD, working_copy

__all__ = [
    "AR_ORDER",
    "FWHM_MM",
    "NOISE_LABELS",
    "REFLECTION_LIMIT",
    "TRUNCATE_SIGMA",
    "ArEstimate",
    "VoxelBox",
    "ar_from_autocorr",
    "bias_matrix",
    "corrected_autocorr",
    "residual_autocov",
    "smooth_in_mask",
    "smoothing_weights",
    "voxel_ar",
    "voxel_box",
    "whiten",
    "whitening_filter",
]

#: Order of the autoregressive model.
AR_ORDER = 2
#: Lags of the bias correction (the noise model's autocovariances up to this lag enter
#: ``M``; only the first AR_ORDER corrected autocorrelations are used).
BIAS_LAGS = 2
#: Smooth the autocovariances ``v_0..v_p`` and take ratios after smoothing (True), rather
#: than smoothing each voxel's ratios ``v_k / v_0``: a ratio of two noisy sums is biased by
#: O(1/n) toward zero (about -0.03 at lag 1 for n = 200 and strong autocorrelation,
#: measured by the calibration runner); ratios of sums over the neighbourhood are not.
#: Voxels weigh in proportion to their noise variance.
POOL_VARIANCE = True
#: Defect-correction steps that remove the truncation of the bias correction (0: none).
REFINE_STEPS = 3
#: FWHM of the Gaussian that smooths the autocorrelation maps (mm).
FWHM_MM = 8.0
#: The Gaussian is truncated at this many standard deviations (per axis).
TRUNCATE_SIGMA = 2.0
#: Short names of the noise models for captions (one source for every view).
NOISE_LABELS = {"ols": "OLS", "ar1": "AR(1)", "arp": f"AR({AR_ORDER}), smoothed"}
#: Reflection coefficients are clipped to this magnitude (stationarity).
REFLECTION_LIMIT = 0.99


# ----------------------------------------------------------------------------- shifts


def _lag(a: np.ndarray, j: int) -> np.ndarray:
    """``L_j a`` along axis 0: ``out[t] = a[t - j]`` (0 for ``t < j``); ``j < 0`` leads."""
    out = np.zeros_like(a)
    n = a.shape[0]
    if j == 0:
        out[:] = a
    elif 0 < j < n:
        out[j:] = a[:-j]
    elif -n < j < 0:
        out[:j] = a[-j:]
    return out


def _sym(a: np.ndarray, k: int) -> np.ndarray:
    """``S_k a`` with ``S_0 = I`` and ``S_k = L_k + L_k'``."""
    return a.copy() if k == 0 else _lag(a, k) + _lag(a, -k)


def bias_matrix(X: np.ndarray, lags: int) -> np.ndarray:
    """``M_jk = tr(L_j R S_k R)`` for ``j, k = 0..lags`` (Worsley et al. 2002).

    ``E[r' L_j r] = sum_k M_jk v_k`` for residuals ``r = R y`` of the design ``X`` when the
    noise has autocovariances ``v_0..v_lags`` and none beyond. Computed with an
    orthonormal basis ``Q`` of X (``R = I - Q Q'``) in ``O(n q^2)`` per entry:
    ``tr(L_j S_k) - tr(Q' S_k L_j Q) - tr(Q' L_j S_k Q) + tr(Q'L_jQ Q'S_kQ)``.

    >>> bias_matrix(np.ones((10, 1)), 1).round(3).tolist()  # tr(L_j R S_k R) by dense matrices
    [[9.0, -1.8], [-0.9, 7.22]]
    """
    X = np.asarray(X, dtype=np.float64)
    n = X.shape[0]
    q, _r = np.linalg.qr(X)
    M = np.empty((lags + 1, lags + 1))
    lq = [_lag(q, j) for j in range(lags + 1)]
    sq = [_sym(q, k) for k in range(lags + 1)]
    qlq = [q.T @ a for a in lq]
    qsq = [q.T @ a for a in sq]
    for j in range(lags + 1):
        for k in range(lags + 1):
            if k == 0:
                t0 = float(n) if j == 0 else 0.0
            else:
                t0 = float(n - j) if j == k else 0.0
            t1 = float(np.sum(q * _sym(lq[j], k)))  # tr(Q' S_k L_j Q)
            t2 = float(np.sum(q * _lag(sq[k], j)))  # tr(Q' L_j S_k Q)
            t3 = float(np.sum(qlq[j] * qsq[k].T))  # tr(Q'L_jQ Q'S_kQ)
            M[j, k] = t0 - t1 - t2 + t3
    return M


def residual_autocov(R: np.ndarray, lags: int) -> np.ndarray:
    """``a_j = sum_t r_t r_{t-j}`` for ``j = 0..lags``, per column: shape (lags + 1, V).

    >>> residual_autocov(np.array([1.0, 2.0, 3.0]), 1)[:, 0].tolist()
    [14.0, 8.0]
    """
    R = np.asarray(R, dtype=np.float64)
    if R.ndim == 1:
        R = R[:, None]
    out = np.empty((lags + 1, R.shape[1]))
    for j in range(lags + 1):
        out[j] = np.einsum("ij,ij->j", R[j:], R[: R.shape[0] - j])
    return out


def corrected_autocorr(a: np.ndarray, M: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Bias-corrected autocorrelations ``rho_1..rho_lags`` (lags, V) and a validity mask.

    ``v = M^-1 a``; ``rho_k = v_k / v_0``. Invalid (False, rho 0) where ``v_0 <= 0`` or a
    value is not finite (constant voxels).
    """
    v = np.linalg.solve(M, a)
    ok = np.isfinite(v).all(axis=0) & (v[0] > 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        rho = np.where(ok, v[1:] / np.where(ok, v[0], 1.0), 0.0)
    return rho, ok


# ----------------------------------------------------------------------------- AR(p)


def ar_from_autocorr(rho: np.ndarray, order: int | None = None) -> np.ndarray:
    """AR coefficients (order, V) from autocorrelations ``rho_1..rho_order`` (Levinson).

    Reflection coefficients are clipped to ``[-REFLECTION_LIMIT, REFLECTION_LIMIT]``, so
    the result is always a stationary AR process.

    The Yule-Walker solution for AR(2) (a published formula) is
    ``phi_1 = r_1 (1 - r_2) / (1 - r_1^2)``, ``phi_2 = (r_2 - r_1^2) / (1 - r_1^2)``:

    >>> np.round(ar_from_autocorr(np.array([0.6, 0.2]))[:, 0], 6).tolist()
    [0.75, -0.25]
    """
    rho = np.asarray(rho, dtype=np.float64)
    if rho.ndim == 1:
        rho = rho[:, None]
    p = rho.shape[0] if order is None else int(order)
    V = rho.shape[1]
    r = np.vstack([np.ones((1, V)), rho[:p]])
    phi = np.zeros((p, V))
    err = np.ones(V)
    for m in range(1, p + 1):
        acc = r[m] - np.einsum("kv,kv->v", phi[: m - 1], r[m - 1 : 0 : -1]) if m > 1 else r[1]
        kappa = np.clip(acc / err, -REFLECTION_LIMIT, REFLECTION_LIMIT)
        prev = phi[: m - 1].copy()
        phi[: m - 1] = prev - kappa * prev[::-1]
        phi[m - 1] = kappa
        err = err * (1.0 - kappa * kappa)
    return phi


def whitening_filter(phi: np.ndarray) -> np.ndarray:
    """Per-voxel filter ``C`` (V, p + 1, p + 1) of the exact AR(p) prewhitening.

    Whitened row ``t`` is ``sum_k C[v, min(t, p), k] a[t - k]`` (``k <= min(t, p)``).
    Rows ``t < p`` use the order-``t`` predictor of the step-down recursion, scaled by
    ``sqrt(err_p / err_t)``, so that ``W'W`` is proportional to the inverse AR(p)
    covariance; for p = 1 this is the Prais-Winsten transform.

    >>> C = whitening_filter(np.array([[0.5]]))
    >>> np.round(C[0], 6).tolist()
    [[0.866025, 0.0], [1.0, -0.5]]
    """
    phi = np.asarray(phi, dtype=np.float64)
    if phi.ndim == 1:
        phi = phi[:, None]
    p, V = phi.shape
    coefs, kappa = _step_down(phi)  # orders p, p-1, ..., 0 and the reflection coefficients
    # prediction error variances relative to the process variance: err_0 = 1
    err = np.ones((p + 1, V))
    for m in range(1, p + 1):
        err[m] = err[m - 1] * (1.0 - kappa[m] ** 2)
    # built voxels last and returned as a (V, p + 1, p + 1) view of that memory: every use
    # reads one (t, k) entry of all voxels at a time, which is then contiguous
    Cl = np.zeros((p + 1, p + 1, V))
    for t in range(p + 1):
        scale = np.sqrt(err[p] / err[t])
        Cl[t, 0] = scale
        for k in range(1, t + 1):
            np.multiply(coefs[t][k - 1], -scale, out=Cl[t, k])
    return np.moveaxis(Cl, 2, 0)


def whiten(C: np.ndarray, A: np.ndarray) -> np.ndarray:
    """``W_v a_v`` for every column ``v`` of ``A`` (T, V), with filters ``C`` (V, p+1, p+1).

    >>> whiten(whitening_filter(np.array([[0.5]])), np.ones((3, 1)))[:, 0].round(6).tolist()
    [0.866025, 0.5, 0.5]
    """
    p = C.shape[1] - 1
    n = A.shape[0]
    out = A * C[:, p, 0]
    for k in range(1, p + 1):
        out[k:] += A[: n - k] * C[:, p, k]
    for t in range(min(p, n)):
        row = A[t] * C[:, t, 0]
        for k in range(1, t + 1):
            row = row + A[t - k] * C[:, t, k]
        out[t] = row
    return out


# ----------------------------------------------------------------------------- one pass
#
# The whole AR(p) fit of a voxel needs only a few sums over its time series, so a map reads
# the data once: with ``Xs`` the design scaled to unit-norm columns and ``L_d`` the lag-d
# shift (``(L_d y)_t = y_{t-d}``, ``L_{-d} = L_d'``),
#
# * ``H_d = Xs' S_d y`` for ``d = 0..P``, ``S_0 = I``, ``S_d = L_d + L_d'`` (one product of
#   the stacked, symmetrically lagged design with the data: only these sums enter),
# * ``y' L_d y`` for ``d = 0..P`` (the data's own autocovariances), and
# * the first and last ``P`` samples,
#
# give (1) the OLS residual autocovariances of step 2 above, ``r' L_j r = y'L_j y -
# u'Q'S_j y + u' Q'L_j Q u`` (``j > 0``) with ``u = Q'y`` and ``Q`` an orthonormal basis
# of the design, and (2) the GLS normal equations of step 6 for any AR(p) coefficients:
# ``W'W`` is the band Toeplitz matrix of ``g_d = sum_k c_k c_{k+d}`` (``c`` the steady row of
# the whitening filter) plus a correction in its first and last ``p`` rows and columns, so
# ``X*'y* = sum_d g_d H_d + (boundary)``, ``X*'X*`` likewise from the design's own lagged
# products and ``y*'y* = g_0 y'y + 2 sum_d g_d y'L_d y + (boundary)``. Every identity is
# exact; the two residual sums of squares are differences (``y'y - u'u`` and ``y*'y* -
# b'X*'y*``) on centred float64 data, exact to about ``eps / (1 - R^2)`` relative, and the
# voxels below :data:`voxelscope.core.glm.RSS_GUARD` get explicit residuals instead (as for
# OLS).


@dataclass
class ArpSums:
    """Per-voxel sums of one pass over the data (every array has the voxels last).

    Attributes
    ----------
    mean, tss : ndarray (V,)
        Mean of the kept volumes and the sum of squares of the working copy (centred when
        the design has a constant).
    bad : ndarray of bool (V,)
        Voxels with a non-finite sample (their working copy is all zeros).
    H : ndarray (P + 1, q, V)
        ``Xs' S_d y`` for ``d = 0..P`` (``S_0 = I``, ``S_d = L_d + L_d'``), with ``Xs`` the
        design scaled to unit-norm columns.
    acy : ndarray (P + 1, V)
        ``y' L_d y`` for ``d = 0..P``.
    head, tail : ndarray (P, V)
        The first and last ``P`` samples of the working copy.
    v : ndarray (L + 1, V)
        Bias-corrected autocovariances of the OLS residuals (0 where not ``ok``).
    ok : ndarray of bool (V,)
        Voxels whose autocovariances are usable (not constant, finite, ``v_0 > 0``).
    """

    mean: np.ndarray
    tss: np.ndarray
    bad: np.ndarray
    H: np.ndarray
    acy: np.ndarray
    head: np.ndarray
    tail: np.ndarray
    v: np.ndarray
    ok: np.ndarray

    @property
    def lags(self) -> int:
        return int(self.acy.shape[0] - 1)

    @property
    def n_voxels(self) -> int:
        return int(self.mean.shape[0])

    def take(self, sel: Any) -> ArpSums:
        """The sums of some voxels (an index, slice or boolean mask over the last axis)."""
        return ArpSums(*(getattr(self, f)[..., sel] for f in _SUM_FIELDS))

    @classmethod
    def concat(cls, parts: Sequence[ArpSums]) -> ArpSums:
        """The sums of several blocks, one after the other."""
        return cls(*(np.concatenate([getattr(x, f) for x in parts], axis=-1) for f in _SUM_FIELDS))

    @classmethod
    def empty(cls, n_voxels: int, q: int, lags: int, bias_lags: int) -> ArpSums:
        """Zeroed sums for ``n_voxels`` (filled block by block with :meth:`put`)."""
        P = lags
        return cls(
            np.zeros(n_voxels),
            np.zeros(n_voxels),
            np.zeros(n_voxels, dtype=bool),
            np.zeros((P + 1, q, n_voxels)),
            np.zeros((P + 1, n_voxels)),
            np.zeros((P, n_voxels)),
            np.zeros((P, n_voxels)),
            np.zeros((bias_lags + 1, n_voxels)),
            np.zeros(n_voxels, dtype=bool),
        )

    def put(self, pos: np.ndarray, other: ArpSums) -> None:
        """Store ``other``'s voxels at positions ``pos``."""
        pos = run_or_index(pos)
        for f in _SUM_FIELDS:
            getattr(self, f)[..., pos] = getattr(other, f)


_SUM_FIELDS = ("mean", "tss", "bad", "H", "acy", "head", "tail", "v", "ok")


def _coldot(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Column-wise dot products of two (k, V) arrays."""
    return np.einsum("iv,iv->v", a, b)


#: A design column counts as closed under the lag-d shifts when the interior rows of
#: ``S_d x`` are a combination of the design's columns to within this (relative to the
#: column's largest value; the identity holds to rounding for the discrete cosine drift
#: columns and the constant).
SHIFT_CLOSED_TOL = 1e-13


def _shift_closed(Xs: np.ndarray, P: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Columns of ``Xs`` whose symmetric shifts ``S_d x`` (d = 1..P) are, away from the
    first and last P rows, combinations of the columns themselves.

    For such a column ``S_d x = Xs a_d + e_d`` with ``e_d`` zero except in the first and
    last P rows, so ``x' S_d y = a_d' (Xs' y) + e_d' y`` needs only ``Xs' y`` and the first
    and last P samples: no product of the shifted column with the data. This holds for
    the discrete cosine drift columns (``cos(w (t - d)) + cos(w (t + d)) = 2 cos(w d)
    cos(w t)``, a trigonometric identity) and the constant; other columns (the task
    regressors, confounds) are not closed.

    Returns ``(closed, A, E)``: the closed columns' indices (c,), ``A`` (P, c, q) with
    rows ``a_d'`` and ``E`` (P, c, 2P) with ``e_d`` at the first and last P rows.

    >>> t = np.arange(40)
    >>> task = np.random.default_rng(0).standard_normal(40)
    >>> Xs = np.column_stack([np.ones(40), np.cos(np.pi * (2 * t + 1) / 80), task])
    >>> Xs = Xs / np.linalg.norm(Xs, axis=0)
    >>> closed, A, E = _shift_closed(Xs, 2)
    >>> closed.tolist(), A.shape, E.shape
    ([0, 1], (2, 2, 3), (2, 2, 4))
    """
    n, q = Xs.shape
    none = (np.zeros(0, dtype=np.int64), np.zeros((P, 0, q)), np.zeros((P, 0, 2 * P)))
    if P < 1 or n - 2 * P < 2 * q:
        return none
    inner = slice(P, n - P)
    pinv = np.linalg.pinv(Xs[inner])
    ends = np.r_[0:P, n - P : n]
    coefs, resid = [], []
    for d in range(1, P + 1):
        S = _sym(Xs, d)
        a = pinv @ S[inner]  # (q, q): column k's combination
        e = S - Xs @ a
        scale = np.maximum(np.abs(S).max(axis=0), 1e-300)
        coefs.append(a)
        resid.append((e, np.abs(e[inner]).max(axis=0) <= SHIFT_CLOSED_TOL * scale))
    ok = np.logical_and.reduce([r[1] for r in resid])
    closed = np.flatnonzero(ok)
    if closed.size == 0:
        return none
    A = np.stack([a[:, closed].T for a in coefs])
    E = np.stack([e[ends][:, closed].T for e, _ in resid])
    return closed, A, E


def run_or_index(idx: np.ndarray) -> slice | np.ndarray:
    """A run of consecutive indices as a slice (a view, no scatter; a block of a full
    mask), other indices as they are.

    >>> run_or_index(np.arange(3, 7)), run_or_index(np.array([1, 3])).tolist()
    (slice(3, 7, None), [1, 3])
    """
    idx = np.asarray(idx)
    if idx.size and int(idx[-1]) - int(idx[0]) == idx.size - 1 and np.all(np.diff(idx) == 1):
        return slice(int(idx[0]), int(idx[-1]) + 1)
    return idx


def _design_lags(prep: Any, lags: int) -> dict[str, Any]:
    """Design-only pieces of the one-pass sums, memoised on the prepared design."""
    key = ("_ar_lags", lags)
    got = prep.memo.get(key)
    if got is not None:
        return got
    X = np.asarray(prep.X, dtype=np.float64)
    norms = np.linalg.norm(X, axis=0)
    Xs = X / norms
    q, _r = np.linalg.qr(X)
    r_inv = np.linalg.solve(_r, np.eye(_r.shape[0]))
    P = lags
    closed, shift_a, shift_e = _shift_closed(Xs, P)
    is_open = np.ones(Xs.shape[1], dtype=bool)  # not np.setdiff1d: it imports numpy.ma
    is_open[closed] = False
    open_ = np.flatnonzero(is_open)
    # the stack's first q rows are Xs'; then, for d = 1..P, (S_d Xs)' of the columns that
    # are not closed under shifts (the others follow from Xs'y and the first and last P
    # samples, see _shift_closed): its product with y gives every Xs' S_d y
    stack = np.concatenate([Xs.T] + [_sym(Xs, d)[:, open_].T for d in range(1, P + 1)])
    K = np.stack([Xs.T @ _sym(Xs, d) for d in range(P + 1)])  # Xs' S_d Xs
    QLQ = np.stack([q.T @ _lag(q, j) for j in range(P + 1)])  # Q' L_j Q
    got = {
        "norms": norms,
        "Xs": Xs,
        "stack": np.ascontiguousarray(stack),
        "open": open_,
        "closed": closed,
        "open_at": run_or_index(open_),
        "closed_at": run_or_index(closed),
        "shift_a": shift_a,
        "shift_e": shift_e,
        "K": K,
        "QT": r_inv.T * norms[None, :],  # Q' S_d y = QT @ H_d
        "QLQ": QLQ,
        "QLQ_stack": np.ascontiguousarray(QLQ[1:].reshape(-1, QLQ.shape[2])),
    }
    prep.memo[key] = got
    return got


def arp_sums(
    prep: Any,
    Y: np.ndarray,
    mean: np.ndarray,
    tss: np.ndarray,
    bad: np.ndarray | None,
    lags: int | None = None,
    autocov: bool = True,
) -> ArpSums:
    """The one-pass sums of a working copy ``Y`` (kept volumes, float64, centred when the
    design has a constant; see :func:`voxelscope.core.glm.working_copy`).

    Also computes the bias-corrected OLS residual autocovariances (``v``, ``ok``) of step
    3 from the sums (:func:`arp_autocov`; explicit residuals below the guard), unless
    ``autocov`` is False: then ``v`` and ``ok`` are left empty for :func:`arp_autocov`
    to fill later, in larger pieces (a map: fewer small products per voxel).
    """
    P = max(AR_ORDER, BIAS_LAGS) if lags is None else int(lags)
    n, V = Y.shape
    if n <= 2 * P:
        raise InputError(f"{n} volumes are too few for an AR({P}) noise model")
    D = _design_lags(prep, P)
    q = D["Xs"].shape[1]
    prod = D["stack"] @ Y
    H = np.empty((P + 1, q, V))
    H[0] = prod[:q]
    head = np.array(Y[:P])
    tail = np.array(Y[n - P :])
    op, closed = D["open_at"], D["closed_at"]
    if D["open"].size:
        H[1:, op] = prod[q:].reshape(P, D["open"].size, V)
    if D["closed"].size:
        ends = np.concatenate([head, tail])
        for d in range(1, P + 1):
            H[d, closed] = D["shift_a"][d - 1] @ H[0]
            H[d, closed] += D["shift_e"][d - 1] @ ends
    acy = np.empty((P + 1, V))
    acy[0] = tss
    loops = _loops(V) if Y.flags.c_contiguous else None
    if loops is not None:  # all lags in one pass over the block
        loops.lag_products(Y, P, acy)
    else:
        for d in range(1, P + 1):
            acy[d] = np.einsum("ij,ij->j", Y[d:], Y[: n - d])
    bad = np.zeros(V, dtype=bool) if bad is None else np.asarray(bad, dtype=bool)
    L = max(P, BIAS_LAGS)
    s = ArpSums(
        np.asarray(mean, dtype=np.float64),
        tss,
        bad,
        H,
        acy,
        head,
        tail,
        np.zeros((L + 1, V)),
        np.zeros(V, dtype=bool),
    )
    if autocov:
        arp_autocov(prep, s, lambda idx: Y[:, idx])
    return s


def arp_autocov(prep: Any, s: ArpSums, series: Any) -> None:
    """Fill ``s.v`` and ``s.ok``: the bias-corrected autocovariances of the OLS residuals
    (step 3) from the one-pass sums, ``r' L_j r = y'L_j y - u'Q'S_j y + u'Q'L_jQ u``.

    ``series(idx)`` returns the working copy (T, k) of some voxels: it is called only
    for near-exact fits and constant voxels (residual sum of squares below the guard),
    which get explicit residuals instead.
    """
    V = s.n_voxels
    if V > SOLVE_PIECE:  # part by part: each step's arrays stay in the processor's cache
        for a0 in range(0, V, SOLVE_PIECE):
            sl = slice(a0, min(V, a0 + SOLVE_PIECE))
            part = s.take(sl)  # views: v and ok are filled in place
            arp_autocov(prep, part, lambda idx, a0=a0: series(idx + a0))
        return
    P = s.lags
    L = max(P, BIAS_LAGS)
    D = _design_lags(prep, P)
    H, acy, tss = s.H, s.acy, s.tss
    QT = D["QT"]
    u = QT @ H[0]  # Q'y
    w = QT.T @ u  # u'Q'S_j y = w'H_j
    quad = (D["QLQ_stack"] @ u).reshape(L, -1, V)  # Q'L_j Q u, j = 1..L
    a = np.empty((L + 1, V))
    a[0] = acy[0] - _coldot(u, u)  # Q'Q = I
    for j in range(1, L + 1):
        a[j] = acy[j] - _coldot(w, H[j]) + _coldot(u, quad[j - 1])
    close = np.flatnonzero(~(a[0] > RSS_GUARD * tss))
    if close.size:  # near-exact fits and constant voxels: explicit residuals
        # a working copy that is all zeros (a constant series, centred, or one with a
        # non-finite sample) has zero residuals: no need to read it again
        zero = tss[close] == 0.0
        a[:, close[zero]] = 0.0
        close = close[~zero]
    if close.size:
        Yc = np.asarray(series(close), dtype=np.float64)
        Rc = Yc - prep.X @ (prep.pinv @ Yc)
        a[:, close] = residual_autocov(Rc, L)
    M = design_bias_matrix(prep, L)
    v = _inverse(M) @ a  # a 3 x 3 inverse: LAPACK per block costs more
    ok = ~s.bad & np.isfinite(v).all(axis=0) & (v[0] > 0)
    ok &= a[0] > 1e-20 * np.maximum(tss, 1e-300)
    if not POOL_VARIANCE:
        v = v / np.where(ok, v[0], 1.0)
    v[:, ~ok] = 0.0
    s.v[...] = v
    s.ok[...] = ok


def _boundary(C: np.ndarray, g: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``W'W`` minus its band Toeplitz part in the first and last ``p`` rows and columns:
    (p, p, V) each. ``C`` (V, p+1, p+1) are the filters, ``g`` (p+1, V) the Toeplitz
    values.

    Column ``s < p`` meets the first ``p`` rows of ``W`` (the lower-order predictors) and
    steady rows ``p..s+p``; the last ``p`` columns miss the rows beyond ``n - 1``.
    """
    V, p1, _ = C.shape
    p = p1 - 1
    m = 2 * p
    W = np.zeros((m, m, V))  # the first 2p rows and columns of W
    for t in range(m):
        for k in range(min(t, p) + 1):
            W[t, t - k] = C[:, min(t, p), k]
    top = np.empty((p, p, V))
    bot = np.zeros((p, p, V))
    c = C[:, p, :].T  # (p+1, V)
    for a in range(p):
        for b in range(p):
            top[a, b] = np.einsum("tv,tv->v", W[:, a], W[:, b]) - g[abs(a - b)]
            for k in range(min(a, b) + 1):
                bot[a, b] -= c[p - a + k] * c[p - b + k]
    return top, bot


#: Smallest batch of voxels that goes to the compiled loops (:mod:`voxelscope.core.loops`):
#: a map's pieces are far larger; a single fit (a few voxels) stays in NumPy.
LOOP_VOXELS = 1024
_LOOPS: list = []  # [the loops' module, or None where they are not available], once loaded
_LOOPS_LOCK = threading.Lock()


def load_loops() -> bool:
    """Load the compiled loops (:mod:`voxelscope.core.loops`) for this process's later maps.

    Loading costs about 0.7 s (numba's import, then the first call of each loop from
    numba's cache; the first time after an install, the compilation: a few seconds), and
    the loops save about 0.05 s on a map of 160,000 voxels (two workers; DEVELOPERS.md), so
    only a process that makes many maps loads them: the window (in the background after
    its first map) and the benchmarks. A single ``voxelscope map`` or ``fit`` stays in
    NumPy and never imports numba. ``VOXELSCOPE_COMPILED=0`` keeps every map in NumPy;
    if numba fails to import, that is said once on stderr and maps stay in NumPy.
    Safe to call from several threads; returns whether the loops are in use.
    """
    with _LOOPS_LOCK:
        if not _LOOPS:
            import os

            got = None
            if os.environ.get("VOXELSCOPE_COMPILED", "1") != "0":
                try:
                    from . import loops as got

                    got.warm()
                except Exception as exc:  # pragma: no cover - numba is a dependency
                    import sys

                    got = None
                    print(
                        f"voxelscope: numba did not load ({exc}); maps run their AR(p) loops"
                        " in NumPy, slower (reinstall numba to get them back)",
                        file=sys.stderr,
                    )
            _LOOPS.append(got)
    return _LOOPS[0] is not None


def _loops(n_voxels: int) -> Any:
    """The compiled loops' module for a batch of ``n_voxels`` once :func:`load_loops` has
    loaded them, else None: NumPy then (also below :data:`LOOP_VOXELS`).

    >>> _loops(1) is None
    True
    """
    if n_voxels < LOOP_VOXELS or not _LOOPS:
        return None
    return _LOOPS[0]


def _bordered_cholesky(A: np.ndarray, tmp: np.ndarray | None = None) -> np.ndarray:
    """Cholesky factor of a batch of symmetric positive definite matrices, with forward
    substitution of right-hand sides on the way, in place, voxels last.

    ``A`` (q, q + m, V) holds column ``j`` of each matrix in ``A[j, :q]`` (only rows
    ``j..q-1`` are read: the lower triangle) and the ``m`` right-hand sides ``b_r`` in
    ``A[j, q + r] = b_r[j]``. Afterwards ``A[j, j:q]`` is column ``j`` of the lower
    factor ``L`` (``L L' = G``) and ``A[:, q + r]`` is ``L^-1 b_r``: the right-hand sides
    are extra rows of the matrix (a bordered Cholesky), so one left-looking loop over the
    q columns does both. Every step is an elementwise operation over the voxels (NaN where
    a matrix is not positive definite). ``tmp`` (at least (q + m, V)) is scratch space.

    >>> A = np.array([[4.0, 2.0, 2.0], [0.0, 3.0, 1.0]])[:, :, None]  # G = [[4, 2], [2, 3]]
    >>> _bordered_cholesky(A)[:, :, 0].round(6).tolist()  # L = [[2, 0], [1, sqrt 2]]
    [[2.0, 1.0, 1.0], [0.0, 1.414214, 0.0]]
    """
    q, width, V = A.shape
    loops = _loops(V)
    if loops is not None and A.flags.c_contiguous:
        return loops.bordered_cholesky(A)
    if tmp is None:
        tmp = np.empty((width, V))
    with np.errstate(invalid="ignore", divide="ignore"):
        for j in range(q):
            col = A[j, j:]
            if j:  # all earlier columns at once (one einsum: 1.5x the speed of a k loop)
                col -= np.einsum("kmv,kv->mv", A[:j, j:], A[:j, j], out=tmp[: width - j])
            np.sqrt(col[0], out=col[0])
            col[1:] /= col[0]
    return A


def _back_substitute(A: np.ndarray, z: np.ndarray) -> np.ndarray:
    """``x = L'^-1 z`` for the factors of :func:`_bordered_cholesky` (``A``) and ``z``
    (q, V) or (q, m, V)."""
    q = A.shape[0]
    x = np.empty(z.shape)
    many = z.ndim == 3
    with np.errstate(invalid="ignore", divide="ignore"):
        for i in range(q - 1, -1, -1):
            if i == q - 1:
                x[i] = z[i] / A[i, i]
                continue
            if many:
                acc = z[i] - np.einsum("kv,kmv->mv", A[i, i + 1 : q], x[i + 1 :])
            else:
                acc = z[i] - np.einsum("kv,kv->v", A[i, i + 1 : q], x[i + 1 :])
            x[i] = acc / A[i, i]
    return x


def _spd_solve(G: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """Solve ``G x = rhs`` for a batch of symmetric positive definite matrices laid out
    voxels last: ``G`` (q, q, V), ``rhs`` (q, m, V) -> (q, m, V), by
    :func:`_bordered_cholesky` and back substitution (NaN where a matrix is not positive
    definite). Only the lower triangle of ``G`` is read.

    >>> G = np.array([[4.0, 2.0], [2.0, 3.0]])[:, :, None]
    >>> _spd_solve(G, np.array([[2.0], [1.0]])[:, :, None])[:, 0, 0].round(6).tolist()
    [0.5, 0.0]
    """
    q, m, V = rhs.shape
    A = np.empty((q, q + m, V))
    A[:, :q] = np.swapaxes(G, 0, 1)  # A[j, i] = G[i, j]
    A[:, q:] = rhs
    _bordered_cholesky(A)
    return _back_substitute(A, A[:, q:])


#: Most voxels per part of a batched solve (and of :func:`arp_autocov`): every step of a
#: part runs on arrays of the part's voxels, which then stay in the processor's cache.
SOLVE_PIECE = 8192
#: Bytes of the (q, q + 1, w) Cholesky working set of one part; a design with many
#: columns (indicator columns of censored volumes) gets parts of fewer voxels, down to
#: 1024. On 2 cores with 2 MB of cache each, a 12-column design ran its solves 1.4x
#: faster in parts of 8,192 voxels than of 16,384.
SOLVE_BYTES = 10 << 20


def _solve_part(q: int) -> int:
    """Voxels per part of a batched solve for a design of ``q`` columns.

    >>> _solve_part(12), _solve_part(42)
    (8192, 1024)
    """
    return int(min(SOLVE_PIECE, max(1024, SOLVE_BYTES // (8 * q * (q + 1)))))


def arp_solve(
    prep: Any,
    s: ArpSums,
    phi: np.ndarray,
    c: np.ndarray,
    want_cov: bool = True,
    series: Any = None,
    betas: bool = True,
) -> tuple[np.ndarray | None, np.ndarray | None, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """GLS of every voxel of the sums under its own AR(p) whitening ``phi`` (p, V).

    ``series(idx)`` returns the working copy of some voxels (T, k): it is called only for
    voxels whose whitened residual sum of squares falls below the guard (near-exact fits),
    which then get explicit whitened residuals.

    Returns
    -------
    B : (q, V) betas of the working copy (None when ``betas`` is False: a map needs only
    the contrast); cov : (V, q, q) ``(X*'X*)^-1`` (None unless ``want_cov``); cvar : (V,)
    ``c' (X*'X*)^-1 c``; rss_w : (V,) the whitened residual sum of squares; C : (V, p+1,
    p+1) the whitening filters (None when a batch of AR(2) voxels without ``want_cov``
    took the compiled loops: a map keeps no filters); cb : (V,) ``c' B``.
    """
    phi = np.asarray(phi, dtype=np.float64)
    if phi.ndim == 1:
        phi = phi[:, None]
    p = phi.shape[0]
    P = s.lags
    if p > P:
        raise InputError(f"the sums have {P} lags, too few for AR({p}) whitening")
    D = _design_lags(prep, P)
    norms, Xs = D["norms"], D["Xs"]
    q = Xs.shape[1]
    V = phi.shape[1]
    basis, ends = _normal_basis(D, p)
    # X*'X* from (g, top, bottom) per voxel: compiled for a map's AR(2) batch, which then
    # needs no filters (voxelscope.core.loops), else from the filters part by part
    loops = _loops(V) if p == 2 and not want_cov else None
    coef_all = (
        None
        if loops is None
        else loops.gram_coefficients_ar2(np.ascontiguousarray(phi), np.empty((11, V)))
    )
    C = whitening_filter(phi) if coef_all is None else None
    cs = c / norms
    part = _solve_part(q)
    betas = betas or want_cov
    # betas of every voxel, or (a map) only of the near-exact fits, allocated when one comes
    Bs = np.empty((q, V)) if betas else None
    cvar = np.empty(V)
    zz = np.empty(V)
    yy = np.empty(V)
    cb = np.empty(V)
    cov = np.empty((V, q, q)) if want_cov else None
    if not want_cov:
        # One bordered Cholesky per voxel gives the factor L and z = L^-1 X*'y*, with the
        # columns that the contrast weighs put last: then c'G^-1 c = |L_c^-1 c_c|^2 and
        # c'b = (L_c^-1 c_c)'z_c need only L's last block L_c, and |z|^2 = y*'X* b.
        nz = np.flatnonzero(cs != 0)
        perm = np.concatenate([np.setdiff1d(np.arange(q), nz), nz])
        r = nz.size
        key = ("columns", p, perm.tobytes())
        columns = D.get(key)
        if columns is None:
            columns = D[key] = _gram_columns(basis, q, perm)
        cr = cs[nz]
        w = min(V, part)
        A = np.empty((q, q + 1, w))
        tmp = np.empty((q + 1, w))
    # part by part, every step of a part on arrays that stay in the processor's cache
    for a in range(0, V, part):
        b = min(V, a + part)
        sl = slice(a, b)
        if coef_all is None:
            Cp = C[sl]
            cp = Cp[:, p, :].T  # (p+1, w): the steady row
            g = np.stack([np.einsum("kv,kv->v", cp[: p + 1 - d], cp[d:]) for d in range(p + 1)])
            top, bot = _boundary(Cp, g)
        else:
            coef = coef_all[:, sl]
            g, top, bot = coef[:3], coef[3:7].reshape(2, 2, -1), coef[7:].reshape(2, 2, -1)
        # X*'y* (q, w) and y*'y* (w,): the band Toeplitz part, then the first and last p rows
        H = s.H[:, :, sl]  # in the design's order; the Cholesky's order is taken below
        head, tail = s.head[:p, sl], s.tail[P - p :, sl]
        Eh = np.concatenate(
            [np.einsum("tuv,uv->tv", top, head), np.einsum("tuv,uv->tv", bot, tail)]
        )
        gv = np.empty((q, b - a))
        if not want_cov and b - a < w:  # the last, shorter part
            w = b - a
            A = np.empty((q, q + 1, w))
            tmp = np.empty((q + 1, w))
        np.multiply(g[0], H[0], out=gv)
        y2 = g[0] * s.acy[0, sl]
        for d in range(1, p + 1):
            gv += g[d] * H[d]
            y2 += 2.0 * g[d] * s.acy[d, sl]
        gv += ends.T @ Eh
        if not want_cov:
            np.take(gv, perm, axis=0, out=A[:, q])  # X*'y* in the order perm, for the Cholesky
        y2 += np.einsum("tv,tv->v", np.concatenate([head, tail]), Eh)
        yy[sl] = y2
        # X*'X* (q, q, w) = basis @ (g, top, bot): one product, then the solve
        if coef_all is None:
            coef = np.concatenate([g, top.reshape(p * p, -1), bot.reshape(p * p, -1)])
        if want_cov:
            G = (basis @ coef).reshape(q, q, -1)
            Ginv = np.linalg.inv(np.moveaxis(G, 2, 0))
            Bs[:, sl] = np.einsum("vij,jv->iv", Ginv, gv)
            cov[sl] = Ginv / np.outer(norms, norms)
            cvar[sl] = np.einsum("i,vij,j->v", c, cov[sl], c)
            zz[sl] = np.einsum("iv,iv->v", gv, Bs[:, sl])
            continue
        for j in range(q):
            np.matmul(columns[j], coef, out=A[j, j:q])
        _bordered_cholesky(A, tmp)
        z = A[:, q]
        zz[sl] = np.einsum("iv,iv->v", z, z)  # y*'X* G^-1 X*'y* = |L^-1 X*'y*|^2
        u = _forward_last(A, cr)  # L_c^-1 c_c
        cvar[sl] = np.einsum("iv,iv->v", u, u)  # c' G^-1 c = |L^-1 c|^2
        cb[sl] = np.einsum("iv,iv->v", u, z[q - r :])  # c' G^-1 X*'y*
        if betas:
            Bs[perm, sl] = _back_substitute(A, z)
        else:  # near-exact fits need their betas for explicit residuals
            rw = yy[sl] - zz[sl]
            near = np.flatnonzero(~(rw > RSS_GUARD * yy[sl]))
            if near.size:
                if Bs is None:
                    Bs = np.full((q, V), np.nan)
                Bs[perm[:, None], a + near] = _back_substitute(A[:, :, near], z[:, near])
    rss_w = yy - zz
    close = np.flatnonzero(~(rss_w > RSS_GUARD * yy))
    if betas:
        B = Bs / norms[:, None]
    else:  # the near-exact fits are exactly the close ones (the same test of rss_w)
        B = np.empty((q, 0)) if Bs is None else Bs[:, close] / norms[:, None]
    if close.size and series is not None:
        Rc = series(close) - prep.X @ (B[:, close] if betas else B)
        Rwc = whiten(whitening_filter(phi[:, close]) if C is None else C[close], Rc)
        rss_w[close] = np.einsum("ij,ij->j", Rwc, Rwc)
    if want_cov:
        cb = c @ B
    return (B if betas else None), cov, cvar, rss_w, C, cb


def _gram_columns(basis: np.ndarray, q: int, perm: np.ndarray) -> list[np.ndarray]:
    """Rows of ``basis`` (:func:`_normal_basis`) that give column ``j`` of ``X*'X*`` with
    rows and columns in the order ``perm``, from its diagonal down (rows ``j..q-1``): the
    lower triangle, q (q + 1) / 2 entries."""
    return [np.ascontiguousarray(basis[perm[j:] * q + perm[j]]) for j in range(q)]


def _forward_last(A: np.ndarray, c: np.ndarray) -> np.ndarray:
    """``L_c^-1 c`` (r, V) for the last r x r block ``L_c`` of the factors of
    :func:`_bordered_cholesky` (``A``) and a vector ``c`` (r,)."""
    q = A.shape[0]
    r = c.size
    u = np.empty((r, A.shape[2]))
    with np.errstate(invalid="ignore", divide="ignore"):
        for i in range(r):
            row = q - r + i
            acc = np.full(A.shape[2], float(c[i]))
            for k in range(i):
                acc -= A[q - r + k, row] * u[k]
            u[i] = acc / A[row, row]
    return u


def _normal_basis(D: dict, p: int) -> tuple[np.ndarray, np.ndarray]:
    """``(basis, ends)``: ``X*'X* = basis @ (g_0..g_p, top, bottom)`` (q*q rows), and the
    first and last p rows of the scaled design (2p, q); memoised in ``D``."""
    key = ("basis", p)
    got = D.get(key)
    if got is None:
        Xs, K = D["Xs"], D["K"]
        n, q = Xs.shape
        parts = [K[: p + 1].reshape(p + 1, q * q).T]
        for rows in (Xs[:p], Xs[n - p :]):
            parts.append(np.einsum("ti,sj->ijts", rows, rows).reshape(q * q, p * p))
        got = D[key] = (
            np.ascontiguousarray(np.concatenate(parts, axis=1)),
            np.concatenate([Xs[:p], Xs[n - p :]]),
        )
    return got


# ----------------------------------------------------------------------------- space


def smoothing_weights(
    voxel_mm: Sequence[float], fwhm_mm: float | None = None
) -> tuple[np.ndarray, ...]:
    """The three 1-D Gaussian weights (truncated at :data:`TRUNCATE_SIGMA` sigma).

    >>> [w.size for w in smoothing_weights((3.0, 3.0, 4.0))]
    [7, 7, 5]
    """
    fwhm_mm = FWHM_MM if fwhm_mm is None else fwhm_mm
    out = []
    for size in voxel_mm:
        sigma = fwhm_mm / (2.0 * math.sqrt(2.0 * math.log(2.0))) / float(size)
        radius = max(0, math.ceil(TRUNCATE_SIGMA * sigma))
        x = np.arange(-radius, radius + 1, dtype=np.float64)
        out.append(np.exp(-0.5 * (x / sigma) ** 2) if sigma > 0 else np.ones(1))
    return tuple(out)


def smooth_in_mask(
    values: np.ndarray,
    valid: np.ndarray,
    weights: Sequence[np.ndarray],
    parallel: Any = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Normalised convolution of (X, Y, Z, K) ``values`` over the ``valid`` voxels.

    Returns the smoothed values (0 where no valid voxel is in reach) and the summed
    weight of valid neighbours (the denominator).

    Only the box around the valid voxels, widened by the kernel's reach, is convolved:
    outside it both sums are exactly 0, so the result is the same as over the whole grid
    (a map of a few planes, the window's preview, smooths a thin slab, not the volume).
    Each of the K numerators and the denominator is its own 3-D convolution (the same
    sums, line by line, as one 4-D convolution): ``parallel(fn, items)`` (optional,
    returning ``[fn(i) for i in items]``) may run them side by side (scipy's filters
    release the GIL).

    Examples
    --------
    >>> v = np.zeros((9, 9, 9, 1)); ok = np.zeros((9, 9, 9), bool)
    >>> v[4, 4, 4, 0], ok[4, 4, 4] = 2.0, True
    >>> out, den = smooth_in_mask(v, ok, (np.ones(3),) * 3)
    >>> float(out[3, 5, 4, 0]), float(out[0, 0, 0, 0]), float(den[4, 4, 4])
    (2.0, 0.0, 1.0)
    """
    from scipy import ndimage

    valid = np.asarray(valid, dtype=bool)
    out = np.zeros(values.shape, dtype=np.float64)
    den_all = np.zeros(valid.shape, dtype=np.float64)
    hit = np.argwhere(valid)
    if hit.size == 0:
        return out, den_all
    box = []
    for axis, w in enumerate(weights):
        r = (np.asarray(w).size - 1) // 2
        lo = max(0, int(hit[:, axis].min()) - r)
        hi = min(valid.shape[axis], int(hit[:, axis].max()) + r + 1)
        box.append(slice(lo, hi))
    box_t = tuple(box)
    m = valid[box_t].astype(np.float64)
    K = values.shape[-1]

    def convolve(k: int) -> np.ndarray:
        a = values[(*box_t, k)] * m if k < K else m
        for axis, w in enumerate(weights):
            a = ndimage.correlate1d(a, w, axis=axis, mode="constant", cval=0.0)
        return a

    jobs = [K, *range(K)]  # the denominator first
    sums = parallel(convolve, jobs) if parallel is not None else [convolve(k) for k in jobs]
    den = sums[0]
    safe = np.where(den > 0, den, 1.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        for k in range(K):
            out[(*box_t, k)] = np.where(den > 0, sums[k + 1] / safe, 0.0)
    den_all[box_t] = den
    return out, den_all


def voxel_sizes(affine: np.ndarray) -> tuple[float, float, float]:
    """Voxel edge lengths (mm) from an affine's column norms."""
    a = np.asarray(affine, dtype=np.float64)[:3, :3]
    return tuple(float(v) if v > 0 else 1.0 for v in np.linalg.norm(a, axis=0))  # type: ignore[return-value]


@dataclass(frozen=True)
class ArEstimate:
    """How one voxel's AR(p) coefficients were obtained (shown in the window and JSON).

    Attributes
    ----------
    phi : ndarray (p,)
        AR coefficients used for prewhitening.
    autocorr : ndarray (p,)
        The smoothed, bias-corrected autocorrelations they come from.
    n_neighbours : int
        Voxels of the mask within reach of the smoothing kernel that entered the average.
    fwhm_mm : float
    own_autocorr : ndarray (p,) or None
        The voxel's own bias-corrected autocorrelations (before smoothing).
    nu_rho : float or None
        The df of the smoothed autocorrelations at this voxel (:func:`rho_df` with the
        run's smoothness, :func:`run_smoothness`, over its share at the edge of the mask):
        what the effective df of the voxel's t needs (:func:`arp_effective_df`).
    fwhm_data_mm : tuple of float or None
        The run's smoothness used for ``nu_rho``.
    """

    phi: np.ndarray
    autocorr: np.ndarray
    n_neighbours: int
    fwhm_mm: float
    own_autocorr: np.ndarray | None = None
    nu_rho: float | None = None
    fwhm_data_mm: tuple[float, ...] | None = None

    def describe(self) -> str:
        coefs = ", ".join(f"{v:.3f}" for v in self.phi)
        return (
            f"AR({self.phi.size}) coefficients {coefs}: bias-corrected autocorrelations "
            f"averaged over {self.n_neighbours} mask voxels ({self.fwhm_mm:g} mm FWHM)"
        )

    def short(self) -> str:
        """A few words for a narrow part of the window."""
        coefs = ", ".join(f"{v:.2f}" for v in self.phi)
        return f"AR {coefs}, from {self.n_neighbours} voxels around ({self.fwhm_mm:g} mm)"

    def to_json(self) -> dict[str, Any]:
        return {
            "phi": [float(v) for v in self.phi],
            "autocorr": [float(v) for v in self.autocorr],
            "own_autocorr": None
            if self.own_autocorr is None
            else [float(v) if np.isfinite(v) else None for v in self.own_autocorr],
            "n_neighbours": int(self.n_neighbours),
            "fwhm_mm": float(self.fwhm_mm),
            "nu_rho": None if self.nu_rho is None else float(self.nu_rho),
            "data_fwhm_mm": None
            if self.fwhm_data_mm is None
            else [float(v) for v in self.fwhm_data_mm],
        }


def ols_autocorr_block(prep: Any, Y: np.ndarray, lags: int = AR_ORDER):
    """Bias-corrected autocorrelations (lags, V) and validity (V,) of one (T, V) block."""
    return _ols_autocorr(prep, Y, design_bias_matrix(prep, lags), lags)


def smooth_map(
    rho: np.ndarray,
    valid: np.ndarray,
    run: Any,
    fwhm_mm: float | None = None,
    parallel: Any = None,
):
    """:func:`smooth_in_mask` with the run's voxel sizes; returns the smoothed values."""
    fwhm_mm = FWHM_MM if fwhm_mm is None else fwhm_mm
    weights = smoothing_weights(voxel_sizes(getattr(run, "affine", np.eye(4))), fwhm_mm)
    return smooth_in_mask(rho, valid, weights, parallel)[0]


def _ols_autocorr(prep: Any, Y: np.ndarray, M: np.ndarray, lags: int):
    """Bias-corrected autocovariances ``v_0..v_L`` (L + 1, V) of the OLS residuals and
    their validity (V,), from the same one-pass sums as a map (:func:`arp_sums`), so a
    clicked voxel's neighbourhood gives exactly the map's values. Invalid voxels
    (constant, non-finite, ``v_0 <= 0``) are 0; ``L = M.shape[0] - 1``.

    With :data:`POOL_VARIANCE` False the values are ``1, rho_1..rho_L`` instead (each
    voxel normalised by its own ``v_0``)."""
    Y = np.asarray(Y)
    if Y.ndim == 1:
        Y = Y[:, None]
    keep = getattr(prep, "keep", None)
    if keep is not None and Y.shape[0] != prep.X.shape[0]:
        Y = Y[keep]  # left-out volumes leave the estimate too
    s = arp_sums(prep, *working_copy(prep, Y), lags=max(lags, M.shape[0] - 1))
    return s.v[: M.shape[0]], s.ok


def _ratio(v: np.ndarray) -> np.ndarray:
    """Autocorrelations ``v_k / v_0`` (lags, V) of autocovariances (lags + 1, V); 0 where
    ``v_0 <= 0``."""
    good = v[0] > 0
    return np.where(good, v[1:] / np.where(good, v[0], 1.0), 0.0)


def own_ar(prep: Any, Y: np.ndarray, order: int = AR_ORDER) -> np.ndarray:
    """AR(p) coefficients (order, V) from each voxel's own bias-corrected autocorrelations,
    not smoothed: what :func:`voxelscope.core.glm.fit` uses under ``noise="arp"`` when no
    coefficients are given (a time series without its neighbourhood)."""
    v, _ok = _ols_autocorr(prep, Y, design_bias_matrix(prep, order), order)
    return ar_from_smoothed(v, order, prep)[0]


def _inverse(M: np.ndarray) -> np.ndarray:
    """The inverse of a small bias-correction matrix, memoised by its bytes."""
    key = M.tobytes()
    got = _INVERSES.get(key)
    if got is None:
        if len(_INVERSES) > 64:
            _INVERSES.clear()
        got = _INVERSES[key] = np.linalg.inv(M)
    return got


_INVERSES: dict[bytes, np.ndarray] = {}


def design_bias_matrix(prep: Any, lags: int = AR_ORDER) -> np.ndarray:
    """:func:`bias_matrix` of a prepared design, memoised on it."""
    lags = max(lags, BIAS_LAGS)
    key = ("_ar_bias", lags)
    M = prep.memo.get(key)
    if M is None:
        M = bias_matrix(prep.X, lags)
        prep.memo[key] = M
    return M


def full_bias_matrix(X: np.ndarray, lags: int) -> np.ndarray:
    """``tr(L_j R S_k R)`` for ``j = 0..lags`` and every ``k = 0..n-1`` (lags + 1, n):
    the expected residual autocovariances under a noise model with all its lags.

    Every term of :func:`bias_matrix`'s expansion is a sum along one diagonal of an
    n x n matrix (``tr(A S_k)`` is the sum of A's diagonals at offsets ``+-k``), so all
    ``k`` come from a few diagonal sums at once.
    """
    X = np.asarray(X, dtype=np.float64)
    n = X.shape[0]
    q, _r = np.linalg.qr(X)
    Gq = q @ q.T
    out = np.zeros((lags + 1, n))
    k = np.arange(n)
    for j in range(lags + 1):
        lq = _lag(q, j)
        t1 = _sym_diagonals(q @ lq.T)  # tr(Q' S_k L_j Q)
        t2 = _sym_diagonals(Gq[j:], n)  # tr(Q' L_j S_k Q): rows t >= j of Q Q'
        t3 = _sym_diagonals(q @ (q.T @ lq) @ q.T)  # tr(Q'L_jQ Q'S_kQ) = tr(Q Q'L_jQ Q' S_k)
        t0 = np.where(k == j, float(n - j), 0.0)
        out[j] = t0 - t1 - t2 + t3
    return out


_DIAGONAL_INDEX: dict[tuple[int, int], np.ndarray] = {}


def _diagonal_index(r: int, c: int) -> np.ndarray:
    """``col - row + r - 1`` of every entry of an (r, c) matrix, raveled (kept per shape:
    a fit asks for the same few shapes a dozen times per kernel)."""
    idx = _DIAGONAL_INDEX.get((r, c))
    if idx is None:
        if len(_DIAGONAL_INDEX) > 16:
            _DIAGONAL_INDEX.clear()
        rows, cols = np.indices((r, c))
        idx = _DIAGONAL_INDEX[(r, c)] = (cols - rows + r - 1).ravel()
        idx.flags.writeable = False
    return idx


def _sym_diagonals(A: np.ndarray, n: int | None = None) -> np.ndarray:
    """``d[k] = sum_i A[i, i - k] + sum_i A[i, i + k]`` (once for ``k = 0``) for
    ``k = 0..n-1``: ``tr(A' S_k)`` of an (r, c) matrix, diagonals relative to its own
    first row.

    >>> _sym_diagonals(np.arange(9.0).reshape(3, 3)).tolist()
    [12.0, 16.0, 8.0]
    """
    r, c = A.shape
    n = c if n is None else n
    d = np.bincount(_diagonal_index(r, c), weights=A.ravel(), minlength=r + c - 1)
    # offset m = col - row sits at index m + r - 1
    out = np.zeros(n)
    for sign in (1, -1):
        m = sign * np.arange(n) + r - 1
        ok = (m >= 0) & (m < d.size)
        out[ok] += d[m[ok]]
    out[0] -= d[r - 1]  # k = 0 counted once
    return out


#: Lags of the AR autocorrelation sequence computed between two convergence checks.
_SEGMENT = 16
#: A voxel's AR autocorrelation sequence in :func:`_implied` stops once its last p values
#: are below this. The tail left out moves the implied residual autocovariances by about
#: 1e-12 of their lag-0 value (measured on a map with AR coefficients 0-0.7: 1.3e-12;
#: tests/core/test_noise.py holds 1e-9 against the full sequence), far below every other
#: rounding of the estimate; 1e-13 cost about 30 % more lags of the recursion.
IMPLIED_TOL = 1e-10
#: The same for every step of the defect correction but its last. A step's error in the
#: implied values reaches the estimate damped by the later steps (each step shrinks the
#: defect about five-fold: measured on AR(1) noise with coefficients 0-0.7, largest defect
#: 4.5e-2, 9.3e-3, 2.0e-3, 4.5e-4 after steps 1-4), so 1e-7 there moves the estimate by
#: about 1e-8, four orders below what the last step leaves; it saves about a third of the
#: early steps' lags.
EARLY_TOL = 1e-7


def _implied(
    phi: np.ndarray,
    rho: np.ndarray,
    F: np.ndarray,
    tol: float = IMPLIED_TOL,
    buf: np.ndarray | None = None,
    segment: int | None = None,
) -> np.ndarray:
    """``F @ g`` (L + 1, V) for the autocorrelations ``g_0..g_{n-1}`` of AR(p) processes
    ``phi`` (p, V) whose first p autocorrelations are ``rho`` (p, V) (the Yule-Walker
    extension). Each voxel's sequence stops (the rest counts as 0) at the end of the first
    segment (``segment // 2`` lags, then ``segment`` each) where its own last p values are
    below ``tol`` in magnitude, so a voxel's value does not depend on the others it is
    computed with, and the recursion runs only as long as each voxel needs (the voxels
    still running are gathered together after every segment). ``buf`` (at least
    (segment + p + 1) * V) is reused across calls: fresh pages cost more than the
    arithmetic.

    >>> F = np.ones((1, 50))
    >>> round(float(_implied(np.array([[0.5]]), np.array([[0.5]]), F)[0, 0]), 12)  # sum of 0.5^k
    2.0
    """
    segment = _SEGMENT if segment is None else int(segment)
    p, V = phi.shape
    n = F.shape[1]
    head = min(p + 1, n)
    g0 = np.empty((head, V))
    g0[0] = 1.0
    g0[1:head] = rho[: head - 1]
    out = F[:, :head] @ g0
    if head >= n or V == 0:
        return out
    need = (segment + p + 1) * V
    if buf is None or buf.size < need:
        buf = np.empty(need)
    active = None  # all voxels, in order, until some stop
    ph = phi
    width = V
    rows = buf[: (segment + p) * width].reshape(segment + p, width)
    rows[:p] = g0[head - p : head]
    tmp = buf[(segment + p) * V : (segment + p + 1) * V]
    k = head
    first = True
    while k < n and width:
        # a short first segment: weakly correlated voxels are done after a few lags
        m = min(segment // 2 if first else segment, n - k)
        first = False
        t = tmp[:width]
        for r in range(p, p + m):
            np.multiply(ph[0], rows[r - 1], out=rows[r])
            for i in range(1, p):
                np.multiply(ph[i], rows[r - 1 - i], out=t)
                rows[r] += t
        part = F[:, k : k + m] @ rows[p : p + m]
        if active is None:
            out += part
        else:
            out[:, active] += part
        k += m
        going = np.max(np.abs(rows[m : m + p]), axis=0) >= tol
        n_going = int(np.count_nonzero(going))
        if 2 * n_going > width:  # most still run: the others go on as zeros (adding 0)
            if n_going < width:
                rows[m : m + p, ~going] = 0.0
            rows[:p] = rows[m : m + p]
            continue
        keep = np.flatnonzero(going)
        last = rows[m : m + p][:, keep]
        ph = ph[:, keep]
        active = keep if active is None else active[keep]
        width = keep.size
        rows = buf[: (segment + p) * width].reshape(segment + p, width)
        rows[:p] = last
    return out


def _step_down(phi: np.ndarray) -> tuple[list[np.ndarray], np.ndarray]:
    """Coefficients of orders 0..p (each (m, V)) and reflection coefficients (p + 1, V;
    row 0 unused) of AR(p) processes ``phi`` (p, V), by the step-down recursion."""
    p, V = phi.shape
    coefs: list[np.ndarray] = [np.zeros((0, V))] * (p + 1)
    coefs[p] = phi.copy()
    kappa = np.zeros((p + 1, V))
    for m in range(p, 0, -1):
        a = coefs[m]
        k = a[m - 1]
        kappa[m] = k
        denom = 1.0 - k * k
        coefs[m - 1] = (a[: m - 1] + k * a[m - 2 :: -1][: m - 1]) / denom if m > 1 else a[:0]
    return coefs, kappa


def ar_from_smoothed(
    values: np.ndarray, order: int, prep: Any = None, chunk: int = 1 << 20
) -> tuple[np.ndarray, np.ndarray]:
    """AR coefficients (order, V) and autocorrelations (order, V) from smoothed,
    bias-corrected autocovariances ``v_0..v_L`` (L + 1, V); white noise where ``v_0 <= 0``.

    With ``prep`` (the design) and :data:`REFINE_STEPS` > 0 the truncation of the bias
    correction at :data:`BIAS_LAGS` is removed by defect correction: the AR(p) model's
    full autocorrelation sequence gives the expected residual autocovariances
    (:func:`full_bias_matrix`), those are corrected like the data, and the difference to the
    data's corrected values is added to the estimate, until the model reproduces the
    data's residual autocovariances at lags 0..L.
    """
    rho_obs = _ratio(values)[:order]
    if prep is None or REFINE_STEPS <= 0 or values.shape[1] == 0:
        return ar_from_autocorr(rho_obs, order), rho_obs
    lags = values.shape[0] - 1
    M = design_bias_matrix(prep, lags)
    key = ("_ar_bias_full", lags)
    F = prep.memo.get(key)
    if F is None:
        F = full_bias_matrix(prep.X, lags)
        prep.memo[key] = F
    valid = values[0] > 0
    Minv = _inverse(M)
    V = values.shape[1]
    loops = _loops(V) if order == 2 and F.shape[0] == 3 and F.shape[1] > 3 else None
    if loops is not None:  # the same steps, compiled (voxelscope.core.loops)
        phi_all = np.empty((order, V))
        rho_all = np.empty((order, V))
        loops.refine_ar2(
            np.ascontiguousarray(rho_obs), np.ascontiguousarray(Minv), np.ascontiguousarray(F.T),
            REFINE_STEPS, EARLY_TOL, IMPLIED_TOL, _SEGMENT, REFLECTION_LIMIT, phi_all, rho_all,
        )  # fmt: skip
        phi_all[:, ~valid] = 0.0
        rho_all[:, ~valid] = 0.0
        return phi_all, rho_all
    buf = np.empty((_SEGMENT + order + 1) * min(chunk, V))
    phi_all = np.zeros((order, V))
    rho_all = np.zeros((order, V))
    for a in range(0, V, chunk):
        sl = slice(a, a + chunk)
        ro = rho_obs[:, sl]
        rho = ro.copy()
        phi = ar_from_autocorr(rho, order)
        for step in range(REFINE_STEPS):
            rho = _stationary_rho(phi, rho)  # the model's first p autocorrelations
            tol = IMPLIED_TOL if step == REFINE_STEPS - 1 else EARLY_TOL
            implied = _ratio(Minv @ _implied(phi, rho, F, tol, buf))[:order]
            rho = np.clip(rho + (ro - implied), -REFLECTION_LIMIT, REFLECTION_LIMIT)
            phi = ar_from_autocorr(rho, order)
        rho = _stationary_rho(phi, rho)
        phi_all[:, sl] = phi
        rho_all[:, sl] = rho
    phi_all[:, ~valid] = 0.0
    rho_all[:, ~valid] = 0.0
    return phi_all, rho_all


def _stationary_rho(phi: np.ndarray, rho: np.ndarray) -> np.ndarray:
    """The first p autocorrelations of the (clipped, stationary) AR process ``phi``."""
    p = phi.shape[0]
    if p == 1:
        return phi.copy()
    # from the reflection coefficients, forward: rho_m = kappa_m err_{m-1} +
    # sum_i a_{m-1,i} rho_{m-i} (the Levinson recursion solved for rho_m)
    coefs, kappa = _step_down(phi)
    out = np.empty(phi.shape)
    err = np.ones(phi.shape[1])
    for m in range(1, p + 1):
        acc = kappa[m] * err
        for i in range(1, m):
            acc = acc + coefs[m - 1][i - 1] * out[m - i - 1]
        out[m - 1] = acc
        err = err * (1.0 - kappa[m] ** 2)
    return out


@dataclass(frozen=True)
class VoxelBox:
    """A voxel's neighbourhood within the truncated smoothing kernel, read once.

    ``glob`` (n, 3) are the mask voxels of the box, ``weights`` (n,) their smoothing
    weights, ``data`` (T, n) float32 their series (None when the box holds no mask
    voxel). The box depends on the run, the voxel, the mask and the FWHM only, not on the
    design, so every kernel's estimate at a voxel can share it (:meth:`voxel_box`).
    """

    ijk: tuple[int, int, int]
    glob: np.ndarray
    weights: np.ndarray
    data: np.ndarray | None
    fwhm_mm: float


def voxel_box(
    run: Any,
    ijk: Sequence[int],
    mask: np.ndarray | None = None,
    fwhm_mm: float | None = None,
) -> VoxelBox:
    """Read the box of mask voxels that :func:`voxel_ar` averages over (one read of their
    series for every kernel).

    Examples
    --------
    >>> from voxelscope.core.maps import ArrayRun
    >>> run = ArrayRun(np.random.default_rng(0).normal(size=(5, 5, 5, 30)))
    >>> box = voxel_box(run, (0, 0, 0), fwhm_mm=2.0)  # reach 2 voxels: a 3x3x3 corner
    >>> box.glob.shape, box.data.shape
    ((27, 3), (30, 27))
    """
    fwhm_mm = FWHM_MM if fwhm_mm is None else float(fwhm_mm)
    shape = tuple(int(n) for n in run.shape)
    mask = np.asarray(run.mask() if mask is None else mask, dtype=bool)
    if mask.shape != shape:
        raise InputError(f"the mask has shape {mask.shape} but the run grid is {shape}")
    centre = tuple(int(v) for v in ijk)
    weights = smoothing_weights(voxel_sizes(getattr(run, "affine", np.eye(4))), fwhm_mm)
    lo, hi, wts = [], [], []
    for axis, w in enumerate(weights):
        r = (w.size - 1) // 2
        c = centre[axis]
        a, b = max(0, c - r), min(shape[axis], c + r + 1)
        lo.append(a)
        hi.append(b)
        wts.append(w[a - c + r : b - c + r])
    sub = mask[lo[0] : hi[0], lo[1] : hi[1], lo[2] : hi[2]]
    local = np.argwhere(sub)
    if local.size == 0:
        return VoxelBox(centre, np.zeros((0, 3), dtype=np.intp), np.zeros(0), None, fwhm_mm)
    glob = local + np.array(lo)
    flat = np.ravel_multi_index(glob.T, shape)
    if hasattr(run, "timeseries_many"):
        data = np.asarray(run.timeseries_many(flat), dtype=np.float32).T
    else:
        data = run.data.reshape(-1, run.n_volumes)[flat].astype(np.float32).T
    w = wts[0][local[:, 0]] * wts[1][local[:, 1]] * wts[2][local[:, 2]]
    return VoxelBox(centre, glob, w, data, fwhm_mm)


def voxel_ar(
    run: Any,
    prep: Any,
    ijk: Sequence[int],
    mask: np.ndarray | None = None,
    order: int | None = None,
    fwhm_mm: float | None = None,
    box: VoxelBox | None = None,
) -> ArEstimate:
    """One voxel's AR(p) coefficients, exactly as :func:`smoothed_ar_map` gives them.

    Reads only the box of neighbours within the truncated smoothing kernel; ``box``
    (from :func:`voxel_box` for the same voxel, mask and FWHM) saves reading it again.
    """
    prep = prep.censored()  # the map's design when volumes inside the run are left out
    order = AR_ORDER if order is None else int(order)
    if box is None:
        box = voxel_box(run, ijk, mask=mask, fwhm_mm=fwhm_mm)
    fwhm_mm = box.fwhm_mm
    M = design_bias_matrix(prep, order)
    if box.data is None:
        rho = np.zeros(order)
        return ArEstimate(np.zeros(order), rho, 0, fwhm_mm, None)
    glob, data = box.glob, box.data
    vals, ok = _ols_autocorr(prep, data, M, order)
    w = box.weights * ok
    centre = np.flatnonzero((glob == np.asarray(ijk)).all(axis=1))
    own = _ratio(vals[:, centre[:1]])[:order, 0] if centre.size and ok[centre[0]] else None
    den = float(w.sum())
    sm = (vals @ w) / den if den > 0 else np.zeros(vals.shape[0])
    phi, rho = ar_from_smoothed(sm[:, None], order, prep)
    # the df of the smoothed autocorrelations: the map's nu_rho (rho_df over edge_share)
    sizes = voxel_sizes(getattr(run, "affine", np.eye(4)))
    fwhm_data = run_smoothness(run, prep, run.mask() if mask is None else mask)
    kernel = smoothing_weights(sizes, fwhm_mm)
    interior = float(np.prod([(k * k).sum() / k.sum() ** 2 for k in kernel]))
    share = max(float((w * w).sum()) / den**2 / interior, 1.0) if den > 0 else 1.0
    nu_rho = rho_df(prep.df, sizes, fwhm_data, fwhm_mm)
    return ArEstimate(
        phi[:, 0],
        rho[:, 0],
        int(np.count_nonzero(w)),
        fwhm_mm,
        own,
        nu_rho / share,
        tuple(float(v) for v in fwhm_data),
    )


# ----------------------------------------------------------------------------- effective df
#
# Step 7's alternative, measured (tests/benchmarks/calibration.py, DEVELOPERS.md "Noise model
# calibration"). The t of a fit whose whitening comes from *estimated* autocorrelations is
# not exactly t(n - rank): the estimate adds variance to the denominator. The paper's
# effective df (Worsley et al. 2002; the formulas below are recalled from memory and
# rederived here in our own words) treats that variance as a second chi-square term:
#
# * the autocorrelation estimate of one voxel has about ``nu = n - rank`` degrees of
#   freedom; smoothing it in space averages the estimates of neighbours, which are
#   independent only as far as the data are rough. For data with Gaussian spatial
#   correlation of FWHM ``f_data`` and a Gaussian smoothing kernel of FWHM ``f_rho`` in
#   D dimensions, ``nu_rho = nu (2 (f_rho / f_data)^2 + 1)^(D/2)`` (from memory). In our
#   words: a product of two data fields (an autocovariance) has the squared correlation
#   of the data, a Gaussian of half the variance, and averaging a field of correlation
#   variance ``s^2`` with a kernel of variance ``k^2`` divides its variance by
#   ``((s^2 + 2 k^2) / s^2)^(D/2)``; :func:`rho_df` computes that division on the voxel
#   grid with the truncated kernel actually used, which tends to the formula for kernels
#   wide against a voxel and to the number of voxels averaged for rough data;
# * a small error in the autocorrelations at lag ``j`` changes the estimated variance of
#   the contrast by ``2 tau_j`` times that error, relative, with ``tau_j`` the lag-j
#   autocorrelation of the contrast's whitened weight vector
#   ``a = W X (X*'X*)^-1 c`` (``c'b = a'y*``); with errors of variance ``1 / nu_rho`` at
#   every lag, independent, and Satterthwaite's matching of a chi-square (variance
#   ``2 / df`` relative), ``1 / nu_eff = 1 / nu + 2 sum_j tau_j^2 / nu_rho`` (the paper's
#   form, from memory; :func:`effective_df`).
#
# The errors of an AR(p) estimate are not independent across lags (p numbers determine
# all of them), which the formula ignores; a simulation with a known number of pooled
# voxels (tests/core/test_noise.py) shows what that does.


def contrast_autocorr(
    prep: Any, phi: np.ndarray, c: np.ndarray, lags: int | None = None, chunk: int = 2048
) -> np.ndarray:
    """Autocorrelations ``tau_1..tau_lags`` (lags, V) of each voxel's whitened contrast
    weights ``a = W X (X*'X*)^-1 c`` (``c'b = a'y*``), for AR coefficients ``phi`` (p, V).

    ``lags`` defaults to every lag (``n - 1``).

    >>> X = np.column_stack([np.ones(6), np.arange(6.0)])
    >>> tau = contrast_autocorr(X, np.zeros((1, 1)), np.array([0.0, 1.0]), lags=1)
    >>> float(tau[0, 0])  # white noise: the centred ramp -2.5..2.5, 8.75 / 17.5 by hand
    0.5
    """
    X = np.asarray(getattr(prep, "X", prep), dtype=np.float64)
    phi = np.asarray(phi, dtype=np.float64)
    if phi.ndim == 1:
        phi = phi[:, None]
    c = np.asarray(c, dtype=np.float64).reshape(-1)
    if getattr(prep, "n_model", None) is not None and c.size == prep.n_model:
        c = np.concatenate([c, np.zeros(X.shape[1] - c.size)])
    n, q = X.shape
    lags = n - 1 if lags is None else int(lags)
    V = phi.shape[1]
    out = np.empty((lags, V))
    size = 1 << int(np.ceil(np.log2(2 * n)))
    for a0 in range(0, V, chunk):
        sl = slice(a0, min(V, a0 + chunk))
        C = whitening_filter(phi[:, sl])
        Xw = np.stack([whiten(C, np.repeat(X[:, [k]], C.shape[0], axis=1)) for k in range(q)])
        G = np.einsum("itv,jtv->vij", Xw, Xw)
        u = np.linalg.solve(G, np.broadcast_to(c, (G.shape[0], q))[..., None])[..., 0]
        a = np.einsum("itv,vi->tv", Xw, u)
        f = np.fft.rfft(a, size, axis=0)
        ac = np.fft.irfft(f * np.conj(f), size, axis=0)[: lags + 1]
        out[:, sl] = ac[1:] / ac[0]
    return out


def rho_df(
    nu: float,
    voxel_mm: Sequence[float],
    fwhm_data_mm: Sequence[float] | float,
    fwhm_mm: float | None = None,
) -> float:
    """Degrees of freedom ``nu_rho`` of the smoothed autocorrelations in the interior of the
    mask: ``nu`` divided by the variance that the truncated smoothing kernel leaves of an
    autocovariance field whose data have Gaussian spatial correlation of FWHM
    ``fwhm_data_mm`` (per axis; 0: independent voxels).

    In the continuum this is ``nu (2 (f_rho / f_data)^2 + 1)^(3/2)`` (Worsley et al. 2002,
    from memory); for independent voxels it is ``nu`` times the number of voxels the
    kernel averages, ``(sum w)^2 / sum w^2``.

    >>> round(rho_df(100, (3.0, 3.0, 3.0), 0.0) / 100, 2)  # 8 mm kernel, 3 mm voxels
    64.14
    """
    weights = smoothing_weights(voxel_mm, fwhm_mm)
    f = np.broadcast_to(np.asarray(fwhm_data_mm, dtype=np.float64), (len(weights),))
    share = 1.0
    for w, size, fd in zip(weights, voxel_mm, f, strict=True):
        r = (w.size - 1) // 2
        d = np.arange(-r, r + 1) * float(size)
        if fd > 0:
            s2 = (fd / (2.0 * math.sqrt(2.0 * math.log(2.0)))) ** 2
            corr2 = np.exp(-((d[:, None] - d[None, :]) ** 2) / (2.0 * s2))
        else:
            corr2 = np.eye(w.size)
        share *= float(w @ corr2 @ w) / float(w.sum()) ** 2
    return float(nu) / share


def edge_share(mask: np.ndarray, voxel_mm: Sequence[float], fwhm_mm: float | None = None):
    """Per voxel, how much more variance the smoothed autocorrelations keep near the edge
    of the mask than inside it, for independent voxels: ``(sum w^2 m / (sum w m)^2) /
    (sum w^2 / (sum w)^2)`` (1 inside, above 1 near the edge; divide :func:`rho_df` by it).
    """
    from scipy import ndimage

    weights = smoothing_weights(voxel_mm, fwhm_mm)
    m = np.asarray(mask, dtype=np.float64)
    num, den = m, m
    interior = 1.0
    for axis, w in enumerate(weights):
        num = ndimage.correlate1d(num, w * w, axis=axis, mode="constant", cval=0.0)
        den = ndimage.correlate1d(den, w, axis=axis, mode="constant", cval=0.0)
        interior *= float((w * w).sum()) / float(w.sum()) ** 2
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.where(den > 0, num / np.where(den > 0, den, 1.0) ** 2 / interior, 1.0)
    return np.maximum(out, 1.0)


def smoothness_fwhm(
    resid: np.ndarray, mask: np.ndarray, voxel_mm: Sequence[float]
) -> tuple[float, float, float]:
    """FWHM (mm, per axis) of the data's spatial smoothness from residuals (X, Y, Z, T).

    Common practice: the correlation of neighbouring voxels' normalised residuals along
    each axis, ``r``, read as a Gaussian correlation ``exp(-d^2 / (4 s^2))`` of the
    underlying white field smoothed with a Gaussian of standard deviation ``s``, gives
    ``FWHM = d sqrt(2 ln 2 / -ln r)``; ``r <= 0`` (rough data) gives 0.

    >>> from scipy import ndimage
    >>> e = np.random.default_rng(0).standard_normal((24, 24, 24, 40))
    >>> x = ndimage.gaussian_filter(e, (2.0, 2.0, 2.0, 0.0))  # sigma 2 voxels: FWHM 4.71
    >>> f = smoothness_fwhm(x, np.ones((24, 24, 24), bool), (1, 1, 1))
    >>> all(abs(v - 4.71) < 0.2 for v in f)
    True
    """
    R = np.asarray(resid, dtype=np.float64)
    m = np.asarray(mask, dtype=bool)
    norm = np.sqrt(np.einsum("...t,...t->...", R, R))
    ok = m & (norm > 0)
    U = np.where(ok[..., None], R / np.where(ok, norm, 1.0)[..., None], 0.0)
    out = []
    for axis, size in enumerate(voxel_mm):
        n = U.shape[axis]
        a = np.take(U, np.arange(n - 1), axis=axis)
        b = np.take(U, np.arange(1, n), axis=axis)
        both = np.take(ok, np.arange(n - 1), axis=axis) & np.take(ok, np.arange(1, n), axis=axis)
        if not both.any():
            out.append(0.0)
            continue
        r = float(np.einsum("...t,...t->...", a, b)[both].mean())
        out.append(
            float(size) * math.sqrt(2.0 * math.log(2.0) / -math.log(r)) if 0 < r < 1 else 0.0
        )
    return tuple(out)  # type: ignore[return-value]


def effective_df(nu: float, tau: np.ndarray, nu_rho: np.ndarray | float) -> np.ndarray:
    """``1 / nu_eff = 1 / nu + 2 sum_j tau_j^2 / nu_rho`` per voxel (see the section text;
    the form is the paper's, from memory). ``tau`` (lags, V) from :func:`contrast_autocorr`.

    >>> effective_df(100, np.array([[0.5], [0.0]]), 50.0).round(6).tolist()  # 1/(.01 + .01)
    [50.0]
    """
    tau = np.asarray(tau, dtype=np.float64)
    return 1.0 / (1.0 / float(nu) + 2.0 * np.sum(tau * tau, axis=0) / np.asarray(nu_rho))


#: Voxel pairs per axis that :func:`run_smoothness` reads to estimate the data's smoothness.
SMOOTHNESS_PAIRS = 2000
#: Seed of the sample of pairs (the same pairs in every process: map and click agree).
SMOOTHNESS_SEED = 0
#: Version of the smoothness estimate. A cached run keeps each design's result beside its
#: entry (:class:`voxelscope.core.cache.KeptValues`) under a digest that includes this
#: number, so RAISE IT WITH EVERY CHANGE THAT COULD CHANGE A RESULT of
#: :func:`_estimate_smoothness`, :func:`_smoothness_sample`, :func:`voxel_sizes` or
#: :func:`voxelscope.core.workcopy.working_copy`; otherwise results of the old code are
#: served. tests/core/test_noise.py pins a digest of that code to this number and fails
#: when the code changes and the number does not.
SMOOTHNESS_VERSION = 1

_SMOOTHNESS: Any = None  # weak memo: run -> {(design, mask) digest: FWHM per axis}


def run_smoothness(run: Any, prep: Any, mask: np.ndarray) -> tuple[float, float, float]:
    """FWHM (mm, per axis) of a run's spatial smoothness, from the OLS residuals of up to
    :data:`SMOOTHNESS_PAIRS` neighbouring voxel pairs per axis inside the mask (a fixed,
    seeded sample, so a map and a clicked voxel get the same value); the estimate of
    :func:`smoothness_fwhm` on those pairs.

    Memoised per run, design and mask: in the process, and for a run served from the
    cache also beside its entry (``run.kept_values``), under a digest of everything the
    result depends on besides the run's data (:func:`_smoothness_key`), so a later fit of
    the same run and model reads three numbers instead of the sample. Within a process
    the sampled series are read once per run and mask (:func:`_smoothness_sample`) and
    shared by every design (a fit's kernels).
    """
    mask = np.asarray(mask, dtype=bool)
    key = _smoothness_key(run, prep, mask)
    memo = _smoothness_memo(run)
    got = memo.get(key)
    if got is not None:
        return got
    kept = getattr(run, "kept_values", None)
    if kept is not None:
        found = kept.get(key)
        if found is not None and len(found) == 3:
            got = memo[key] = found
            return got  # type: ignore[return-value]
    got = memo[key] = _estimate_smoothness(run, prep, mask, memo)
    if kept is not None:
        kept.put(key, got)
    return got


def _smoothness_key(run: Any, prep: Any, mask: np.ndarray) -> str:
    """SHA-256 (hex) of everything :func:`run_smoothness` depends on besides the run's data:
    the estimator's version, sample size and seed, numpy's version (the residuals' last
    bits), the mask, the design and its pseudo-inverse, the kept and censored volumes,
    whether the design has a constant, and the voxel sizes."""
    import hashlib

    h = hashlib.sha256()

    def part(label: str, data: bytes) -> None:
        h.update(f"{label}:{len(data)}:".encode())
        h.update(data)

    def array(label: str, a: Any) -> None:
        if a is None:
            part(label, b"none")
            return
        a = np.ascontiguousarray(a)
        part(label, f"{a.dtype.str}{a.shape}".encode() + a.tobytes())

    head = (
        f"smoothness {SMOOTHNESS_VERSION} pairs {SMOOTHNESS_PAIRS} seed {SMOOTHNESS_SEED} "
        f"numpy {np.__version__} constant {prep.constant_index}"
    )
    part("head", head.encode())
    part("mask", repr(mask.shape).encode() + np.packbits(mask).tobytes())
    array("X", prep.X)
    array("pinv", prep.pinv)
    array("keep", getattr(prep, "keep", None))
    array("spikes", getattr(prep, "spikes", None))
    array("sizes", np.array(voxel_sizes(getattr(run, "affine", np.eye(4)))))
    return h.hexdigest()


def _estimate_smoothness(
    run: Any, prep: Any, mask: np.ndarray, memo: dict
) -> tuple[float, float, float]:
    """:func:`run_smoothness` computed: the sample (read once per mask into ``memo``),
    each axis's OLS residuals under ``prep`` and their mean neighbour correlation."""
    import hashlib

    from .workcopy import working_copy as _wc

    mask_key = hashlib.sha1(np.packbits(mask).tobytes() + repr(mask.shape).encode()).hexdigest()
    sample = memo.get(("sample", mask_key))
    if sample is None:
        sample = memo[("sample", mask_key)] = _smoothness_sample(run, mask)
    sizes = voxel_sizes(getattr(run, "affine", np.eye(4)))
    out = []
    keep = getattr(prep, "keep", None)
    spikes = getattr(prep, "spikes", None)
    # the working copy depends on the design only through these: shared by the kernels
    copy_key = (
        "copy",
        mask_key,
        None if keep is None else np.asarray(keep).tobytes(),
        None if spikes is None else np.asarray(spikes).tobytes(),
        prep.constant_index is not None,
    )
    copies = memo.setdefault(copy_key, {})
    for axis, (k, series) in enumerate(sample):
        if k == 0:
            out.append(0.0)
            continue
        Yc = copies.get(axis)
        if Yc is None:
            Y = series.T if keep is None else series.T[keep]
            Yc = copies[axis] = _wc(prep, Y)[0]  # float64 (exact from the float32 series)
        R = Yc - prep.X @ (prep.pinv @ Yc)
        norm = np.sqrt(np.einsum("tv,tv->v", R, R))
        good = (norm[:k] > 0) & (norm[k:] > 0)
        if not good.any():
            out.append(0.0)
            continue
        r = float(
            np.mean(np.einsum("tv,tv->v", R[:, :k], R[:, k:])[good] / (norm[:k] * norm[k:])[good])
        )
        out.append(
            sizes[axis] * math.sqrt(2.0 * math.log(2.0) / -math.log(r)) if 0 < r < 1 else 0.0
        )
    return tuple(float(v) for v in out)  # type: ignore[return-value]


def _smoothness_memo(run: Any) -> dict:
    """The memo of :func:`run_smoothness` for ``run`` (a fresh one when it cannot be
    weakly referenced)."""
    import weakref

    global _SMOOTHNESS
    if _SMOOTHNESS is None:
        _SMOOTHNESS = weakref.WeakKeyDictionary()
    try:
        return _SMOOTHNESS.setdefault(run, {})
    except TypeError:  # not weakly referable: no memo
        return {}


def _smoothness_sample(run: Any, mask: np.ndarray) -> list[tuple[int, np.ndarray | None]]:
    """Per axis, ``(k, series)``: the (2k, T) time series of the seeded sample of k
    neighbouring pairs inside ``mask`` (first voxels, then their neighbours), as the
    run serves them; ``(0, None)`` when the axis has no pair."""
    shape = mask.shape
    rng = np.random.default_rng(SMOOTHNESS_SEED)
    out: list[tuple[int, np.ndarray | None]] = []
    for axis in range(3):
        n = shape[axis]
        a = np.take(mask, np.arange(n - 1), axis=axis) & np.take(mask, np.arange(1, n), axis=axis)
        first = np.argwhere(a)
        if first.shape[0] == 0:
            out.append((0, None))
            continue
        if first.shape[0] > SMOOTHNESS_PAIRS:
            first = first[np.sort(rng.choice(first.shape[0], SMOOTHNESS_PAIRS, replace=False))]
        second = first.copy()
        second[:, axis] += 1
        idx = np.ravel_multi_index(np.concatenate([first, second]).T, shape)
        if hasattr(run, "timeseries_many"):
            series = np.asarray(run.timeseries_many(idx))
        else:
            series = np.asarray(run.data.reshape(-1, run.n_volumes)[idx])
        out.append((int(first.shape[0]), series))
    return out


#: ``tau_squares`` computes the sum on a grid of AR coefficients of this step and
#: interpolates (multilinear) between the grid points around each voxel's coefficients
#: (0: every voxel exactly), so a map needs it at a few hundred points, not at every
#: voxel; the effect on the effective df is below 0.1 % (tests/core/test_noise.py), far
#: below its own uncertainty.
TAU_STEP = 0.01
#: Grid points of :class:`TauTable` computed per call of the exact sum (one batch; a
#: map's few hundred points make several batches, so both workers take some).
TAU_CHUNK = 128


def _dense_limit(n_voxels: int) -> int:
    """Largest box of grid points that :class:`TauTable` indexes densely (else it sorts):
    an index array no larger than a few of the map's own per-voxel arrays."""
    return max(1 << 20, 8 * n_voxels)


@dataclass(frozen=True)
class TauTable:
    """``sum_j tau_j^2`` (see :func:`tau_squares`) at the grid points of step ``step``
    around a set of AR coefficients, computed once, and read by multilinear interpolation.

    A map builds one table for all its voxels (:meth:`build`, the grid points spread over
    the workers with ``parallel``) and each piece of voxels reads it (:meth:`at`): with AR
    coefficients spread across the brain, the pieces share most of their grid points, which
    were computed again in every piece before. A point's value does not depend on which
    other points it is computed with (batches of :data:`TAU_CHUNK` in a fixed order), so
    the result is the same for any number of workers.

    >>> from voxelscope.core.glm import prepare
    >>> X = np.column_stack([np.ones(40), np.arange(40.0) % 8 < 4])
    >>> phi = np.array([[0.105, 0.3], [0.0, -0.1]])
    >>> table = TauTable.build(prepare(X), phi, np.array([0.0, 1.0]))
    >>> table.nodes.shape  # 2 x 2 grid points around each voxel's coefficients
    (2, 8)
    >>> bool(np.allclose(table.at(phi), tau_squares(prepare(X), phi, np.array([0.0, 1.0]))))
    True
    """

    prep: Any
    c: np.ndarray
    step: float
    base: np.ndarray  # (p,) the lowest grid index of each coefficient
    span: np.ndarray  # (p,) grid points of each coefficient in the box
    keys: np.ndarray  # (N,) sorted flat box positions of the computed points
    slot: np.ndarray | None  # (prod span,) row of each box position in values (dense box)
    nodes: np.ndarray  # (p, N) the computed grid points' coefficients
    values: np.ndarray  # (N,)

    @classmethod
    def build(
        cls,
        prep: Any,
        phi: np.ndarray,
        c: np.ndarray,
        step: float | None = None,
        parallel: Any = None,
    ) -> TauTable:
        """The table for coefficients ``phi`` (p, V) of one design and contrast ``c``.

        ``parallel(fn, items)`` (optional) returns ``[fn(i) for i in items]``, possibly
        computed side by side; it gets the batches of grid points.
        """
        phi = np.asarray(phi, dtype=np.float64)
        if phi.ndim == 1:
            phi = phi[:, None]
        step = TAU_STEP if step is None else float(step)
        p, V = phi.shape
        lo = np.floor(phi / step).astype(np.int64)
        if V:
            base = lo.min(axis=1)
            span = lo.max(axis=1) - base + 2
        else:
            base = np.zeros(p, dtype=np.int64)
            span = np.ones(p, dtype=np.int64)
        box = int(np.prod(span))
        corner = _corner_offsets(span)
        cell = _box_key(lo - base[:, None], span)
        slot = None
        if box <= _dense_limit(V):
            hit = np.zeros(box, dtype=bool)
            for off in corner:
                hit[cell + off] = True
            keys = np.flatnonzero(hit)
            slot = np.full(box, -1, dtype=np.int64)
            slot[keys] = np.arange(keys.size)
        else:  # a box too wide to index: sort the points instead
            keys = np.unique(np.concatenate([cell + off for off in corner]))
        idx = np.empty((p, keys.size), dtype=np.int64)
        rest = keys
        for k in range(p - 1, -1, -1):
            rest, idx[k] = np.divmod(rest, span[k])
        nodes = (idx + base[:, None]) * step
        c = np.asarray(c, dtype=np.float64).reshape(-1)
        batches = [slice(a, a + TAU_CHUNK) for a in range(0, keys.size, TAU_CHUNK)]

        def one(sl: slice) -> np.ndarray:
            with np.errstate(invalid="ignore", divide="ignore"):
                return _tau_squares(prep, nodes[:, sl], c, TAU_CHUNK)

        parts = parallel(one, batches) if parallel is not None else [one(b) for b in batches]
        values = np.concatenate(parts) if parts else np.zeros(0)
        return cls(prep, c, step, base, span, keys, slot, nodes, values)

    def at(self, phi: np.ndarray) -> np.ndarray:
        """``sum_j tau_j^2`` (V,) at coefficients ``phi`` (p, V) inside the table's box:
        multilinear interpolation between the grid points around each voxel (exactly
        where one of them lies beyond the stationary region)."""
        phi = np.asarray(phi, dtype=np.float64)
        if phi.ndim == 1:
            phi = phi[:, None]
        step = self.step
        p, V = phi.shape
        scaled = phi / step
        lo = np.floor(scaled)
        frac = scaled - lo
        cell = _box_key(lo.astype(np.int64) - self.base[:, None], self.span)
        out = np.zeros(V)
        for bits, off in zip(_corner_bits(p), _corner_offsets(self.span), strict=True):
            key = cell + off
            if self.slot is not None:
                row = self.slot[key]
            else:
                row = np.searchsorted(self.keys, key)
            w = np.ones(V)
            for k in range(p):
                w *= frac[k] if bits[k] else 1.0 - frac[k]
            out += w * self.values[row]
        off_grid = ~np.isfinite(out)  # a grid point beyond the stationary region
        if off_grid.any():
            out[off_grid] = _tau_squares(self.prep, phi[:, off_grid], self.c, TAU_CHUNK)
        return out


def _corner_bits(p: int) -> list[tuple[int, ...]]:
    """The 2^p corners of a grid cell, as 0/1 offsets per coefficient."""
    return [tuple((m >> (p - 1 - k)) & 1 for k in range(p)) for m in range(1 << p)]


def _corner_offsets(span: np.ndarray) -> list[int]:
    """Flat box offsets of the 2^p corners of a cell (the order of :func:`_corner_bits`)."""
    p = len(span)
    return [
        int(_box_key(np.array(bits, dtype=np.int64)[:, None], span)[0]) for bits in _corner_bits(p)
    ]


def _box_key(idx: np.ndarray, span: np.ndarray) -> np.ndarray:
    """Flat position (mixed radix, last coefficient fastest) of grid indices (p, V)."""
    key = np.zeros(idx.shape[1], dtype=np.int64)
    for k in range(idx.shape[0]):
        key = key * int(span[k]) + idx[k]
    return key


def tau_squares(
    prep: Any, phi: np.ndarray, c: np.ndarray, step: float | None = None, chunk: int = TAU_CHUNK
) -> np.ndarray:
    """``sum_{j >= 1} tau_j^2`` (V,) of each voxel's whitened contrast weights (all lags):
    what :func:`effective_df` needs, the same as summing :func:`contrast_autocorr`, but
    from the one-pass design sums (``X*'X*`` from the band Toeplitz parts, as in
    :func:`arp_solve`), on a grid of ``step`` (default :data:`TAU_STEP`; 0: every voxel
    exactly) with multilinear interpolation (:class:`TauTable`).
    """
    phi = np.asarray(phi, dtype=np.float64)
    if phi.ndim == 1:
        phi = phi[:, None]
    step = TAU_STEP if step is None else float(step)
    if step <= 0 or phi.shape[1] == 0:
        return _tau_squares(prep, phi, c, chunk)
    return TauTable.build(prep, phi, c, step).at(phi)


def _tau_squares(prep: Any, phi: np.ndarray, c: np.ndarray, chunk: int) -> np.ndarray:
    p, V = phi.shape
    D = _design_lags(prep, max(p, AR_ORDER, BIAS_LAGS))
    norms, Xs = D["norms"], D["Xs"]
    n, q = Xs.shape
    c = np.asarray(c, dtype=np.float64).reshape(-1)
    if getattr(prep, "n_model", None) is not None and c.size == prep.n_model:
        c = np.concatenate([c, np.zeros(q - c.size)])
    basis, _ends = _normal_basis(D, p)
    size = 1 << int(np.ceil(np.log2(2 * n)))
    out = np.empty(V)
    cs = c / norms
    for a0 in range(0, V, chunk):
        sl = slice(a0, min(V, a0 + chunk))
        C = whitening_filter(phi[:, sl])
        cp = C[:, p, :].T
        g = np.stack([np.einsum("kv,kv->v", cp[: p + 1 - d], cp[d:]) for d in range(p + 1)])
        top, bot = _boundary(C, g)
        m = g.shape[1]
        coef = np.concatenate([g, top.reshape(p * p, m), bot.reshape(p * p, m)])
        G = np.moveaxis((basis @ coef).reshape(q, q, m), 2, 0)
        G = np.tril(G) + np.swapaxes(np.tril(G, -1), 1, 2)  # only the lower triangle is exact
        u = np.linalg.solve(G, np.broadcast_to(cs, (m, q))[..., None])[..., 0]
        a = np.ascontiguousarray(whiten(C, Xs @ u.T).T)  # (m, n): FFTs along contiguous rows
        f = np.fft.rfft(a, size, axis=1)
        ac = np.fft.irfft(f.real**2 + f.imag**2, size, axis=1)[:, :n]
        out[sl] = np.einsum("vj,vj->v", ac[:, 1:], ac[:, 1:]) / (ac[:, 0] * ac[:, 0])
    return out


def arp_effective_df(
    prep: Any, phi: np.ndarray, c: np.ndarray, nu_rho: np.ndarray | float
) -> np.ndarray:
    """Each voxel's effective df (V,) under AR(p) coefficients ``phi`` (p, V):
    :func:`effective_df` with ``sum tau_j^2`` from :func:`tau_squares`.

    >>> from voxelscope.core.glm import prepare
    >>> X = np.column_stack([np.ones(40), np.arange(40.0) % 8 < 4])
    >>> d = arp_effective_df(prepare(X), np.zeros((2, 1)), np.array([0.0, 1.0]), 1e12)
    >>> round(float(d[0]), 3)  # nu_rho without bound: n - rank
    38.0
    """
    return effective_df(float(prep.df), tau_squares(prep, phi, c)[None, :] ** 0.5, nu_rho)
