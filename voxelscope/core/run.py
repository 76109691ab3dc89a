"""A 4D fMRI run: header, affine, TR, fast voxel time series, mean image and brain mask.

:func:`open_run` reads the header of a NIfTI-1 or NIfTI-2 run (``.nii`` or ``.nii.gz``)
and returns a :class:`Run`. Voxel data are served from one of three stores:

``"memmap"``
    An uncompressed ``.nii`` is memory-mapped as it lies on disk (x fastest). A voxel's
    time series is one strided read; whole-volume passes read the file in place, block by
    block (:meth:`Run.iter_blocks`), or slab by slab in C order (:meth:`Run.iter_chunks`).
``"cache"``
    A compressed run is decompressed once into the voxel-major cache
    (:mod:`voxelscope.core.cache`), which keeps the brain voxels; a time series is then
    one contiguous row. Voxels outside that never change are served exactly; any other
    voxel is read from the file.
``"memory"``
    A compressed run opened with ``use_cache=False`` (or whose cache cannot be written)
    is decompressed into memory in the same voxel-major float32 layout.
``"file"``
    A compressed run too big for the cache and for memory: voxels are read from the file
    on demand (slow, said in a warning).

All values are scaled (``scl_slope`` / ``scl_inter`` applied, as nibabel does).

Timing
------
The TR comes from, in order: the ``tr`` argument; the BIDS sidecar (``RepetitionTime``
in the ``.json`` named after the run); the header (``pixdim[4]`` in the unit given by
``xyzt_units``: seconds, milliseconds or microseconds). A header TR above
:data:`MS_THRESHOLD_S` "seconds" is read as milliseconds, with a warning; a TR still
outside :data:`PLAUSIBLE_TR_S` is an :class:`~voxelscope.core.errors.InputError` asking
for ``--tr``. When sidecar and header disagree, the sidecar wins and a warning says so.

``SliceTiming`` (sidecar, seconds) sets :attr:`Run.reference_time_s`, the time within each
TR at which the model's regressors are sampled: the median slice acquisition time, so the
sampled regressor is closest to the timing of the typical slice. Without ``SliceTiming``
it is 0.0 (the start of each volume's acquisition).

Examples
--------
>>> from nibabel.testing import data_path
>>> run = open_run(Path(data_path) / "functional.nii")
>>> run.shape, run.n_volumes, run.tr, run.tr_source, run.axcodes
((17, 21, 3), 20, 2.0, 'header', ('L', 'A', 'S'))
>>> run.timeseries((8, 10, 1)).shape
(20,)
"""

from __future__ import annotations

import math
import mmap
import os
import threading
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np
from nibabel.affines import apply_affine, voxel_sizes

from voxelscope.core import cache as _cache
from voxelscope.core.companions import find_companions, merge_sidecars, read_sidecar
from voxelscope.core.errors import InputError
from voxelscope.core.images import _check_affine, _check_dtype, load_nifti, nifti_affine

__all__ = [
    "MASK_FRACTION",
    "MASK_PERCENTILE",
    "MS_THRESHOLD_S",
    "PLAUSIBLE_TR_S",
    "Run",
    "brain_mask",
    "open_run",
    "resolve_tr",
    "sampling_reference",
]

#: A header TR above this many seconds is taken to be milliseconds (with a warning).
MS_THRESHOLD_S = 100.0
#: TRs (seconds) we accept from a header or sidecar: outside this range we ask for ``--tr``.
PLAUSIBLE_TR_S = (0.01, 100.0)
#: Brain mask: keep voxels whose mean exceeds this fraction of the robust maximum ...
MASK_FRACTION = 0.2
#: ... where the robust maximum is this percentile of the valid voxels' means.
MASK_PERCENTILE = 98.0

# Float32 bytes of one slab copied while iterating an uncompressed run in C order
# (iter_chunks); iter_blocks reads the file in place and copies at most one block.
_SLAB_BYTES = 32 * 1024 * 1024
# Columns of a memory-mapped run handed out as blocks before their pages are released.
_RELEASE_COLUMNS = 8192
# Blocks handed out but perhaps not yet consumed, whose pages are left alone.
_RELEASE_LAG_BLOCKS = 8

_TIME_FACTORS = {"sec": 1.0, "unknown": 1.0, "msec": 1e-3, "usec": 1e-6}


# --------------------------------------------------------------------------- stores


class _RawMemmap:
    """An uncompressed run memory-mapped as stored: (X, Y, Z, T), x fastest, raw values."""

    def __init__(self, raw: np.memmap, slope: float, inter: float):
        self.raw = raw
        self.slope = float(slope)
        self.inter = float(inter)
        self.shape = tuple(int(n) for n in raw.shape[:3])
        self.scaled = not (self.slope == 1.0 and self.inter == 0.0)
        self._map = getattr(raw, "_mmap", None)
        # where the array's first byte lies inside the mapping (numpy aligns the mapping
        # to the allocation granularity)
        self._shift = int(getattr(raw, "offset", 0)) % mmap.ALLOCATIONGRANULARITY

    def release(self, start: int, stop: int) -> None:
        """Drop the pages of array bytes ``[start, stop)`` from this process's memory.

        The file is mapped read-only, so the pages stay in the system's page cache and are
        read back on demand; this only keeps a pass over a large run from counting the
        whole file as the program's own memory. Partial pages at the ends are kept.
        """
        if self._map is None or not hasattr(self._map, "madvise"):
            return
        page = mmap.PAGESIZE
        lo = -(-(start + self._shift) // page) * page
        hi = ((stop + self._shift) // page) * page
        if hi > lo:
            try:
                self._map.madvise(mmap.MADV_DONTNEED, lo, hi - lo)
            except (OSError, ValueError, AttributeError):  # pragma: no cover - best effort
                self._map = None

    def _scale32(self, a: np.ndarray) -> np.ndarray:
        """Scaled float32 copy (never a view of the file)."""
        if not self.scaled:
            return np.array(a, dtype=np.float32)
        out = np.multiply(a, np.float32(self.slope), dtype=np.float32)
        if self.inter != 0.0:
            out += np.float32(self.inter)
        return out

    def row(self, flat: int) -> np.ndarray:
        i, j, k = np.unravel_index(flat, self.shape)
        series = np.asarray(self.raw[i, j, k, :], dtype=np.float64)
        return series * self.slope + self.inter if self.scaled else series

    def rows(self, flat_idx: np.ndarray) -> np.ndarray:
        i, j, k = np.unravel_index(flat_idx, self.shape)
        return self._scale32(self.raw[i, j, k, :])

    def chunks(self, flat: np.ndarray, chunk: int) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        x, y, z = self.shape
        t = self.raw.shape[3]
        plane = y * z  # flat indices of x-slab [i0, i1) are [i0*plane, i1*plane)
        dx = int(max(1, min(x, _SLAB_BYTES // max(1, plane * t * 4))))
        starts = np.searchsorted(flat, np.arange(0, x + dx, dx) * plane)
        for s, i0 in enumerate(range(0, x, dx)):
            sel = flat[starts[s] : starts[s + 1]]
            if sel.size == 0:
                continue
            i1 = min(x, i0 + dx)
            # time-major copy of the slab: tmp[t] is volume t restricted to the slab, in C
            # order, so a column of tmp2 is one voxel; each volume transposes in cache
            tmp = np.empty((t, i1 - i0, y, z), dtype=self.raw.dtype)
            for v in range(t):
                tmp[v] = self.raw[i0:i1, :, :, v]
            tmp2 = tmp.reshape(t, -1)
            local = sel - i0 * plane
            for a in range(0, sel.size, chunk):
                cols = tmp2[:, local[a : a + chunk]]
                yield sel[a : a + chunk], self._scale32(np.ascontiguousarray(cols.T))

    def blocks(self, mask: np.ndarray, block: int) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        """(T, n) blocks straight from the file's layout, in Fortran (x fastest) order.

        The file is a C-order (T, X*Y*Z) array whose column ``f`` is the voxel with Fortran
        flat index ``f``; a block is a run of ``block`` in-mask columns. Where those columns
        are consecutive and the file holds unscaled native float32, the block is a read-only
        view of the mapped file (no copy); otherwise it is a float32 copy of just the
        block's columns, (T, n) in C order (``block * T * 4`` bytes).
        """
        t = self.raw.shape[3]
        data2d = np.asarray(self.raw).T.reshape(t, -1)  # a view: (T, V) C order
        ff = np.flatnonzero(mask.ravel(order="F"))
        if ff.size == 0:
            return
        cflat = np.ravel_multi_index(np.unravel_index(ff, self.shape, order="F"), self.shape)
        cflat = cflat.astype(np.int64, copy=False)
        plain = not self.scaled and self.raw.dtype == np.dtype(np.float32)
        row_bytes = data2d.shape[1] * self.raw.dtype.itemsize
        done = 0  # columns before this one have been handed out and may be released
        for a in range(0, ff.size, block):
            sel = ff[a : a + block]
            lo, hi = int(sel[0]), int(sel[-1]) + 1
            cols = data2d[:, lo:hi]
            if hi - lo != sel.size:
                cols = cols[:, sel - lo]  # a copy of the in-mask columns only
            if plain:
                yield cflat[a : a + block], cols
            else:
                yield cflat[a : a + block], self._scale32(cols)
            # Release every row's pages of the columns handed out well before this block:
            # the consumer may still be working on the last few blocks (maps keep up to
            # 2 per worker thread in flight), which would only fault their pages back in.
            safe = lo - _RELEASE_LAG_BLOCKS * block
            if safe - done >= _RELEASE_COLUMNS:
                size = self.raw.dtype.itemsize
                for v in range(t):
                    self.release(v * row_bytes + done * size, v * row_bytes + safe * size)
                done = safe

    def volume(self, t: int) -> np.ndarray:
        return self._scale32(self.raw[..., t])

    def raw_batches(self, batch_bytes: int = _SLAB_BYTES) -> Iterator[np.ndarray]:
        """Raw volumes as C-ordered (B, Z, Y, X) views, a batch at a time."""
        x, y, z, t = self.raw.shape
        b = int(max(1, min(t, batch_bytes // max(1, x * y * z * 4))))
        vol_bytes = x * y * z * self.raw.dtype.itemsize
        for t0 in range(0, t, b):
            yield np.asarray(self.raw[..., t0 : t0 + b]).T
            self.release(t0 * vol_bytes, min(t, t0 + b) * vol_bytes)


# --------------------------------------------------------------------------- the run


@dataclass(eq=False)
class Run:
    """An open 4D run. Build it with :func:`open_run`.

    Attributes
    ----------
    path : Path
        The run file.
    shape : tuple of 3 int
        Spatial grid (X, Y, Z).
    n_volumes : int
        Number of volumes T.
    affine : ndarray
        4x4 voxel -> mm by the NIfTI-1 rule (sform, else qform, else pixdim).
    tr : float
        Repetition time in seconds.
    tr_source : str
        ``"argument"``, ``"sidecar"`` or ``"header"``.
    slice_timing : ndarray or None
        Acquisition time of each slice within the TR, seconds (BIDS ``SliceTiming``).
    reference_time_s : float
        Time within each TR at which regressors are sampled: the median of
        ``slice_timing`` when present, else 0.0.
    axcodes : tuple of 3 str
        ``nibabel.aff2axcodes(affine)``, e.g. ``("L", "A", "S")``.
    voxel_size : tuple of 3 float
        mm, the column lengths of the affine.
    warnings : list of str
        One-line notes for the user (TR disagreements, NaN voxels, ...), each said once.
    header : nibabel header
        A 3D float32 copy of the run's header, for writing maps on the run's grid.
    storage : str
        ``"memmap"``, ``"cache"``, ``"memory"`` or ``"file"``.
    affine_source : str
        ``"sform"``, ``"qform"`` or ``"pixdim"``.
    sidecar : Path or None
        The BIDS sidecar that was read.
    cache_path : Path or None
        The cache file serving the data (storage ``"cache"``).
    """

    path: Path
    shape: tuple[int, int, int]
    n_volumes: int
    affine: np.ndarray = field(repr=False)
    tr: float
    tr_source: str
    slice_timing: np.ndarray | None
    reference_time_s: float
    axcodes: tuple[str, str, str]
    voxel_size: tuple[float, float, float]
    warnings: list[str]
    header: Any = field(repr=False)
    storage: str = "memmap"
    affine_source: str = "sform"
    sidecar: Path | None = None
    cache_path: Path | None = None
    sidecars: tuple[Path, ...] = ()
    reference_source: str = "start of each volume"
    mask_source: str = "intensity"
    _store: Any = field(default=None, repr=False)
    _summary: Any = field(default=None, repr=False)
    _mean: np.ndarray | None = field(default=None, repr=False)
    _mask: np.ndarray | None = field(default=None, repr=False)
    _given_mask: np.ndarray | None = field(default=None, repr=False)
    _lock: Any = field(default_factory=threading.RLock, repr=False)

    def set_mask(self, mask: np.ndarray, source: str) -> None:
        """Use ``mask`` (bool, the run's grid) as the brain mask instead of the intensity rule.

        Voxels whose time series is NaN or constant are still left out when the mask is
        first used. ``source`` (the mask file) names it in messages and in
        :attr:`mask_source`.
        """
        mask = np.asarray(mask, dtype=bool)
        if mask.shape != self.shape:
            raise InputError(
                f"{source}: mask shape {mask.shape} does not match the grid "
                f"{self._grid_text()} of {self.path}"
            )
        with self._lock:
            self._given_mask = mask.copy()
            self._mask = None
            self.mask_source = str(source)
            if isinstance(self._store, _cache.VoxelStore):
                self._store.widen(mask)  # the cache keeps every voxel of the given mask

    # ----------------------------------------------------------------- geometry

    @property
    def n_voxels(self) -> int:
        """X*Y*Z."""
        x, y, z = self.shape
        return x * y * z

    def _grid_text(self) -> str:
        return "x".join(str(n) for n in self.shape)

    def check_voxel(self, ijk: Sequence[int]) -> tuple[int, int, int]:
        """Validate voxel indices and return them as a tuple of int.

        Raises
        ------
        InputError
            ``voxel (i, j, k) is outside the grid XxYxZ of FILE; ...``

        Examples
        --------
        >>> from nibabel.testing import data_path
        >>> run = open_run(Path(data_path) / "functional.nii")
        >>> run.check_voxel((1, 2, 0))
        (1, 2, 0)
        """
        try:
            vals = [float(v) for v in ijk]
        except (TypeError, ValueError):
            raise InputError(f"voxel {ijk!r} is not three integer indices") from None
        if len(vals) != 3 or not all(math.isfinite(v) and v == int(v) for v in vals):
            raise InputError(f"voxel {tuple(ijk)!r} is not three integer indices")
        i, j, k = (int(v) for v in vals)
        if not all(0 <= a < n for a, n in zip((i, j, k), self.shape)):
            limits = ", ".join(f"0 to {n - 1}" for n in self.shape)
            raise InputError(
                f"voxel ({i}, {j}, {k}) is outside the grid {self._grid_text()} of "
                f"{self.path}; give indices from {limits}"
            )
        return i, j, k

    def voxel_to_mm(self, ijk: Any) -> np.ndarray:
        """World coordinates (mm) of voxel indices, shape (3,) or (n, 3).

        Examples
        --------
        >>> from nibabel.testing import data_path
        >>> open_run(Path(data_path) / "functional.nii").voxel_to_mm((0, 0, 0)).tolist()
        [32.0, -40.0, 0.0]
        """
        return apply_affine(self.affine, np.asarray(ijk, dtype=np.float64))

    def mm_to_voxel(self, xyz: Sequence[float]) -> tuple[int, int, int]:
        """Nearest voxel to a world position (mm).

        Raises
        ------
        InputError
            The position is outside the grid (named in the message).

        Examples
        --------
        >>> from nibabel.testing import data_path
        >>> open_run(Path(data_path) / "functional.nii").mm_to_voxel((30.5, -39, 1))
        (0, 0, 0)
        """
        pos = np.asarray(xyz, dtype=np.float64)
        if pos.shape != (3,) or not np.all(np.isfinite(pos)):
            raise InputError(f"position {tuple(np.ravel(xyz))!r} is not three finite mm values")
        frac = apply_affine(np.linalg.inv(self.affine), pos)
        ijk = np.floor(frac + 0.5).astype(np.int64)
        if not all(0 <= a < n for a, n in zip(ijk, self.shape)):
            x, y, z = (float(v) for v in pos)
            raise InputError(
                f"position ({x:g}, {y:g}, {z:g}) mm is outside the grid {self._grid_text()} "
                f"of {self.path} (nearest voxel would be {tuple(int(a) for a in ijk)}); "
                f"give a position inside the run"
            )
        return int(ijk[0]), int(ijk[1]), int(ijk[2])

    # ----------------------------------------------------------------- data

    def timeseries(self, ijk: Sequence[int]) -> np.ndarray:
        """Scaled time series of one voxel, float64 shape (T,).

        Examples
        --------
        >>> from nibabel.testing import data_path
        >>> open_run(Path(data_path) / "functional.nii").timeseries((8, 10, 1)).dtype
        dtype('float64')
        """
        i, j, k = self.check_voxel(ijk)
        flat = (i * self.shape[1] + j) * self.shape[2] + k
        return self._store.row(flat)

    def _check_flat(self, flat_idx: Any) -> np.ndarray:
        idx = np.asarray(flat_idx)
        if idx.ndim != 1 or (idx.size and idx.dtype.kind not in "iu"):
            raise InputError("flat voxel indices must be a 1D array of integers")
        idx = idx.astype(np.int64, copy=False)
        if idx.size and (idx.min() < 0 or idx.max() >= self.n_voxels):
            raise InputError(
                f"flat voxel index outside 0..{self.n_voxels - 1} (grid {self._grid_text()} "
                f"of {self.path})"
            )
        return idx

    def timeseries_many(self, flat_idx: np.ndarray) -> np.ndarray:
        """Time series of many voxels, float32 (n, T), rows in the order given.

        ``flat_idx = np.ravel_multi_index(ijk.T, run.shape)`` (C order).
        """
        return self._store.rows(self._check_flat(flat_idx))

    def iter_chunks(
        self, mask: np.ndarray | None = None, chunk_voxels: int = 4096
    ) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        """Iterate over the voxels of a mask in C order, a chunk at a time.

        Parameters
        ----------
        mask : ndarray of bool, optional
            Shape ``run.shape``; default :meth:`mask`.
        chunk_voxels : int
            Voxels per chunk (at most).

        Yields
        ------
        flat_idx : ndarray
            int64 (n,), ascending C-order flat indices (all chunks together are
            ``np.flatnonzero(mask)``).
        data : ndarray
            float32 (n, T), the scaled time series.
        """
        mask = self.mask() if mask is None else np.asarray(mask, dtype=bool)
        if mask.shape != self.shape:
            raise InputError(
                f"mask shape {mask.shape} does not match the grid {self._grid_text()} "
                f"of {self.path}"
            )
        if chunk_voxels < 1:
            raise ValueError("chunk_voxels must be at least 1")
        flat = np.flatnonzero(mask).astype(np.int64)
        if flat.size == 0:
            return
        yield from self._store.chunks(flat, int(chunk_voxels))

    def iter_blocks(
        self, mask: np.ndarray | None = None, block_voxels: int = 1024
    ) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        """Iterate over the voxels of a mask in the store's own order, as (T, n) blocks.

        The fast path for whole-volume passes (maps): each block comes straight from the
        layout of the data, without transposing copies. An uncompressed run is walked in
        file order (x fastest, then y, then z) and a block is, where it can be, a
        read-only view of the mapped file; the voxel-major cache and the in-memory store
        are walked in C order and a block is the transpose of their rows (a view where
        the block's voxels are consecutive). Otherwise a block is a float32 copy of just
        its voxels, so memory stays bounded by ``block_voxels * T * 4`` bytes.

        Parameters
        ----------
        mask : ndarray of bool, optional
            Shape ``run.shape``; default :meth:`mask`.
        block_voxels : int
            Voxels per block (at most).

        Yields
        ------
        flat_idx : ndarray
            int64 (n,), C-order flat indices (``np.ravel_multi_index(ijk, run.shape)``)
            of the block's voxels. All blocks together hold each index of
            ``np.flatnonzero(mask)`` once, but not necessarily in ascending order
            (Fortran order for an uncompressed run).
        data : ndarray
            float32 (T, n), the scaled time series as columns. It may be a read-only view
            of the run's data (possibly not contiguous): copy it before changing it.

        Examples
        --------
        >>> from nibabel.testing import data_path
        >>> run = open_run(Path(data_path) / "functional.nii")
        >>> idx, data = next(run.iter_blocks(np.ones(run.shape, bool), block_voxels=100))
        >>> ijk = np.unravel_index(idx[5], run.shape)  # C-order flat index -> (i, j, k)
        >>> data.shape, data.dtype.name, bool(np.allclose(data[:, 5], run.timeseries(ijk)))
        ((20, 100), 'float32', True)
        """
        mask = self.mask() if mask is None else np.asarray(mask, dtype=bool)
        if mask.shape != self.shape:
            raise InputError(
                f"mask shape {mask.shape} does not match the grid {self._grid_text()} "
                f"of {self.path}"
            )
        if block_voxels < 1:
            raise ValueError("block_voxels must be at least 1")
        if isinstance(self._store, _RawMemmap):
            yield from self._store.blocks(mask, int(block_voxels))
            return
        flat = np.flatnonzero(mask).astype(np.int64)
        if flat.size == 0:
            return
        yield from self._store.blocks(flat, int(block_voxels))

    def volume(self, t: int) -> np.ndarray:
        """Volume ``t`` (0-based) as float32 (X, Y, Z)."""
        if not (isinstance(t, (int, np.integer)) and 0 <= int(t) < self.n_volumes):
            raise InputError(f"volume {t!r} is outside 0..{self.n_volumes - 1} of {self.path}")
        return self._store.volume(int(t))

    def summary(self) -> _cache.Summary:
        """Mean, non-finite and constant flags per voxel (one pass over the data, cached)."""
        with self._lock:  # lazy parts may be asked for from several threads at once
            if self._summary is None:
                layout = self._store.raw_layout  # only the memmap store lacks a summary
                self._summary = _cache.summarize_volumes(self._store.raw_batches(), layout)
                self._note_summary()
            return self._summary

    def _note_summary(self) -> None:
        bad = int(np.count_nonzero(self._summary.nonfinite))
        if bad:
            self.warnings.append(
                f"{self.path}: {bad} voxels hold NaN or infinite values; they are left "
                f"out of the brain mask"
            )

    def mean_image(self) -> np.ndarray:
        """Mean over time, float32 (X, Y, Z); 0 at voxels with non-finite values.

        The array is cached and read-only.
        """
        with self._lock:
            if self._mean is None:
                mean = np.array(self.summary().mean, dtype=np.float32)
                mean.flags.writeable = False
                self._mean = mean
            return self._mean

    def mask(self) -> np.ndarray:
        """Brain mask, bool (X, Y, Z), cached and read-only; see :func:`brain_mask`.

        Voxels with a NaN/inf value or a constant time series are always outside.
        """
        with self._lock:
            if self._mask is None and self._given_mask is not None:
                s = self.summary()
                mask = self._given_mask & ~s.nonfinite & ~s.constant
                if not mask.any():
                    raise InputError(
                        f"{self.mask_source}: no voxel of the mask holds a usable time series "
                        f"of {self.path} (all are NaN or constant); give this run's mask "
                        "(--mask FILE) or use --mask auto"
                    )
                mask.flags.writeable = False
                self._mask = mask
            if self._mask is None:
                mask, fallback = _summary_mask(self.summary())
                if fallback:
                    self.warnings.append(
                        f"{self.path}: no voxel is bright enough for an intensity mask; "
                        f"using every voxel that varies over time"
                    )
                mask.flags.writeable = False
                self._mask = mask
            return self._mask


def _summary_mask(s: _cache.Summary) -> tuple[np.ndarray, bool]:
    """The run's brain mask from its summary (the one rule: :meth:`Run.mask`; the cache
    keeps a superset of it, :func:`_cache_must_keep`), and whether the fallback was used."""
    valid = ~s.nonfinite & ~s.constant
    mask = brain_mask(s.mean, valid)
    if not mask.any() and valid.any():
        return valid.copy(), True
    return mask, False


def _enclosed(mask: np.ndarray) -> np.ndarray:
    """Voxels outside ``mask`` that meet it in all six axis directions.

    A superset of the holes that :func:`scipy.ndimage.binary_fill_holes` fills: a hole's
    straight path to the edge of the grid must cross the mask (numpy only, no scipy).

    Examples
    --------
    >>> m = np.zeros((5, 5, 5), bool); m[1:4, 1:4, 1:4] = True; m[2, 2, 2] = False
    >>> np.argwhere(_enclosed(m)).tolist()
    [[2, 2, 2]]
    """
    out = ~mask
    for ax in range(3):
        fwd = np.logical_or.accumulate(mask, axis=ax)
        bwd = np.flip(np.logical_or.accumulate(np.flip(mask, ax), axis=ax), ax)
        out &= fwd & bwd
    return out


def _mask_superset(s: _cache.Summary, fraction: float, valid: np.ndarray) -> np.ndarray:
    """The intensity rule of :func:`brain_mask` without its scipy steps: every voxel over
    the threshold (any component) and every voxel they enclose; contains the mask."""
    mean = np.asarray(s.mean, dtype=np.float64)
    ok = valid & np.isfinite(mean)
    if not ok.any():
        return ok
    ref = float(np.percentile(mean[ok], MASK_PERCENTILE))
    over = ok & (mean > fraction * ref) if ref > 0 else ok & (mean > 0)
    if not over.any():
        return ok  # the mask falls back to every valid voxel
    return (over | _enclosed(over)) & ok


def _cache_selection(s: _cache.Summary) -> np.ndarray:
    """Voxels the cache stores, chosen from the summary of the first volumes: the mask
    rule with a margin (three quarters of the intensity fraction). Voxels that are zero in
    every one of those volumes are left to the final check (they are background)."""
    valid = ~s.nonfinite & ~(s.constant & (s.mean == 0))
    return _mask_superset(s, 0.75 * MASK_FRACTION, valid)


def _cache_must_keep(s: _cache.Summary) -> np.ndarray:
    """A superset of :meth:`Run.mask` from the whole run's summary: the cache stores all
    of it, so maps over the mask never read the file."""
    return _mask_superset(s, MASK_FRACTION, ~s.nonfinite & ~s.constant)


# --------------------------------------------------------------------------- mask


def brain_mask(
    mean: np.ndarray,
    valid: np.ndarray | None = None,
    fraction: float = MASK_FRACTION,
    percentile: float = MASK_PERCENTILE,
    largest_component: bool = True,
    fill_holes: bool = True,
) -> np.ndarray:
    """Intensity-based brain mask of a mean image.

    A voxel is in the mask when it is *valid* (finite, and not constant over time when
    ``valid`` says so) and its mean exceeds ``fraction`` times the ``percentile``-th
    percentile of the valid means (a robust maximum, insensitive to a few hot voxels).
    Optionally the largest 26-connected component is kept and enclosed holes are
    filled (filled voxels must be valid too).

    Parameters
    ----------
    mean : ndarray
        3D mean image.
    valid : ndarray of bool, optional
        Voxels allowed in the mask; default: finite means.
    fraction : float
        Default :data:`MASK_FRACTION` (0.2).
    percentile : float
        Default :data:`MASK_PERCENTILE` (98).
    largest_component, fill_holes : bool

    Returns
    -------
    ndarray of bool

    Examples
    --------
    >>> m = np.zeros((5, 5, 5)); m[1:4, 1:4, 1:4] = 100.0; m[2, 2, 2] = 1.0
    >>> int(brain_mask(m).sum()), int(brain_mask(m, fill_holes=False).sum())
    (27, 26)
    """
    mean = np.asarray(mean, dtype=np.float64)
    ok = np.isfinite(mean)
    if valid is not None:
        ok &= np.asarray(valid, dtype=bool)
    if not ok.any():
        return np.zeros(mean.shape, dtype=bool)
    ref = float(np.percentile(mean[ok], percentile))
    mask = ok & (mean > fraction * ref) if ref > 0 else ok & (mean > 0)
    if largest_component and mask.any():
        from scipy import ndimage  # here, not at start-up (about 0.25 s)

        labels, n = ndimage.label(mask, structure=np.ones((3, 3, 3), dtype=bool))
        if n > 1:
            sizes = np.bincount(labels.ravel())
            sizes[0] = 0
            mask = labels == int(np.argmax(sizes))
    if fill_holes and mask.any():
        from scipy import ndimage

        mask = ndimage.binary_fill_holes(mask) & ok
    return mask


# --------------------------------------------------------------------------- timing


@dataclass
class _HeaderTR:
    value: float | None  # seconds, usable
    problem: str | None  # why the header TR cannot be used
    note: str | None  # warning when it is used


def _header_tr(path: Path, header: Any) -> _HeaderTR:
    raw = float(header["pixdim"][4])
    unit = header.get_xyzt_units()[1]
    where = f"header TR (pixdim[4] = {raw:g}, xyzt_units time unit '{unit}')"
    if unit not in _TIME_FACTORS:
        return _HeaderTR(None, f"the {where} is not a time", None)
    if not math.isfinite(raw) or raw <= 0:
        return _HeaderTR(None, f"the {where} gives no TR", None)
    value = raw * _TIME_FACTORS[unit]
    note = None
    if unit in ("sec", "unknown") and value > MS_THRESHOLD_S:
        value = raw / 1000.0
        note = (
            f"{path}: the {where} says {raw:g} s, which is implausible; reading it as "
            f"{raw:g} ms = {value:g} s (give --tr to override)"
        )
    lo, hi = PLAUSIBLE_TR_S
    if not lo <= value <= hi:
        return _HeaderTR(None, f"the {where} gives an implausible TR of {value:g} s", None)
    return _HeaderTR(value, None, note)


def _read_sidecar(sidecar: Path) -> dict[str, Any]:
    return read_sidecar(sidecar)


def _number(value: Any) -> float | None:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def resolve_tr(
    path: Path,
    header: Any,
    tr: float | None = None,
    sidecar: Path | None = None,
    n_slices: int | None = None,
    meta: dict[str, Any] | None = None,
    origin: dict[str, Path] | None = None,
) -> tuple[float, str, np.ndarray | None, list[str]]:
    """Decide the TR of a run and read its slice timing.

    Parameters
    ----------
    path : Path
        The run (for messages).
    header : nibabel header
    tr : float, optional
        Explicit TR in seconds; wins over everything.
    sidecar : Path, optional
        BIDS JSON sidecar (``RepetitionTime``, ``SliceTiming``, seconds).
    n_slices : int, optional
        Expected length of ``SliceTiming``.
    meta, origin : dict, optional
        The merged sidecar fields (BIDS inheritance, see
        :func:`voxelscope.core.companions.merge_sidecars`) and the file each came from;
        when given, ``sidecar`` is not read again.

    Returns
    -------
    tr : float
        Seconds.
    source : str
        ``"argument"``, ``"sidecar"`` or ``"header"``.
    slice_timing : ndarray or None
        Seconds, one per slice.
    warnings : list of str

    Raises
    ------
    InputError
        No usable TR anywhere, an implausible TR, or an unreadable sidecar.
    """
    notes: list[str] = []
    if meta is None:
        meta = _read_sidecar(sidecar) if sidecar is not None else {}
    origin = dict(origin or {})

    def where(key: str) -> Path | None:
        return origin.get(key, sidecar)

    head = _header_tr(path, header)
    lo, hi = PLAUSIBLE_TR_S

    if tr is not None:
        value = _number(tr)
        if value is None or value <= 0:
            raise InputError(f"{path}: TR {tr!r} must be a positive number of seconds (--tr)")
        if value > MS_THRESHOLD_S:
            raise InputError(
                f"{path}: TR {value:g} s is implausible; give the TR in seconds (--tr)"
            )
        chosen, source = value, "argument"
    elif "RepetitionTime" in meta:
        value = _number(meta["RepetitionTime"])
        if value is None or not lo <= value <= hi:
            raise InputError(
                f"{where('RepetitionTime')}: RepetitionTime {meta['RepetitionTime']!r} is not "
                f"a plausible TR in seconds (BIDS); fix the sidecar or give --tr"
            )
        chosen, source = value, "sidecar"
        if head.value is not None and abs(head.value - value) > 1e-3 * max(value, 1.0):
            notes.append(
                f"{path}: TR differs between the sidecar ({value:g} s, "
                f"{where('RepetitionTime').name}) and the header ({head.value:g} s); "
                f"using the sidecar"
            )
    elif head.value is not None:
        chosen, source = head.value, "header"
        if head.note:
            notes.append(head.note)
    else:
        where = f"; no RepetitionTime in {sidecar.name}" if sidecar is not None else ""
        raise InputError(
            f"{path}: no usable TR: {head.problem}{where}; give the TR in seconds (--tr)"
        )

    timing = None
    if "SliceTiming" in meta and meta.get("SliceTimingCorrected") is not True:
        timing = _slice_timing(where("SliceTiming"), meta["SliceTiming"], chosen, n_slices, notes)
    return chosen, source, timing, notes


def sampling_reference(
    meta: dict[str, Any],
    origin: dict[str, Path],
    tr: float,
    timing: np.ndarray | None,
) -> tuple[float, str]:
    """The time within each TR at which regressors are sampled, and why.

    BIDS (derivatives, preprocessed BOLD sidecars): when ``SliceTimingCorrected`` is true,
    every slice was interpolated to ``StartTime`` seconds after the start of the volume's
    acquisition, so that is the reference, and raw ``SliceTiming`` no longer describes the
    data (it is set aside). Otherwise, with a usable ``SliceTiming`` (one value per slice
    of the grid), the median slice time; otherwise 0, the start of each volume.

    Returns
    -------
    reference_time_s : float
    source : str
        Plain words for the status line and the table output.

    Raises
    ------
    InputError
        ``StartTime`` not a number, negative, or not below the TR.

    Examples
    --------
    >>> sampling_reference({"SliceTimingCorrected": True, "StartTime": 0.975}, {}, 2.0, None)
    (0.975, 'StartTime 0.975 s (slice-time corrected)')
    >>> sampling_reference({}, {}, 2.0, np.array([0.0, 1.0, 0.5]))
    (0.5, 'median SliceTiming 0.5 s')
    >>> sampling_reference({}, {}, 2.0, None)
    (0.0, 'start of each volume')
    """
    corrected = meta.get("SliceTimingCorrected") is True
    set_aside = "; SliceTiming set aside" if corrected and "SliceTiming" in meta else ""
    if corrected and "StartTime" in meta:
        where = origin.get("StartTime", "the sidecar")
        value = _number(meta["StartTime"])
        if value is None or not 0.0 <= value < tr:
            raise InputError(
                f"{where}: StartTime {meta['StartTime']!r} must be a number of seconds from 0 "
                f"up to but not including the TR ({tr:g} s) (BIDS); fix the sidecar"
            )
        return value, f"StartTime {value:g} s (slice-time corrected{set_aside})"
    if corrected:
        return 0.0, f"start of each volume (slice-time corrected, no StartTime{set_aside})"
    if timing is not None:
        ref = float(np.median(timing))
        return ref, f"median SliceTiming {ref:g} s"
    return 0.0, "start of each volume"


def _slice_timing(
    sidecar: Path | None, value: Any, tr: float, n_slices: int | None, notes: list[str]
) -> np.ndarray | None:
    nums = [_number(v) for v in value] if isinstance(value, list) else [None]
    if not nums or any(v is None for v in nums):
        notes.append(f"{sidecar}: SliceTiming is not a list of numbers; ignored")
        return None
    timing = np.asarray(nums, dtype=np.float64)
    if n_slices is not None and timing.size != n_slices:
        notes.append(
            f"{sidecar}: SliceTiming has {timing.size} values but the run has {n_slices} "
            f"slices; ignored"
        )
        return None
    if timing.min() < 0 or timing.max() >= tr:
        notes.append(
            f"{sidecar}: SliceTiming values must lie in [0, TR = {tr:g} s) (seconds, BIDS); ignored"
        )
        return None
    return timing


# --------------------------------------------------------------------------- opening


def _run_shape(path: Path, img: Any) -> tuple[int, int, int, int]:
    shape = tuple(int(n) for n in img.shape)
    if any(n == 0 for n in shape):
        raise InputError(
            f"{path}: zero-length dimension in shape {shape} (dim field); the file is "
            f"empty or its header is wrong"
        )
    if len(shape) < 4:
        raise InputError(
            f"{path}: a {len(shape)}D image {shape} is not a run; a run needs 4 dimensions "
            f"(x, y, z, time), open it as an underlay or map instead"
        )
    if len(shape) > 4 and any(n != 1 for n in shape[4:]):
        raise InputError(
            f"{path}: a {len(shape)}D image {shape} is not a single run; give a 4D file "
            f"(x, y, z, time)"
        )
    x, y, z, t = shape[:4]
    if t < 2:
        raise InputError(f"{path}: the run has only {t} volume; a run needs at least 2")
    return x, y, z, t


def _is_compressed(path: Path) -> bool:
    with open(path, "rb") as f:
        magic = f.read(4)
    name = path.name.lower()
    return (
        magic[:2] == b"\x1f\x8b"
        or magic[:3] == b"BZh"
        or magic == b"\x28\xb5\x2f\xfd"
        or name.endswith((".gz", ".bz2", ".zst"))
    )


def _spatial_header(header: Any, shape: tuple[int, int, int]) -> Any:
    hdr = header.copy()
    hdr.set_data_shape(shape)
    hdr.set_data_dtype(np.float32)
    hdr.set_slope_inter(1.0, 0.0)
    hdr.set_xyzt_units(xyz=hdr.get_xyzt_units()[0])
    return hdr


def open_run(
    path: str | os.PathLike[str],
    tr: float | None = None,
    use_cache: bool = True,
    progress: Callable[[float], bool | None] | None = None,
    cache_dir: str | os.PathLike[str] | None = None,
    sidecars: Sequence[str | os.PathLike[str]] | None = None,
    notify: Callable[[str], None] | None = None,
    keep: Callable[[tuple[int, int, int], np.ndarray], np.ndarray] | None = None,
) -> Run:
    """Open a 4D NIfTI run for fast voxel access.

    Parameters
    ----------
    path : str or path-like
        ``.nii`` or ``.nii.gz``, NIfTI-1 or NIfTI-2. Never modified.
    tr : float, optional
        TR in seconds; overrides the sidecar and the header.
    use_cache : bool
        For a compressed run: build/use the voxel-major disk cache (default). With
        False the run is decompressed into memory instead.
    progress : callable, optional
        ``progress(fraction) -> bool | None`` during decompression; return False to
        cancel (:class:`voxelscope.core.cache.Cancelled`).
    cache_dir : path-like, optional
        Cache directory; default ``platformdirs.user_cache_dir("voxelscope")/runs``.
    sidecars : sequence of path-like, optional
        The JSON sidecars that apply to the run, farthest first and the run's own last
        (BIDS inheritance; :func:`voxelscope.core.companions.find_companions`). Default:
        the companions found for the run.
    notify : callable, optional
        Called with a line to show at once (a big cache announced before it is written);
        without it the line joins :attr:`Run.warnings`.
    keep : callable, optional
        ``keep(shape, affine)`` -> bool mask on the run's grid: voxels the cache of a
        compressed run must hold besides its own choice (a brain mask given from a file,
        applied later with :meth:`Run.set_mask`).

    Returns
    -------
    Run

    Raises
    ------
    InputError
        Missing, not NIfTI, corrupt or truncated, not 4D, zero-sized, unsupported voxel
        type, or no plausible TR. The one-line message names the file.
    voxelscope.core.cache.Cancelled
        The progress callback cancelled the first open.

    Examples
    --------
    >>> from nibabel.testing import data_path
    >>> run = open_run(Path(data_path) / "example4d.nii.gz", use_cache=False)
    >>> run.tr
    2.0
    >>> print(run.warnings[0])  # doctest: +ELLIPSIS
    /...example4d.nii.gz: the header TR (pixdim[4] = 2000, ...) ... as 2000 ms = 2 s ...
    """
    path = Path(path).expanduser()
    img = load_nifti(path, "run")
    header = img.header
    x, y, z, t = _run_shape(path, img)
    dtype = np.dtype(img.dataobj.dtype)
    _check_dtype(path, dtype)
    affine, affine_source = nifti_affine(header)
    _check_affine(path, affine, affine_source)
    notes: list[str] = []
    if affine_source == "pixdim":
        notes.append(
            f"{path}: neither sform_code nor qform_code is set; positions use the voxel "
            f"sizes only (orientation unknown)"
        )

    if sidecars is None:
        sidecars = find_companions(path).sidecars
    sidecar_list = tuple(Path(p) for p in sidecars)
    meta, origin = merge_sidecars(sidecar_list)
    sidecar = sidecar_list[-1] if sidecar_list else None
    slice_dim = header.get_dim_info()[2]
    n_slices = (x, y, z)[slice_dim if slice_dim is not None and slice_dim < 3 else 2]
    tr_s, tr_source, timing, tr_notes = resolve_tr(
        path, header, tr, sidecar, n_slices, meta=meta, origin=origin
    )
    notes.extend(tr_notes)
    reference_s, reference_source = sampling_reference(meta, origin, tr_s, timing)

    slope, inter = float(img.dataobj.slope), float(img.dataobj.inter)
    layout = _cache.RawLayout(
        path=path,
        offset=int(img.dataobj.offset),
        dtype=dtype,
        shape=(x, y, z, t),
        slope=slope,
        inter=inter,
        compressed=_is_compressed(path),
    )
    summary = None
    cache_path = None
    if not layout.compressed:
        needed = layout.offset + layout.volume_bytes * t
        size = path.stat().st_size
        if size < needed:
            raise InputError(
                f"{path}: the file is truncated ({size} bytes, the header needs {needed}); "
                f"re-copy or re-export it"
            )
        raw = np.memmap(
            path, dtype=dtype, mode="r", offset=layout.offset, shape=(x, y, z, t), order="F"
        )
        store: Any = _RawMemmap(raw, slope, inter)
        store.raw_layout = layout
        storage = "memmap"
        if progress is not None:
            progress(1.0)  # nothing to prepare: the file is mapped as it lies
    else:
        select, must_keep = _cache_selection, _cache_must_keep
        if keep is not None:
            extra = np.asarray(keep((x, y, z), np.array(affine, dtype=np.float64)), dtype=bool)

            def select(s: _cache.Summary) -> np.ndarray:
                return _cache_selection(s) | extra

            def must_keep(s: _cache.Summary) -> np.ndarray:
                return _cache_must_keep(s) | extra

        opened = _cache.open_store(
            layout,
            select,
            must_keep,
            use_cache=use_cache,
            cache_dir=cache_dir,
            progress=progress,
            notify=notify,
        )
        store, summary = opened.store, opened.summary
        storage, cache_path = opened.storage, opened.cache_path
        notes.extend(opened.notes)

    affine = np.array(affine, dtype=np.float64)
    run = Run(
        path=path,
        shape=(x, y, z),
        n_volumes=t,
        affine=affine,
        tr=float(tr_s),
        tr_source=tr_source,
        slice_timing=timing,
        reference_time_s=float(reference_s),
        axcodes=tuple(nib.aff2axcodes(affine)),  # type: ignore[arg-type]
        voxel_size=tuple(float(v) for v in voxel_sizes(affine)),  # type: ignore[arg-type]
        warnings=notes,
        header=_spatial_header(header, (x, y, z)),
        storage=storage,
        affine_source=affine_source,
        sidecar=sidecar,
        cache_path=cache_path,
        sidecars=sidecar_list,
        reference_source=reference_source,
        _store=store,
        _summary=summary,
    )
    if summary is not None:
        run._note_summary()
    if isinstance(store, _cache.VoxelStore):
        store.notes = run.warnings  # later notes (a failed checksum, file reads) join them
    return run
