"""Where a run's voxel values come from: the store interface and the memory-mapped store.

A :class:`~voxelscope.core.run.Run` reads every voxel value through one object that
follows :class:`VoxelSource`. There are two implementations:

:class:`MappedStore` (storage ``"memmap"``)
    An uncompressed ``.nii`` memory-mapped as it lies on disk (x fastest). A voxel's time
    series is one strided read; whole-volume passes read the file in place, block by
    block, or slab by slab in C order.
:class:`~voxelscope.core.voxelmajor.VoxelStore` (storage ``"cache"``, ``"memory"``, ``"file"``)
    A compressed run's voxels in voxel-major rows (a cache file or memory), constants it
    knows exactly, and the run file for anything else.

Both apply ``scl_slope`` / ``scl_inter`` as nibabel does. ``tests/core/test_stores.py``
runs the same conformance checks against every storage kind.

Examples
--------
>>> from pathlib import Path
>>> from nibabel.testing import data_path
>>> from voxelscope.core.run import open_run
>>> isinstance(open_run(Path(data_path) / "functional.nii")._store, VoxelSource)
True
"""

from __future__ import annotations

import mmap
from collections.abc import Iterator
from typing import Protocol, runtime_checkable

import numpy as np

from voxelscope.core.rawfile import RawLayout

__all__ = ["MappedStore", "VoxelSource"]

# Float32 bytes of one slab copied while iterating an uncompressed run in C order
# (iter_rows); blocks read the file in place and copy at most one block.
SLAB_BYTES = 32 * 1024 * 1024
# Columns of a memory-mapped run handed out as blocks before their pages are released: one
# madvise per volume each time, so 8192 columns cost 5400 calls on a 64x64x40x300 map
# (about 7 % of it); 32768 and 65536 were both 0.93x of the map time (2 workers,
# alternating, load 9), and 32768 keeps the peak of mapped pages lower (OLS map: 171 MB
# resident for a 188 MB run, 207 MB with 65536, 150 MB with 8192).
RELEASE_COLUMNS = 32768
# Blocks handed out but perhaps not yet consumed, whose pages are left alone.
RELEASE_LAG_BLOCKS = 8


@runtime_checkable
class VoxelSource(Protocol):
    """What a run needs from a store of its voxel values.

    Flat indices are C-order (``np.ravel_multi_index(ijk, shape)``) over the grid
    ``shape`` (X, Y, Z); every value is scaled (``raw * slope + inter``). Arrays handed
    out are float32 copies unless said otherwise.
    """

    layout: RawLayout
    shape: tuple[int, int, int]

    def row(self, flat: int) -> np.ndarray:
        """One voxel's time series, float64 (T,)."""
        ...

    def rows(self, flat_idx: np.ndarray) -> np.ndarray:
        """Many voxels' time series, float32 (n, T), in the order given."""
        ...

    def iter_rows(self, flat: np.ndarray, chunk: int) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        """``(flat_idx, data (n, T))`` for ascending ``flat``, ``chunk`` voxels at most."""
        ...

    def iter_blocks(self, mask: np.ndarray, block: int) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        """``(flat_idx, data (T, n))`` for the voxels of ``mask`` in the store's own order.

        ``data`` may be a read-only view of the store (not necessarily contiguous).
        """
        ...

    def volume(self, t: int) -> np.ndarray:
        """Volume ``t`` as float32 (X, Y, Z)."""
        ...


class MappedStore:
    """An uncompressed run memory-mapped as stored: (X, Y, Z, T), x fastest, raw values.

    Follows :class:`VoxelSource`; :meth:`raw_batches` feeds the run's summary pass.
    """

    def __init__(self, layout: RawLayout):
        x, y, z, t = layout.shape
        raw = np.memmap(
            layout.path,
            dtype=layout.dtype,
            mode="r",
            offset=layout.offset,
            shape=(x, y, z, t),
            order="F",
        )
        self.layout = layout
        self.raw = raw
        self.slope = float(layout.slope)
        self.inter = float(layout.inter)
        self.shape = tuple(int(n) for n in raw.shape[:3])
        self.scaled = not (self.slope == 1.0 and self.inter == 0.0)
        #: unscaled native float32: blocks are views of the file, values as stored
        self.plain = not self.scaled and raw.dtype == np.dtype(np.float32)
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

    def iter_rows(self, flat: np.ndarray, chunk: int) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        x, y, z = self.shape
        t = self.raw.shape[3]
        plane = y * z  # flat indices of x-slab [i0, i1) are [i0*plane, i1*plane)
        dx = int(max(1, min(x, SLAB_BYTES // max(1, plane * t * 4))))
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

    def iter_blocks(self, mask: np.ndarray, block: int) -> Iterator[tuple[np.ndarray, np.ndarray]]:
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
        plain = self.plain
        row_bytes = data2d.shape[1] * self.raw.dtype.itemsize
        done = 0  # columns before this one have been handed out and may be released
        for a in range(0, ff.size, block):
            sel = ff[a : a + block]
            lo, hi = int(sel[0]), int(sel[-1]) + 1
            cols = data2d[:, lo:hi]
            if hi - lo != sel.size:  # a copy of the in-mask columns only (np.take: several
                cols = np.take(cols, sel - lo, axis=1)  # times faster than cols[:, sel - lo])
            if plain:
                yield cflat[a : a + block], cols
            else:
                yield cflat[a : a + block], self._scale32(cols)
            # Release every row's pages of the columns handed out well before this block:
            # the consumer may still be working on the last few blocks (maps keep up to
            # 2 per worker thread in flight), which would only fault their pages back in.
            safe = lo - RELEASE_LAG_BLOCKS * block
            if safe - done >= RELEASE_COLUMNS:
                size = self.raw.dtype.itemsize
                for v in range(t):
                    self.release(v * row_bytes + done * size, v * row_bytes + safe * size)
                done = safe

    def volume(self, t: int) -> np.ndarray:
        return self._scale32(self.raw[..., t])

    def batch_volumes(self, batch_bytes: int = SLAB_BYTES) -> int:
        """Volumes per batch of :meth:`raw_batches`."""
        x, y, z, t = self.raw.shape
        return int(max(1, min(t, batch_bytes // max(1, x * y * z * 4))))

    def raw_batches(self, batch_bytes: int = SLAB_BYTES) -> Iterator[np.ndarray]:
        """Raw volumes as C-ordered (B, Z, Y, X) views, a batch at a time."""
        x, y, z, t = self.raw.shape
        b = self.batch_volumes(batch_bytes)
        vol_bytes = x * y * z * self.raw.dtype.itemsize
        for t0 in range(0, t, b):
            yield np.asarray(self.raw[..., t0 : t0 + b]).T
            self.release(t0 * vol_bytes, min(t, t0 + b) * vol_bytes)
