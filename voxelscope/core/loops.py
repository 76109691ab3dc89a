"""Compiled per-voxel loops of the AR(p) map (numba), for the steps NumPy runs slowly.

A map's AR(p) estimate and its whitened solves are, per voxel, a recursion of a few dozen
steps and a 12-column Cholesky factorisation. In NumPy each step is a call over a batch of
voxels: a few microseconds of interpreter per call, taken in turns by the map's workers
under the interpreter lock. The loops here are the same arithmetic compiled, and they
release the lock (``nogil``), so the workers run them side by side.

Only :mod:`voxelscope.core.noise` calls them, for batches of at least
``noise.LOOP_VOXELS`` voxels (a map), and only in a process that loaded them with
``noise.load_loops()`` (the window after its first map, the benchmarks): loading costs
more than one map gains, so ``voxelscope map`` and ``fit`` stay in NumPy and never import
numba. The NumPy code in ``noise`` stays the definition, and ``tests/core/test_loops.py``
holds each loop to it on random input. Compiled code is kept in numba's cache
(``__pycache__`` beside this file, or the user's cache folder), so only the first load
after an install or upgrade pays the compilation (a few seconds).

Examples
--------
>>> import numpy as np
>>> A = np.array([[4.0, 2.0, 2.0], [0.0, 3.0, 1.0]])[:, :, None]  # G = [[4, 2], [2, 3]]
>>> bordered_cholesky(A)[:, :, 0].round(6).tolist()  # L = [[2, 0], [1, sqrt 2]], L^-1 b
[[2.0, 1.0, 1.0], [0.0, 1.414214, 0.0]]
"""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["bordered_cholesky", "gram_coefficients_ar2", "lag_products", "refine_ar2", "warm"]

# nogil: the map's workers run these side by side; error_model="numpy": a division by zero
# gives inf or NaN as in NumPy instead of raising; cache: compiled once per install.
_OPTIONS = {"nogil": True, "cache": True, "error_model": "numpy", "boundscheck": False}


@numba.njit(**_OPTIONS)
def lag_products(Y: np.ndarray, lags: int, out: np.ndarray) -> np.ndarray:  # pragma: no cover
    """``out[d] = sum_t Y[t] * Y[t - d]`` for ``d = 1..lags`` (each voxel a column of the
    C-ordered ``Y`` (n, V)), in one pass over ``Y``: the lagged products of ``noise.arp_sums``.
    ``out[0]`` is left as it is."""
    n, V = Y.shape
    for d in range(1, lags + 1):
        for v in range(V):
            out[d, v] = 0.0
    for t in range(1, n):
        for d in range(1, min(lags, t) + 1):
            for v in range(V):
                out[d, v] += Y[t, v] * Y[t - d, v]
    return out


@numba.njit(**_OPTIONS)
def gram_coefficients_ar2(phi: np.ndarray, out: np.ndarray) -> np.ndarray:  # pragma: no cover
    """What ``noise.arp_solve`` builds ``X*'X*`` from, for AR(2) voxels ``phi`` (2, V):
    ``out`` (11, V) holds ``g_0..g_2`` (the autocovariances of the whitening filter's
    steady row), then the 2 x 2 corrections at the start (``top``) and at the end
    (``bot``), row-major, as ``noise.whitening_filter`` and ``noise._boundary`` give them.

    The filter (step-down recursion, prediction errors relative to the process variance):
    rows ``[s0]``, ``[s1, -k1 s1]``, ``[1, -phi1, -phi2]`` with ``k1 = phi1 / (1 - phi2)``,
    ``s0 = sqrt(err2)``, ``s1 = sqrt(err2 / err1)``.
    """
    V = phi.shape[1]
    for v in range(V):
        a1 = phi[0, v]
        a2 = phi[1, v]
        k1 = (a1 + a2 * a1) / (1.0 - a2 * a2)
        err1 = 1.0 - k1 * k1
        err2 = err1 * (1.0 - a2 * a2)
        s0 = np.sqrt(err2)
        s1 = np.sqrt(err2 / err1)
        w1 = k1 * -s1  # row 1: [s1, w1]
        c1 = a1 * -1.0  # the steady row: [1, c1, c2]
        c2 = a2 * -1.0
        g0 = 1.0 + c1 * c1 + c2 * c2
        g1 = c1 + c1 * c2
        g2 = c2
        # the first four rows of W: W[0] = (s0), W[1] = (w1, s1), W[2] = (c2, c1, 1),
        # W[3] = (0, c2, c1, 1); top[a, b] = sum_t W[t, a] W[t, b] - g[|a - b|]
        t01 = w1 * s1 + c2 * c1 - g1
        out[0, v] = g0
        out[1, v] = g1
        out[2, v] = g2
        out[3, v] = s0 * s0 + w1 * w1 + c2 * c2 - g0
        out[4, v] = t01
        out[5, v] = t01
        out[6, v] = s1 * s1 + c1 * c1 + c2 * c2 - g0
        out[7, v] = -(c2 * c2)
        out[8, v] = -(c2 * c1)
        out[9, v] = -(c1 * c2)
        out[10, v] = -(c1 * c1) - c2 * c2
    return out


@numba.njit(**_OPTIONS)
def bordered_cholesky(A: np.ndarray) -> np.ndarray:  # pragma: no cover - compiled
    """``noise._bordered_cholesky`` compiled: ``A`` (q, q + m, V), in place.

    Column ``j`` of each matrix in ``A[j, :q]`` (lower triangle read), the right-hand
    sides in ``A[j, q:]``; afterwards ``A[j, j:q]`` is column ``j`` of the lower factor
    and ``A[:, q:]`` is ``L^-1 b``. NaN where a matrix is not positive definite.
    """
    q, width, V = A.shape
    for j in range(q):
        for k in range(j):
            for m in range(j, width):
                for v in range(V):
                    A[j, m, v] -= A[k, m, v] * A[k, j, v]
        for v in range(V):
            A[j, j, v] = np.sqrt(A[j, j, v])
        for m in range(j + 1, width):
            for v in range(V):
                A[j, m, v] /= A[j, j, v]
    return A


@numba.njit(inline="always")
def _clip(x: float, limit: float) -> float:  # pragma: no cover - compiled
    return min(max(x, -limit), limit)


@numba.njit(inline="always")
def _levinson2(r1: float, r2: float, limit: float) -> tuple:  # pragma: no cover
    """``noise.ar_from_autocorr`` for AR(2): (phi_1, phi_2)."""
    k1 = _clip(r1, limit)
    err = 1.0 - k1 * k1
    k2 = _clip((r2 - k1 * r1) / err, limit)
    return k1 - k2 * k1, k2


@numba.njit(inline="always")
def _stationary2(a1: float, a2: float) -> tuple:  # pragma: no cover - compiled
    """``noise._stationary_rho`` for AR(2): the process's first two autocorrelations."""
    k1 = (a1 + a2 * a1) / (1.0 - a2 * a2)
    return k1, a2 * (1.0 - k1 * k1) + k1 * k1


@numba.njit(**_OPTIONS)
def refine_ar2(
    ro: np.ndarray,
    Minv: np.ndarray,
    Ft: np.ndarray,
    steps: int,
    early_tol: float,
    last_tol: float,
    segment: int,
    limit: float,
    phi: np.ndarray,
    rho: np.ndarray,
) -> None:  # pragma: no cover - compiled; tests/core/test_loops.py runs it
    """The defect correction of ``noise.ar_from_smoothed`` for AR(2), four voxels at a time.

    ``ro`` (2, V) the observed (smoothed, bias-corrected) autocorrelations, ``Minv`` (3, 3)
    the inverse bias matrix, ``Ft`` (n, 3) the transposed full bias matrix, n > 3; writes
    the coefficients ``phi`` and the model's autocorrelations ``rho`` (2, V each). Each
    step: the model's first two autocorrelations, the residual autocovariances that its
    whole autocorrelation sequence implies (each voxel's sequence stopped as in
    ``noise._implied``, at ``early_tol``, in the last step at ``last_tol``), corrected like
    the data; the difference to the data's goes into the estimate.

    The recursion of four voxels runs interleaved (four independent chains of
    multiply-adds keep the processor busy where one chain waits on its own last result);
    a voxel whose sequence has stopped goes on as zeros, which add nothing, so each
    voxel's numbers are those of its own sequence.
    """
    V = ro.shape[1]
    n = Ft.shape[0]
    a1 = np.zeros(4)
    a2 = np.zeros(4)
    r1 = np.zeros(4)
    r2 = np.zeros(4)
    out = np.zeros((4, 3))
    for v0 in range(0, V, 4):
        w = min(4, V - v0)
        for i in range(4):
            if i < w:
                a1[i], a2[i] = _levinson2(ro[0, v0 + i], ro[1, v0 + i], limit)
            else:
                a1[i] = 0.0
                a2[i] = 0.0
        for step in range(steps):
            tol = last_tol if step == steps - 1 else early_tol
            for i in range(4):
                r1[i], r2[i] = _stationary2(a1[i], a2[i])
                for j in range(3):
                    out[i, j] = Ft[0, j] + Ft[1, j] * r1[i] + Ft[2, j] * r2[i]
            _sequence4(a1, a2, r1, r2, Ft, n, tol, segment, out)
            for i in range(w):
                o0 = out[i, 0]
                o1 = out[i, 1]
                o2 = out[i, 2]
                w0 = Minv[0, 0] * o0 + Minv[0, 1] * o1 + Minv[0, 2] * o2
                w1 = Minv[1, 0] * o0 + Minv[1, 1] * o1 + Minv[1, 2] * o2
                w2 = Minv[2, 0] * o0 + Minv[2, 1] * o1 + Minv[2, 2] * o2
                i1 = w1 / w0 if w0 > 0 else 0.0
                i2 = w2 / w0 if w0 > 0 else 0.0
                c1 = _clip(r1[i] + (ro[0, v0 + i] - i1), limit)
                c2 = _clip(r2[i] + (ro[1, v0 + i] - i2), limit)
                a1[i], a2[i] = _levinson2(c1, c2, limit)
        for i in range(w):
            phi[0, v0 + i] = a1[i]
            phi[1, v0 + i] = a2[i]
            rho[0, v0 + i], rho[1, v0 + i] = _stationary2(a1[i], a2[i])


@numba.njit(inline="always")
def _settle(g: float, h: float, a: float, b: float, tol: float) -> tuple:  # pragma: no cover
    """One lane of :func:`_sequence4` at the end of a segment: a sequence whose last two
    values ``g, h`` are below ``tol`` stops and goes on as zeros (coefficients ``a, b`` 0
    too), which add nothing. Returns the lane's values and whether it goes on."""
    if max(abs(g), abs(h)) < tol:
        return 0.0, 0.0, 0.0, 0.0, False
    return g, h, a, b, True


@numba.njit(inline="always")
def _sequence4(a1, a2, r1, r2, Ft, n, tol, segment, out):  # pragma: no cover - compiled
    """Add ``Ft[k] * g_k`` for k >= 3 to ``out`` (4, 3) for four AR(2) sequences ``g``
    (coefficients ``a1, a2``, first autocorrelations ``r1, r2``), each stopped at the end
    of the first segment where its last two values are below ``tol``."""
    p1, p2, p3, p4 = a1[0], a1[1], a1[2], a1[3]
    q1, q2, q3, q4 = a2[0], a2[1], a2[2], a2[3]
    g1, g2, g3, g4 = r2[0], r2[1], r2[2], r2[3]  # the newest value of each sequence
    h1, h2, h3, h4 = r1[0], r1[1], r1[2], r1[3]
    o10, o11, o12 = out[0, 0], out[0, 1], out[0, 2]
    o20, o21, o22 = out[1, 0], out[1, 1], out[1, 2]
    o30, o31, o32 = out[2, 0], out[2, 1], out[2, 2]
    o40, o41, o42 = out[3, 0], out[3, 1], out[3, 2]
    k = 3
    m = segment // 2
    while k < n:
        end = min(k + m, n)
        while k < end:
            f0 = Ft[k, 0]
            f1 = Ft[k, 1]
            f2 = Ft[k, 2]
            x1 = p1 * g1
            x1 += q1 * h1
            x2 = p2 * g2
            x2 += q2 * h2
            x3 = p3 * g3
            x3 += q3 * h3
            x4 = p4 * g4
            x4 += q4 * h4
            h1, g1 = g1, x1
            h2, g2 = g2, x2
            h3, g3 = g3, x3
            h4, g4 = g4, x4
            o10 += f0 * x1
            o11 += f1 * x1
            o12 += f2 * x1
            o20 += f0 * x2
            o21 += f1 * x2
            o22 += f2 * x2
            o30 += f0 * x3
            o31 += f1 * x3
            o32 += f2 * x3
            o40 += f0 * x4
            o41 += f1 * x4
            o42 += f2 * x4
            k += 1
        m = segment
        g1, h1, p1, q1, going1 = _settle(g1, h1, p1, q1, tol)
        g2, h2, p2, q2, going2 = _settle(g2, h2, p2, q2, tol)
        g3, h3, p3, q3, going3 = _settle(g3, h3, p3, q3, tol)
        g4, h4, p4, q4, going4 = _settle(g4, h4, p4, q4, tol)
        if not (going1 or going2 or going3 or going4):
            break
    out[0, 0], out[0, 1], out[0, 2] = o10, o11, o12
    out[1, 0], out[1, 1], out[1, 2] = o20, o21, o22
    out[2, 0], out[2, 1], out[2, 2] = o30, o31, o32
    out[3, 0], out[3, 1], out[3, 2] = o40, o41, o42


def warm() -> None:
    """Call every loop once on small arrays of the types a map passes (float64, C order),
    so that numba loads (or, after an install, compiles) them now and not in a map."""
    Y = np.ones((8, 4))
    lag_products(Y, 2, np.zeros((3, 4)))
    A = np.zeros((2, 3, 4))
    A[0, 0] = A[1, 1] = 1.0
    bordered_cholesky(A)
    phi = np.full((2, 4), 0.1)
    refine_ar2(phi, np.eye(3), np.ones((8, 3)), 1, 1e-7, 1e-10, 16, 0.99, phi.copy(), phi.copy())
    gram_coefficients_ar2(phi, np.empty((11, 4)))
