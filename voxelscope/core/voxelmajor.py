"""Voxel-major rows of a compressed run: the one-pass builder and the store serving them.

A ``.nii.gz`` run stores volume after volume, so one voxel's time series is scattered
through the whole compressed stream. :func:`build` decompresses the run once, volume
batch by volume batch, and keeps a *voxel-major* copy of the chosen voxels: a float32
array of shape ``(n, T)``, one contiguous row per stored voxel, written into whatever
array the caller allocates (a cache file, see :mod:`voxelscope.core.cache`, or memory).

:class:`VoxelStore` serves a run's voxels from such rows (checked block by block against
their CRC-32 when the rows come from disk), from the values of voxels that never change,
and from the run file for any other voxel (one pass for everything asked at once), so
every voxel stays answerable and no value is ever made up. It follows
:class:`voxelscope.core.stores.VoxelSource`.

Examples
--------
>>> from pathlib import Path
>>> from nibabel.testing import data_path
>>> import nibabel as nib
>>> path = Path(data_path) / "example4d.nii.gz"
>>> img = nib.load(path)
>>> layout = RawLayout(path, int(img.dataobj.offset), np.dtype(img.dataobj.dtype),
...                    img.shape, 1.0, 0.0, True)
>>> everything = lambda s: np.ones(s.mean.shape, bool)
>>> built = build(layout, everything, everything, lambda n: np.empty((n, 2), np.float32))
>>> ijk = np.unravel_index(built.stored[5], img.shape[:3])
>>> built.rows.shape, bool(np.array_equal(built.rows[5], img.get_fdata()[ijk]))
((294912, 2), True)
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np

from voxelscope.core.errors import VoxelscopeError
from voxelscope.core.rawfile import (
    GzipStream,
    ProgressCallback,
    RawLayout,
    crc32,
    report_progress,
    scale_raw,
    stream_batches,
)
from voxelscope.core.summary import Stats, Summary

__all__ = [
    "BLOCK_BYTES",
    "Allocate",
    "Built",
    "CacheCorrupt",
    "CheckedRows",
    "Select",
    "VoxelStore",
    "block_crcs",
    "block_rows",
    "build",
    "read_voxels",
]

#: Target size of one checksummed block of rows.
BLOCK_BYTES = 256 * 1024


class CacheCorrupt(VoxelscopeError):
    """Cached data failed a checksum; the entry must not be used."""


def _f_order(flat_c: np.ndarray, shape: tuple[int, int, int]) -> np.ndarray:
    return np.ravel_multi_index(np.unravel_index(flat_c, shape), shape, order="F")


def _c_order(flat_f: np.ndarray, shape: tuple[int, int, int]) -> np.ndarray:
    return np.ravel_multi_index(np.unravel_index(flat_f, shape, order="F"), shape)


def _gather(v2: np.ndarray, sel_f: np.ndarray, out: np.ndarray, t0: int, t1: int, layout) -> None:
    """out[r, t0:t1] = scaled v2[:, sel_f[r]] (one sequential gather, one transposed write)."""
    if sel_f.size:
        scale_raw(np.take(v2, sel_f, axis=1).T, layout, out=out[:, t0:t1])


def read_voxels(
    layout: RawLayout, flat_c: np.ndarray, progress: ProgressCallback | None = None
) -> np.ndarray:
    """Time series of some voxels, read straight from the run file in one pass.

    Parameters
    ----------
    layout : RawLayout
    flat_c : ndarray of int
        C-order flat voxel indices.
    progress : callable, optional

    Returns
    -------
    ndarray
        float32 (n, T), rows in the order given.
    """
    flat_c = np.asarray(flat_c, dtype=np.int64)
    x, y, z, t = layout.shape
    out = np.empty((flat_c.size, t), dtype=np.float32)
    if flat_c.size == 0:
        return out
    sel_f = _f_order(flat_c, (x, y, z))
    for t0, t1, v, _f in stream_batches(layout, progress=progress):
        _gather(v.reshape(t1 - t0, -1), sel_f, out, t0, t1, layout)
    return out


@dataclass
class Built:
    summary: Summary
    stored: np.ndarray  # C-order flat index of each row, in row order
    rows: np.ndarray | None
    known_idx: np.ndarray  # C-order flat index of voxels not stored whose values are known
    known_val: np.ndarray  # their (constant) value
    members: np.ndarray | None  # gzip member table
    data_end: int = 0


Select = Callable[[Summary], np.ndarray]
Allocate = Callable[[int], "np.ndarray | None"]


def build(
    layout: RawLayout,
    select: Select,
    final: Select,
    allocate: Allocate,
    progress: ProgressCallback | None = None,
    batch_bytes: int | None = None,
) -> Built:
    """Decompress the run once and keep the rows of the selected voxels.

    ``select(first_batch_summary)`` picks the stored voxels (X, Y, Z) from the first batch
    of volumes; ``allocate(n_rows)`` gives the (n_rows, T) float32 array to write them
    into (or None to keep no rows); ``final(summary)`` is the brain mask of the whole run:
    any of its voxels the first choice missed are fetched in a second pass.
    """
    x, y, z, _t = layout.shape
    shape3 = (x, y, z)
    stats = Stats()
    rows = None
    sel_f = np.empty(0, dtype=np.int64)
    stream = None
    report_progress(progress, 0.0, layout)
    for t0, t1, v, f in stream_batches(layout, batch_bytes, progress):
        stream = f
        stats.add(v)
        if t0 == 0:
            keep = np.asarray(select(stats.summary(layout)), dtype=bool)
            sel_f = np.flatnonzero(keep.ravel(order="F"))
            rows = allocate(int(sel_f.size))
        if rows is not None:
            _gather(v.reshape(t1 - t0, -1), sel_f, rows, t0, t1, layout)
    summary = stats.summary(layout)
    stored = _c_order(sel_f, shape3)
    if rows is not None:
        kept = np.zeros(layout.n_voxels, dtype=bool)
        kept[stored] = True
        missing = np.flatnonzero(np.asarray(final(summary), dtype=bool).ravel() & ~kept)
        if missing.size:  # the first batch was not like the rest: fetch what it missed
            bigger = allocate(int(stored.size + missing.size))
            if bigger is not None:
                bigger[: stored.size] = rows
                bigger[stored.size :] = read_voxels(layout, missing)
                stored = np.concatenate([stored, missing])
            rows = bigger
    known, value = stats.known_values(layout)
    outside = np.ones(layout.n_voxels, dtype=bool)
    if rows is not None:
        outside[stored] = False
    known_idx = np.flatnonzero(known.ravel() & outside)
    members = stream.member_table() if isinstance(stream, GzipStream) else None
    data_end = stream.data_end if isinstance(stream, GzipStream) else 0
    return Built(
        summary=summary,
        stored=stored.astype(np.int64),
        rows=rows,
        known_idx=known_idx.astype(np.int64),
        known_val=value.ravel()[known_idx].astype(np.float32),
        members=members,
        data_end=int(data_end),
    )


# --------------------------------------------------------------------------- checked rows


class CheckedRows:
    """Rows of a cache file, each block checked against its CRC-32 on first read."""

    def __init__(self, data: np.ndarray, block_rows: int, crcs: np.ndarray | None, where: str):
        self.data = data
        self.block_rows = max(1, int(block_rows))
        self.crcs = crcs
        self.where = where
        n_blocks = -(-data.shape[0] // self.block_rows) if data.shape[0] else 0
        self.ok = np.zeros(n_blocks, dtype=bool) if crcs is not None else np.ones(n_blocks, bool)
        self._lock = threading.Lock()

    def check_range(self, lo: int, hi: int) -> None:
        if hi <= lo:
            return
        b0, b1 = lo // self.block_rows, (hi - 1) // self.block_rows + 1
        if self.ok[b0:b1].all():
            return
        self._check(np.arange(b0, b1))

    def check_rows(self, pos: np.ndarray) -> None:
        if pos.size == 0:
            return
        # marks, not np.unique: that imports numpy.ma (about 20 ms of a fit's start-up)
        hit = np.zeros(self.ok.size, dtype=bool)
        hit[pos // self.block_rows] = True
        blocks = np.flatnonzero(hit & ~self.ok)
        if blocks.size:
            self._check(blocks)

    def _check(self, blocks: np.ndarray) -> None:
        with self._lock:
            for b in blocks.tolist():
                if self.ok[b]:
                    continue
                part = self.data[b * self.block_rows : (b + 1) * self.block_rows]
                if crc32(memoryview(np.ascontiguousarray(part)).cast("B")) != int(self.crcs[b]):
                    raise CacheCorrupt(f"{self.where}: block {b} of the cached rows is damaged")
                self.ok[b] = True


def block_crcs(rows: np.ndarray, block_rows: int) -> np.ndarray:
    n = rows.shape[0]
    out = np.empty(-(-n // block_rows) if n else 0, dtype=np.uint32)
    for b in range(out.size):
        part = np.ascontiguousarray(rows[b * block_rows : (b + 1) * block_rows])
        out[b] = crc32(memoryview(part).cast("B"))
    return out


def block_rows(t: int) -> int:
    return max(1, BLOCK_BYTES // (4 * t))


# --------------------------------------------------------------------------- the store


class VoxelStore:
    """Voxel time series of a compressed run: stored rows, known constants, the file.

    Rows are checked against their block checksums as they are first read; a failed
    check calls ``recover()``, which gives a fresh store to take over (the entry rebuilt),
    and the read is repeated. Voxels neither stored nor constant are read from the run
    file in one pass for everything asked at once.
    """

    def __init__(
        self,
        layout: RawLayout,
        rows: CheckedRows | None,
        stored: np.ndarray,
        known_idx: np.ndarray,
        known_val: np.ndarray,
        recover: Callable[[CacheCorrupt], tuple[VoxelStore, str]] | None = None,
        notes: list[str] | None = None,
    ):
        self.layout = layout
        x, y, z, t = layout.shape
        self.shape = (x, y, z)
        self.n_volumes = t
        self._set(rows, stored, known_idx, known_val)
        self._recover = recover
        self._widen: Callable[[np.ndarray], tuple[VoxelStore, str]] | None = None
        self.notes = notes if notes is not None else []
        self._fetched: dict[int, np.ndarray] = {}
        self._lock = threading.RLock()
        self._said_file = False

    def _set(self, rows, stored, known_idx, known_val) -> None:
        n = self.layout.n_voxels
        pos = np.full(n, -1, dtype=np.int64 if n >= 2**31 else np.int32)
        if rows is not None:
            pos[stored] = np.arange(stored.size, dtype=pos.dtype)
        known = np.zeros(n, dtype=bool)
        known[known_idx] = True
        val = np.zeros(n, dtype=np.float32)
        val[known_idx] = known_val
        # one assignment: a reader in another thread sees the old state or the new one
        self._state = (rows, stored, pos, known, val)

    @property
    def _rows(self) -> CheckedRows | None:
        return self._state[0]

    @property
    def stored(self) -> np.ndarray:
        """C-order flat index of each stored row."""
        return self._state[1]

    @property
    def _pos(self) -> np.ndarray:
        return self._state[2]

    @property
    def _known(self) -> np.ndarray:
        return self._state[3]

    @property
    def _val(self) -> np.ndarray:
        return self._state[4]

    @property
    def data(self) -> np.ndarray | None:
        """The stored rows (n, T) float32, or None."""
        return None if self._rows is None else self._rows.data

    # ------------------------------------------------------------ reading
    def _guarded(self, fn: Callable[[], Any]) -> Any:
        rows = self._rows
        try:
            return fn()
        except CacheCorrupt as err:
            if self._recover is None:
                raise
            with self._lock:
                if self._rows is rows:  # not yet recovered by another thread
                    fresh, line = self._recover(err)
                    self._take_over(fresh)
                    self.notes.append(line)
            return fn()

    def _take_over(self, fresh: VoxelStore) -> None:
        self._set(fresh._rows, fresh.stored, *self._known_pairs(fresh))
        self._recover = fresh._recover
        self._widen = fresh._widen

    def widen(self, mask: np.ndarray) -> None:
        """Keep every voxel of ``mask`` (a brain mask given by the user) at hand.

        Voxels of the mask that are neither stored nor constant make the cache entry be
        rebuilt once with them included (later opens find them stored); a store in memory
        reads them from the file now, in one pass.
        """
        flat = np.flatnonzero(np.asarray(mask, dtype=bool).ravel())
        missing = flat[(self._pos[flat] < 0) & ~self._known[flat]]
        if not missing.size:
            return
        with self._lock:
            if self._widen is not None:
                fresh, line = self._widen(np.asarray(mask, dtype=bool))
                self._take_over(fresh)
                self.notes.append(line)
            else:
                self._prefetch(missing)

    @staticmethod
    def _known_pairs(store: VoxelStore) -> tuple[np.ndarray, np.ndarray]:
        idx = np.flatnonzero(store._known)
        return idx, store._val[idx]

    def _say_file(self) -> None:
        if not self._said_file:
            self._said_file = True
            self.notes.append(
                f"{self.layout.path}: voxels outside the cached brain voxels are read from "
                f"the run file (slower)"
            )

    def _from_file(self, flat: np.ndarray) -> np.ndarray:
        """Rows of voxels that are neither stored nor constant (one pass for them all)."""
        with self._lock:
            need = list(dict.fromkeys(f for f in flat.tolist() if f not in self._fetched))
            if need:
                self._say_file()
                got = read_voxels(self.layout, np.asarray(need, dtype=np.int64))
                if len(self._fetched) + len(need) > 4096:
                    self._fetched.clear()  # bounded: a few thousand rows at most
                self._fetched.update(zip(need, got))
            return np.stack([self._fetched[f] for f in flat.tolist()])

    def _gather(self, flat: np.ndarray) -> np.ndarray:
        """float32 (n, T) copies, rows in the order given."""
        out = np.empty((flat.size, self.n_volumes), dtype=np.float32)
        if flat.size == 0:
            return out
        rows, _stored, pos_all, known_all, val_all = self._state
        pos = pos_all[flat]
        have = pos >= 0
        if have.any():
            p = pos[have].astype(np.int64)
            rows.check_rows(p)
            order = np.argsort(p, kind="stable")
            tmp = np.empty((p.size, self.n_volumes), dtype=np.float32)
            tmp[order] = rows.data[p[order]]
            out[have] = tmp
        rest = ~have
        if rest.any():
            known = rest & known_all[flat]
            if known.any():
                out[known] = val_all[flat[known]][:, None]
            other = rest & ~known
            if other.any():
                out[other] = self._from_file(flat[other])
        return out

    def row(self, flat: int) -> np.ndarray:
        flat = int(flat)
        if self._pos[flat] < 0 and not self._known[flat] and flat not in self._fetched:
            self._from_file(self._around(flat))  # a click outside: its neighbours come too
        return self._guarded(
            lambda: self._gather(np.array([flat], dtype=np.int64))[0].astype(np.float64)
        )

    def _around(self, flat: int) -> np.ndarray:
        """The voxel and its neighbours within two voxels that the file must give."""
        ijk = np.unravel_index(flat, self.shape)
        box = [np.arange(max(0, c - 2), min(n, c + 3)) for c, n in zip(ijk, self.shape)]
        grid = np.ravel_multi_index(np.meshgrid(*box, indexing="ij"), self.shape).ravel()
        grid = grid[(self._pos[grid] < 0) & ~self._known[grid]]
        return np.unique(np.concatenate([[flat], grid])).astype(np.int64)

    def rows(self, flat_idx: np.ndarray) -> np.ndarray:
        return self._guarded(lambda: self._gather(np.asarray(flat_idx, dtype=np.int64)))

    def iter_rows(self, flat: np.ndarray, chunk: int) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        self._prefetch(flat)
        for a in range(0, flat.size, chunk):
            idx = flat[a : a + chunk]
            yield idx, self._guarded(lambda idx=idx: self._gather(idx))

    def _prefetch(self, flat: np.ndarray) -> None:
        """Read every voxel the file must give in one pass, before iterating."""
        other = flat[(self._pos[flat] < 0) & ~self._known[flat]]
        if other.size:
            self._say_file()
            got = read_voxels(self.layout, other)
            with self._lock:
                self._fetched = dict(zip(other.tolist(), got))

    def iter_blocks(self, mask: np.ndarray, block: int) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        """(T, n) blocks of the voxels of ``mask`` in storage order.

        A block is a read-only view of the rows where its voxels are consecutive stored
        rows, else a float32 copy.
        """
        flat = np.flatnonzero(mask).astype(np.int64)
        if flat.size == 0:
            return
        if self._rows is None:
            for idx, rows in self.iter_rows(flat, block):
                yield idx, rows.T
            return
        pos = self._pos[flat].astype(np.int64)
        have = pos >= 0
        stored_flat = flat[have][np.argsort(pos[have], kind="stable")]
        for a in range(0, stored_flat.size, block):
            idx = stored_flat[a : a + block]
            yield idx, self._guarded(lambda idx=idx: self._block_of(idx))
        rest = flat[~have]
        if rest.size:
            for idx, rows in self.iter_rows(rest, block):
                yield idx, rows.T

    def _block_of(self, idx: np.ndarray) -> np.ndarray:
        state = self._state
        p = state[2][idx].astype(np.int64)
        lo, hi = int(p[0]), int(p[-1]) + 1
        if hi - lo == idx.size and np.all(np.diff(p) == 1):
            state[0].check_range(lo, hi)
            rows = state[0].data[lo:hi].view(np.ndarray)
            rows.flags.writeable = False  # a view of the cache itself
            return rows.T
        return self._gather(idx).T

    def volume(self, t: int) -> np.ndarray:
        return self._guarded(lambda: self._volume(t))

    def _volume(self, t: int) -> np.ndarray:
        rows, stored, pos, known, val = self._state
        out = val.copy()
        if rows is not None and stored.size:
            rows.check_range(0, stored.size)
            out[stored] = rows.data[:, t]
        other = (pos < 0) & ~known
        if other.any():
            self._say_file()
            for t0, _t1, v, _f in stream_batches(self.layout, batch_bytes=1):
                if t0 == t:
                    vol = scale_raw(v[0].transpose(2, 1, 0), self.layout).ravel()
                    out[other] = vol[other]
                    break
        return out.reshape(self.shape)
