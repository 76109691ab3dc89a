"""Per-voxel facts gathered in one pass over a run: mean, non-finite and constant flags.

The run's brain mask (:mod:`voxelscope.core.mask`) is decided from them, and the cache
keeps them beside its rows.

Examples
--------
>>> from pathlib import Path
>>> layout = RawLayout(Path("x.nii"), 352, np.dtype("<f4"), (2, 1, 1, 3), 1.0, 0.0, False)
>>> batch = np.array([[[[1.0, 5.0]]], [[[1.0, 6.0]]], [[[1.0, np.nan]]]], np.float32)
>>> s = summarize_volumes(iter([batch]), layout)
>>> s.mean.ravel().tolist(), s.constant.ravel().tolist(), s.nonfinite.ravel().tolist()
([1.0, 0.0], [True, False], [False, True])
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np

from voxelscope.core.rawfile import RawLayout, scale_raw

__all__ = ["BlockSummary", "Stats", "Summary", "summarize_volumes"]


@dataclass
class Summary:
    """Per-voxel facts gathered while reading the run once.

    ``mean`` is float32 (X, Y, Z), 0 where a voxel has a non-finite value;
    ``nonfinite`` marks voxels with a NaN or infinite value in any volume;
    ``constant`` marks voxels whose value never changes.
    """

    mean: np.ndarray
    nonfinite: np.ndarray
    constant: np.ndarray


def _summary(mean_raw, vmin, vmax, layout: RawLayout) -> Summary:
    """Summary from (Z, Y, X) raw-unit accumulators."""
    with np.errstate(invalid="ignore", over="ignore"):
        mean = (mean_raw * layout.slope + layout.inter).transpose(2, 1, 0)
        nonfinite = ~np.isfinite(mean)
        constant = (vmax == vmin).transpose(2, 1, 0) & ~nonfinite
    mean = np.where(nonfinite, 0.0, mean).astype(np.float32)
    return Summary(
        mean=np.ascontiguousarray(mean),
        nonfinite=np.ascontiguousarray(nonfinite),
        constant=np.ascontiguousarray(constant),
    )


class Stats:
    """Running sum, minimum and maximum per voxel over raw (B, Z, Y, X) batches."""

    def __init__(self) -> None:
        self.total: np.ndarray | None = None
        self.vmin: np.ndarray | None = None
        self.vmax: np.ndarray | None = None
        self.n = 0

    def add(self, v: np.ndarray) -> None:
        with np.errstate(invalid="ignore", over="ignore"):
            # per batch in the data's own precision (integers: int64), summed in float64
            s = v.sum(axis=0).astype(np.float64, copy=False)
            bmin, bmax = v.min(axis=0), v.max(axis=0)
        if self.total is None:
            self.total, self.vmin, self.vmax = s.copy(), bmin, bmax
        else:
            self.total += s
            np.minimum(self.vmin, bmin, out=self.vmin)
            np.maximum(self.vmax, bmax, out=self.vmax)
        self.n += v.shape[0]

    def summary(self, layout: RawLayout) -> Summary:
        return _summary(self.total / self.n, self.vmin, self.vmax, layout)

    def known_values(self, layout: RawLayout) -> tuple[np.ndarray, np.ndarray]:
        """(known, value), (X, Y, Z): voxels whose every value is the same (NaN included),
        and that value scaled exactly as the rows are (float32 arithmetic)."""
        vmin = self.vmin.transpose(2, 1, 0)
        vmax = self.vmax.transpose(2, 1, 0)
        with np.errstate(invalid="ignore", over="ignore"):
            same = vmin == vmax
            if vmin.dtype.kind == "f":
                same |= np.isnan(vmin) & np.isnan(vmax) & np.isnan(self.total.transpose(2, 1, 0))
            value = scale_raw(vmin, layout)
        return same, value


def summarize_volumes(volumes: Iterator[np.ndarray], layout: RawLayout) -> Summary:
    """Summary from raw (unscaled) batches shaped (B, Z, Y, X); used for memory-mapped runs."""
    stats = Stats()
    for v in volumes:
        stats.add(v)
    return stats.summary(layout)


class BlockSummary:
    """A run's :class:`Summary` gathered from blocks of voxels instead of from volumes.

    For a whole-volume pass that reads (T, n) blocks of columns (voxels) of an unscaled
    float32 run: :meth:`totals` sums each column exactly as :class:`Stats` sums volumes
    (in float32 within a batch of ``batch`` volumes, the batch sums added in float64, in
    the same order), so the means, and the mask decided from them, equal those of
    :func:`summarize_volumes` bit for bit. ``constant`` is given by the caller (a fit's
    working copy knows it: a constant float32 series centres to exact zeros).

    Examples
    --------
    >>> from pathlib import Path
    >>> layout = RawLayout(Path("x.nii"), 352, np.dtype("<f4"), (2, 1, 1, 3), 1.0, 0.0, False)
    >>> vols = np.array([[[[1.0, 5.0]]], [[[1.0, 6.0]]], [[[1.0, 7.0]]]], np.float32)
    >>> g = BlockSummary((2, 1, 1), batch=2)
    >>> block = vols.reshape(3, 2)  # (T, n): column j is voxel j (here in C order as well)
    >>> g.add(np.array([0, 1]), g.totals(block), np.array([True, False]))
    >>> s, ref = g.summary(3), summarize_volumes(iter([vols[:2], vols[2:]]), layout)
    >>> s.mean.ravel().tolist() == ref.mean.ravel().tolist(), s.constant.ravel().tolist()
    (True, [True, False])
    """

    def __init__(self, shape: tuple[int, int, int], batch: int):
        self.shape = tuple(int(n) for n in shape)
        self.batch = int(batch)
        n = int(np.prod(self.shape))
        self.total = np.zeros(n)
        self.constant = np.zeros(n, dtype=bool)

    def totals(self, data: np.ndarray) -> np.ndarray:
        """Float64 sums over time of the float32 (T, n) columns, summed as :class:`Stats`."""
        total = None
        with np.errstate(invalid="ignore", over="ignore"):
            for t0 in range(0, data.shape[0], self.batch):
                s = data[t0 : t0 + self.batch].sum(axis=0).astype(np.float64, copy=False)
                if total is None:
                    total = s.copy()
                else:
                    total += s
        return total

    def add(self, flat_idx: np.ndarray, totals: np.ndarray, constant: np.ndarray) -> None:
        """Record some voxels (C-order flat indices): their totals and constant flags."""
        self.total[flat_idx] = totals
        self.constant[flat_idx] = constant

    def summary(self, n_volumes: int) -> Summary:
        """The summary of every voxel (each must have been added once)."""
        with np.errstate(invalid="ignore", over="ignore"):
            mean = self.total / n_volumes
            nonfinite = ~np.isfinite(mean)
        return Summary(
            mean=np.where(nonfinite, 0.0, mean).astype(np.float32).reshape(self.shape),
            nonfinite=nonfinite.reshape(self.shape),
            constant=(self.constant & ~nonfinite).reshape(self.shape),
        )
