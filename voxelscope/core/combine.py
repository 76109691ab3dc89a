"""Several runs of one subject: fixed effects across runs and whether the runs agree.

Each run is fitted on its own, through the one fitting path
(:meth:`voxelscope.core.model.Analysis.fit_voxel` for a voxel,
:func:`voxelscope.core.maps.compute_map` for a volume); this module only combines the
runs' contrast estimates and their variances, per kernel.

Fixed effects (common practice for the runs of one subject)
------------------------------------------------------------
With run estimates ``b_i``, their variances ``v_i`` and residual degrees of freedom
``df_i`` (``k`` runs), and weights ``w_i = 1 / v_i``:

* combined estimate ``b = sum(w_i b_i) / sum(w_i)``;
* its variance ``v = 1 / sum(w_i)``;
* ``t = b / sqrt(v)`` on ``df = sum(df_i)`` degrees of freedom, two-sided ``p``.

Agreement between runs
----------------------
Cochran's heterogeneity statistic (Cochran 1954, Biometrics 10:101-129)
``Q = sum(w_i (b_i - b)^2)``, referred to the chi-square distribution on ``k - 1``
degrees of freedom (``q_p``). Flags, each a plain sentence:

* ``runs-disagree`` when ``q_p`` is below :data:`DISAGREE_P` (0.05);
* ``one-run`` when the combined effect is present (``p`` below :data:`EFFECT_P`, 0.001)
  but leaving one run out removes it (``p`` of the other runs at or above
  :data:`GONE_P`, 0.05, or the estimate changes sign), naming that run. Two thresholds
  rather than one keep a borderline voxel from being flagged because any run tips it.

A run whose fit has no residual variance at a voxel (constant, exactly fitted, outside
its brain) leaves the combination undefined there: every combined number is NaN
(``null`` in JSON, 0 in maps), with a flag naming the run; never an infinity.

Examples
--------
>>> fe = fixed_effects([2.0, 4.0], [1.0, 1.0], [100, 100])
>>> float(fe.estimate[0]), float(fe.variance[0]), int(fe.df[0]), float(fe.q[0])
(3.0, 0.5, 200, 2.0)
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from scipy import special

from .bids import run_labels
from .errors import InputError
from .jsonsafe import finite_or_none
from .maps import STAT_NAMES, MapResult, compute_map
from .numfmt import format_value
from .pvalues import check_tail, neglog10p_from_t, p_from_t, z_from_t

__all__ = [
    "COMBINED_STATS",
    "DISAGREE_P",
    "EFFECT_P",
    "GONE_P",
    "CombinedFit",
    "CombinedMapResult",
    "FixedEffects",
    "LeftOut",
    "RunFlag",
    "combine_fits",
    "combine_maps",
    "compute_combined_map",
    "fixed_effects",
    "nearest_index",
    "nearest_on_grid",
    "same_grid",
    "voxel_in_runs",
]

#: Cochran's Q p below this: the runs disagree.
DISAGREE_P = 0.05
#: Combined p below this: the combined effect is present.
EFFECT_P = 0.001
#: Leaving a run out leaves p at or above this (or flips the sign): that run carried it.
GONE_P = 0.05


# ----------------------------------------------------------------------------- arithmetic


@dataclass(frozen=True, eq=False)
class FixedEffects:
    """Fixed-effects combination of ``k`` runs at ``n`` voxels (arrays of shape (n,)).

    Attributes
    ----------
    estimate, variance, t, p : float64
        Combined contrast estimate, its variance, t and two-sided p; NaN where undefined.
    df : float64
        ``sum(df_i)``.
    q, q_p : float64
        Cochran's Q and its chi-square p on ``k - 1`` df (NaN for one run).
    valid : bool
        False where a run has no finite positive variance (the combination is undefined).
    n_runs : int
    """

    estimate: np.ndarray
    variance: np.ndarray
    t: np.ndarray
    df: np.ndarray
    p: np.ndarray
    q: np.ndarray
    q_p: np.ndarray
    valid: np.ndarray
    n_runs: int


def _as_2d(a: Any, name: str) -> np.ndarray:
    arr = np.asarray(a, dtype=np.float64)
    if arr.ndim == 1:
        arr = arr[:, None]
    if arr.ndim != 2:
        raise InputError(f"{name} must be one value per run, or runs x voxels")
    return arr


def fixed_effects(estimates: Any, variances: Any, dfs: Any, want_p: bool = True) -> FixedEffects:
    """Combine run estimates by inverse-variance weighting, with Cochran's Q.

    Parameters
    ----------
    estimates, variances : array, shape (k,) or (k, n)
        Per-run contrast estimates and their variances.
    dfs : array, shape (k,) or (k, n)
        Per-run residual degrees of freedom.
    want_p : bool
        Compute ``p`` and ``q_p`` (maps that need only t skip the tails).

    Returns
    -------
    FixedEffects

    Examples
    --------
    >>> fe = fixed_effects([[1.0, 1.0], [3.0, 1.0]], [[1.0, 1.0], [1.0, np.nan]], [10, 10])
    >>> fe.estimate.tolist()[0], bool(fe.valid[1]), bool(np.isnan(fe.t[1]))
    (2.0, False, True)
    """
    b = _as_2d(estimates, "estimates")
    v = _as_2d(variances, "variances")
    if b.shape != v.shape:
        raise InputError(f"estimates {b.shape} and variances {v.shape} differ in shape")
    k, n = b.shape
    if k < 1:
        raise InputError("no runs to combine")
    d = np.asarray(dfs, dtype=np.float64)
    if d.ndim == 1:
        d = d[:, None]
    d = np.broadcast_to(d, (k, n))
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        valid = np.all(np.isfinite(b) & np.isfinite(v) & (v > 0), axis=0)
        w = np.where(valid, 1.0 / np.where(valid, v, 1.0), np.nan)
        sw = w.sum(axis=0)
        estimate = (w * b).sum(axis=0) / sw
        variance = 1.0 / sw
        t = estimate / np.sqrt(variance)
        df = d.sum(axis=0)
        q = (w * (b - estimate) ** 2).sum(axis=0)
        if want_p:
            p = 2.0 * special.stdtr(df, -np.abs(t))
            q_p = special.chdtrc(k - 1, q) if k > 1 else np.full(n, np.nan)
        else:
            p = q_p = np.full(n, np.nan)
    nan = np.full(n, np.nan)
    if k == 1:
        q = nan.copy()
    return FixedEffects(
        estimate=np.where(valid, estimate, np.nan),
        variance=np.where(valid, variance, np.nan),
        t=np.where(valid, t, np.nan),
        df=df,
        p=np.where(valid, p, np.nan),
        q=np.where(valid, q, np.nan),
        q_p=np.where(valid, q_p, np.nan),
        valid=valid,
        n_runs=k,
    )


# ----------------------------------------------------------------------------- one voxel


@dataclass(frozen=True)
class RunFlag:
    """A statement about the runs at one voxel.

    ``id`` is ``runs-disagree``, ``one-run`` or ``run-undefined``; ``run`` names the run
    it is about (None when it is about all of them).

    >>> RunFlag("one-run", "Only run-2 shows it.", "run-2").to_json()["run"]
    'run-2'
    """

    id: str
    text: str
    run: str | None = None

    def to_json(self) -> dict[str, str | None]:
        return {"id": self.id, "text": self.text, "run": self.run}


@dataclass(frozen=True)
class LeftOut:
    """The combination of every run but one."""

    run: str
    estimate: float | None
    t: float | None
    p: float | None

    def to_json(self) -> dict[str, Any]:
        """The run, the other runs' combined estimate (also as ``beta``, its earlier key), t
        and p.

        >>> LeftOut("run-1", 0.5, 2.0, 0.05).to_json()["estimate"]
        0.5
        """
        return {
            "run": self.run,
            "estimate": self.estimate,
            "beta": self.estimate,  # the earlier key of the estimate, kept for older scripts
            "t": self.t,
            "p": self.p,
        }


@dataclass(frozen=True)
class CombinedFit:
    """One kernel's fixed-effects combination at one voxel.

    Numbers that are undefined are None. ``runs`` holds each run's label, estimate, variance,
    t and df in order, so a table can show rows per run and the combined row together.
    """

    kernel: str
    contrast: str
    estimate: float | None
    variance: float | None
    t: float | None
    df: float
    p: float | None
    q: float | None
    q_p: float | None
    n_runs: int
    flags: tuple[RunFlag, ...] = ()
    leave_one_out: tuple[LeftOut, ...] = ()
    runs: tuple[dict[str, Any], ...] = field(default=())
    tail: str = "two"
    p_tail: float | None = None
    neglog10p: float | None = None
    z: float | None = None

    def to_json(self) -> dict[str, Any]:
        """The documented JSON object: kernel, estimate (also as ``beta``, its earlier key),
        variance, t, df, p, q, q_p, flags;
        ``p`` and ``neglog10p`` are for ``tail`` (two-sided by default), ``z`` exact."""
        df = int(self.df) if float(self.df).is_integer() else float(self.df)
        return {
            "kernel": self.kernel,
            "contrast": self.contrast,
            "estimate": self.estimate,
            "beta": self.estimate,  # the earlier key of the estimate, kept for older scripts
            "variance": self.variance,
            "t": self.t,
            "df": df,
            "p": self.p_tail if self.tail != "two" else self.p,
            "tail": self.tail,
            "neglog10p": self.neglog10p,
            "z": self.z,
            "q": self.q,
            "q_p": self.q_p,
            "n_runs": self.n_runs,
            "flags": [f.to_json() for f in self.flags],
            "leave_one_out": [x.to_json() for x in self.leave_one_out],
        }


def _fmt_p(p: float) -> str:
    return format_value("p", p)


def combine_fits(
    kernel: str,
    contrast: str,
    labels: Sequence[str],
    estimates: Sequence[float | None],
    variances: Sequence[float | None],
    dfs: Sequence[float],
    tail: str = "two",
) -> CombinedFit:
    """Combine one kernel's per-run fits at one voxel, with agreement flags.

    ``p`` is two-sided (the flags use it); ``p_tail`` and ``neglog10p`` are for ``tail``
    and ``z`` is exact at any t (:mod:`voxelscope.core.pvalues`).

    Parameters
    ----------
    kernel, contrast : str
    labels : sequence of str
        One short name per run (see :func:`run_labels`), used in the flags.
    estimates, variances : sequence of float or None
        Per-run contrast estimate and variance (None where the run's fit is undefined).
    dfs : sequence of float
    tail : {"two", "positive", "negative"}

    Examples
    --------
    >>> c = combine_fits("gamma", "tap", ["a", "b"], [1.0, 1.2], [0.01, 0.01], [90, 90])
    >>> round(c.estimate, 6), c.df, [f.id for f in c.flags]
    (1.1, 180.0, [])
    >>> c = combine_fits("gamma", "tap", ["a", "b", "c"], [3.0, 0, 0.1], [.1, .1, .1], [90] * 3)
    >>> [(f.id, f.run) for f in c.flags]
    [('runs-disagree', None), ('one-run', 'a')]
    """
    k = len(labels)
    if not (len(estimates) == len(variances) == len(dfs) == k) or k == 0:
        raise InputError("give one estimate, variance and df per run")
    b = np.array([np.nan if x is None else x for x in estimates], dtype=np.float64)
    v = np.array([np.nan if x is None else x for x in variances], dtype=np.float64)
    d = np.asarray(dfs, dtype=np.float64)
    fe = fixed_effects(b, v, d)
    flags: list[RunFlag] = []
    bad = [lab for lab, bi, vi in zip(labels, b, v) if not (np.isfinite(bi) and vi > 0)]
    for lab in bad:
        flags.append(
            RunFlag(
                "run-undefined",
                f"{lab} has no residual variance at this voxel (constant, exactly fitted or "
                "outside its brain), so the runs cannot be combined here.",
                lab,
            )
        )
    loo: list[LeftOut] = []
    p = finite_or_none(fe.p)
    q_p = finite_or_none(fe.q_p)
    if not bad and k > 1:
        if q_p is not None and q_p < DISAGREE_P:
            flags.append(
                RunFlag(
                    "runs-disagree",
                    "The runs disagree here (Cochran's Q = "
                    f"{format_value('Q', fe.q[0])} on {k - 1} "
                    f"df, p = {_fmt_p(q_p)} < {DISAGREE_P:g}); look at each run before "
                    "trusting the combined estimate.",
                )
            )
        for i, lab in enumerate(labels):
            keep = np.arange(k) != i
            sub = fixed_effects(b[keep], v[keep], d[keep])
            loo.append(
                LeftOut(
                    lab, finite_or_none(sub.estimate), finite_or_none(sub.t), finite_or_none(sub.p)
                )
            )
        if p is not None and p < EFFECT_P:
            sign = np.sign(fe.estimate[0])
            for x in loo:
                gone = x.p is None or x.p >= GONE_P or np.sign(x.estimate or 0.0) != sign
                if gone:
                    flags.append(
                        RunFlag(
                            "one-run",
                            f"The combined effect (p = {_fmt_p(p)}) rests on {x.run}: without "
                            f"it the other runs give p = "
                            f"{'undefined' if x.p is None else _fmt_p(x.p)}.",
                            x.run,
                        )
                    )
    runs = tuple(
        {
            "run": lab,
            "estimate": None if not np.isfinite(bi) else float(bi),
            "variance": None if not np.isfinite(vi) else float(vi),
            "t": float(bi / np.sqrt(vi)) if np.isfinite(bi) and vi > 0 else None,
            "df": float(di),
        }
        for lab, bi, vi, di in zip(labels, b, v, d)
    )
    t = finite_or_none(fe.t)
    p_tail = nl10 = z = None
    if t is not None:
        df_all = float(fe.df[0])
        p_tail = finite_or_none(p_from_t(t, df_all, tail))
        nl10 = finite_or_none(neglog10p_from_t(t, df_all, tail))
        z = finite_or_none(z_from_t(t, df_all))
    return CombinedFit(
        kernel=str(kernel),
        contrast=str(contrast),
        estimate=finite_or_none(fe.estimate),
        variance=finite_or_none(fe.variance),
        t=t,
        df=float(fe.df[0]),
        p=p,
        q=finite_or_none(fe.q),
        q_p=q_p,
        n_runs=k,
        flags=tuple(flags),
        leave_one_out=tuple(loo),
        runs=runs,
        tail=check_tail(tail),
        p_tail=p_tail,
        neglog10p=nl10,
        z=z,
    )


# ----------------------------------------------------------------------------- runs


def same_grid(runs: Sequence[Any], atol: float = 1e-4) -> bool:
    """True when every run has the first run's shape and affine (to ``atol`` mm).

    >>> from types import SimpleNamespace as NS
    >>> a = NS(shape=(2, 2, 2), affine=np.eye(4))
    >>> b, c = NS(shape=(2, 2, 2), affine=np.eye(4)), NS(shape=(2, 2, 3), affine=np.eye(4))
    >>> same_grid([a, b]), same_grid([a, c])
    (True, False)
    """
    first = runs[0]
    for r in runs[1:]:
        if tuple(r.shape[:3]) != tuple(first.shape[:3]):
            return False
        if not np.allclose(np.asarray(r.affine), np.asarray(first.affine), atol=atol):
            return False
    return True


def voxel_in_runs(
    runs: Sequence[Any],
    voxel: Sequence[int] | None = None,
    mm: Sequence[float] | None = None,
) -> list[tuple[int, int, int]]:
    """Each run's voxel for one place: by index when the runs share a grid, by mm always.

    ``mm`` goes to each run's nearest voxel (:meth:`voxelscope.core.run.Run.mm_to_voxel`);
    ``voxel`` is the same index in every run and needs the runs on one grid.

    Raises
    ------
    InputError
        Both or neither given; indices on runs with different grids; a place outside a run.
    """
    if (voxel is None) == (mm is None):
        raise InputError("give either a voxel (I J K) or a position in mm (X Y Z)")
    if voxel is not None:
        if not same_grid(runs):
            raise InputError(
                f"the runs are on different grids ({_grids_text(runs)}); voxel indices "
                "mean different places in each",
                remedy="position",
            )
        return [r.check_voxel(tuple(voxel)) for r in runs]
    return [r.mm_to_voxel(tuple(mm)) for r in runs]  # type: ignore[arg-type]


def _grids_text(runs: Sequence[Any]) -> str:
    return ", ".join(
        f"{Path(str(getattr(r, 'path', '?'))).name} {'x'.join(str(int(n)) for n in r.shape[:3])}"
        for r in runs
    )


# ----------------------------------------------------------------------------- maps


def nearest_index(
    shape: Sequence[int],
    affine: np.ndarray,
    target_shape: Sequence[int],
    target_affine: np.ndarray,
) -> np.ndarray:
    """Flat index into a source grid of the nearest source voxel of each target voxel
    centre (-1 where it falls outside), shape ``target_shape``.

    The nearest voxel is chosen exactly as a position in mm is turned into a voxel
    (``floor(index + 0.5)`` through the inverse affine; see
    :meth:`voxelscope.core.run.Run.mm_to_voxel`).

    >>> nearest_index((4, 1, 1), np.eye(4), (3, 1, 1), np.diag([2.0, 1, 1, 1])).ravel().tolist()
    [0, 2, -1]
    """
    src_shape = tuple(int(n) for n in shape[:3])
    tshape = tuple(int(n) for n in target_shape)
    m = np.linalg.inv(np.asarray(affine, np.float64)) @ np.asarray(target_affine, np.float64)
    axes = [np.arange(n, dtype=np.float64) for n in tshape]
    flat = np.zeros(tshape, dtype=np.int64)
    ok = np.ones(tshape, dtype=bool)
    stride = 1
    for a in (2, 1, 0):  # C order: the last axis varies fastest
        coord = (
            m[a, 0] * axes[0][:, None, None]
            + m[a, 1] * axes[1][None, :, None]
            + m[a, 2] * axes[2][None, None, :]
            + m[a, 3]
        )
        idx = np.floor(coord + 0.5).astype(np.int64)
        ok &= (idx >= 0) & (idx < src_shape[a])
        flat += idx * stride
        stride *= src_shape[a]
    flat[~ok] = -1
    return flat


def nearest_on_grid(
    data: np.ndarray,
    affine: np.ndarray,
    target_shape: Sequence[int],
    target_affine: np.ndarray,
    fill: float = np.nan,
    index: np.ndarray | None = None,
) -> np.ndarray:
    """Sample a 3D array at the nearest source voxel of each target voxel centre.

    The nearest voxel is chosen exactly as a position in mm is turned into a voxel
    (:func:`nearest_index`), so a combined map at a voxel uses the very voxels that
    ``fit --mm`` at that voxel's centre uses. Target voxels whose nearest voxel is outside
    the source grid get ``fill``. ``index`` reuses a :func:`nearest_index` result.

    >>> src = np.arange(4.0).reshape(4, 1, 1)
    >>> nearest_on_grid(src, np.eye(4), (3, 1, 1), np.diag([2.0, 1, 1, 1])).ravel().tolist()
    [0.0, 2.0, nan]
    """
    data = np.asarray(data)
    if index is None:
        index = nearest_index(data.shape, affine, target_shape, target_affine)
    src = data.reshape(-1)
    out = np.full(index.shape, fill, dtype=np.result_type(data.dtype, np.float32))
    ok = index >= 0
    out[ok] = src[index[ok]]
    return out


#: Statistics a combined map can hold (a single-run map's, plus Cochran's Q and its p).
COMBINED_STATS = (*STAT_NAMES, "q", "q_p")


@dataclass(eq=False)
class CombinedMapResult(MapResult):
    """A fixed-effects map across runs: a :class:`~voxelscope.core.maps.MapResult` whose
    ``df`` is ``sum(df_i)``, plus Cochran's ``q`` and ``q_p`` volumes, each run's own map
    (``run_maps``, on its own grid), the run ``labels`` and the runs ``resampled`` onto the
    first run's grid."""

    q: np.ndarray | None = None
    q_p: np.ndarray | None = None
    run_maps: tuple[Any, ...] = ()
    labels: tuple[str, ...] = ()
    resampled: tuple[str, ...] = ()
    paths: tuple[str, ...] = ()

    def stat(self, name: str) -> np.ndarray:
        """One statistic by name, including ``q`` and ``q_p``."""
        if name in ("q", "q_p"):
            value = getattr(self, name)
            if value is None:
                raise InputError(f"the combined map has no '{name}'; ask for it")
            return value
        return super().stat(name)

    def describe(self) -> str:
        """One line: the combination, kernel, contrast, df, voxels and any resampling."""
        text = (
            f"fixed effects over {len(self.labels)} runs ({', '.join(self.labels)}): "
            + super().describe()
        )
        if self.resampled:
            text += f"; {', '.join(self.resampled)} sampled on the first run's grid (nearest voxel)"
        return text


def compute_combined_map(
    runs: Sequence[Any],
    analyses: Sequence[Any],
    settings: Any,
    kernel: str | None = None,
    labels: Sequence[str] | None = None,
    stats: Sequence[str] = ("t", "estimate", "variance", "z", "p"),
    progress: Any = None,
    workers: int | None = None,
    mask: np.ndarray | None = None,
    rho_step: float | None = None,
    tail: str = "two",
) -> CombinedMapResult:
    """Fixed-effects map across runs on the first run's grid.

    Every run is mapped on its own grid by :func:`voxelscope.core.maps.compute_map` (the
    single-run map, so the one fitting path and its options flow through), keeping only
    the estimate and its variance; runs on another grid are sampled at the first run's voxel centres
    (nearest voxel, :func:`nearest_on_grid`), then combined voxel by voxel with
    :func:`fixed_effects`. A voxel is in the combined mask when it is inside every run's
    mask and no run is degenerate there.

    Parameters
    ----------
    runs, analyses : sequences of the same length
        Each run with its own :class:`~voxelscope.core.model.Analysis`.
    settings : ModelSettings
    kernel : str, optional
        Default the first of ``settings.kernels``.
    labels : sequence of str, optional
        Run names (default :func:`run_labels` of the paths).
    stats : sequence of str
        Any of :data:`COMBINED_STATS`.
    progress : callable, optional
        ``progress(fraction)``; returning False cancels
        (:class:`voxelscope.core.errors.Cancelled`).
    workers, rho_step
        Passed to :func:`~voxelscope.core.maps.compute_map` for every run.
    mask : ndarray of bool, optional
        Voxels on the first run's grid; runs on that grid are fitted there only, runs on
        other grids within their own brain mask, and the combination is kept inside it.

    Returns
    -------
    CombinedMapResult
        A :class:`~voxelscope.core.maps.MapResult` (``df = sum(df_i)``) with ``q``,
        ``q_p``, the per-run maps, the labels and which runs were resampled.
    """
    if len(runs) != len(analyses) or not runs:
        raise InputError("give one analysis per run")
    stats = tuple(stats)
    for s in stats:
        if s not in COMBINED_STATS:
            raise InputError(f"unknown map statistic '{s}'; use {', '.join(COMBINED_STATS)}")
    labels = (
        list(labels)
        if labels is not None
        else run_labels([getattr(r, "path", "run") for r in runs])
    )
    kernel = str(kernel if kernel is not None else settings.kernels[0])
    k = len(runs)
    first = runs[0]
    shape = tuple(int(n) for n in first.shape[:3])
    if mask is not None:
        mask = np.asarray(mask, dtype=bool)
        if mask.shape != shape:
            raise InputError(
                f"the mask has shape {mask.shape} but the first run's grid is "
                f"{'x'.join(map(str, shape))}; give a mask on that grid"
            )
    run_maps = []
    for i, (run, an) in enumerate(zip(runs, analyses)):
        sub = None
        if progress is not None:

            def sub(f, i=i):
                return progress((i + f) / k)

        run_maps.append(
            compute_map(
                run,
                an,
                settings,
                kernel,
                mask=mask if (mask is not None and (i == 0 or same_grid([first, run]))) else None,
                rho_step=rho_step,
                stats=("estimate", "variance"),
                progress=sub,
                workers=workers,
            )
        )
    return combine_maps(runs, run_maps, labels, stats, mask=mask, settings=settings, tail=tail)


def combine_maps(
    runs: Sequence[Any],
    run_maps: Sequence[MapResult],
    labels: Sequence[str],
    stats: Sequence[str] = ("t", "estimate", "variance", "z", "p"),
    mask: np.ndarray | None = None,
    settings: Any = None,
    tail: str = "two",
) -> CombinedMapResult:
    """Combine single-run maps (each with ``estimate`` and ``variance``, on its run's grid)
    into the fixed-effects map on the first run's grid; see :func:`compute_combined_map`.
    """
    first = runs[0]
    shape = tuple(int(n) for n in first.shape[:3])
    aff0 = np.asarray(first.affine, dtype=np.float64)
    kernel = run_maps[0].kernel
    stats = tuple(stats)
    for s in stats:
        if s not in COMBINED_STATS:
            raise InputError(f"unknown map statistic '{s}'; use {', '.join(COMBINED_STATS)}")
    if not (len(runs) == len(run_maps) == len(labels)) or not runs:
        raise InputError("give one map and one label per run")
    for lab, m in zip(labels, run_maps):
        if m.estimate is None or m.variance is None:
            raise InputError(
                f"the map of {lab} has no estimate or variance; compute them to combine"
            )
    n_all = int(np.prod(shape))
    inside = np.ones(n_all, dtype=bool) if mask is None else mask.reshape(-1).copy()
    estimates, variances, resampled = [], [], []
    for i, (run, m) in enumerate(zip(runs, run_maps)):
        est, var, ok = m.estimate.reshape(-1), m.variance.reshape(-1), m.mask.reshape(-1)
        if i and not same_grid([first, run]):
            index = nearest_index(run.shape, run.affine, shape, aff0).reshape(-1)
            there = index >= 0
            index = np.where(there, index, 0)
            est, var, ok = est[index], var[index], ok[index] & there
            resampled.append(labels[i])
        inside &= ok
        estimates.append(est)
        variances.append(var)
    sel = np.flatnonzero(inside)
    B = np.stack([b_[sel] for b_ in estimates]).astype(np.float64)
    V = np.stack([v_[sel] for v_ in variances]).astype(np.float64)
    dfs = np.array([m.df for m in run_maps], dtype=np.float64)
    check_tail(tail)
    fe = fixed_effects(B, V, dfs, want_p="q_p" in stats)
    good = sel[fe.valid]
    df_total = float(dfs.sum())

    def vol(name: str, values: np.ndarray, outside: float = 0.0) -> np.ndarray | None:
        if name not in stats and name != "t":
            return None
        out = np.full(n_all, outside, dtype=np.float32)
        out[good] = values[fe.valid]
        return out.reshape(shape)

    # p, z and -log10 p from the combined t on sum(df_i) through the exact tails
    t_ok = np.where(fe.valid, fe.t, 0.0)
    z = vol("z", z_from_t(t_ok, df_total)) if "z" in stats else None
    p_map = vol("p", p_from_t(t_ok, df_total, tail), 1.0) if "p" in stats else None
    nl10 = (
        vol("neglog10p", neglog10p_from_t(t_ok, df_total, tail)) if "neglog10p" in stats else None
    )
    valid_mask = np.zeros(n_all, dtype=bool)
    valid_mask[good] = True
    first_map = run_maps[0]
    out = CombinedMapResult(
        t=vol("t", fe.t),
        estimate=vol("estimate", fe.estimate),
        variance=vol("variance", fe.variance),
        z=z,
        p=p_map,
        neglog10p=nl10,
        tail=tail,
        mask=valid_mask.reshape(shape),
        degenerate=np.zeros(shape, dtype=bool),
        rho=None,
        kernel=kernel,
        contrast=first_map.contrast,
        noise=first_map.noise,
        df=int(df_total) if df_total.is_integer() else df_total,
        weights=first_map.weights,
        columns=first_map.columns,
        affine=aff0,
        settings=settings if settings is not None else run_maps[0].settings,
        rho_step=None,
        q=vol("q", fe.q),
        q_p=vol("q_p", fe.q_p, 1.0),
        run_maps=tuple(run_maps),
        labels=tuple(labels),
        resampled=tuple(resampled),
        paths=tuple(str(getattr(r, "path", "")) for r in runs),
    )
    if "t" not in stats:
        out.t = None
    return out
