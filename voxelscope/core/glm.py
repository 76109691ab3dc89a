"""General linear model fits: OLS, AR(1) and AR(p), t and F contrasts, one voxel or many.

One code path serves a single clicked voxel and a whole volume: data are a matrix ``Y`` of
shape ``(n_volumes, n_voxels)``; a single voxel is a batch of one.

Numerics
--------
* Each voxel is centred before the fit when the design has a constant column (the mean is
  added back to the constant's beta), and everything is computed in float64.
* One matrix product over the data: with ``Q`` an orthonormal basis of the design's columns
  (``X = QR``), ``z = Q'y``, ``b = R^-1 z`` and the residual sum of squares is
  ``||y||^2 - ||z||^2``. On centred float64 data this is exact to about ``eps / (1 - R^2)``
  relative (both terms are accurate to a few ``eps ||y||^2``); where ``1 - R^2`` falls
  below :data:`RSS_GUARD` (near-exact fits, where the difference would cancel) the
  residuals ``y - X b`` are computed explicitly for those voxels only. (What lost digits
  in the past was float32 and uncentred raw BOLD values, not the identity.)
* Constant voxels, and voxels the design fits exactly, have no residual variance: their
  ``t``, ``p`` and ``variance`` are NaN (``null`` in JSON), flagged in ``degenerate``.

AR(1) noise model
-----------------
``rho = sum(r_t r_{t-1}) / sum(r_t^2)`` from the OLS residuals, clipped to [-0.99, 0.99];
then the Prais-Winsten transform (Prais & Winsten, 1954) of ``y`` and ``X``: row 0 scaled
by ``sqrt(1 - rho^2)``, row ``t`` replaced by ``y_t - rho y_{t-1}``; then OLS on the
transformed data (one pass). Unlike a transform that drops the first observation, no row is
lost, so ``df = n - rank``. Fitted signal and residuals are reported in data units
(``X b`` and ``y - X b``); ``sigma2`` and ``r2`` are described in :class:`FitResult`.
Every voxel is whitened with its own rho, for one voxel or a million alike: the whitened
normal equations are quadratic in rho, so they are assembled from a few products of the
design with the data and solved per voxel as small p x p systems (see ``_ar1_solve``); the
residual variance comes from explicitly whitened residuals.

AR(p) noise model (the default of maps, fits and the window)
-----------------------------------------------------------
``noise="arp"`` prewhitens every voxel with AR(p) coefficients given by the caller
(``ar``, one row per voxel): the bias-corrected, spatially smoothed estimates of
:mod:`voxelscope.core.noise` (Worsley et al. 2002). The whitening is the exact inverse
Cholesky factor of the AR(p) covariance (Prais-Winsten for p = 1). The GLS normal
equations and the whitened residual sum of squares are assembled per voxel from a few
sums of one pass over the data (lagged products of the design with the data, the data's
autocovariances at lags 0..p and its first and last p samples; see
:mod:`voxelscope.core.noise`), so a map (:func:`arp_block_sums`, then :func:`fit_sums`)
reads the data once; near-exact fits (below :data:`RSS_GUARD`) and shown series get
explicitly whitened residuals; ``df = n - rank``, and with ``nu_rho`` (the df of the
smoothed autocorrelations, from the neighbourhood) p, z and -log10 p use each voxel's
effective df (``FitResult.df_eff``, :func:`voxelscope.core.noise.arp_effective_df`).
Volumes censored inside the run get one indicator column each (:func:`censored_design`),
which makes the AR(p) fit exact.

Examples
--------
>>> rng = np.random.default_rng(0)
>>> X = np.column_stack([rng.standard_normal(50), np.ones(50)])
>>> y = 2.0 * X[:, 0] + 10 + 0.1 * rng.standard_normal(50)
>>> res = fit(X, y, contrast=[1, 0])
>>> round(float(res.estimate[0]), 1), int(res.df)
(2.0, 48)
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace

import numpy as np

from .errors import InputError, ModelError
from .numfmt import count
from .pvalues import neglog10p_from_t, p_from_t, two_sided_p, z_from_t
from .workcopy import RSS_GUARD, working_copy

__all__ = [
    "NOISE_MODELS",
    "FitResult",
    "PreparedDesign",
    "ar1_rho",
    "arp_block_sums",
    "censored_design",
    "condition_f_matrix",
    "f_test",
    "fit",
    "fit_sums",
    "parse_contrast",
    "prais_winsten",
    "prepare",
    "working_copy",
]

_RHO_LIMIT = 0.99

#: Noise models: ordinary least squares, AR(1) from the OLS residuals (Prais-Winsten), and
#: the default AR(p), bias-corrected and smoothed in space (voxelscope.core.noise).
NOISE_MODELS = ("ols", "ar1", "arp")


# ----------------------------------------------------------------------------- design prep


@dataclass(frozen=True, eq=False)
class PreparedDesign:
    """Everything about a design that does not depend on the data.

    Attributes
    ----------
    X : ndarray (n, p)
    pinv : ndarray (p, n)
        Moore-Penrose pseudo-inverse of X.
    cov_unscaled : ndarray (p, p)
        ``(X'X)^-1``.
    rank, df : int
    constant_index : int or None
        Index of the all-ones column when there is one.
    q, r_inv : ndarray (n, p) and (p, p)
        ``X = q r`` (thin QR) and ``r^-1``: ``pinv = r_inv q'``.
    keep : ndarray of bool (n_all,) or None
        Volumes that enter the fit (None: all). With a mask, ``X``, ``pinv`` and
        ``cov_unscaled`` are those of the kept rows and ``X_all`` is the whole design.
    X_all : ndarray (n_all, p) or None
        The design on every volume, for fitted values and residuals of all rows.
    steps : ndarray of int (n - 1,) or None
        Volumes between consecutive kept volumes when some step exceeds 1 (the AR(1)
        whitening treats those as gaps).
    warnings : tuple of str
        A poorly conditioned design (see :data:`CONDITION_LIMIT`).
    spikes : ndarray of int or None
        Only in the design of :func:`censored_design`: rows of ``X`` (volumes read into the
        fit) that are censored and carry one indicator column each.
    n_model : int or None
        Only there too: the number of model columns (the rest are indicator columns, which
        every result leaves out).
    fit_keep : ndarray of bool (n_all,) or None
        Only there too: the volumes that really enter the fit (``keep`` also reads the
        censored volumes between them).
    """

    X: np.ndarray
    names: tuple[str, ...]
    pinv: np.ndarray
    cov_unscaled: np.ndarray
    rank: int
    df: int
    constant_index: int | None
    memo: dict = field(default_factory=dict, repr=False)
    q: np.ndarray | None = field(default=None, repr=False)
    r_inv: np.ndarray | None = field(default=None, repr=False)
    keep: np.ndarray | None = None
    X_all: np.ndarray | None = None
    steps: np.ndarray | None = None
    warnings: tuple[str, ...] = ()
    spikes: np.ndarray | None = None
    n_model: int | None = None
    fit_keep: np.ndarray | None = None

    @property
    def n_all(self) -> int:
        """Rows of the whole design (kept and left-out volumes)."""
        return int(self.X.shape[0] if self.X_all is None else self.X_all.shape[0])

    def censored(self) -> PreparedDesign:
        """:func:`censored_design` of this design (so :mod:`voxelscope.core.noise` can ask
        for it without importing this module, which imports it)."""
        return censored_design(self)


#: Numerical rank tolerance: with columns scaled to unit norm, singular values below this
#: fraction of the largest count as zero. Confound tables are text with about six
#: significant digits (half a unit in the sixth digit is up to 5e-6 of a value), so a column
#: that is a multiple or a sum of others in truth differs from it by that much once written;
#: 1e-5 sees through that rounding while full-rank designs stay far above it.
RANK_TOL = 1e-5
#: Warn when the condition number of the design, columns scaled to unit norm, exceeds this.
CONDITION_LIMIT = 1e4


def _scaled_svd(X: np.ndarray):
    norms = np.linalg.norm(X, axis=0)
    Xn = X / np.where(norms == 0, 1.0, norms)
    _, s, vt = np.linalg.svd(Xn, full_matrices=False)
    return norms, s, vt


def _involved(v: np.ndarray, names: Sequence[str]) -> list[str]:
    """Columns that take part in a (near) dependency ``Xn v ~ 0``."""
    big = np.abs(v) > 0.05 * np.abs(v).max()
    return [names[i] for i in np.flatnonzero(big)]


def _collinear_columns(X: np.ndarray, names: Sequence[str]) -> list[str]:
    norms, s, vt = _scaled_svd(X)
    zero = [names[i] for i in np.flatnonzero(norms == 0)]
    null = vt[s <= RANK_TOL * s.max()]
    involved = set(zero)
    for v in null:
        involved.update(_involved(v, names))
    return [n for n in names if n in involved]


def _rank_fix(cols: Sequence[str]) -> str:
    """The fix that fits a set of collinear columns."""
    text = " ".join(cols)
    if re.search(r"comp_cor", text) and sum("comp_cor" in c for c in cols) > 1:
        return "choose fewer CompCor components (or one kind of them)"
    if any(c.startswith("drift_") for c in cols):
        return "switch the high-pass filter off, or drop the confound columns that repeat the drift"
    if any(re.match(r"cosine_?\d+$", c) for c in cols):
        return "drop the cosine columns or the other drift-like columns"
    return f"drop one of them (e.g. {cols[-1]!r})"


def prepare(
    X: np.ndarray, names: Sequence[str] | None = None, keep: np.ndarray | None = None
) -> PreparedDesign:
    """Check a design for full column rank and precompute its inverse parts.

    Parameters
    ----------
    X : ndarray (n, p)
    names : sequence of str, optional
    keep : ndarray of bool (n,), optional
        Volumes that enter the fit; the others (non-steady-state, censored) leave every
        statistic but still get fitted values and residuals (see :func:`fit`).

    Raises
    ------
    ModelError
        Fewer kept rows than columns, a column that is zero on the kept rows, or columns
        that are (near) combinations of others at :data:`RANK_TOL` (named, with a fix).

    >>> p = prepare(np.column_stack([np.arange(5.0), np.ones(5)]), ["slope", "constant"])
    >>> p.df, p.constant_index
    (3, 1)
    >>> p = prepare(np.column_stack([np.arange(6.0), np.ones(6)]), keep=[0, 1, 1, 0, 1, 1])
    >>> p.df, p.steps.tolist(), p.X_all.shape
    (2, [1, 2, 1], (6, 2))
    """
    X = np.asarray(X, dtype=float)
    if X.ndim != 2:
        raise ModelError("the design matrix must be two-dimensional")
    names = tuple(names) if names is not None else tuple(f"x{i}" for i in range(X.shape[1]))
    X_all = None
    steps = None
    where = ""
    if keep is not None:
        keep = np.asarray(keep, dtype=bool).reshape(-1)
        if keep.size != X.shape[0]:
            raise ModelError(
                f"the volume mask has {keep.size} entries but the design has {X.shape[0]} rows"
            )
        if keep.all():
            keep = None
        else:
            X_all = X
            X = X[keep]
            kept = np.flatnonzero(keep)
            st = np.diff(kept)
            steps = st if st.size and st.max() > 1 else None
            where = " kept"
            keep = keep.copy()
            keep.setflags(write=False)
    n, p = X.shape
    if n < p:
        left = "" if X_all is None else f" ({X_all.shape[0] - n} left out)"
        raise ModelError(
            f"the run has {count(n, where.strip() + ' volume' if where else 'volume')}{left} "
            f"but the model has {count(p, 'column')}; "
            "use fewer regressors or leave out fewer volumes"
        )
    if not np.all(np.isfinite(X)):
        raise ModelError("the design matrix has non-finite values; check events and confounds")
    norms, s, vt = _scaled_svd(X)
    if np.any(norms == 0):
        empty = [names[i] for i in np.flatnonzero(norms == 0)]
        raise ModelError(
            f"design column(s) {', '.join(repr(c) for c in empty)} are all zero on the{where} "
            "volumes (a condition with no events inside the run?); check the events and onsets"
        )
    rank = int(np.sum(s > RANK_TOL * s.max()))
    if rank < p:
        cols = _collinear_columns(X, names)
        raise ModelError(
            f"the design is rank-deficient (numerical rank {rank} of {p} columns): "
            f"{', '.join(repr(c) for c in cols)} are (near) multiples or sums of one another; "
            f"{_rank_fix(cols)}"
        )
    warnings: tuple[str, ...] = ()
    cond = float(s.max() / s.min())
    if cond > CONDITION_LIMIT:
        cols = _involved(vt[-1], names)
        warnings = (
            f"the design is poorly conditioned (condition number {cond:.2g} with columns "
            f"scaled to unit norm, above {CONDITION_LIMIT:.0e}): {', '.join(cols)} nearly "
            f"overlap, so their betas are unstable; {_rank_fix(cols)}",
        )
    # QR-based inverse: better conditioned than inverting X'X directly.
    q, r = np.linalg.qr(X)
    r_inv = np.linalg.solve(r, np.eye(p))
    pinv = r_inv @ q.T
    cov = r_inv @ r_inv.T
    const = None
    for i in range(p):
        col = X[:, i]
        if np.all(col == col[0]) and col[0] != 0:
            const = i
            break
    for a in (X, pinv, cov, q, r_inv):
        a.setflags(write=False)
    if X_all is not None:
        X_all = np.array(X_all)
        X_all.setflags(write=False)
    return PreparedDesign(
        X,
        names,
        pinv,
        cov,
        rank,
        n - rank,
        const,
        keep=keep,
        X_all=X_all,
        steps=steps,
        warnings=warnings,
        q=q,
        r_inv=r_inv,
    )


def censored_design(prep: PreparedDesign) -> PreparedDesign:
    """The design of an exact AR(p) fit when volumes inside the run are left out.

    An AR(p) whitening needs consecutive volumes. The volumes before the first kept one and
    after the last kept one are dropped (what stays is a contiguous stretch of a stationary
    series: exact). Every volume left out between them stays in the series with one
    indicator column of its own (1 at that volume, 0 elsewhere; censoring by such columns is
    common practice). Under any noise covariance ``V``, GLS of ``[X, E]`` on the stretch
    gives the same betas of ``X``, the same residual quadratic form and the same
    ``df = n_kept - rank`` as GLS of ``X`` on the kept volumes alone with their own
    covariance (the kept part of ``V``): the indicator columns fit the censored volumes
    exactly, and the rest is the likelihood of the kept volumes (tests/core/test_glm.py
    checks this against statsmodels GLS). The bias correction of the AR estimate then uses
    the residual-forming matrix of ``[X, E]``, which is the right one. The censored volumes'
    values never matter (:func:`working_copy` sets them to the mean of the kept ones).

    The design without interior gaps is returned as it is. Memoised on ``prep``.

    >>> p = prepare(np.column_stack([np.ones(8), np.arange(8.0)]), keep=[0, 1, 1, 0, 1, 1, 1, 0])
    >>> c = censored_design(p)
    >>> c.X.shape, c.df == p.df, c.spikes.tolist(), c.names[-1]  # volumes 1-6, one indicator
    ((6, 3), True, [2], 'censored volume 3')
    """
    if prep.steps is None or prep.spikes is not None:
        return prep
    got = prep.memo.get("_censored")
    if got is not None:
        return got
    keep = np.asarray(prep.keep)
    kept = np.flatnonzero(keep)
    lo, hi = int(kept[0]), int(kept[-1]) + 1
    stretch = np.zeros(keep.size, dtype=bool)
    stretch[lo:hi] = True
    inner = np.flatnonzero(~keep[lo:hi])  # censored volumes inside the stretch
    E = np.zeros((keep.size, inner.size))
    E[lo + inner, np.arange(inner.size)] = 1.0
    names = (*prep.names, *(f"censored volume {lo + int(i)}" for i in inner))
    full = np.column_stack([np.asarray(prep.X_all), E])
    sp = prepare(full, names, keep=stretch if not stretch.all() else None)
    inner.setflags(write=False)
    sp = replace(
        sp,
        keep=sp.keep if sp.keep is not None else _readonly(np.ones(keep.size, dtype=bool)),
        X_all=prep.X_all,
        spikes=inner,
        n_model=int(prep.X.shape[1]),
        fit_keep=prep.keep,
        warnings=prep.warnings,
    )
    prep.memo["_censored"] = sp
    return sp


def _readonly(a: np.ndarray) -> np.ndarray:
    a.setflags(write=False)
    return a


def _pad_contrast(prep: PreparedDesign, c: np.ndarray) -> np.ndarray:
    """Contrast weights over the model columns, with zeros for indicator columns."""
    if prep.n_model is not None and c.size == prep.n_model:
        return np.concatenate([c, np.zeros(prep.X.shape[1] - c.size)])
    return c


def _basis(prep: PreparedDesign) -> tuple[np.ndarray, np.ndarray]:
    """``(q, r^-1)`` of the design (from :func:`prepare`, or computed once and memoised)."""
    if prep.q is not None and prep.r_inv is not None:
        return prep.q, prep.r_inv
    qr = prep.memo.get("_qr")
    if qr is None:
        q, r = np.linalg.qr(prep.X)
        qr = prep.memo["_qr"] = (q, np.linalg.solve(r, np.eye(r.shape[0])))
    return qr


def _rss(prep: PreparedDesign, Y: np.ndarray, tss: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Betas (p, V) and residual sums of squares (V,) with one product over ``Y``.

    ``Y`` is centred (when the design has a constant) float64, ``tss`` its column sums of
    squares. ``rss = tss - ||q'y||^2``; voxels with ``rss <= RSS_GUARD * tss`` (near-exact
    fits, constant voxels, non-finite values) get explicit residuals ``y - X b`` instead.
    """
    q, r_inv = _basis(prep)
    z = q.T @ Y  # the one product over the data
    B = r_inv @ z
    rss = tss - np.einsum("ij,ij->j", z, z)
    close = np.flatnonzero(~(rss > RSS_GUARD * tss))
    if close.size:
        Bc = B[:, close]
        Rc = Y[:, close] - prep.X @ Bc
        rss[close] = np.einsum("ij,ij->j", Rc, Rc)
    return B, rss


# ----------------------------------------------------------------------------- contrasts

_NUM = re.compile(r"(\d+(?:\.\d*)?(?:[eE][-+]?\d+)?|\.\d+(?:[eE][-+]?\d+)?)")
_WORD_AT = re.compile(r"[^\s+*]+")


def parse_contrast(
    expr: str | None,
    names: Sequence[str],
    groups: Mapping[str, Sequence[int]] | None = None,
    default: str | None = None,
) -> np.ndarray:
    """Weights for a linear combination of column (or condition) names.

    Accepts ``tap``, ``tap - tone``, ``0.5*tap + 0.5*tone``, ``2 tap``, ``-tone``.
    A name in ``groups`` that spans several columns (a condition under FIR) stands for the
    average of its columns. A term is ``[signs] [number [*]] name``; terms are joined by
    ``+`` or ``-``. Every error names what is wrong and the character (counted from 1)
    where it is, the same line for the window and the command line.

    Parameters
    ----------
    expr : str or None
        The expression; None or empty means ``default``.
    names : sequence of str
        Design column names.
    groups : mapping, optional
        Condition name -> its column indices (main column first).
    default : str, optional
        Expression used when ``expr`` is empty (usually the first condition).

    Raises
    ------
    InputError
        Unknown names (listed with their characters) or a malformed expression (what was
        expected at which character).

    >>> parse_contrast("tap - tone", ["tone", "tap", "constant"]).tolist()
    [-1.0, 1.0, 0.0]
    >>> parse_contrast("0.5*tap + 0.5*tone", ["tone", "tap", "constant"]).tolist()
    [0.5, 0.5, 0.0]
    >>> try:
    ...     parse_contrast("2*tap+", ["tone", "tap", "constant"])
    ... except InputError as err:
    ...     print(err)
    contrast '2*tap+': expected a condition name after '+' at character 6
    """
    names = list(names)
    if expr is None or not str(expr).strip():
        if default is None:
            raise InputError("no contrast given", field="contrast", remedy="contrast")
        expr = default
    from .inputs import excerpt
    from .limits import CONTRAST_CHARS, CONTRAST_COEFFICIENT

    text = str(expr)
    if len(text) > CONTRAST_CHARS:
        raise InputError(
            f"contrast '{excerpt(text)}' is {len(text)} characters long; "
            f"a contrast has at most {CONTRAST_CHARS}"
        )
    quoted = excerpt(text, 80)  # messages quote at most this much
    lookup: dict[str, list[int]] = {}
    for i, n in enumerate(names):
        lookup[n] = [i]
    if groups:
        for g, idx in groups.items():
            if len(idx) > 1 and _is_fir_group(names, g, idx):
                lookup[g] = list(idx)
            elif g not in lookup:
                lookup[g] = [idx[0]]
    known = sorted(lookup, key=len, reverse=True)
    offer = list(groups) if groups else names
    use = ", ".join(excerpt(o) for o in offer[:20]) + (
        f" and {len(offer) - 20} more" if len(offer) > 20 else ""
    )
    unknown: list[tuple[str, int]] = []

    def fail(what: str) -> InputError:
        # an unknown name earlier in the text is the first thing to fix
        if unknown:
            return unknown_error()
        return InputError(f"contrast '{quoted}': {what}")

    def unknown_error() -> InputError:
        parts = [f"'{excerpt(u)}' at character {at + 1}" for u, at in unknown[:5]]
        listed = parts[0] if len(parts) == 1 else ", ".join(parts[:-1]) + " and " + parts[-1]
        more = f" (and {len(unknown) - 5} more)" if len(unknown) > 5 else ""
        return InputError(
            f"contrast '{quoted}': unknown name{'s' if len(unknown) > 1 else ''} "
            f"{listed}{more}; use {use}"
        )

    def found(at: int) -> str:
        return f"found '{excerpt(text[at:], 12)}'" if at < len(text) else "the text ends"

    w = np.zeros(len(names))
    pos = 0
    n_terms = 0
    end = len(text)

    def skip(p: int) -> int:
        while p < end and text[p].isspace():
            p += 1
        return p

    while True:
        pos = skip(pos)
        if pos >= end:
            break
        sign = 1.0
        after = ""  # the last thing read before the name, for "expected ... after X"
        after_at = 0
        if n_terms > 0 and text[pos] not in "+-":
            raise fail(
                f"expected + or - at character {pos + 1}, {found(pos)}; "
                "write terms like 'tap - tone' or '0.5*tap + 0.5*tone'"
            )
        while pos < end and (text[pos] in "+-" or text[pos].isspace()):
            if text[pos] in "+-":
                after, after_at = text[pos], pos
                if text[pos] == "-":
                    sign = -sign
            pos += 1
        coef = 1.0
        # a known name first, so that names starting with digits ('2back') stay names
        m = None if _known_name_at(text, pos, known) else _NUM.match(text, pos)
        if m:
            coef = float(m.group(1))
            if not abs(coef) <= CONTRAST_COEFFICIENT:  # also NaN and inf (1e309)
                raise fail(
                    f"coefficient {excerpt(m.group(1), 20)} is not a "
                    f"number between -{CONTRAST_COEFFICIENT:g} and {CONTRAST_COEFFICIENT:g}"
                )
            after, after_at = excerpt(m.group(1), 20), m.start()
            pos = skip(m.end())
            if pos < end and text[pos] == "*":
                after, after_at = "*", pos
                pos = skip(pos + 1)
        if pos >= end or text[pos] in "+-*":
            what = "a condition name"
            where = f"after '{after}' at character {after_at + 1}" if after else ""
            if not where:
                where = f"at character {pos + 1}"
            if pos < end:
                raise fail(f"expected {what} {where}, {found(pos)}")
            raise fail(f"expected {what} {where}")
        name = _known_name_at(text, pos, known)
        if name is None:
            mm = _WORD_AT.match(text, pos)
            word = mm.group(0) if mm else text[pos:]
            unknown.append((word, pos))
            pos += max(1, len(word))
            n_terms += 1
            continue
        pos += len(name)
        cols = lookup[name]
        for c in cols:
            w[c] += sign * coef / len(cols)
        n_terms += 1
        nxt = skip(pos)
        if nxt < end and text[nxt] == "*":
            raise fail(
                f"unexpected '*' at character {nxt + 1}: the number goes before the name, "
                f"e.g. '2*{excerpt(name, 30)}'"
            )
    if unknown:
        raise unknown_error()
    if n_terms == 0 or not np.any(w):
        raise InputError(
            f"contrast '{quoted}' has no non-zero weights; name at least one condition"
        )
    return w


def _known_name_at(text: str, pos: int, known: Sequence[str]) -> str | None:
    """The longest known name starting at ``pos`` and ending at a word boundary."""
    for k in known:
        if text.startswith(k, pos):
            end = pos + len(k)
            if end == len(text) or not (text[end].isalnum() or text[end] == "_"):
                return k
    return None


def _is_fir_group(names: Sequence[str], group: str, idx: Sequence[int]) -> bool:
    return all(str(names[i]).startswith(f"{group}_fir") for i in idx)


def condition_f_matrix(
    names: Sequence[str], groups: Mapping[str, Sequence[int]], condition: str
) -> np.ndarray:
    """Rows selecting every column of one condition (with its derivatives or FIR bins).

    >>> condition_f_matrix(["a", "a_dt", "constant"], {"a": [0, 1]}, "a").tolist()
    [[1.0, 0.0, 0.0], [0.0, 1.0, 0.0]]
    """
    if condition not in groups:
        raise InputError(f"unknown condition '{condition}'; use {', '.join(groups)}")
    idx = list(groups[condition])
    c = np.zeros((len(idx), len(names)))
    c[np.arange(len(idx)), idx] = 1.0
    return c


# ----------------------------------------------------------------------------- results


@dataclass(eq=False)
class FitResult:
    """The result of one fit of one design to ``n_voxels`` time series.

    Per-voxel arrays have shape ``(n_voxels,)``.

    Attributes
    ----------
    noise : {"ols", "ar1", "arp"}
    weights : ndarray (p,)
        Contrast weights.
    betas : ndarray (p, n_voxels) or None
        None only from :func:`fit_sums` with ``betas=False`` (a map: the contrast only).
    estimate : contrast estimate ``c'b`` (``betas`` are the columns' coefficients)
    variance : ``sigma2 * c'(X'X)^-1 c`` (whitened X under AR(1))
    t, p : t statistic and its two-sided p value (``p`` is None when the fit was asked
        for without it, ``want_p=False``)
    df : int
        ``n - rank``.
    df_eff : ndarray (n_voxels,) or None
        Under the default AR(p) model with its neighbourhood (``nu_rho`` given): the
        effective df of each voxel's t (:func:`voxelscope.core.noise.arp_effective_df`),
        which ``p``, ``z`` and ``-log10 p`` use; ``df_used`` is whichever applies.
    sigma2 : residual variance ``sum(r^2) / df`` (of the whitened residuals under AR(1))
    r2 : ``1 - sum((y - Xb)^2) / sum((y - mean y)^2)`` in data units (uncentred,
        ``sum(y^2)`` below, when the design has no constant column)
    rho : AR(1) coefficient per voxel (None for OLS and AR(p))
    ar : ndarray (order, n_voxels) or None
        AR(p) coefficients used for each voxel (``noise="arp"`` only).
    whitened_residuals : ndarray (n, n_voxels) or None
        Residuals after prewhitening (AR(1) and AR(p), when series are kept): what the
        model assumes to be white noise.
    fitted, residuals : ndarray (n, n_voxels) or None
        ``X b`` and ``y - X b`` in data units; None when not kept.
    degenerate : bool per voxel
        True where there is no residual variance (constant or exactly fitted voxel).
    keep : ndarray of bool (n,) or None
        The volumes that entered the fit when some were left out (see :func:`prepare`).
    cov_unscaled : ndarray (n_groups, p, p)
        ``(X'X)^-1`` (OLS: one group for all voxels) or ``(X*'X*)^-1`` per voxel (AR(1));
        ``group`` gives each voxel's row.
    mean, tss : ndarray (n_voxels,) float64 or None
        Each voxel's mean over the fitted volumes and the sum of squares of its working
        copy (centred when the design has a constant): 0 when ``nonfinite``, 0 ``tss`` for
        a constant voxel. A map gathers the run's mean image from them.
    nonfinite : ndarray of bool (n_voxels,) or None
        Voxels with a NaN or infinite sample (None when there are none).
    """

    noise: str
    weights: np.ndarray
    betas: np.ndarray | None
    estimate: np.ndarray
    variance: np.ndarray
    t: np.ndarray
    p: np.ndarray | None
    df: int
    sigma2: np.ndarray
    r2: np.ndarray
    rho: np.ndarray | None
    fitted: np.ndarray | None
    residuals: np.ndarray | None
    degenerate: np.ndarray
    cov_unscaled: np.ndarray
    group: np.ndarray
    names: tuple[str, ...] = field(default=())
    keep: np.ndarray | None = None
    ar: np.ndarray | None = None
    whitened_residuals: np.ndarray | None = None
    mean: np.ndarray | None = None
    tss: np.ndarray | None = None
    nonfinite: np.ndarray | None = None
    df_eff: np.ndarray | None = None

    @property
    def n_voxels(self) -> int:
        return int(self.estimate.shape[0])

    @property
    def beta(self) -> np.ndarray:
        """The earlier name of :attr:`estimate`, kept so that older scripts keep working."""
        return self.estimate

    @property
    def df_used(self) -> np.ndarray | int:
        """The df of the t distribution: the effective df per voxel when there are, else
        ``df``."""
        return self.df if self.df_eff is None else self.df_eff

    @property
    def z(self) -> np.ndarray:
        """Exact z with the same tail probability as ``t`` (sign of ``t``), at any t; 0
        where degenerate (see :mod:`voxelscope.core.pvalues`)."""
        z = z_from_t(self.t, self.df_used) if self.df > 0 else np.full(self.t.shape, np.nan)
        return np.where(self.degenerate, 0.0, z)

    def p_tail(self, tail: str = "two") -> np.ndarray:
        """p of ``t`` for ``tail`` (``two``, ``positive`` or ``negative``); NaN where
        degenerate."""
        p = p_from_t(self.t, self.df_used, tail) if self.df > 0 else np.full(self.t.shape, np.nan)
        return np.where(self.degenerate, np.nan, p)

    def neglog10p(self, tail: str = "two") -> np.ndarray:
        """``-log10 p`` of ``t`` for ``tail``, finite at any t; NaN where degenerate."""
        q = neglog10p_from_t(self.t, self.df_used, tail) if self.df > 0 else self.t * np.nan
        return np.where(self.degenerate, np.nan, q)


def ar1_rho(residuals: np.ndarray) -> np.ndarray:
    """Lag-1 autocorrelation ``sum(r_t r_{t-1}) / sum(r_t^2)`` per column, clipped.

    >>> float(ar1_rho(np.array([1.0, 1.0, 1.0, 1.0]))[0])
    0.75
    """
    r = np.asarray(residuals, dtype=float)
    if r.ndim == 1:
        r = r[:, None]
    return _rho_of(r, np.einsum("ij,ij->j", r, r))


def _rho_of(r: np.ndarray, den: np.ndarray, steps: np.ndarray | None = None) -> np.ndarray:
    """:func:`ar1_rho` of residuals ``r`` (n, V) whose ``sum(r^2)`` per column is ``den``.

    With gaps (``steps``, volumes between consecutive rows), only neighbours one volume
    apart enter the lag-1 sum, scaled by ``(n - 1) / pairs`` so that it stands for the
    ``n - 1`` products of a series without gaps.
    """
    if steps is None:
        num = np.einsum("ij,ij->j", r[1:], r[:-1])
    else:
        pair = np.flatnonzero(steps == 1) + 1
        num = np.einsum("ij,ij->j", r[pair], r[pair - 1]) * ((r.shape[0] - 1) / max(pair.size, 1))
    with np.errstate(invalid="ignore", divide="ignore"):
        rho = np.where(den > 0, num / np.where(den > 0, den, 1.0), 0.0)
    return np.clip(rho, -_RHO_LIMIT, _RHO_LIMIT)


def prais_winsten(a: np.ndarray, rho: float, steps: np.ndarray | None = None) -> np.ndarray:
    """Prais-Winsten transform along axis 0 (Prais & Winsten, 1954), with gaps.

    Row 0 is scaled by ``sqrt(1 - rho^2)``; row ``t`` becomes ``a_t - rho a_{t-1}``.
    When rows are volumes ``g`` apart (``steps[t - 1] = g``, left-out volumes between them),
    row ``t`` becomes ``sqrt((1 - rho^2) / (1 - rho^(2 g))) (a_t - rho^g a_{t-1})``: an AR(1)
    series seen every ``g`` volumes is AR(1) with coefficient ``rho^g`` and innovation
    variance ``1 - rho^(2 g)`` (of a unit stationary variance), so each row is scaled to the
    innovation variance ``1 - rho^2`` of a step of one. The transform whitens exactly the
    covariance ``rho^|t_i - t_j|`` over the kept volume times; with every step 1 it is the
    plain transform.

    >>> prais_winsten(np.array([1.0, 2.0, 3.0]), 0.5).tolist()
    [0.8660254037844386, 1.5, 2.0]
    >>> prais_winsten(np.array([1.0, 2.0, 3.0]), 0.5, steps=np.array([1, 2])).round(4).tolist()
    [0.866, 1.5, 2.2361]
    """
    a = np.asarray(a, dtype=float)
    out = np.empty_like(a)
    out[0] = math.sqrt(1.0 - rho * rho) * a[0]
    if steps is None:
        out[1:] = a[1:] - rho * a[:-1]
        return out
    g = np.asarray(steps, dtype=float)
    rg = rho**g
    scale = np.sqrt((1.0 - rho * rho) / (1.0 - rg * rg)) if rho != 0 else np.ones_like(g)
    shape = (-1,) + (1,) * (a.ndim - 1)
    out[1:] = scale.reshape(shape) * (a[1:] - rg.reshape(shape) * a[:-1])
    return out


def _as_prepared(design) -> PreparedDesign:
    if isinstance(design, PreparedDesign):
        return design
    names = getattr(design, "names", None)
    X = getattr(design, "X", design)
    return prepare(np.asarray(X, dtype=float), names)


def fit(
    design,
    Y: np.ndarray,
    contrast: Sequence[float] | np.ndarray,
    noise: str = "ols",
    rho_step: float | None = None,
    keep_series: bool = True,
    want_p: bool = True,
    ar: np.ndarray | None = None,
    nu_rho: np.ndarray | float | None = None,
) -> FitResult:
    """Fit a design to one or many time series and evaluate one t contrast.

    Parameters
    ----------
    design : DesignMatrix, PreparedDesign or ndarray (n, p)
    Y : ndarray, shape (n,) or (n, n_voxels)
        Any float dtype and memory layout (a C- or Fortran-ordered or strided view, e.g.
        the transpose of voxel-major rows); computed in float64 in a copy that keeps
        ``Y``'s layout, so ``Y`` itself is never changed.
    contrast : sequence of float, length p
    noise : {"ols", "ar1", "arp"}
    rho_step : float, optional
        Under AR(1), round rho to this step before whitening (kept for comparisons with
        binned methods). None uses
        each voxel's own rho.
    keep_series : bool
        Keep ``fitted`` and ``residuals`` (n x n_voxels); maps turn this off.
    want_p : bool
        Compute ``p`` (default). Maps that keep only ``t``, ``estimate`` or ``variance`` turn
        this off to save the t distribution's tail; ``p`` is then None (``z`` still works).
    ar : ndarray (order,) or (order, n_voxels)
        AR(p) coefficients for ``noise="arp"`` (one column per voxel, or one for all);
        see :mod:`voxelscope.core.noise` for how the default model estimates them (maps
        and clicked voxels pass the spatially smoothed ones). None: each voxel's own
        bias-corrected estimate, not smoothed.
    nu_rho : float or ndarray (n_voxels,), optional
        ``noise="arp"`` only: the df of the smoothed autocorrelations (from the
        neighbourhood, :class:`voxelscope.core.noise.ArEstimate`); then ``p``, ``z`` and
        ``-log10 p`` use each voxel's effective df (``df_eff``). None: ``n - rank``.

    Returns
    -------
    FitResult
    """
    prep = _as_prepared(design)
    if noise == "arp":  # censored volumes inside the run: exact, with indicator columns
        prep = censored_design(prep)
    Y = np.asarray(Y)
    if Y.ndim == 1:
        Y = Y[:, None]
    p = prep.X.shape[1]
    if Y.shape[0] != prep.n_all:
        raise InputError(f"the data have {Y.shape[0]} volumes but the design has {prep.n_all} rows")
    c = _pad_contrast(prep, np.asarray(contrast, dtype=float).reshape(-1))
    if c.size != p:
        raise InputError(f"the contrast has {c.size} weights but the design has {p} columns")
    if noise not in NOISE_MODELS:
        raise InputError(f"noise model must be one of {', '.join(NOISE_MODELS)}, not '{noise}'")
    if noise == "arp":
        if ar is None:  # no neighbourhood: each voxel's own bias-corrected estimate
            from .noise import own_ar

            ar = own_ar(prep, Y)
        ar = np.asarray(ar, dtype=np.float64)
        if ar.ndim == 1:
            ar = ar[:, None]
        if ar.shape[1] == 1 and Y.shape[1] != 1:
            ar = np.repeat(ar, Y.shape[1], axis=1)
        if ar.shape[1] != Y.shape[1] or not np.all(np.isfinite(ar)):
            raise InputError(
                f"ar has {ar.shape[1]} columns for {Y.shape[1]} voxels (or non-finite values)"
            )

    df_eff = None
    if noise == "arp" and nu_rho is not None:
        from .noise import arp_effective_df

        df_eff = arp_effective_df(prep, ar, c, nu_rho)
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        if prep.keep is None:
            return _fit_checked(prep, Y, c, noise, rho_step, keep_series, want_p, ar, df_eff)
        return _fit_kept(prep, Y, c, noise, rho_step, keep_series, want_p, ar, df_eff)


def _fit_kept(
    prep: PreparedDesign,
    Y: np.ndarray,
    c: np.ndarray,
    noise: str,
    rho_step: float | None,
    keep_series: bool,
    want_p: bool,
    ar: np.ndarray | None = None,
    df_eff: np.ndarray | None = None,
) -> FitResult:
    """Fit on the kept volumes only; fitted values and residuals cover every volume.

    Left-out volumes leave every statistic (betas, variance, t, df, rho, R²); their fitted
    value is ``x_t b`` and their residual ``y_t - x_t b``, for plots that grey them.
    """
    res = _fit_checked(prep, Y[prep.keep], c, noise, rho_step, keep_series, want_p, ar, df_eff)
    if keep_series:
        fitted = prep.X_all @ res.betas
        res.fitted = fitted
        res.residuals = np.asarray(Y, dtype=np.float64) - fitted
    res.keep = prep.keep if prep.fit_keep is None else prep.fit_keep
    return res


def _contrast_variance(prep: PreparedDesign, c: np.ndarray) -> float:
    """``c' (X'X)^-1 c``, memoised per design and contrast (a click reuses both)."""
    key = c.tobytes()
    memo = prep.memo
    v = memo.get(key)
    if v is None:
        v = float(c @ prep.cov_unscaled @ c)
        if len(memo) > 64:
            memo.clear()
        memo[key] = v
    return v


def _ar1_solve(
    prep: PreparedDesign, Y: np.ndarray, rho: np.ndarray, c: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Exact Prais-Winsten GLS for every voxel's own rho, without a loop over voxels.

    With ``X*`` the transformed design, the normal equations are quadratic in rho:
    ``X*'X* = (1 + r^2) A - r L - r^2 E`` with ``A = X'X``,
    ``L = sum_t (x_t x_{t-1}' + x_{t-1} x_t')`` and ``E = x_0 x_0' + x_{n-1} x_{n-1}'``,
    and ``X*'y* = (1 + r^2) X'y - r (X[1:]'y[:-1] + X[:-1]'y[1:]) - r^2 (x_0 y_0 +
    x_{n-1} y_{n-1})``. Columns are scaled to unit norm first for conditioning.

    Returns betas (p, V), ``(X*'X*)^-1`` per voxel (V, p, p) and ``c'(X*'X*)^-1 c`` (V,).
    """
    X = prep.X
    norms = np.linalg.norm(X, axis=0)
    Xs = X / norms
    A = Xs.T @ Xs
    L = Xs[1:].T @ Xs[:-1]
    L = L + L.T
    E = np.outer(Xs[0], Xs[0]) + np.outer(Xs[-1], Xs[-1])
    # G = (1 + r^2) A - r L - r^2 E, (V, p, p), built in place (two buffers, same rounding)
    r = rho[:, None, None]
    r2 = r * r
    G = np.multiply(1.0 + r2, A)
    tmp = np.multiply(r, L)
    G -= tmp
    G -= np.multiply(r2, E, out=tmp)
    del tmp
    xy = Xs.T @ Y
    lag = Xs[1:].T @ Y[:-1] + Xs[:-1].T @ Y[1:]
    ends = Xs[0][:, None] * Y[0] + Xs[-1][:, None] * Y[-1]
    g = (1.0 + rho * rho) * xy - rho * lag - (rho * rho) * ends  # (p, V)
    Ginv = np.linalg.inv(G)
    Bs = np.einsum("vij,jv->iv", Ginv, g)
    B = Bs / norms[:, None]
    cov = np.divide(Ginv, np.outer(norms, norms), out=Ginv)
    cvar = np.einsum("i,vij,j->v", c, cov, c)
    return B, cov, cvar


def _gap_weights(rho: np.ndarray, g: int) -> tuple[np.ndarray, np.ndarray]:
    """``rho^g`` and the squared row scale ``(1 - rho^2) / (1 - rho^(2 g))`` per voxel."""
    rg = rho**g
    with np.errstate(invalid="ignore", divide="ignore"):
        w = np.where(rho == 0, 1.0, (1.0 - rho * rho) / (1.0 - rg * rg))
    return rg, w


def _ar1_solve_gaps(
    prep: PreparedDesign, Y: np.ndarray, rho: np.ndarray, c: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """:func:`_ar1_solve` for kept volumes with gaps (see :func:`prais_winsten`).

    Rows are grouped by their step ``g`` from the previous kept volume; with ``w_g`` the
    squared row scale, ``X*'X* = (1 - r^2) x_0 x_0' + sum_g w_g (A_g - r^g L_g + r^(2g) P_g)``
    where, over the rows ``t`` of step ``g``, ``A_g = sum x_t x_t'``, ``P_g = sum x_{t-1}
    x_{t-1}'`` and ``L_g = sum (x_t x_{t-1}' + x_{t-1} x_t')``; ``X*'y*`` likewise. A few
    distinct steps make a few p x p products, then one small solve per voxel.
    """
    X = prep.X
    norms = np.linalg.norm(X, axis=0)
    Xs = X / norms
    r = rho
    r2 = r * r
    G = (1.0 - r2)[:, None, None] * np.outer(Xs[0], Xs[0])
    g_vec = (1.0 - r2) * (Xs[0][:, None] * Y[0])
    for g in np.unique(prep.steps):
        t = np.flatnonzero(prep.steps == g) + 1
        cur, prev = Xs[t], Xs[t - 1]
        A = cur.T @ cur
        P = prev.T @ prev
        L = cur.T @ prev
        L = L + L.T
        rg, w = _gap_weights(r, int(g))
        G += w[:, None, None] * (
            A[None] - rg[:, None, None] * L[None] + (rg * rg)[:, None, None] * P[None]
        )
        Yc, Yp = Y[t], Y[t - 1]
        g_vec += w * (cur.T @ Yc - rg * (cur.T @ Yp + prev.T @ Yc) + (rg * rg) * (prev.T @ Yp))
    Ginv = np.linalg.inv(G)
    Bs = np.einsum("vij,jv->iv", Ginv, g_vec)
    B = Bs / norms[:, None]
    cov = np.divide(Ginv, np.outer(norms, norms), out=Ginv)
    cvar = np.einsum("i,vij,j->v", c, cov, c)
    return B, cov, cvar


def _gap_rss(R: np.ndarray, rho: np.ndarray, steps: np.ndarray) -> np.ndarray:
    """Sum of squares of the whitened residuals (per voxel ``rho``) with gaps."""
    out = (1.0 - rho * rho) * R[0] * R[0]
    for g in np.unique(steps):
        t = np.flatnonzero(steps == g) + 1
        rg, w = _gap_weights(rho, int(g))
        d = R[t] - rg * R[t - 1]
        out = out + w * np.einsum("ij,ij->j", d, d)
    return out


def arp_block_sums(
    prep: PreparedDesign, data: np.ndarray, lags: int | None = None, autocov: bool = True
):
    """The one-pass sums (:class:`voxelscope.core.noise.ArpSums`) of a block ``data``
    (n_all, V) of any layout: what a map keeps of every voxel under ``noise="arp"``
    (``autocov=False``: without the residual autocovariances, which
    :func:`voxelscope.core.noise.arp_autocov` adds later)."""
    from .noise import arp_sums

    data = np.asarray(data)
    if data.ndim == 1:
        data = data[:, None]
    if data.shape[0] != prep.n_all:
        raise InputError(
            f"the data have {data.shape[0]} volumes but the design has {prep.n_all} rows"
        )
    if prep.keep is not None:
        data = data[prep.keep]
    Y, mean, tss, bad = working_copy(prep, data)
    return arp_sums(prep, Y, mean, tss, bad, lags, autocov=autocov)


def fit_sums(
    design,
    sums,
    contrast: Sequence[float] | np.ndarray,
    ar: np.ndarray,
    want_p: bool = True,
    series=None,
    betas: bool = True,
    df_eff: np.ndarray | None = None,
) -> FitResult:
    """:func:`fit` under ``noise="arp"`` from one-pass sums (:func:`arp_block_sums`)
    instead of the data: what a map does once it knows every voxel's AR coefficients.

    ``series(idx)`` returns the working copy (:func:`working_copy`) of some of the voxels;
    it is called only for near-exact fits (see :data:`RSS_GUARD`). Fitted values and
    residuals are not kept; ``r2`` is NaN. With ``betas=False`` (what a map asks for)
    only the contrast is estimated and ``betas`` of the result is None. ``df_eff`` (V,):
    each voxel's effective df, for ``p`` (see :func:`fit`).
    """
    from .noise import arp_solve

    prep = _as_prepared(design)
    c = _pad_contrast(prep, np.asarray(contrast, dtype=float).reshape(-1))
    if c.size != prep.X.shape[1]:
        raise InputError(
            f"the contrast has {c.size} weights but the design has {prep.X.shape[1]} columns"
        )
    ar = np.asarray(ar, dtype=np.float64)
    if ar.ndim == 1:
        ar = ar[:, None]
    v = sums.n_voxels
    if ar.shape[1] != v or not np.all(np.isfinite(ar)):
        raise InputError(f"ar has {ar.shape[1]} columns for {v} voxels (or non-finite values)")
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        B, cov, cvar, rss_w, _C, cb = arp_solve(
            prep, sums, ar, c, want_cov=v <= 64, series=series, betas=betas
        )
        bad = sums.bad if sums.bad.any() else None
        return _finish(
            prep, c, "arp", B, cov, cvar, np.full(v, np.nan), rss_w, sums.mean, sums.tss,
            bad, None, False, want_p, None, None, np.arange(v), None, ar, df_eff, cb=cb,
        )  # fmt: skip


def _fit_checked(
    prep: PreparedDesign,
    Y: np.ndarray,
    c: np.ndarray,
    noise: str,
    rho_step: float | None,
    keep_series: bool,
    want_p: bool = True,
    ar: np.ndarray | None = None,
    df_eff: np.ndarray | None = None,
) -> FitResult:
    X = prep.X
    v = Y.shape[1]
    # One float64 working copy. OLS keeps Y's own layout (order "K"): a block of voxel-major
    # rows arrives as an F-ordered view and a block of volumes C-ordered, and neither is
    # transposed. AR(1) and AR(p) work in C order: rho is a ratio of sums over time whose rounding
    # depends on the layout, and t is sensitive to rho near 1, so a C-order copy keeps
    # AR(1) results the same to the last digit whichever store the data come from.
    Y, mean, tss, bad = working_copy(prep, Y, order="K" if noise == "ols" else "C")
    n = Y.shape[0]
    # constant voxels: what is left after centring is only the rounding of the mean
    flat = None if noise == "ols" else tss <= 1e-20 * mean * mean * n

    Rw = None
    if noise == "arp":
        from .noise import AR_ORDER, BIAS_LAGS, arp_solve, arp_sums, whiten

        sums = arp_sums(prep, Y, mean, tss, bad, max(ar.shape[0], AR_ORDER, BIAS_LAGS))
        B, cov, cvar, rss_w, filt, _cb = arp_solve(
            prep, sums, ar, c, want_cov=keep_series or v <= 64, series=lambda i: Y[:, i]
        )
        if keep_series:  # residuals are shown: all explicit
            R = np.matmul(X, B)
            np.subtract(Y, R, out=R)
            rss = np.einsum("ij,ij->j", R, R)
            Rw = whiten(filt, R)
            rss_w = np.einsum("ij,ij->j", Rw, Rw)
        else:  # maps: R^2 is not kept
            R = None
            rss = np.full(v, np.nan)
        if cov is None:
            cov = np.zeros((0, X.shape[1], X.shape[1]))
        group = np.arange(v)
    else:
        B, rss = _rss(prep, Y, tss)  # the same for one clicked voxel and a whole map
        R = None
    if noise != "arp" and (keep_series or noise == "ar1"):  # residuals where shown or needed
        R = np.empty_like(Y)  # in place: R = Y - X B
        np.matmul(X, B, out=R)
        np.subtract(Y, R, out=R)
    rho = None
    cvar = cvar if noise == "arp" else None
    if noise != "arp":
        rss_w = rss
    if noise == "ar1":
        rss = np.einsum("ij,ij->j", R, R)  # rho is a ratio of residual sums: both explicit
        rho = np.where(flat, 0.0, _rho_of(R, rss, prep.steps))  # 0 for constant voxels
        if rho_step is not None:
            rho = np.round(rho / rho_step) * rho_step
        rho = np.clip(rho, -_RHO_LIMIT, _RHO_LIMIT)
        solve = _ar1_solve if prep.steps is None else _ar1_solve_gaps  # gaps: left-out volumes
        B, cov, cvar = solve(prep, Y, rho, c)
        np.matmul(X, B, out=R)
        np.subtract(Y, R, out=R)
        rss = np.einsum("ij,ij->j", R, R)
        # whitened residuals: the Prais-Winsten transform is linear, so whiten y - X b
        if prep.steps is not None:
            rss_w = _gap_rss(R, rho, prep.steps)
            Rw = None
        else:
            Rw0 = np.sqrt(1.0 - rho * rho) * R[0]
            Rw = np.multiply(R[:-1], rho, out=Y[1:])  # Y is not needed any more
            np.subtract(R[1:], Rw, out=Rw)
            rss_w = Rw0 * Rw0 + np.einsum("ij,ij->j", Rw, Rw)
            if keep_series:
                Rw = np.concatenate([Rw0[None], Rw])
        group = np.arange(v)
    elif noise == "ols":
        group = np.zeros(v, dtype=np.int64)
        cov = prep.cov_unscaled[None]
        cvar = _contrast_variance(prep, c)
    return _finish(
        prep, c, noise, B, cov, cvar, rss, rss_w, mean, tss, bad, flat, keep_series, want_p,
        R, Rw, group, rho, ar, df_eff,
    )  # fmt: skip


def _finish(
    prep: PreparedDesign,
    c: np.ndarray,
    noise: str,
    B: np.ndarray,
    cov: np.ndarray,
    cvar,
    rss: np.ndarray,
    rss_w: np.ndarray,
    mean: np.ndarray,
    tss: np.ndarray,
    bad: np.ndarray | None,
    flat: np.ndarray | None,
    keep_series: bool,
    want_p: bool,
    R: np.ndarray | None,
    Rw: np.ndarray | None,
    group: np.ndarray,
    rho: np.ndarray | None,
    ar: np.ndarray | None,
    df_eff: np.ndarray | None = None,
    *,
    cb: np.ndarray | None = None,
) -> FitResult:
    """Variance, t, p and the degenerate voxels of a fit; the mean back into the constant.

    ``B`` may be None when ``cb`` (``c'B`` of the working copy) is given."""
    X = prep.X
    n = X.shape[0]
    v = rss_w.shape[0]
    centred = prep.constant_index is not None
    df = prep.df
    if cov is None:
        cov = np.zeros((0, X.shape[1], X.shape[1]))
    sigma2 = rss_w / df if df > 0 else np.full(v, np.nan)
    # No residual variance at all: constant voxels or an exact fit, relative to the size of
    # the data (its mean and its spread).
    degenerate = rss_w <= 1e-20 * (mean * mean * n + tss)
    if bad is not None:
        degenerate |= bad
    if df <= 0:
        degenerate[:] = True
    if B is None:  # the contrast only (a map); the mean goes back in as into the constant
        estimate = cb + c[prep.constant_index] * mean / X[0, prep.constant_index] if centred else cb
    else:
        if centred:  # the constant column need not be all ones
            B[prep.constant_index] += mean / X[0, prep.constant_index]
        estimate = c @ B
    if prep.n_model is not None:  # indicator columns of censored volumes: not reported
        m = prep.n_model
        B, c, X = (None if B is None else B[:m]), c[:m], X[:, :m]
        if cov.shape[0]:
            cov = cov[:, :m, :m]
    variance = sigma2 * cvar
    t = estimate / np.sqrt(variance)
    r2 = 1.0 - rss / tss  # constant voxels (flat) are set to NaN below
    pval = None
    if want_p:  # a few voxels (a click, a fit) without importing scipy.special
        pval = two_sided_p(t, df if df_eff is None else df_eff)
    if degenerate.any():
        for a in (variance, t, pval):
            if a is not None:
                a[degenerate] = np.nan
        if flat is None:
            flat = tss <= 1e-20 * mean * mean * n
        r2[flat] = np.nan
    fitted = residuals = None
    if keep_series:
        fitted = X @ B
        residuals = R
    else:
        Rw = None
    if bad is not None:  # voxels with NaN or infinite samples have no fit at all
        if B is not None:
            B[:, bad] = np.nan
        estimate[bad] = np.nan
        r2[bad] = np.nan
        sigma2[bad] = np.nan
        if keep_series:
            fitted[:, bad] = np.nan
            residuals[:, bad] = np.nan
            if Rw is not None:
                Rw[:, bad] = np.nan
    return FitResult(
        noise=noise,
        weights=c,
        betas=B,
        estimate=estimate,
        variance=variance,
        t=t,
        p=pval,
        df=int(df),
        sigma2=sigma2,
        r2=r2,
        rho=rho,
        fitted=fitted,
        residuals=residuals,
        degenerate=degenerate,
        cov_unscaled=cov,
        group=group,
        names=prep.names if prep.n_model is None else prep.names[: prep.n_model],
        ar=ar if noise == "arp" else None,
        whitened_residuals=Rw,
        mean=mean,
        tss=tss,
        nonfinite=bad,
        df_eff=None if df_eff is None else np.asarray(df_eff, dtype=np.float64),
    )


def f_test(result: FitResult, C: np.ndarray) -> tuple[np.ndarray, np.ndarray, int, int]:
    """F test of ``C b = 0`` for every voxel of a fit.

    ``F = (Cb)' [C (X'X)^-1 C']^-1 (Cb) / (q sigma2)`` with ``q`` rows in ``C``.

    Returns
    -------
    F, p : ndarray (n_voxels,)
    df_num, df_den : int
    """
    C = np.atleast_2d(np.asarray(C, dtype=float))
    q = C.shape[0]
    if C.shape[1] != result.betas.shape[0]:
        raise InputError(
            f"the F contrast has {C.shape[1]} columns but the design has {result.betas.shape[0]}"
        )
    cb = C @ result.betas  # (q, v)
    F = np.empty(result.n_voxels)
    for g in range(result.cov_unscaled.shape[0]):
        sel = result.group == g
        m = C @ result.cov_unscaled[g] @ C.T
        sol = np.linalg.solve(m, cb[:, sel])
        F[sel] = np.einsum("ij,ij->j", cb[:, sel], sol) / q
    with np.errstate(invalid="ignore", divide="ignore"):
        F = np.where(result.degenerate, np.nan, F / result.sigma2)
    from scipy import special

    p = np.where(result.degenerate, np.nan, special.fdtrc(q, result.df, np.nan_to_num(F)))
    return F, p, q, result.df
