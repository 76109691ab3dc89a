"""Whole-volume maps: the single-voxel fit, run on every voxel of a mask.

A map goes through exactly the code that fits one clicked voxel,
:func:`voxelscope.core.glm.fit` with the analysis's prepared design and contrast (as
:meth:`voxelscope.core.model.Analysis.fit_voxel` calls it), on blocks of voxels (the
columns of ``Y``). Blocks come from :meth:`voxelscope.core.run.Run.iter_blocks` in the
store's own layout (a view of the mapped file or of the voxel-major cache where it can
be, never a transposing copy); :func:`~voxelscope.core.glm.fit` centres every voxel and
computes its residuals explicitly in float64, so a raw-BOLD-like run (mean 10000) keeps
its digits. Blocks are about a thousand voxels, so the float64 working set stays in cache
and memory stays bounded whatever the size of the run.

Under AR(1) noise every voxel is prewhitened with its own rho, exactly as a single voxel
is (see :func:`voxelscope.core.glm.fit`); ``rho_step`` optionally rounds rho first.

Values outside the mask, and at degenerate voxels (constant over time, or fitted exactly),
are 0 in ``t``, ``z``, ``estimate`` and ``variance`` and 1 in ``p``: never a huge t. Such voxels
are False in :attr:`MapResult.mask`.

Examples
--------
>>> from voxelscope.core.events import Condition
>>> from voxelscope.core.model import Analysis, ModelSettings
>>> run = ArrayRun(np.random.default_rng(0).normal(100, 1, (4, 4, 3, 60)).astype(np.float32))
>>> a = Analysis([Condition("tone", [10.0, 40.0], [10.0, 10.0])], n_volumes=60, tr=1.25)
>>> m = compute_map(run, a, ModelSettings(), "double-gamma")
>>> m.t.shape, m.t.dtype.name, m.df, int(m.mask.sum())
((4, 4, 3), 'float32', 57, 48)
"""

from __future__ import annotations

import os
from collections import deque
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .blas import one_blas_thread
from .errors import Cancelled, InputError
from .glm import fit
from .model import Analysis, ModelSettings
from .pvalues import check_tail, neglog10p_from_t, p_from_t, z_from_t

__all__ = [
    "DEFAULT_CHUNK_VOXELS",
    "EARLIER_STAT_NAMES",
    "STAT_NAMES",
    "ArrayRun",
    "Cancelled",
    "MapResult",
    "compute_map",
    "kernel_difference",
]

#: Statistics a map can hold (``estimate``: the contrast's ``c'b``).
STAT_NAMES = ("t", "estimate", "variance", "z", "p", "neglog10p")
#: Earlier names of statistics, still accepted where users have them (``--stat beta``, a
#: saved session's map statistic) -> today's name.
EARLIER_STAT_NAMES = {"beta": "estimate"}

#: Voxels per block: 1024 x 300 volumes of float64 is 2.4 MB, so each block's working
#: copies stay in cache. Measured on the 64x64x40x300 benchmark run (2 cores, CPU time per
#: map, best of several): 1024 was fastest for OLS (0.136 s) and AR(1) (0.65 s); 2048 was
#: within 3 %, 256-512 lost 5-15 % to per-call overhead and 4096 lost 25-45 % to cache
#: misses.
DEFAULT_CHUNK_VOXELS = 1024

ProgressCallback = Callable[[float], "bool | None"]

_NOISE_LABEL = {"ols": "OLS", "ar1": "AR(1)", "arp": "AR(p) (bias-corrected, smoothed)"}
_TAIL_LABEL = {
    "two": "two-sided",
    "positive": "one-sided (positive)",
    "negative": "one-sided (negative)",
}


@dataclass(eq=False)
class MapResult:
    """A whole-volume fit of one kernel and one contrast.

    Attributes
    ----------
    t, estimate, variance, z, p : ndarray (X, Y, Z) float32 (variance float64) or None
        The statistics asked for (None for the others); ``estimate`` is the contrast's
        ``c'b``. Outside :attr:`mask` they are 0
        (``p`` is 1). ``z`` is exact at any t (:func:`voxelscope.core.pvalues.z_from_t`);
        ``p`` is for :attr:`tail` (two-sided by default) and underflows to 0 in float32
        from about t = 19; :attr:`neglog10p` does not.
    mask : ndarray of bool (X, Y, Z)
        Voxels that were fitted and are not degenerate.
    degenerate : ndarray of bool (X, Y, Z)
        Fitted voxels without residual variance (constant over time, or fitted exactly).
    rho : ndarray (X, Y, Z) float32 or None
        AR(1) coefficient per voxel under AR(1); None for OLS.
    kernel : str
    contrast : str
        The contrast expression.
    noise : {"ols", "ar1"}
    df : int
        Residual degrees of freedom ``n - rank`` (the same at every voxel).
    df_eff : ndarray (X, Y, Z) float32 or None
        Under the default AR(p) model: each voxel's effective df, which its p, z and
        -log10 p use (:func:`voxelscope.core.noise.arp_effective_df`; 0 outside the mask).
    data_fwhm_mm : tuple of float or None
        The run's smoothness that entered ``df_eff`` (:func:`voxelscope.core.noise.run_smoothness`).
    weights : ndarray
        Contrast weights on the design columns.
    columns : tuple of str
        Design column names.
    affine : ndarray (4, 4) or None
        The run's voxel -> mm affine.
    settings : ModelSettings or None
    rho_step : float or None
    neglog10p : ndarray (X, Y, Z) float32 or None
        ``-log10 p`` for :attr:`tail`; 0 outside the mask.
    tail : {"two", "positive", "negative"}
        The tail ``p`` and ``neglog10p`` are stated for.
    ar : ndarray (X, Y, Z, order) float32 or None
        Under the AR(p) model: the smoothed, bias-corrected AR coefficients every voxel was
        prewhitened with (:mod:`voxelscope.core.noise`).
    """

    t: np.ndarray | None
    estimate: np.ndarray | None
    variance: np.ndarray | None
    z: np.ndarray | None
    p: np.ndarray | None
    mask: np.ndarray
    degenerate: np.ndarray
    rho: np.ndarray | None
    kernel: str
    contrast: str
    noise: str
    df: int
    weights: np.ndarray = field(default_factory=lambda: np.zeros(0))
    columns: tuple[str, ...] = ()
    affine: np.ndarray | None = None
    settings: ModelSettings | None = None
    rho_step: float | None = None
    neglog10p: np.ndarray | None = None
    tail: str = "two"
    ar: np.ndarray | None = None
    df_eff: np.ndarray | None = None
    data_fwhm_mm: tuple[float, ...] | None = None

    @property
    def shape(self) -> tuple[int, int, int]:
        return tuple(int(n) for n in self.mask.shape)  # type: ignore[return-value]

    @property
    def n_voxels(self) -> int:
        """Number of fitted, non-degenerate voxels."""
        return int(np.count_nonzero(self.mask))

    def stat(self, name: str) -> np.ndarray:
        """One statistic by name (``t``, ``estimate``, ``variance``, ``z``, ``p``, ``neglog10p``
        or ``rho``).

        Raises
        ------
        InputError
            Unknown name, or a statistic that was not computed.
        """
        if name not in (*STAT_NAMES, "rho"):
            raise InputError(f"unknown map statistic '{name}'; use {', '.join(STAT_NAMES)}")
        value = getattr(self, name)
        if value is None:
            raise InputError(
                f"the map has no '{name}' (computed: "
                f"{', '.join(s for s in STAT_NAMES if getattr(self, s) is not None)})"
            )
        return value

    def df_text(self) -> str:
        """The df in a few words: ``df 188``, or the effective df's median and range.

        >>> m = np.ones((1, 1, 2), dtype=bool)
        >>> r = MapResult(None, None, None, None, None, m, ~m, None, "gamma", "tone", "arp", 190,
        ...               df_eff=np.array([[[150.0, 171.0]]], np.float32))
        >>> r.df_text()
        'effective df 160.5 (150.0-171.0; n - rank 190)'
        """
        if self.df_eff is None or not self.mask.any():
            return f"df {self.df}"
        d = self.df_eff[self.mask]
        return (
            f"effective df {float(np.median(d)):.1f} ({float(d.min()):.1f}-{float(d.max()):.1f}; "
            f"n - rank {self.df})"
        )

    def describe(self) -> str:
        """One line: kernel, contrast, noise model, df and voxel counts."""
        deg = int(np.count_nonzero(self.degenerate))
        text = (
            f"kernel {self.kernel}, contrast '{self.contrast}', "
            f"{_NOISE_LABEL.get(self.noise, self.noise)} noise, "
            f"{self.df_text()}, {self.n_voxels} voxels, p {_TAIL_LABEL.get(self.tail, self.tail)}"
        )
        if deg:
            text += f" ({deg} constant or exactly fitted voxels set to 0)"
        return text


class ArrayRun:
    """A run held in a NumPy array, with the parts of the Run interface maps need.

    For notebooks and tests: ``data`` is (X, Y, Z, T); ``mask()`` is every voxel whose
    time series is finite and not constant.

    Parameters
    ----------
    data : ndarray (X, Y, Z, T)
    affine : ndarray (4, 4), optional
    tr : float
        Seconds.

    Examples
    --------
    >>> r = ArrayRun(np.ones((2, 2, 2, 5), dtype=np.float32))
    >>> r.shape, r.n_volumes, bool(r.mask().any())
    ((2, 2, 2), 5, False)
    """

    def __init__(self, data: np.ndarray, affine: np.ndarray | None = None, tr: float = 1.0):
        data = np.asarray(data)
        if data.ndim != 4:
            raise InputError(f"a run must be 4D, not shape {data.shape}")
        self.data = data
        self.shape = tuple(int(n) for n in data.shape[:3])
        self.n_volumes = int(data.shape[3])
        self.affine = np.eye(4) if affine is None else np.asarray(affine, dtype=np.float64)
        self.tr = float(tr)
        self.reference_time_s = 0.0
        self.path = None
        self.header = None
        self.warnings: list[str] = []

    def mask(self) -> np.ndarray:
        flat = self.data.reshape(-1, self.n_volumes)
        finite = np.all(np.isfinite(flat), axis=1)
        varies = np.ptp(np.where(finite[:, None], flat, 0), axis=1) > 0
        return (finite & varies).reshape(self.shape)

    def iter_rows(
        self, mask: np.ndarray | None = None, chunk_voxels: int = 4096
    ) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        mask = self.mask() if mask is None else np.asarray(mask, dtype=bool)
        flat = np.flatnonzero(mask)
        rows = self.data.reshape(-1, self.n_volumes)
        for a in range(0, flat.size, chunk_voxels):
            idx = flat[a : a + chunk_voxels]
            yield idx, np.asarray(rows[idx], dtype=np.float32)

    def iter_blocks(
        self, mask: np.ndarray | None = None, block_voxels: int = 1024
    ) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        """(flat_idx, float32 (T, n)) blocks in C order, as :meth:`Run.iter_blocks`."""
        for idx, rows in self.iter_rows(mask, chunk_voxels=block_voxels):
            yield idx, rows.T

    def voxel_to_mm(self, ijk: Any) -> np.ndarray:
        ijk = np.asarray(ijk, dtype=np.float64)
        return ijk @ self.affine[:3, :3].T + self.affine[:3, 3]


def _check_mask(run: Any, mask: np.ndarray | None) -> np.ndarray:
    shape = tuple(int(n) for n in run.shape)
    if mask is None:
        return np.asarray(run.mask(), dtype=bool)
    mask = np.asarray(mask)
    if mask.shape != shape:
        raise InputError(
            f"the mask has shape {mask.shape} but the run grid is {'x'.join(map(str, shape))}; "
            "give a mask on the run's grid"
        )
    return mask.astype(bool, copy=False)


def _workers(workers: int | None) -> int:
    if workers is None:
        return max(1, min(2, os.cpu_count() or 1))
    if int(workers) < 1:
        raise InputError("workers must be at least 1")
    return int(workers)


def _scatter(
    res,
    idx: np.ndarray,
    flat: dict[str, np.ndarray],
    want: set[str],
    fitted: np.ndarray,
    degenerate: np.ndarray,
    rho: np.ndarray | None,
    tail: str = "two",
) -> None:
    """Copy one chunk's fit into the flat output maps (0 / p = 1 where degenerate)."""
    deg = res.degenerate
    good = ~deg
    fitted[idx] = True
    degenerate[idx] = deg
    t = np.where(good, res.t, 0.0)
    flat["t"][idx] = t
    if "estimate" in want:
        flat["estimate"][idx] = np.where(good, res.estimate, 0.0)
    if "variance" in want:
        flat["variance"][idx] = np.where(good, res.variance, 0.0)
    if "p" in want:
        p = res.p if tail == "two" and res.p is not None else p_from_t(t, res.df_used, tail)
        flat["p"][idx] = np.where(good, p, 1.0)
    if "z" in want:
        flat["z"][idx] = np.where(good, z_from_t(t, res.df_used), 0.0)
    if "neglog10p" in want:
        flat["neglog10p"][idx] = np.where(good, neglog10p_from_t(t, res.df_used, tail), 0.0)
    if rho is not None and res.rho is not None:
        rho[idx] = res.rho


def _for_blocks(chunks, work, store, n_workers: int, with_index: bool = False) -> None:
    """``store(idx, work(data))`` for every block, on ``n_workers`` threads in order.

    The main thread reads block k+1 while the workers fit earlier ones (NumPy and BLAS
    release the GIL); at most 2 blocks per worker are in flight.
    """

    def call(idx, data):
        return work(idx, data) if with_index else work(data)

    if n_workers == 1:
        for idx, data in chunks:
            store(idx, call(idx, data))
        return
    with ThreadPoolExecutor(n_workers, thread_name_prefix="voxelscope-map") as pool:
        pending: deque = deque()
        try:
            for idx, data in chunks:
                pending.append((idx, pool.submit(call, idx, data)))
                while len(pending) > 2 * n_workers:
                    i, fut = pending.popleft()
                    store(i, fut.result())
            while pending:
                i, fut = pending.popleft()
                store(i, fut.result())
        finally:
            for _i, fut in pending:
                fut.cancel()


#: Fewest voxels per piece of a one-pass AR(p) map's work after the pass (from the sums,
#: not the data). A map's voxels go in about one piece per worker: each step of a piece
#: is a few hundred NumPy calls on whole rows of the piece, and pieces of a few thousand
#: voxels spent more time taking turns at the interpreter lock than computing (measured
#: on 2 cores, 163,840 voxels: the steps after the pass took 1.1x the time of one worker
#: on two with pieces of 8,192 voxels, 0.6x with two pieces). Inside a piece the solves
#: and autocovariances go in cache-sized parts of noise.SOLVE_PIECE voxels.
SOLVE_VOXELS = 8192


def _working_series(run: Any, prep: Any, flat_idx: np.ndarray) -> np.ndarray:
    """The fit's working copy (:func:`voxelscope.core.glm.working_copy`) of some voxels,
    read again from the run: near-exact fits of a one-pass AR(p) map need their residuals
    explicitly."""
    from .glm import working_copy

    if hasattr(run, "timeseries_many"):
        rows = np.asarray(run.timeseries_many(flat_idx), dtype=np.float32)
    else:
        rows = np.asarray(run.data.reshape(-1, run.n_volumes)[flat_idx], dtype=np.float32)
    data = rows.T
    if getattr(prep, "keep", None) is not None:
        data = data[prep.keep]
    return working_copy(prep, data)[0]


#: Volumes read first to guess the brain mask for a one-pass map (:func:`_one_pass`).
GUESS_VOLUMES = 8
#: A one-pass map when the guess holds at least this share of the grid. Below it, the
#: voxels outside the guess are cheaper to summarise in the run's own streaming pass than
#: block by block (measured on 64x64x40x300 runs, 2 workers: one pass 0.65-0.95x of two
#: at 100 % of the grid bright, 1.13x at 60 %, 1.2x at 31 %).
ONE_PASS_SHARE = 0.9


def _one_pass(
    run: Any, guess: np.ndarray, fit_chunk, store, advance, n_workers: int, block: int
) -> np.ndarray:
    """Fit the voxels the brain mask will probably hold while gathering the run's summary,
    in one pass over a plain memory-mapped run; return the run's brain mask.

    ``fit_chunk(idx, data)`` fits (or, under AR(p), takes the one-pass sums of) a (T, n)
    block and returns something with each voxel's ``tss`` (its working copy's sum of
    squares); ``store(idx, result)`` keeps it; ``advance(n)`` counts voxels only summarised.

    The mask needs every voxel's mean (the intensity rule), which used to cost a pass of
    its own before the fit. Here the blocks of the whole grid are read once, in file
    order; every voxel's sum over time is taken as the summary pass takes it
    (:class:`~voxelscope.core.summary.BlockSummary`, equal bit for bit), and the voxels
    of ``guess`` (:meth:`Run.likely_mask` from the first volumes, the cache's margin below
    the threshold) are fitted, their working copy telling which are constant. The summary
    then decides the mask by the one rule (:meth:`Run.adopt_summary`, :meth:`Run.mask`);
    voxels of the mask outside the guess, if any, are fitted afterwards. Every voxel is
    fitted exactly as a two-pass map fits it; the caller sets voxels outside the mask to 0.
    """
    shape = tuple(int(n) for n in run.shape)
    guess = guess.reshape(-1)
    gather = run.summary_gatherer()

    def work(idx: np.ndarray, data: np.ndarray):
        totals = gather.totals(data)
        inside = guess[idx]
        if inside.all():
            return None, totals, fit_chunk(idx, data), None
        pick = np.flatnonzero(inside)
        res = None
        rest = data  # no voxel of the guess: the block as it is
        if pick.size:  # np.take copies columns of a strided view ~6x faster than data[:, i]
            res = fit_chunk(idx[pick], np.take(data, pick, axis=1))
            rest = np.take(data, np.flatnonzero(~inside), axis=1)
        with np.errstate(invalid="ignore"):
            flat_ = rest.min(axis=0) == rest.max(axis=0)
        return inside, totals, res, flat_

    def keep(idx: np.ndarray, got) -> None:
        inside, totals, res, flat_ = got
        constant = np.zeros(idx.size, dtype=bool)
        if res is not None:
            # a constant float32 series centres to exact zeros (its float64 mean is exact)
            if inside is None:
                constant[:] = res.tss == 0.0
                store(idx, res)
            else:
                constant[inside] = res.tss == 0.0
                store(idx[inside], res)
        if flat_ is not None:
            constant[~inside] = flat_
            advance(int(np.count_nonzero(~inside)))
        gather.add(idx, totals, constant)

    with one_blas_thread():
        blocks = run.iter_blocks(np.ones(shape, dtype=bool), block_voxels=block)
        _for_blocks(blocks, work, keep, n_workers, with_index=True)
    run.adopt_summary(gather.summary(int(run.n_volumes)))
    mask = np.asarray(run.mask(), dtype=bool)
    missed = mask & ~guess.reshape(shape)
    if missed.any():
        with one_blas_thread():
            blocks = run.iter_blocks(missed, block_voxels=block)
            _for_blocks(blocks, fit_chunk, store, n_workers, with_index=True)
    return mask


def compute_map(
    run: Any,
    analysis: Analysis,
    settings: ModelSettings,
    kernel: str | None = None,
    mask: np.ndarray | None = None,
    rho_step: float | None = None,
    chunk_voxels: int = DEFAULT_CHUNK_VOXELS,
    progress: ProgressCallback | None = None,
    stats: Sequence[str] = STAT_NAMES,
    workers: int | None = None,
    tail: str = "two",
    data_fwhm_mm: Sequence[float] | None = None,
) -> MapResult:
    """Fit one kernel at every voxel of a mask and return the contrast's maps.

    Parameters
    ----------
    run : Run
        Anything with ``shape``, ``n_volumes``, ``affine``, ``mask()`` and
        ``iter_blocks(mask, block_voxels)`` (or only ``iter_rows(mask, chunk_voxels)``);
        see :class:`voxelscope.core.run.Run`.
    analysis : Analysis
        Conditions and confounds of the run.
    settings : ModelSettings
        Contrast, noise model, drift, confounds, onset shift, derivatives.
    kernel : str, optional
        Kernel name; default the first of ``settings.kernels``.
    mask : ndarray of bool, optional
        Voxels to fit; default ``run.mask()``. When that mask is still to be decided from
        a plain float32 ``.nii`` that is bright almost everywhere, the run is read once for
        both: its summary is gathered while fitting (:func:`_one_pass`), with the same
        mask and the same numbers as fitting after the summary pass.
    rho_step : float or None
        AR(1) only: round rho to this step first (None, the default: exact per voxel).
    chunk_voxels : int
        Voxels per fit call (one block); default :data:`DEFAULT_CHUNK_VOXELS`.
    progress : callable, optional
        ``progress(fraction)`` after each chunk; returning False cancels.
    stats : sequence of str
        Statistics to keep (any of :data:`STAT_NAMES`).
    workers : int, optional
        Threads fitting blocks side by side (each with single-threaded BLAS) while the
        next block is read; default ``min(2, cores)``. Results do not depend on it.
    tail : {"two", "positive", "negative"}
        Tail of ``p`` and ``neglog10p`` (two-sided by default; ``z`` does not depend on it).
    data_fwhm_mm : sequence of 3 float, optional
        AR(p) only: the run's smoothness (mm per axis) for the effective df; default
        estimated from ``run`` (:func:`voxelscope.core.noise.run_smoothness`). A few planes
        fitted as a run of their own (the window's preview) pass the whole run's.

    Returns
    -------
    MapResult

    Raises
    ------
    Cancelled
        The progress callback returned False.
    InputError, ModelError
        Bad mask, contrast or model (one line each).
    """
    stats = tuple(stats)
    check_tail(tail)
    for s in stats:
        if s not in STAT_NAMES:
            raise InputError(f"unknown map statistic '{s}'; use {', '.join(STAT_NAMES)}")
    if chunk_voxels < 1:
        raise InputError("chunk_voxels must be at least 1")
    if int(run.n_volumes) != analysis.n_volumes:
        raise InputError(
            f"the run has {run.n_volumes} volumes but the model was built for {analysis.n_volumes}"
        )
    kernel = str(kernel if kernel is not None else settings.kernels[0])
    design, _prep = analysis.prepared(kernel, settings)  # raises ModelError early
    weights = analysis.contrast_weights(kernel, settings)
    ar1 = settings.noise == "ar1"
    shape = tuple(int(n) for n in run.shape)
    n_all = int(np.prod(shape))
    # the run's own mask still to be decided from a plain .nii: gather its summary while
    # fitting (_one_pass) instead of reading the run once for the mask and once to fit
    guess = None
    if (
        mask is None
        and settings.noise in ("ols", "ar1", "arp")
        and _prep.keep is None
        and _prep.constant_index is not None
        and callable(getattr(run, "mask_pending", None))
        and run.mask_pending()
    ):
        guess = np.asarray(run.likely_mask(GUESS_VOLUMES), dtype=bool)
        if np.count_nonzero(guess) < ONE_PASS_SHARE * guess.size:
            guess = None  # much background: the summary's own streaming pass is cheaper
    one_pass = guess is not None
    mask = None if one_pass else _check_mask(run, mask)
    total = n_all if one_pass else int(np.count_nonzero(mask))

    # Flat float32 outputs, filled chunk by chunk; variance in float64, since it squares the
    # data's units and a run in huge units would overflow float32 to inf.
    want = set(stats) | {"t"}
    flat = {
        s: np.zeros(n_all, dtype=np.float64 if s == "variance" else np.float32)
        for s in want
        if s != "p"
    }
    if "p" in want:
        flat["p"] = np.ones(n_all, dtype=np.float32)
    fitted = np.zeros(n_all, dtype=bool)
    degenerate = np.zeros(n_all, dtype=bool)
    rho = np.zeros(n_all, dtype=np.float32) if ar1 else None
    df = int(_prep.df)

    done = 0
    if progress is not None and progress(0.0) is False:
        raise Cancelled("the map was cancelled")
    n_workers = _workers(workers)
    step = rho_step if ar1 else None

    need_p = "p" in want and tail == "two"
    noise = settings.noise
    arp = noise == "arp"
    ar_map = None
    df_flat = None
    fwhm_data = None
    share = 0.85 if arp else 0.0  # of the progress bar spent on the pass over the data

    def report(fraction: float) -> None:
        if progress is not None and progress(fraction) is False:
            raise Cancelled("the map was cancelled")

    def chunks():
        if hasattr(run, "iter_blocks"):
            return run.iter_blocks(mask, block_voxels=int(chunk_voxels))
        # a run with only the row interface: (n, T) rows, transposed (a view)
        return ((i, d.T) for i, d in run.iter_rows(mask, chunk_voxels=int(chunk_voxels)))

    def advance(n: int) -> None:
        nonlocal done
        done += n
        report(share + (1.0 - share) * (min(1.0, done / total) if total else 1.0))

    def store(idx: np.ndarray, res) -> None:
        _scatter(res, idx, flat, want, fitted, degenerate, rho, tail)
        advance(idx.size)

    if arp:
        # One pass over the data keeps a few sums per voxel (voxelscope.core.noise, "one
        # pass"): the bias-corrected autocovariances of the OLS residuals, smoothed in the
        # mask, give every voxel's AR(p) coefficients, and the same sums give its GLS.
        from .glm import arp_block_sums, censored_design, fit_sums
        from .noise import (
            AR_ORDER,
            BIAS_LAGS,
            ArpSums,
            ar_from_smoothed,
            arp_autocov,
            run_or_index,
            smooth_map,
        )

        _prep = censored_design(_prep)  # censored volumes inside the run: exact
        order = AR_ORDER
        n_lags = max(order, BIAS_LAGS)
        values = np.zeros((n_all, n_lags + 1))
        valid = np.zeros(n_all, dtype=bool)
        blocks_in: list = []  # (voxel indices, sums) of every block, in the order they came
        seen = 0

        def block_sums(_idx: np.ndarray, data: np.ndarray):
            return arp_block_sums(_prep, data, n_lags, autocov=False)

        def store_sums(idx: np.ndarray, out) -> None:
            nonlocal seen
            blocks_in.append((idx, out))  # kept as they came: nothing copied on this thread
            seen += idx.size
            report(share * seen / total if total else share)

        if one_pass:  # the sums of the guessed voxels while gathering the summary
            mask = _one_pass(
                run, guess, block_sums, store_sums, lambda n: None, n_workers, int(chunk_voxels)
            )
            in_mask = mask.reshape(-1)
            inside_blocks = []  # only the voxels of the mask decided on the way
            for idx, out in blocks_in:
                inside = in_mask[idx]
                if inside.all():
                    inside_blocks.append((idx, out))
                elif inside.any():
                    pick = np.flatnonzero(inside)
                    inside_blocks.append((idx[pick], out.take(pick)))
            blocks_in = inside_blocks
            seen = sum(int(idx.size) for idx, _out in blocks_in)
            total = int(np.count_nonzero(in_mask))
        else:
            with one_blas_thread():
                _for_blocks(chunks(), block_sums, store_sums, n_workers, with_index=True)

        def parallel(fn, items) -> list:
            # [fn(item) for item in items], on the map's workers
            items = list(items)
            got: list = [None] * len(items)
            _for_blocks(
                ((i, item) for i, item in enumerate(items)),
                lambda _i, item: fn(item),
                got.__setitem__,
                n_workers,
                with_index=True,
            )
            return got

        # each voxel's effective df: the df of its smoothed autocorrelations (the run's
        # smoothness, the kernel, the voxel's share at the edge) and its whitened contrast
        from .noise import (
            TauTable,
            edge_share,
            effective_df,
            rho_df,
            run_smoothness,
            voxel_sizes,
        )

        # about one piece per worker (consecutive blocks, joined on the workers):
        # the residual autocovariances from the sums, then later the solves; small
        # products over a piece cost less per voxel than over a block
        where = np.concatenate([i for i, _o in blocks_in]) if blocks_in else np.zeros(0, int)
        piece_voxels = max(SOLVE_VOXELS, -(-where.size // n_workers))
        groups: list = []
        start, cur, n_cur = 0, [], 0
        for idx, out in blocks_in:
            cur.append(out)
            n_cur += int(idx.size)
            if n_cur >= piece_voxels:
                groups.append((slice(start, start + n_cur), cur))
                start, cur, n_cur = start + n_cur, [], 0
        if cur:
            groups.append((slice(start, start + n_cur), cur))
        blocks_in = []

        def join(group) -> ArpSums:
            sl, outs = group
            piece = outs[0] if len(outs) == 1 else ArpSums.concat(outs)
            outs.clear()  # the blocks go as their piece comes: memory stays at one copy
            idx = where[sl]
            arp_autocov(_prep, piece, lambda i: _working_series(run, _prep, idx[i]))
            at = run_or_index(idx)  # each piece its own voxels: no two workers write one
            values[at] = piece.v.T
            valid[at] = piece.ok
            return piece

        with one_blas_thread():
            pieces = parallel(join, groups)
        slices = [sl for sl, _outs in groups]
        groups = []

        sizes = voxel_sizes(getattr(run, "affine", np.eye(4)))
        in_mask = valid.reshape(shape) & mask
        with ThreadPoolExecutor(1, thread_name_prefix="voxelscope-map") as side:
            # the edge share beside the smoothing (both are convolutions that release the
            # GIL); the smoothing's numerators and denominator go to the workers
            edge = side.submit(edge_share, in_mask, sizes)
            sm = smooth_map(values.reshape((*shape, n_lags + 1)), in_mask, run, parallel=parallel)
            del values
            sm = sm.reshape(-1, n_lags + 1)
            if data_fwhm_mm is None:
                fwhm_data = run_smoothness(run, _prep, mask)
            else:
                fwhm_data = tuple(float(v) for v in data_fwhm_mm)
            nu_rho = rho_df(_prep.df, sizes, fwhm_data) / edge.result().reshape(-1)
        phi_flat = np.zeros((order, n_all))
        df_flat = np.zeros(n_all)

        phi_seen = np.zeros((order, seen))

        def estimate(sl: slice, _none) -> np.ndarray:
            # each voxel's AR coefficients depend only on its smoothed values
            return ar_from_smoothed(sm[where[sl]].T, order, _prep)[0]

        def keep_phi(sl: slice, phi: np.ndarray) -> None:
            phi_seen[:, sl] = phi

        with one_blas_thread():  # small products: one BLAS thread is faster, as above
            _for_blocks(((sl, None) for sl in slices), estimate, keep_phi, n_workers, True)
            # sum tau^2 of the effective df on one grid of AR coefficients for the whole
            # map (noise.TauTable): the pieces share most of its points
            table = TauTable.build(_prep, phi_seen, weights, parallel=parallel)

            def fit_piece(sl: slice, part):
                phi = phi_seen[:, sl]
                idx = where[sl]
                tau2 = table.at(phi)
                return fit_sums(
                    _prep,
                    part,
                    weights,
                    phi,
                    want_p=need_p,
                    series=lambda i: _working_series(run, _prep, idx[i]),
                    betas=False,
                    df_eff=effective_df(float(_prep.df), np.sqrt(tau2)[None], nu_rho[idx]),
                )

            def store_piece(sl: slice, res) -> None:
                idx = where[sl]
                at = run_or_index(idx)
                phi_flat[:, at] = res.ar
                df_flat[at] = res.df_eff
                store(idx, res)

            _for_blocks(zip(slices, pieces), fit_piece, store_piece, n_workers, True)
        del sm
        pieces = []
        ar_map = phi_flat.T.reshape((*shape, order)).astype(np.float32)
    else:

        def fit_chunk(idx: np.ndarray, data: np.ndarray):
            # what Analysis.fit_voxel does for one voxel, with p only when a map needs it
            return fit(
                _prep,
                data,
                weights,
                noise=noise,
                rho_step=step,
                keep_series=False,
                want_p=need_p,
            )

        if one_pass:
            mask = _one_pass(run, guess, fit_chunk, store, advance, n_workers, int(chunk_voxels))
            outside = ~mask.reshape(-1)
            for name, values in flat.items():  # guessed voxels the mask left out
                values[outside] = 1.0 if name == "p" else 0.0
            fitted[outside] = degenerate[outside] = False
            if rho is not None:
                rho[outside] = 0.0
        else:
            with one_blas_thread():
                _for_blocks(chunks(), fit_chunk, store, n_workers, with_index=True)
    if total == 0 and progress is not None:
        progress(1.0)

    def vol(name: str) -> np.ndarray | None:
        return flat[name].reshape(shape) if name in stats else None

    return MapResult(
        t=vol("t"),
        estimate=vol("estimate"),
        variance=vol("variance"),
        z=vol("z"),
        p=vol("p"),
        mask=(fitted & ~degenerate).reshape(shape),
        degenerate=degenerate.reshape(shape),
        rho=None if rho is None else rho.reshape(shape),
        kernel=kernel,
        contrast=settings.contrast or analysis.default_contrast(),
        noise=settings.noise,
        df=df,
        weights=np.asarray(weights),
        columns=tuple(design.names),
        affine=np.asarray(getattr(run, "affine", np.eye(4)), dtype=np.float64),
        settings=settings,
        rho_step=rho_step if ar1 else None,
        ar=ar_map,
        df_eff=None if df_flat is None else df_flat.reshape(shape).astype(np.float32),
        data_fwhm_mm=fwhm_data,
        neglog10p=vol("neglog10p"),
        tail=tail,
    )


def kernel_difference(map_a: MapResult, map_b: MapResult, stat: str = "t") -> np.ndarray:
    """Voxelwise difference ``a - b`` of one statistic of two maps (default t).

    Voxels outside either map's mask are 0.

    Parameters
    ----------
    map_a, map_b : MapResult
        Maps on the same grid (e.g. two kernels, same contrast).
    stat : str
        Statistic to subtract.

    Returns
    -------
    ndarray (X, Y, Z) float32

    Examples
    --------
    >>> m = np.ones((2, 1, 1), dtype=bool)
    >>> a = MapResult(np.array([[[3.0]], [[1.0]]], np.float32), None, None, None, None,
    ...               m, ~m, None, "gamma", "tone", "ols", 10)
    >>> b = MapResult(np.array([[[1.0]], [[2.0]]], np.float32), None, None, None, None,
    ...               m, ~m, None, "boxcar", "tone", "ols", 10)
    >>> kernel_difference(a, b).ravel().tolist()
    [2.0, -1.0]
    """
    if map_a.shape != map_b.shape:
        raise InputError(
            f"the maps have different grids {map_a.shape} and {map_b.shape}; "
            "compare maps of the same run"
        )
    a = map_a.stat(stat)
    b = map_b.stat(stat)
    both = map_a.mask & map_b.mask
    return np.where(both, a.astype(np.float32) - b.astype(np.float32), np.float32(0.0)).astype(
        np.float32
    )
