"""Exact tail probabilities of t: p for a chosen tail, -log10 p and z, at any t.

A t of 100 on 1000 df has a one-sided tail probability near 1e-521: below the smallest
float64, so ``p`` itself underflows and a z computed from it saturates. Everything here is
computed from the *logarithm* of the tail probability instead, which stays finite at any
t, so z and ``-log10 p`` are exact (about 1e-12 relative, checked against mpmath in the
tests) with no clamp.

Formulas (standard identities of the t distribution, e.g. Abramowitz & Stegun 26.7.1 and
26.5; the continued fraction is the classical one for the incomplete beta function,
A&S 26.5.8, evaluated with the modified Lentz method):

* lower tail ``L(t) = P(T_df <= -|t|) = I_x(df/2, 1/2) / 2`` with ``x = df / (df + t^2)``;
  where ``L`` is above 1e-250 it comes from :func:`scipy.special.stdtr`, below that from
  ``log I_x(a, b) = a log x + b log(1 - x) - log a - log B(a, b) + log CF``;
* z with the same tail probability as t: ``z = -Phi^-1(L)`` with the sign of t, from
  :func:`scipy.special.ndtri_exp` of ``log L``; for ``|t| < 1`` from the central part
  ``P(|T| <= |t|) = I_{t^2/(df+t^2)}(1/2, df/2)`` as ``sqrt(2) erfinv(.)`` so that small
  z keep their relative precision;
* p for a tail: ``two`` (the default) ``2 L``; ``positive`` ``P(T >= t)``; ``negative``
  ``P(T <= t)``; ``-log10 p`` from ``log p``.

A few values at a time (at most :data:`FEW` t values: one voxel's fits, a click) are
computed with the :mod:`math` module alone, so that ``voxelscope fit`` does not import
scipy.special (about 0.35 s, most of a fit's start-up on a cached run): the same
continued fraction for every ``L`` (on ``1 - x`` with the roles of the parameters swapped
where it converges faster, A&S 26.5.2), ``log B(a, 1/2)`` from the Stirling series of
``log Gamma`` (A&S 6.1.40) so that large df lose no digits, and z by Newton's method on
``log Phi(-z)`` (``math.erfc``; beyond z = 30 Laplace's continued fraction for the Mills
ratio, A&S 26.2.14), which converges from any start because ``log Phi`` is concave. It
is within about 1e-11 of mpmath at any df, and agrees with the scipy path to 1e-12 up to
df 1000 (``stdtr`` itself loses digits at larger df); the tests check both.

Examples
--------
>>> round(float(z_from_t(100.0, 1000)), 4)
48.9584
>>> round(float(neglog10p_from_t(100.0, 1000)), 2)
522.27
>>> round(float(p_from_t(2.0, 10, "two")), 6), round(float(p_from_t(2.0, 10, "positive")), 6)
(0.073388, 0.036694)
"""

from __future__ import annotations

import math

import numpy as np

from .errors import InputError

# scipy.special is imported inside each function: importing this module (as glm does)
# keeps start-up short.

__all__ = [
    "FEW",
    "TAILS",
    "check_tail",
    "log_p_from_t",
    "log_t_lower_tail",
    "neglog10p_from_t",
    "p_from_t",
    "two_sided_p",
    "z_from_t",
]

#: Tails a p value can be stated for; ``two`` is the default everywhere.
TAILS = ("two", "positive", "negative")

#: Below this the lower tail is computed from its logarithm (continued fraction).
_LOG_SWITCH = 1e-250
_LN10 = math.log(10.0)
_LN2 = math.log(2.0)
#: At most this many t values are computed without scipy (see the module's docstring).
FEW = 16


def check_tail(tail: str) -> str:
    """The tail name, or a one-line :class:`InputError` naming the choices.

    >>> check_tail("positive")
    'positive'
    """
    if tail not in TAILS:
        raise InputError(f"tail must be one of {', '.join(TAILS)}, not '{tail}'")
    return tail


def _log_betainc_cf(a: np.ndarray, b: float, x: np.ndarray) -> np.ndarray:
    """``log I_x(a, b)`` by the incomplete-beta continued fraction (modified Lentz).

    Converges quickly for ``x < (a + 1) / (a + b + 2)``, which holds wherever the lower t
    tail is below :data:`_LOG_SWITCH`.
    """
    from scipy import special

    tiny = 1e-300
    qab = a + b
    qap = a + 1.0
    qam = a - 1.0
    c = np.ones_like(x)
    d = 1.0 - qab * x / qap
    d = np.where(np.abs(d) < tiny, tiny, d)
    d = 1.0 / d
    h = d.copy()
    todo = np.ones(x.shape, dtype=bool)
    for m in range(1, 20000):
        m2 = 2 * m
        aa = m * (b - m) * x / ((qam + m2) * (a + m2))
        d = 1.0 + aa * d
        d = np.where(np.abs(d) < tiny, tiny, d)
        c = 1.0 + aa / c
        c = np.where(np.abs(c) < tiny, tiny, c)
        d = 1.0 / d
        h = np.where(todo, h * d * c, h)
        aa = -(a + m) * (qab + m) * x / ((a + m2) * (qap + m2))
        d = 1.0 + aa * d
        d = np.where(np.abs(d) < tiny, tiny, d)
        c = 1.0 + aa / c
        c = np.where(np.abs(c) < tiny, tiny, c)
        d = 1.0 / d
        delta = d * c
        h = np.where(todo, h * delta, h)
        todo &= np.abs(delta - 1.0) > 1e-16
        if not todo.any():
            break
    return a * np.log(x) + b * np.log1p(-x) - np.log(a) - special.betaln(a, b) + np.log(h)


# ------------------------------------------------------ a few values, math module only

# Stirling series of log Gamma: sum_k B_2k / (2k (2k - 1) x^(2k - 1)) (A&S 6.1.40)
_STIRLING = (1 / 12, -1 / 360, 1 / 1260, -1 / 1680, 1 / 1188, -691 / 360360, 1 / 156)


def _stirling_tail(x: float) -> float:
    acc, power, x2 = 0.0, x, x * x
    for c in _STIRLING:
        acc += c / power
        power *= x2
    return acc


def _log_gamma_ratio_half(a: float) -> float:
    """``log Gamma(a + 1/2) - log Gamma(a)`` without subtracting two large numbers.

    >>> abs(_log_gamma_ratio_half(20.0) - (math.lgamma(20.5) - math.lgamma(20.0))) < 1e-13
    True
    """
    if a < 10.0:
        return math.lgamma(a + 0.5) - math.lgamma(a)
    return (
        a * math.log1p(0.5 / a)
        + 0.5 * math.log(a)
        - 0.5
        + (_stirling_tail(a + 0.5) - _stirling_tail(a))
    )


def _cf(a: float, b: float, x: float) -> float:
    """The incomplete-beta continued fraction (A&S 26.5.8), modified Lentz; fast for
    ``x < (a + 1) / (a + b + 2)``."""
    tiny = 1e-300
    qab, qap, qam = a + b, a + 1.0, a - 1.0
    c = 1.0
    d = 1.0 - qab * x / qap
    d = 1.0 / (d if abs(d) > tiny else tiny)
    h = d
    for m in range(1, 100000):
        m2 = 2 * m
        for aa in (
            m * (b - m) * x / ((qam + m2) * (a + m2)),
            -(a + m) * (qab + m) * x / ((a + m2) * (qap + m2)),
        ):
            d = 1.0 + aa * d
            d = 1.0 / (d if abs(d) > tiny else tiny)
            c = 1.0 + aa / c
            c = c if abs(c) > tiny else tiny
            delta = d * c
            h *= delta
        if abs(delta - 1.0) <= 2e-16:
            break
    return h


def _t_parts(at: float, df: float) -> tuple[float, float]:
    """``(log L, C)`` for ``|t| = at``: the log lower tail and, where it is the smaller
    one, the central probability ``C = P(|T| <= at) = 1 - 2 L`` (else NaN)."""
    a = 0.5 * df
    t2 = at * at
    x, y = df / (df + t2), t2 / (df + t2)  # both without cancellation
    log_x = -math.log1p(t2 / df)  # all its digits when x is near 1 (large df, small t)
    log_b = 0.5 * math.log(math.pi) - _log_gamma_ratio_half(a)  # log B(a, 1/2)
    if x < (a + 1.0) / (a + 2.5):  # the tail: I_x(a, 1/2) / 2
        log_i = a * log_x + 0.5 * math.log(y) - math.log(a) - log_b
        return log_i + math.log(_cf(a, 0.5, x)) - _LN2, math.nan
    # the centre: C = I_y(1/2, a), and L = (1 - C) / 2
    if y == 0.0:
        return -_LN2, 0.0
    log_c = 0.5 * math.log(y) + a * log_x - math.log(0.5) - log_b
    central = math.exp(log_c) * _cf(0.5, a, y)
    return math.log1p(-central) - _LN2, central


def _parts(v: float, df: float) -> tuple[float, float]:
    """:func:`_t_parts` of one t (either sign; NaN ``df`` where it is not valid): NaN for a
    NaN t or a df that is not positive, ``-inf`` (no central part) for an infinite t."""
    if math.isnan(v) or not df > 0:
        return math.nan, math.nan
    if math.isinf(v):
        return -math.inf, math.nan
    return _t_parts(abs(v), df)


def _few_log_lower(at: np.ndarray, df: np.ndarray | float) -> np.ndarray:
    dfs = np.broadcast_to(np.asarray(df, dtype=np.float64), at.shape).tolist()
    return np.array([_parts(v, d)[0] for v, d in zip(at.tolist(), dfs)], dtype=np.float64)


_HALF_LOG_2PI = 0.5 * math.log(2.0 * math.pi)


def _log_normal_tail(z: float) -> float:
    """``log Phi(-z)``: from ``erfc`` up to z = 30, beyond it from the Mills ratio's
    continued fraction ``1 / (z + 1 / (z + 2 / (z + 3 / ...)))`` (A&S 26.2.14)."""
    if z < 30.0:
        return math.log(0.5 * math.erfc(z / math.sqrt(2.0)))
    f = z
    for k in range(40, 0, -1):
        f = z + k / f
    return -0.5 * z * z - _HALF_LOG_2PI - math.log(f)


def _z_of_log_tail(log_l: float) -> float:
    """z >= 0 with ``log Phi(-z) = log_l`` (``log_l <= log 1/2``), by Newton's method.

    ``log Phi(-z)`` is concave and decreasing, so the iterates fall monotonically onto
    the root from any start above it; ``sqrt(-2 log_l)`` is one (Phi(-z) < exp(-z^2/2)).
    """
    if log_l >= -_LN2:
        return 0.0
    z = math.sqrt(-2.0 * log_l)
    for _ in range(200):
        lt = _log_normal_tail(z)
        step = (lt - log_l) * math.exp(lt + 0.5 * z * z + _HALF_LOG_2PI)  # f / -f'
        z_new = z + step
        if not z_new < z or z_new <= 0.0:
            break
        z = z_new
        if -step <= 4e-16 * z:
            break
    return z


def _z_of_central(central: float) -> float:
    """z >= 0 with ``P(|Z| <= z) = central`` (``erf(z / sqrt 2)``), by Newton's method
    from below (erf is concave there), keeping the relative precision of small z."""
    z = central * math.sqrt(0.5 * math.pi)  # erf(z / sqrt 2) <= this guess's central
    for _ in range(200):
        g = math.erf(z / math.sqrt(2.0)) - central
        step = -g / (math.sqrt(2.0 / math.pi) * math.exp(-0.5 * z * z))
        if not step > 0.0:
            break
        z += step
        if step <= 4e-16 * z:
            break
    return z


def _few_z(t: np.ndarray, df_all: np.ndarray | float) -> np.ndarray:
    out = np.empty(t.shape)
    dfs = np.broadcast_to(np.asarray(df_all, dtype=np.float64), t.shape).tolist()
    for i, v in enumerate(t.tolist()):
        at = abs(v)
        df = dfs[i]
        if math.isnan(v) or not df > 0:
            out[i] = math.nan
        elif math.isinf(v):
            out[i] = math.inf
        elif at < 1e-8:  # z = t f_T(0) / phi(0) + O(t^3)
            dens0 = math.exp(_log_gamma_ratio_half(0.5 * df))
            out[i] = at * dens0 * math.sqrt(2.0 / df)
        elif at < 1.0:
            out[i] = _z_of_central(_t_parts(at, df)[1])
        else:
            out[i] = _z_of_log_tail(_t_parts(at, df)[0])
    return np.copysign(out, t)


def _dfs(df: np.ndarray | float, shape: tuple[int, ...]) -> tuple[np.ndarray, np.ndarray]:
    """Degrees of freedom per element of a t array of ``shape`` (one for all, or one each:
    the effective df of an AR(p) map), flat, with 1 where they are not positive, and where
    they are not."""
    d = np.broadcast_to(np.asarray(df, dtype=np.float64), shape).reshape(-1)
    bad = ~(d > 0)
    return (np.where(bad, 1.0, d) if bad.any() else d), bad


def log_t_lower_tail(t: np.ndarray | float, df: np.ndarray | float) -> np.ndarray:
    """``log P(T_df <= -|t|)`` for every t, finite at any finite t.

    NaN where t is NaN or ``df <= 0``; ``log 0.5`` at t = 0.

    >>> float(np.exp(log_t_lower_tail(0.0, 5)))
    0.5
    >>> bool(np.isfinite(log_t_lower_tail(1e6, 3)))
    True
    """
    shape = np.shape(t)
    t = np.abs(np.asarray(t, dtype=np.float64)).reshape(-1)
    d, bad = _dfs(df, t.shape)
    if bad.all():
        return np.full(shape, np.nan)
    if t.size <= FEW:
        return _few_log_lower(t, np.where(bad, np.nan, d)).reshape(shape)
    from scipy import special

    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        lower = special.stdtr(d, -t)
        out = np.log(lower)
        far = (lower < _LOG_SWITCH) & np.isfinite(t)
        if np.any(far):
            tf = t[far]
            df_far = d[far]
            t2 = tf * tf
            # x = df / (df + t^2) and 1 - x = t^2 / (df + t^2), both without cancellation
            x = df_far / (df_far + t2)
            log_i = _log_betainc_cf(0.5 * df_far, 0.5, x)
            out[far] = log_i - math.log(2.0)
        out = np.where(np.isinf(t), -np.inf, out)
        out[bad] = np.nan
    return out.reshape(shape)


def z_from_t(t: np.ndarray | float, df: np.ndarray | float) -> np.ndarray:
    """The normal deviate with the same tail probability as t (sign of t), at any t.

    NaN where t is NaN; ``+-inf`` only for infinite t.

    >>> round(float(z_from_t(-2.0, 20)), 6)
    -1.886218
    """
    shape = np.shape(t)
    t = np.asarray(t, dtype=np.float64).reshape(-1)
    d, bad = _dfs(df, t.shape)
    if bad.all():
        return np.full(shape, np.nan)
    if t.size <= FEW:
        return _few_z(t, np.where(bad, np.nan, d)).reshape(shape)
    from scipy import special

    at = np.abs(t)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        z = -special.ndtri_exp(log_t_lower_tail(at, d))
        small = at < 1.0
        if np.any(small):
            ts = at[small]
            ds = d[small]
            central = special.betainc(0.5, 0.5 * ds, ts * ts / (ds + ts * ts))
            z[small] = math.sqrt(2.0) * special.erfinv(central)
        tiny = at < 1e-8  # t^2 underflows in the line above; z = t f_T(0) / phi(0) + O(t^3)
        if np.any(tiny):
            dt = d[tiny]
            dens0 = np.exp(special.gammaln(0.5 * (dt + 1)) - special.gammaln(0.5 * dt))
            z[tiny] = at[tiny] * dens0 * np.sqrt(2.0 / dt)
        z[bad] = np.nan
    return np.copysign(z, t).reshape(shape)


def _few_log_p(t: np.ndarray, d: np.ndarray, bad: np.ndarray, tail: str) -> np.ndarray:
    """:func:`log_p_from_t` for :data:`FEW` values, one at a time with the math module (the
    same steps, without NumPy's per-call cost: a fit's p for one voxel took 55-86 us, most
    of it in array calls around a 6-32 us computation)."""
    out = []
    for v, df, b in zip(t.tolist(), d.tolist(), bad.tolist()):
        log_lower, central = _parts(v, math.nan if b else df)
        if tail == "two":
            # near t = 0, p = 1 - P(|T| <= |t|) via log1p, where the central part was the
            # one computed (a df below 1 gives the tail there)
            if abs(v) < 1.0 and central < 1.0:
                out.append(math.log1p(-central))
            else:
                out.append(min(log_lower + _LN2, 0.0))
        elif (v > 0) if tail == "positive" else (v < 0):
            out.append(log_lower)
        else:  # the far side: 1 - the small tail (log_lower <= log 1/2)
            out.append(math.log1p(-math.exp(log_lower)))
    return np.array(out, dtype=np.float64)


def log_p_from_t(t: np.ndarray | float, df: np.ndarray | float, tail: str = "two") -> np.ndarray:
    """Natural log of the p value of t for ``tail`` (``two``, ``positive``, ``negative``).

    >>> round(float(np.exp(log_p_from_t(-2.0, 10, "positive"))), 6)
    0.963306
    """
    check_tail(tail)
    shape = np.shape(t)
    t = np.asarray(t, dtype=np.float64).reshape(-1)
    d, bad = _dfs(df, t.shape)
    if t.size <= FEW:
        return _few_log_p(t, d, bad, tail).reshape(shape)
    log_lower = log_t_lower_tail(t, np.where(bad, 0.0, d))
    if tail == "two":
        out = np.minimum(log_lower + math.log(2.0), 0.0)
        # near t = 0, p = 1 - P(|T| <= |t|): keep its relative precision via log1p
        small = (np.abs(t) < 1.0) & ~bad
        if np.any(small):
            from scipy import special

            ts = np.abs(t[small])
            ds = d[small]
            central = special.betainc(0.5, 0.5 * ds, ts * ts / (ds + ts * ts))
            out[small] = np.log1p(-central)
        return out.reshape(shape)
    # one-sided: the small tail where t points that way, else 1 - the small tail
    toward = t > 0 if tail == "positive" else t < 0
    with np.errstate(invalid="ignore"):
        far_side = np.log1p(-np.exp(log_lower))
    return np.where(toward, log_lower, far_side).reshape(shape)


def two_sided_p(t: np.ndarray, df: np.ndarray | float) -> np.ndarray:
    """``P(|T_df| >= |t|)``, the p value a fit reports: ``2 * scipy.special.stdtr(df,
    -|t|)`` for many values, :func:`p_from_t` for :data:`FEW` (no scipy import).

    >>> round(float(two_sided_p(np.array([2.0]), 10)[0]), 6)
    0.073388
    """
    t = np.asarray(t, dtype=np.float64)
    if t.size <= FEW:
        return p_from_t(t, df, "two")  # NaN where df <= 0
    from scipy import special

    d = np.asarray(df, dtype=np.float64)
    good = d > 0
    return np.where(good, 2.0 * special.stdtr(np.where(good, d, 1.0), -np.abs(t)), np.nan)


def p_from_t(t: np.ndarray | float, df: np.ndarray | float, tail: str = "two") -> np.ndarray:
    """p value of t for ``tail`` (it underflows to 0 beyond about t = 40; use
    :func:`neglog10p_from_t` there).

    >>> round(float(p_from_t(2.0, 10)), 6)
    0.073388
    """
    return np.exp(log_p_from_t(t, df, tail))


def neglog10p_from_t(
    t: np.ndarray | float, df: np.ndarray | float, tail: str = "two"
) -> np.ndarray:
    """``-log10 p`` of t for ``tail``, finite at any finite t.

    >>> round(float(neglog10p_from_t(0.0, 10)), 12)
    0.0
    """
    return -log_p_from_t(t, df, tail) / _LN10
