"""Voxel-major on-disk cache for compressed runs.

A ``.nii.gz`` run stores volume after volume, so one voxel's time series is scattered
through the whole gzip stream: reading it means decompressing everything. On first open
we therefore decompress the run once, volume batch by volume batch, and keep a
*voxel-major* copy of the voxels that matter: a float32 array of shape ``(n, T)``, one
contiguous row per stored voxel. Later opens memory-map it, and a time series is one row.

What is stored (:class:`VoxelStore`)
    The brain voxels, chosen by the run's own mask rule (the caller passes it in), with a
    generous margin decided from the first batch of volumes; every voxel of the final
    brain mask is stored (a second pass fetches any the margin missed). A voxel outside
    whose value never changes (zeros outside the brain, a constant, all NaN) is served
    exactly from the summary. Any other voxel outside is read from the run file on demand
    (one pass over the file for all the voxels asked for at once), so every voxel stays
    answerable and no value is ever made up.

Layout of the cache directory (``platformdirs.user_cache_dir("voxelscope")/runs``, which
honours ``XDG_CACHE_HOME``; or an explicit ``cache_dir``)::

    vxs-<key>.rows          the (n, T) float32 little-endian rows, no header
    vxs-<key>.summary.npz   mean image, flags, which voxel each row is, block checksums,
                            the gzip member table, values of constant voxels
    vxs-<key>.json          metadata, written last (an entry without it is never used);
                            its modification time is the entry's last use

What the cache promises, and how:

* **Never stale.** The key is a SHA-256 of the resolved path, size, ``mtime_ns``, a digest
  of the header bytes and of the file's last bytes, shape, data type and scaling. For gzip
  the summary also records every member's end offset, CRC-32 and length (RFC 1952),
  taken from the trailers while decompressing and checked by the inflater at the end of
  the first read; every later open re-reads those trailers (8 bytes per member) and
  rebuilds when any differs, so a multi-member or block-compressed file changed in an
  early member is never served stale. Other compressions (bz2, zstd) add a CRC-32 of the
  whole compressed file to the key.
* **Never wrong.** The metadata carries a SHA-256 of itself and of the summary file; the
  rows are checked against a CRC-32 per block of about :data:`BLOCK_BYTES`, once per
  block per process, as the blocks are first read. The rows file is mapped with the
  shape and type recorded in the (protected) metadata, never from a header inside the
  file. A failed check removes the entry and rebuilds it from the run (in memory if the
  cache cannot be written), saying so in one warning.
* **Never a crash.** A cache folder that cannot be created or written, a full disk
  (space is reserved before writing), a damaged entry: the run is held in memory instead
  (or read from the file when even memory would not hold it), with one line saying why.
* **Bounded.** The whole cache stays under a size limit (:data:`DEFAULT_LIMIT_BYTES`,
  ``VOXELSCOPE_CACHE_LIMIT``): least recently used entries are removed, said in one line;
  a run whose entry alone would exceed the limit is not cached. Entries of at least
  :data:`ANNOUNCE_BYTES` are announced before they are written.
* **Atomic and clean.** Files are written under temporary names that carry the writing
  process's id and renamed last; temporaries of a build whose process is gone (or older
  than a day) are removed at the next open.
* **Read-only input.** The run is only ever opened for reading.

Examples
--------
>>> info = cache_info(cache_dir=Path(tempfile.mkdtemp()))
>>> len(info), info.total_bytes
(0, 0)
>>> parse_size("20GB"), parse_size("512 MB"), parse_size("1000")
(20000000000, 512000000, 1000)
"""

from __future__ import annotations

import errno
import hashlib
import io
import json
import os
import shutil
import socket
import struct
import sys
import tempfile
import threading
import time
import zlib
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from voxelscope.core.errors import InputError, VoxelscopeError

__all__ = [
    "ANNOUNCE_BYTES",
    "BATCH_BYTES",
    "BLOCK_BYTES",
    "DEFAULT_LIMIT_BYTES",
    "LIMIT_ENV",
    "CacheCorrupt",
    "CacheEntry",
    "CacheInfo",
    "CacheUnavailable",
    "Cancelled",
    "RawLayout",
    "Summary",
    "VoxelStore",
    "cache_clear",
    "cache_info",
    "cache_key",
    "cache_limit_bytes",
    "default_cache_dir",
    "open_store",
    "parse_size",
    "read_voxels",
    "summarize_volumes",
    "terminal_progress",
]

#: Format of the cached files; part of the key, so a new format never reads an old file.
FORMAT_VERSION = 2

#: Target size of one batch of volumes as float32 (the raw batch is at most this big too).
BATCH_BYTES = 16 * 1024 * 1024

#: Target size of one checksummed block of rows.
BLOCK_BYTES = 256 * 1024

#: Default limit of the whole cache folder (bytes); ``VOXELSCOPE_CACHE_LIMIT`` overrides it.
DEFAULT_LIMIT_BYTES = 20 * 10**9

#: Environment variable holding the cache limit, e.g. ``20GB``, ``500MB`` or bytes.
LIMIT_ENV = "VOXELSCOPE_CACHE_LIMIT"

#: Entries at least this big are announced (one line) before they are written.
ANNOUNCE_BYTES = 10**9

#: Temporary files older than this (seconds) are stale whoever wrote them.
STALE_TMP_SECONDS = 24 * 3600

#: ``VOXELSCOPE_INFLATER=zlib`` forces the standard library's inflater (the fallback).
INFLATER_ENV = "VOXELSCOPE_INFLATER"

_PREFIX = "vxs-"
_TAIL_BYTES = 64
_READ_BYTES = 1 << 20  # compressed bytes read at a time
_PIECE = 1 << 20  # decompressed bytes produced at a time
_HOST = hashlib.sha256(socket.gethostname().encode()).hexdigest()[:8]

ProgressCallback = Callable[[float], "bool | None"]
Notify = Callable[[str], None]


class Cancelled(VoxelscopeError):
    """The user cancelled a long operation (the progress callback returned False)."""


class CacheUnavailable(InputError):
    """The cache cannot be used for this run (the run itself is fine)."""


class CacheCorrupt(VoxelscopeError):
    """Cached data failed a checksum; the entry must not be used."""


# --------------------------------------------------------------------------- inflaters


def _zlib_module():
    """The inflater: ISA-L's zlib-compatible module when installed, else zlib."""
    if os.environ.get(INFLATER_ENV, "").strip().lower() != "zlib":
        try:
            from isal import isal_zlib

            return isal_zlib
        except ImportError:  # pragma: no cover - isal is a dependency, zlib the fallback
            pass
    return zlib


def _crc32(data: Any, value: int = 0) -> int:
    """CRC-32 (the gzip polynomial) of a buffer; ISA-L's when available (same values)."""
    return int(_zlib_module().crc32(data, value)) & 0xFFFFFFFF


@dataclass(frozen=True)
class RawLayout:
    """Where and how the voxel data sit in a NIfTI file (from nibabel's array proxy).

    ``shape`` is (X, Y, Z, T); data are Fortran ordered (x fastest), ``dtype`` includes
    the byte order, and values are ``raw * slope + inter``.
    """

    path: Path
    offset: int
    dtype: np.dtype
    shape: tuple[int, int, int, int]
    slope: float
    inter: float
    compressed: bool

    @property
    def volume_bytes(self) -> int:
        """Bytes of one raw volume."""
        x, y, z, _ = self.shape
        return x * y * z * self.dtype.itemsize

    @property
    def n_voxels(self) -> int:
        """X*Y*Z."""
        x, y, z, _ = self.shape
        return x * y * z


def _is_gzip(path: Path) -> bool:
    with open(path, "rb") as f:
        return f.read(2) == b"\x1f\x8b"


class _GzipStream:
    """The decompressed bytes of a gzip file, member by member.

    Each member is inflated by a fresh decompressor (``wbits=31``), which checks the
    member's CRC-32 and length against its trailer; the trailer's offset, CRC-32 and
    length are recorded in :attr:`members`. Zero padding between or after members is
    skipped; other bytes after the last member end the stream (and are recorded as
    :attr:`data_end`).
    """

    def __init__(self, path: Path):
        self._lib = _zlib_module()
        self._f = open(path, "rb", buffering=0)
        self._fd = self._f.fileno()
        self._d: Any = None
        self._buf = b""
        self._pos = 0  # file offset after the last byte read into _buf
        self._out = memoryview(b"")
        self.members: list[tuple[int, int, int]] = []
        self.done = False
        self.data_end = 0

    def close(self) -> None:
        self._f.close()

    def __enter__(self) -> _GzipStream:
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    def _more(self) -> bool:
        data = self._f.read(_READ_BYTES)
        if data:
            self._buf = self._buf + data if self._buf else data
            self._pos += len(data)
        return bool(data)

    def _produce(self, want: int) -> bytes:
        while True:
            if self._d is None:
                while True:
                    self._buf = self._buf.lstrip(b"\0")
                    if len(self._buf) >= 2 or not self._more():
                        break
                if len(self._buf) < 2 or self._buf[:2] != b"\x1f\x8b":
                    if not self.members:
                        raise OSError("not a gzip stream")
                    self.done = True
                    self.data_end = self.members[-1][0]
                    return b""
                self._d = self._lib.decompressobj(31)
            if not self._buf and not self._more():
                raise EOFError("the compressed stream ends before its end marker")
            # bounded pieces: the allocator reuses them (no fresh pages for every batch)
            out = self._d.decompress(self._buf, min(max(want, 1 << 16), _PIECE))
            if self._d.eof:
                rest = self._d.unused_data
                end = self._pos - len(rest)
                crc, isize = struct.unpack("<II", os.pread(self._fd, 8, end - 8))
                self.members.append((end, crc, isize))
                self._buf = rest
                self._d = None
            else:
                self._buf = self._d.unconsumed_tail
            if out:
                return out

    def readinto(self, view: Any) -> int:
        view = memoryview(view).cast("B")
        n, got = len(view), 0
        while got < n:
            if len(self._out):
                k = min(n - got, len(self._out))
                view[got : got + k] = self._out[:k]
                self._out = self._out[k:]
                got += k
                continue
            if self.done:
                break
            self._out = memoryview(self._produce(n - got))
        return got

    def read(self, n: int) -> bytes:
        buf = bytearray(n)
        got = self.readinto(buf)
        return bytes(buf[:got])

    def skip(self, n: int) -> None:
        while n > 0:
            got = len(self.read(min(n, 1 << 22)))
            if not got:
                raise EOFError("the compressed stream ends inside the header")
            n -= got

    def drain(self) -> None:
        """Inflate to the end (every member's CRC and length are checked on the way)."""
        self._out = memoryview(b"")
        while not self.done:
            self._produce(1 << 22)

    def member_table(self) -> np.ndarray:
        """(n, 3) uint64: end offset, CRC-32 and length of each member."""
        return np.asarray(self.members, dtype=np.uint64).reshape(-1, 3)


class _OtherStream:
    """bz2 / zstd streams through nibabel's opener (no member table)."""

    def __init__(self, path: Path):
        from nibabel.openers import ImageOpener

        self._f = ImageOpener(str(path), "rb")

    def close(self) -> None:
        self._f.close()

    def __enter__(self) -> _OtherStream:
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    def readinto(self, view: Any) -> int:
        return self._f.readinto(view)

    def read(self, n: int) -> bytes:
        return self._f.read(n)

    def skip(self, n: int) -> None:
        self._f.seek(n)

    def drain(self) -> None:
        while self._f.read(1 << 22):
            pass


class _PlainStream(_OtherStream):
    def __init__(self, path: Path):
        self._f = open(path, "rb")


def _open_stream(layout: RawLayout):
    if not layout.compressed:
        return _PlainStream(layout.path)
    if _is_gzip(layout.path):
        return _GzipStream(layout.path)
    return _OtherStream(layout.path)


def _read_error(layout: RawLayout, err: BaseException) -> InputError:
    text = " ".join(str(err).split()) or type(err).__name__
    return InputError(
        f"{layout.path}: the voxel data cannot be read ({text[:160]}); the file is "
        f"truncated or corrupt, re-copy or re-export it"
    )


def _report(progress: ProgressCallback | None, fraction: float, layout: RawLayout) -> None:
    if progress is not None and progress(float(fraction)) is False:
        raise Cancelled(f"{layout.path}: opening was cancelled; nothing was kept")


def _stream_batches(
    layout: RawLayout, batch_bytes: int | None = None, progress: ProgressCallback | None = None
) -> Iterator[tuple[int, int, np.ndarray, Any]]:
    """Yield ``(t0, t1, v, stream)`` with ``v`` the raw volumes t0..t1 as (B, Z, Y, X).

    A worker thread inflates the next batch (the inflater releases the GIL) while the
    caller works on this one; ``v`` is only valid until the next batch is asked for. The
    stream is read to its end after the last batch, so a gzip stream's CRCs are checked.
    """
    x, y, z, t = layout.shape
    n_vox = x * y * z
    if batch_bytes is None:
        batch_bytes = BATCH_BYTES
    batch = int(max(1, min(t, batch_bytes // max(1, n_vox * 4))))
    starts = list(range(0, t, batch))
    bufs = [np.empty(batch * layout.volume_bytes, np.uint8) for _ in range(min(2, len(starts)))]
    try:
        f = _open_stream(layout)
    except OSError as err:
        raise _read_error(layout, err) from None

    def read_batch(n: int) -> memoryview:
        t0 = starts[n]
        nbytes = (min(t, t0 + batch) - t0) * layout.volume_bytes
        view = memoryview(bufs[n % len(bufs)].data)[:nbytes]
        got = f.readinto(view)
        if got != nbytes:
            raise EOFError(f"data end after {t0 + got // layout.volume_bytes} of {t} volumes")
        if n == len(starts) - 1:
            f.drain()
        return view

    with f, ThreadPoolExecutor(max_workers=1) as pool:
        try:
            f.skip(layout.offset)
            pending = pool.submit(read_batch, 0)
            for n, t0 in enumerate(starts):
                t1 = min(t, t0 + batch)
                view = pending.result()
                if n + 1 < len(starts):
                    pending = pool.submit(read_batch, n + 1)
                v = np.frombuffer(view, dtype=layout.dtype).reshape(t1 - t0, z, y, x)
                yield t0, t1, v, f
                del v, view
                _report(progress, t1 / t, layout)
        except (EOFError, OSError, zlib.error, ValueError) as err:
            raise _read_error(layout, err) from None
        except Exception as err:  # the ISA-L inflater's own error type
            if type(err).__name__ in ("IsalError", "error"):
                raise _read_error(layout, err) from None
            raise


# --------------------------------------------------------------------------- summary


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


class _Stats:
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
            value = _scale(vmin, layout)
        return same, value


def _scale(raw: np.ndarray, layout: RawLayout, out: np.ndarray | None = None) -> np.ndarray:
    """raw * slope + inter in float32 arithmetic (the one rule for every stored value)."""
    if layout.slope == 1.0 and layout.inter == 0.0:
        if out is None:
            return np.asarray(raw, dtype=np.float32)
        out[...] = raw
        return out
    with np.errstate(invalid="ignore", over="ignore"):
        res = np.multiply(
            raw, np.float32(layout.slope), out=out, dtype=np.float32, casting="unsafe"
        )
        if layout.inter != 0.0:
            np.add(res, np.float32(layout.inter), out=res)
    return res


def summarize_volumes(volumes: Iterator[np.ndarray], layout: RawLayout) -> Summary:
    """Summary from raw (unscaled) batches shaped (B, Z, Y, X); used for memory-mapped runs."""
    stats = _Stats()
    for v in volumes:
        stats.add(v)
    return stats.summary(layout)


# --------------------------------------------------------------------------- building


def _f_order(flat_c: np.ndarray, shape: tuple[int, int, int]) -> np.ndarray:
    return np.ravel_multi_index(np.unravel_index(flat_c, shape), shape, order="F")


def _c_order(flat_f: np.ndarray, shape: tuple[int, int, int]) -> np.ndarray:
    return np.ravel_multi_index(np.unravel_index(flat_f, shape, order="F"), shape)


def _gather(v2: np.ndarray, sel_f: np.ndarray, out: np.ndarray, t0: int, t1: int, layout) -> None:
    """out[r, t0:t1] = scaled v2[:, sel_f[r]] (one sequential gather, one transposed write)."""
    if sel_f.size:
        _scale(np.take(v2, sel_f, axis=1).T, layout, out=out[:, t0:t1])


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
    for t0, t1, v, _f in _stream_batches(layout, progress=progress):
        _gather(v.reshape(t1 - t0, -1), sel_f, out, t0, t1, layout)
    return out


@dataclass
class _Built:
    summary: Summary
    stored: np.ndarray  # C-order flat index of each row, in row order
    rows: np.ndarray | None
    known_idx: np.ndarray  # C-order flat index of voxels not stored whose values are known
    known_val: np.ndarray  # their (constant) value
    members: np.ndarray | None  # gzip member table
    data_end: int = 0


Select = Callable[[Summary], np.ndarray]
Allocate = Callable[[int], "np.ndarray | None"]


def _build(
    layout: RawLayout,
    select: Select,
    final: Select,
    allocate: Allocate,
    progress: ProgressCallback | None = None,
    batch_bytes: int | None = None,
) -> _Built:
    """Decompress the run once and keep the rows of the selected voxels.

    ``select(first_batch_summary)`` picks the stored voxels (X, Y, Z) from the first batch
    of volumes; ``allocate(n_rows)`` gives the (n_rows, T) float32 array to write them
    into (or None to keep no rows); ``final(summary)`` is the brain mask of the whole run:
    any of its voxels the first choice missed are fetched in a second pass.
    """
    x, y, z, _t = layout.shape
    shape3 = (x, y, z)
    stats = _Stats()
    rows = None
    sel_f = np.empty(0, dtype=np.int64)
    stream = None
    _report(progress, 0.0, layout)
    for t0, t1, v, f in _stream_batches(layout, batch_bytes, progress):
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
    members = stream.member_table() if isinstance(stream, _GzipStream) else None
    data_end = stream.data_end if isinstance(stream, _GzipStream) else 0
    return _Built(
        summary=summary,
        stored=stored.astype(np.int64),
        rows=rows,
        known_idx=known_idx.astype(np.int64),
        known_val=value.ravel()[known_idx].astype(np.float32),
        members=members,
        data_end=int(data_end),
    )


# --------------------------------------------------------------------------- checked rows


class _CheckedRows:
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
        blocks = np.unique(pos // self.block_rows)
        blocks = blocks[~self.ok[blocks]]
        if blocks.size:
            self._check(blocks)

    def _check(self, blocks: np.ndarray) -> None:
        with self._lock:
            for b in blocks.tolist():
                if self.ok[b]:
                    continue
                part = self.data[b * self.block_rows : (b + 1) * self.block_rows]
                if _crc32(memoryview(np.ascontiguousarray(part)).cast("B")) != int(self.crcs[b]):
                    raise CacheCorrupt(f"{self.where}: block {b} of the cached rows is damaged")
                self.ok[b] = True


def _block_crcs(rows: np.ndarray, block_rows: int) -> np.ndarray:
    n = rows.shape[0]
    out = np.empty(-(-n // block_rows) if n else 0, dtype=np.uint32)
    for b in range(out.size):
        part = np.ascontiguousarray(rows[b * block_rows : (b + 1) * block_rows])
        out[b] = _crc32(memoryview(part).cast("B"))
    return out


def _block_rows(t: int) -> int:
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
        rows: _CheckedRows | None,
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
    def _rows(self) -> _CheckedRows | None:
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

    def chunks(self, flat: np.ndarray, chunk: int) -> Iterator[tuple[np.ndarray, np.ndarray]]:
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

    def blocks(self, flat: np.ndarray, block: int) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        """(T, n) blocks in storage order; a read-only view of the rows where the block's
        voxels are consecutive stored rows, else a float32 copy."""
        if self._rows is None:
            for idx, rows in self.chunks(flat, block):
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
            for idx, rows in self.chunks(rest, block):
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
            for t0, _t1, v, _f in _stream_batches(self.layout, batch_bytes=1):
                if t0 == t:
                    vol = _scale(v[0].transpose(2, 1, 0), self.layout).ravel()
                    out[other] = vol[other]
                    break
        return out.reshape(self.shape)


# --------------------------------------------------------------------------- locations


def default_cache_dir() -> Path:
    """Directory for cached runs: ``user_cache_dir("voxelscope")/runs``.

    On Linux this honours ``XDG_CACHE_HOME`` (``$XDG_CACHE_HOME/voxelscope/runs``).

    Examples
    --------
    >>> default_cache_dir().name
    'runs'
    """
    import platformdirs

    return Path(platformdirs.user_cache_dir("voxelscope", appauthor=False)) / "runs"


def _resolve_dir(cache_dir: str | os.PathLike[str] | None) -> Path:
    return Path(cache_dir) if cache_dir is not None else default_cache_dir()


_UNITS = {"": 1, "B": 1, "KB": 10**3, "MB": 10**6, "GB": 10**9, "TB": 10**12}
_UNITS.update({"K": 10**3, "M": 10**6, "G": 10**9, "T": 10**12})
_UNITS.update({"KIB": 2**10, "MIB": 2**20, "GIB": 2**30, "TIB": 2**40})


def parse_size(text: str) -> int:
    """Bytes from ``"20GB"``, ``"500 MB"``, ``"1.5T"``, ``"2GiB"`` or a plain number.

    Raises
    ------
    ValueError
        Not a size.
    """
    s = str(text).strip().upper().replace(" ", "")
    i = len(s)
    while i and not (s[i - 1].isdigit() or s[i - 1] == "."):
        i -= 1
    number, unit = s[:i], s[i:]
    value = float(number) * _UNITS[unit] if number and unit in _UNITS else float("nan")
    if not value >= 0 or value == float("inf"):
        raise ValueError(f"not a size: {text!r}")
    return int(value)


def cache_limit_bytes() -> int:
    """The cache limit: ``VOXELSCOPE_CACHE_LIMIT`` or :data:`DEFAULT_LIMIT_BYTES` (20 GB).

    Raises
    ------
    InputError
        The variable is not a size.
    """
    text = os.environ.get(LIMIT_ENV, "").strip()
    if not text:
        return DEFAULT_LIMIT_BYTES
    try:
        return parse_size(text)
    except ValueError:
        raise InputError(
            f"{LIMIT_ENV}={text[:40]!r} is not a size; give bytes or a number with "
            f"KB, MB, GB or TB (e.g. 20GB)"
        ) from None


def _gb(n: float) -> str:
    return f"{n / 1e9:.1f} GB" if n >= 1e9 else f"{n / 1e6:.1f} MB"


# --------------------------------------------------------------------------- keys


def _fingerprint(layout: RawLayout) -> dict[str, Any]:
    path = layout.path.resolve()
    st = path.stat()
    with _open_stream(layout) as f:
        header_bytes = f.read(layout.offset)
    with open(path, "rb") as f:
        f.seek(max(0, st.st_size - _TAIL_BYTES))
        tail = f.read()
    fp: dict[str, Any] = {
        "format": FORMAT_VERSION,
        "source": str(path),
        "size": int(st.st_size),
        "mtime_ns": int(st.st_mtime_ns),
        "header_sha256": hashlib.sha256(header_bytes).hexdigest(),
        "tail_sha256": hashlib.sha256(tail).hexdigest(),
        "shape": list(layout.shape),
        "dtype": layout.dtype.str,
        "slope": float(layout.slope),
        "inter": float(layout.inter),
    }
    if not _is_gzip(path):  # no member table to check: cover the whole compressed file
        crc = 0
        with open(path, "rb") as f:
            while chunk := f.read(1 << 22):
                crc = _crc32(chunk, crc)
        fp["file_crc32"] = crc
    return fp


def cache_key(layout: RawLayout) -> str:
    """Key of a run's cache entry (hex SHA-256 of its fingerprint, 32 characters)."""
    return _key_of(_fingerprint(layout))


def _key_of(fingerprint: dict[str, Any]) -> str:
    text = json.dumps(fingerprint, sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()[:32]


def _names(directory: Path, key: str) -> tuple[Path, Path, Path]:
    base = f"{_PREFIX}{key}"
    return (
        directory / f"{base}.rows",
        directory / f"{base}.summary.npz",
        directory / f"{base}.json",
    )


def _digest(meta: dict[str, Any]) -> str:
    body = {k: v for k, v in meta.items() if k != "digest"}
    return hashlib.sha256(json.dumps(body, sort_keys=True).encode()).hexdigest()


def _members_unchanged(path: Path, members: np.ndarray, data_end: int, tail_crc: int) -> bool:
    """Every recorded gzip trailer is still where it was, with the same CRC and length."""
    size = path.stat().st_size
    ends = members[:, 0].astype(np.int64)
    if ends.size == 0 or ends.min() < 8 or ends.max() > size or data_end > size:
        return False
    raw = np.memmap(path, dtype=np.uint8, mode="r")
    try:
        trailers = np.ascontiguousarray(raw[ends[:, None] - 8 + np.arange(8)])
        pairs = trailers.view("<u4").reshape(-1, 2)
        same = np.array_equal(pairs[:, 0], members[:, 1].astype(np.uint32)) and np.array_equal(
            pairs[:, 1], members[:, 2].astype(np.uint32)
        )
        after = np.asarray(raw[data_end:])
        return bool(same and _crc32(memoryview(np.ascontiguousarray(after))) == tail_crc)
    finally:
        del raw


# --------------------------------------------------------------------------- entries


@dataclass
class _Loaded:
    rows: _CheckedRows
    built: _Built
    data_path: Path


def _load_entry(directory: Path, key: str, fp: dict[str, Any], layout: RawLayout, notes):
    """The entry, None when missing or stale, or None after saying it was damaged."""
    data_path, summary_path, meta_path = _names(directory, key)
    if not meta_path.exists():
        return None

    def damaged(what: str) -> None:
        notes.append(
            f"{directory}: the cache entry of {layout.path.name} is damaged ({what}); "
            f"reading the run again"
        )
        _remove_key(directory, key)

    try:
        meta = json.loads(meta_path.read_text())
        if not isinstance(meta, dict):
            raise ValueError("not an object")
    except (OSError, ValueError, UnicodeDecodeError, RecursionError):
        return damaged("unreadable metadata")
    if meta.get("digest") != _digest(meta):
        return damaged("metadata checksum")
    if meta.get("fingerprint") != fp:
        return None  # another version of the run under the same key: not ours
    try:
        blob = summary_path.read_bytes()
    except OSError:
        return damaged("summary missing")
    if hashlib.sha256(blob).hexdigest() != meta.get("summary_sha256"):
        return damaged("summary checksum")
    x, y, z, t = fp["shape"]
    n_vox = x * y * z
    try:
        with np.load(io.BytesIO(blob), allow_pickle=False) as npz:
            a = {k: npz[k] for k in npz.files}
        summary = Summary(
            mean=np.asarray(a["mean"], dtype=np.float32),
            nonfinite=np.unpackbits(a["nonfinite"], count=n_vox).astype(bool).reshape(x, y, z),
            constant=np.unpackbits(a["constant"], count=n_vox).astype(bool).reshape(x, y, z),
        )
        stored = a["stored"].astype(np.int64)
        val = np.zeros(n_vox, dtype=np.float32)
        val[a["known_nonzero"].astype(np.int64)] = a["known_val"]
        crcs = a["crcs"].astype(np.uint32)
        members = a["members"] if a["members"].size else None
        built = _Built(
            summary=summary,
            stored=stored,
            rows=None,
            known_idx=np.flatnonzero(np.unpackbits(a["known"], count=n_vox)).astype(np.int64),
            known_val=np.zeros(0, np.float32),
            members=members,
            data_end=int(meta.get("data_end", 0)),
        )
        n_rows, n_t = (int(v) for v in meta["rows_shape"])
        block_rows = int(meta["block_rows"])
        tail_crc = int(meta.get("tail_crc", 0))
    except (OSError, ValueError, KeyError, TypeError, EOFError):
        return damaged("summary unreadable")
    built.known_val = val[built.known_idx]
    if summary.mean.shape != (x, y, z) or n_t != t or stored.shape != (n_rows,):
        return damaged("summary does not fit the run")
    if stored.size and (stored.min() < 0 or stored.max() >= n_vox):
        return damaged("summary does not fit the run")
    if members is not None and not _members_unchanged(
        layout.path.resolve(), members, built.data_end, tail_crc
    ):
        _remove_key(directory, key)  # an earlier gzip member changed: stale, not damaged
        return None
    try:
        if data_path.stat().st_size != n_rows * t * 4:
            return damaged("rows file has the wrong size")
        data = (
            np.memmap(data_path, dtype="<f4", mode="r", shape=(n_rows, t))
            if n_rows
            else np.empty((0, t), dtype="<f4")
        )
    except (OSError, ValueError):
        return damaged("rows file unreadable")
    if crcs.size != (-(-n_rows // block_rows) if n_rows else 0):
        return damaged("checksum table does not fit")
    where = f"{data_path}"
    return _Loaded(_CheckedRows(data, block_rows, crcs, where), built, data_path)


def _tmp_name(directory: Path, final: Path) -> Path:
    fd, name = tempfile.mkstemp(
        prefix=f".{final.name}.{_HOST}.{os.getpid()}.", suffix=".tmp", dir=directory
    )
    os.close(fd)
    return Path(name)


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OSError):
        return True
    return True


def _is_stale_tmp(p: Path, now: float) -> bool:
    """A temporary whose writing process is gone (same host), or older than a day."""
    try:
        age = now - p.stat().st_mtime
    except OSError:
        return False
    if age > STALE_TMP_SECONDS:
        return True
    parts = p.name.split(".")
    # .vxs-KEY.rows.HOST.PID.RANDOM.tmp  (and .summary.npz / .json names)
    for i in range(len(parts) - 2):
        if parts[i] == _HOST and parts[i + 1].isdigit():
            pid = int(parts[i + 1])
            return pid != os.getpid() and not _pid_alive(pid)
    return False


def _clean_stale_tmp(directory: Path) -> int:
    freed = 0
    if not directory.is_dir():
        return 0
    now = time.time()
    for p in directory.glob(f".{_PREFIX}*.tmp"):
        if _is_stale_tmp(p, now):
            try:
                size = p.stat().st_size
                p.unlink()
                freed += size
            except OSError:
                pass
    return freed


def _write_bytes_atomic(path: Path, data: bytes) -> None:
    tmp = _tmp_name(path.parent, path)
    try:
        with open(tmp, "wb") as fh:
            fh.write(data)
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)


def _reserve(path: Path) -> None:
    """Allocate the file's blocks now, so a full disk fails here and not as a crash
    (a write through a memory map to a sparse file on a full disk kills the process)."""
    if not hasattr(os, "posix_fallocate"):
        return
    with open(path, "r+b") as fh:
        size = os.fstat(fh.fileno()).st_size
        if size == 0:
            return
        try:
            os.posix_fallocate(fh.fileno(), 0, size)
        except OSError as err:
            if err.errno in (errno.ENOSPC, errno.EDQUOT, errno.EFBIG):
                raise
            # the file system cannot preallocate: carry on (the free-space check was done)


def _unavailable(directory: Path, err: OSError) -> CacheUnavailable:
    why = err.strerror or type(err).__name__
    return CacheUnavailable(
        f"{directory}: cannot write the cache ({why}); free disk space, make the folder "
        f"writable or give another cache folder"
    )


def _summary_blob(built: _Built, crcs: np.ndarray) -> bytes:
    s = built.summary
    buf = io.BytesIO()
    n_vox = s.mean.size
    # values of constant voxels: most are zeros outside the brain, so only the others are
    # listed (bit-exact: -0.0 and NaN count as "not zero")
    nonzero = built.known_idx[built.known_val.view(np.uint32) != 0]
    np.savez(
        buf,
        mean=s.mean,
        nonfinite=np.packbits(s.nonfinite.ravel()),
        constant=np.packbits(s.constant.ravel()),
        stored=built.stored.astype(np.uint32 if n_vox < 2**32 else np.int64),
        crcs=crcs,
        known=np.packbits(_bits(built.known_idx, n_vox)),
        known_nonzero=nonzero.astype(np.uint32 if n_vox < 2**32 else np.int64),
        known_val=built.known_val[np.isin(built.known_idx, nonzero)],
        members=built.members if built.members is not None else np.zeros((0, 3), np.uint64),
    )
    return buf.getvalue()


def _bits(idx: np.ndarray, n: int) -> np.ndarray:
    out = np.zeros(n, dtype=bool)
    out[idx] = True
    return out


def _estimate_bytes(n_rows: int, layout: RawLayout) -> int:
    """Size of an entry: rows, plus the summary (mean, flags, index, checksums)."""
    return n_rows * layout.shape[3] * 4 + layout.n_voxels * 9 // 2 + n_rows * 4 + 4096


# --------------------------------------------------------------------------- opening


@dataclass
class Opened:
    """What :func:`open_store` gives: the store, its summary, where, and what to say."""

    store: VoxelStore
    summary: Summary
    storage: str  # "cache", "memory" or "file"
    cache_path: Path | None
    notes: list[str] = field(default_factory=list)


def _memory_rows(layout: RawLayout, directory: Path | None, why: list[str]) -> Allocate:
    def allocate(n_rows: int) -> np.ndarray | None:
        nbytes = n_rows * layout.shape[3] * 4
        avail = _available_memory()
        if avail is not None and nbytes > avail // 2:
            why.append(
                f"{layout.path}: the run's {_gb(nbytes)} of voxel data do not fit in memory "
                f"either; voxels are read from the file (slow)"
            )
            return None
        try:
            return np.empty((n_rows, layout.shape[3]), dtype=np.float32)
        except MemoryError:
            why.append(f"{layout.path}: not enough memory; voxels are read from the file (slow)")
            return None

    return allocate


def _available_memory() -> int | None:
    """Memory that can be had without swapping (Linux ``MemAvailable``), else None."""
    try:
        with open("/proc/meminfo") as f:
            for line in f:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    return None


def _store_from(layout, built: _Built, rows, recover, notes) -> VoxelStore:
    return VoxelStore(layout, rows, built.stored, built.known_idx, built.known_val, recover, notes)


def open_store(
    layout: RawLayout,
    select: Select,
    final: Select,
    use_cache: bool = True,
    cache_dir: str | os.PathLike[str] | None = None,
    progress: ProgressCallback | None = None,
    notify: Notify | None = None,
    limit_bytes: int | None = None,
) -> Opened:
    """Open a compressed run's voxels: from its cache entry, building it when needed.

    Parameters
    ----------
    layout : RawLayout
        The compressed run.
    select : callable
        ``select(summary_of_the_first_batch)`` -> bool (X, Y, Z): the voxels to store.
    final : callable
        ``final(summary)`` -> bool (X, Y, Z): the run's brain mask; all of it is stored.
    use_cache : bool
        False holds the rows in memory and writes nothing.
    cache_dir : path-like, optional
        Default :func:`default_cache_dir`.
    progress : callable, optional
        ``progress(fraction) -> bool | None``; False cancels (:class:`Cancelled`).
    notify : callable, optional
        Called with a line to show at once (the announcement of a big cache); without it
        the line is kept with the other notes.
    limit_bytes : int, optional
        Limit of the whole cache folder; default :func:`cache_limit_bytes`.

    Returns
    -------
    Opened

    Raises
    ------
    InputError
        Corrupt or truncated input.
    Cancelled
        Cancelled by the callback; nothing is left behind.
    """
    notes: list[str] = []
    directory = _resolve_dir(cache_dir)
    if use_cache:
        limit = cache_limit_bytes() if limit_bytes is None else int(limit_bytes)
        try:
            return _open_cached(layout, select, final, directory, progress, notify, limit, notes)
        except CacheUnavailable as err:
            notes.append(f"{err}; the run is held in memory instead")
    why: list[str] = []
    built = _build(layout, select, final, _memory_rows(layout, None, why), progress)
    notes.extend(why)
    rows = None if built.rows is None else _CheckedRows(built.rows, _block_rows(1), None, "")
    store = _store_from(layout, built, rows, None, notes)
    storage = "memory" if rows is not None else "file"
    return Opened(store, built.summary, storage, None, notes)


def _open_cached(layout, select, final, directory, progress, notify, limit, notes) -> Opened:
    try:
        fp = _fingerprint(layout)
    except (OSError, EOFError, zlib.error) as err:
        raise _read_error(layout, err) from None
    except Exception as err:  # the ISA-L inflater's own error type
        if type(err).__name__ in ("IsalError", "error"):
            raise _read_error(layout, err) from None
        raise
    key = _key_of(fp)
    _clean_stale_tmp(directory)

    def recover(err: CacheCorrupt) -> tuple[VoxelStore, str]:
        _remove_key(directory, key)
        try:
            fresh = _open_cached(layout, select, final, directory, None, notify, limit, [])
            return fresh.store, f"{err}; rebuilt it from the run"
        except CacheUnavailable:
            fresh = open_store(layout, select, final, use_cache=False)
            return fresh.store, f"{err}; reading the run into memory instead"

    def widen(mask: np.ndarray) -> tuple[VoxelStore, str]:
        def wider(s: Summary) -> np.ndarray:
            return np.asarray(select(s), dtype=bool) | mask

        def must(s: Summary) -> np.ndarray:
            return np.asarray(final(s), dtype=bool) | mask

        line = f"{layout.path}: the cache was rebuilt to hold every voxel of the given mask"
        try:
            _remove_key(directory, key)
            fresh = _open_cached(layout, wider, must, directory, None, notify, limit, [])
        except CacheUnavailable:
            fresh = open_store(layout, wider, must, use_cache=False)
            line = f"{layout.path}: the run is read into memory to hold the given mask"
        return fresh.store, line

    def made(built: _Built, rows: _CheckedRows) -> VoxelStore:
        store = _store_from(layout, built, rows, recover, notes)
        store._widen = widen
        return store

    loaded = _load_entry(directory, key, fp, layout, notes)
    if loaded is not None:
        _touch(_names(directory, key)[2])
        _report(progress, 1.0, layout)
        store = made(loaded.built, loaded.rows)
        return Opened(store, loaded.built.summary, "cache", loaded.data_path, notes)

    try:
        directory.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise CacheUnavailable(
            f"{directory}: cannot create the cache folder ({err.strerror}); make it "
            f"writable or give another cache folder"
        ) from None
    data_path, summary_path, meta_path = _names(directory, key)
    tmp_data: Path | None = None
    mm_holder: list[np.ndarray] = []

    def allocate(n_rows: int) -> np.ndarray:
        nonlocal tmp_data
        t = layout.shape[3]
        need = _estimate_bytes(n_rows, layout)
        if need > limit:
            raise CacheUnavailable(
                f"{layout.path}: its cache would take {_gb(need)}, more than the cache "
                f"limit of {_gb(limit)} ({LIMIT_ENV}); not cached"
            )
        freed = _make_room(directory, limit - need, keep=key)
        if freed[0]:
            notes.append(
                f"{directory}: removed {freed[0]} least recently used cached run(s) "
                f"({_gb(freed[1])}) to stay under the cache limit of {_gb(limit)}"
            )
        free = shutil.disk_usage(directory).free
        if free < need + (need >> 5):
            raise CacheUnavailable(
                f"{directory}: the cache needs {need / 1e6:.0f} MB but only "
                f"{free / 1e6:.0f} MB are free; free disk space or give another cache folder"
            )
        if need >= ANNOUNCE_BYTES:
            line = f"{layout.path}: writing a {_gb(need)} cache in {directory} (limit {_gb(limit)})"
            (notify or notes.append)(line)
        try:
            if tmp_data is None:
                tmp_data = _tmp_name(directory, data_path)
            with open(tmp_data, "r+b") as fh:
                fh.truncate(max(1, n_rows * t * 4))
            _reserve(tmp_data)
            mm = np.memmap(tmp_data, dtype="<f4", mode="r+", shape=(max(1, n_rows), t))[:n_rows]
        except OSError as err:
            raise _unavailable(directory, err) from None
        mm_holder.append(mm)
        return mm

    try:
        try:
            built = _build(layout, select, final, allocate, progress)
            rows = built.rows
            # no flush: the pages reach the disk in their own time, and a block that
            # does not (a power cut) fails its checksum instead of being served
            crcs = _block_crcs(rows, _block_rows(layout.shape[3]))
            blob = _summary_blob(built, crcs)
            with open(tmp_data, "r+b") as fh:  # a second allocation may have grown it
                fh.truncate(rows.shape[0] * layout.shape[3] * 4)
            mm_holder.clear()
            del rows
            built.rows = None
            _write_bytes_atomic(summary_path, blob)
            os.replace(tmp_data, data_path)
            meta: dict[str, Any] = {
                "fingerprint": fp,
                "key": key,
                "created": time.time(),
                "rows": data_path.name,
                "rows_shape": [int(built.stored.size), int(layout.shape[3])],
                "block_rows": _block_rows(layout.shape[3]),
                "summary": summary_path.name,
                "summary_sha256": hashlib.sha256(blob).hexdigest(),
                "data_end": built.data_end,
                "tail_crc": _tail_crc(layout.path.resolve(), built.data_end),
                "nbytes": int(data_path.stat().st_size + len(blob)),
            }
            meta["digest"] = _digest(meta)
            _write_bytes_atomic(meta_path, json.dumps(meta, indent=1, sort_keys=True).encode())
        except OSError as err:
            _remove_key(directory, key)
            raise _unavailable(directory, err) from None
    finally:
        mm_holder.clear()
        if tmp_data is not None:
            tmp_data.unlink(missing_ok=True)
    _remove_older_entries(directory, fp["source"], keep=key)
    loaded = _load_entry(directory, key, fp, layout, notes)
    if loaded is None:  # pragma: no cover - only if someone deletes it under our feet
        raise CacheUnavailable(f"{directory}: the cache entry vanished while opening")
    store = made(loaded.built, loaded.rows)
    return Opened(store, loaded.built.summary, "cache", loaded.data_path, notes)


def _tail_crc(path: Path, data_end: int) -> int:
    with open(path, "rb") as f:
        f.seek(data_end)
        return _crc32(f.read())


def _touch(path: Path) -> None:
    """Mark an entry as just used (its metadata's modification time); best effort."""
    try:
        os.utime(path)
    except OSError:
        pass


# --------------------------------------------------------------------------- listing


@dataclass(frozen=True)
class CacheEntry:
    """One cached run, as listed by :func:`cache_info`."""

    key: str
    source: str
    data_path: Path
    size_bytes: int
    created: float
    shape: tuple[int, ...]
    stale: bool  # the source is gone or changed since the entry was written
    last_used: float = 0.0
    stored_voxels: int = 0


@dataclass
class CacheInfo:
    """Entries of a cache directory; iterable over :class:`CacheEntry`."""

    directory: Path
    entries: list[CacheEntry] = field(default_factory=list)
    total_bytes: int = 0
    limit_bytes: int = DEFAULT_LIMIT_BYTES

    def __iter__(self) -> Iterator[CacheEntry]:
        return iter(self.entries)

    def __len__(self) -> int:
        return len(self.entries)


def _entry_files(directory: Path, key: str) -> list[Path]:
    return [p for p in _names(directory, key) if p.exists()]


def _list(directory: Path) -> list[tuple[str, dict[str, Any] | None, float]]:
    """(key, metadata or None, last use) for every key with files in the directory."""
    if not directory.is_dir():
        return []
    keys: dict[str, tuple[dict[str, Any] | None, float]] = {}
    for p in directory.iterdir():
        name = p.name
        if not name.startswith(_PREFIX):
            continue
        key = name[len(_PREFIX) :].split(".", 1)[0]
        keys.setdefault(key, (None, 0.0))
        if name.endswith(".json"):
            try:
                meta = json.loads(p.read_text())
                used = p.stat().st_mtime
            except (OSError, ValueError, UnicodeDecodeError, RecursionError):
                continue
            if isinstance(meta, dict) and meta.get("digest") == _digest(meta):
                keys[key] = (meta, used)
    return sorted((k, m, u) for k, (m, u) in keys.items())


def _is_stale(fp: dict[str, Any]) -> bool:
    try:
        st = Path(fp["source"]).stat()
    except (OSError, KeyError, TypeError):
        return True
    return int(st.st_size) != fp.get("size") or int(st.st_mtime_ns) != fp.get("mtime_ns")


def cache_info(cache_dir: str | os.PathLike[str] | None = None) -> CacheInfo:
    """List the cached runs, their size on disk and last use.

    Parameters
    ----------
    cache_dir : path-like, optional
        Default :func:`default_cache_dir`.

    Returns
    -------
    CacheInfo
        ``directory``, ``entries`` (:class:`CacheEntry`, incomplete leftovers marked
        stale), ``total_bytes`` (all voxelscope files there, leftovers included) and
        ``limit_bytes``.
    """
    directory = _resolve_dir(cache_dir)
    try:
        limit = cache_limit_bytes()
    except InputError:
        limit = DEFAULT_LIMIT_BYTES
    info = CacheInfo(directory=directory, limit_bytes=limit)
    for key, meta, used in _list(directory):
        files = _entry_files(directory, key)
        size = 0
        for p in files:
            try:
                size += p.stat().st_size
            except OSError:
                pass
        fp = (meta or {}).get("fingerprint", {})
        info.entries.append(
            CacheEntry(
                key=key,
                source=str(fp.get("source", "?")),
                data_path=_names(directory, key)[0],
                size_bytes=int(size),
                created=float((meta or {}).get("created", 0.0)),
                shape=tuple(fp.get("shape", ())),
                stale=meta is None or _is_stale(fp),
                last_used=float(used),
                stored_voxels=int((meta or {}).get("rows_shape", [0])[0]),
            )
        )
        info.total_bytes += int(size)
    if directory.is_dir():
        for p in directory.glob(f".{_PREFIX}*.tmp"):
            try:
                info.total_bytes += p.stat().st_size
            except OSError:
                pass
    return info


def _remove_older_entries(directory: Path, source: str, keep: str) -> None:
    for key, meta, _used in _list(directory):
        if key == keep or meta is None:
            continue
        if meta.get("fingerprint", {}).get("source") == source:
            _remove_key(directory, key)


def _remove_key(directory: Path, key: str) -> int:
    freed = 0
    # metadata first, so a half-removed entry is never taken for a complete one
    data_path, summary_path, meta_path = _names(directory, key)
    for p in (meta_path, data_path, summary_path):
        try:
            freed += p.stat().st_size
            p.unlink()
        except OSError:
            pass
    return freed


def _make_room(directory: Path, budget: int, keep: str) -> tuple[int, int]:
    """Remove least recently used entries until the rest take at most ``budget`` bytes.

    Returns (entries removed, bytes freed). Broken leftovers go first.
    """
    if not directory.is_dir():
        return 0, 0
    info = cache_info(directory)
    total = info.total_bytes
    if total <= budget:
        return 0, 0
    order = sorted(
        (e for e in info.entries if e.key != keep), key=lambda e: (not e.stale, e.last_used)
    )
    n = freed = 0
    for e in order:
        if total - freed <= budget:
            break
        freed += _remove_key(directory, e.key)
        n += 1
    return n, freed


def cache_clear(
    cache_dir: str | os.PathLike[str] | None = None,
    stale_only: bool = False,
    source: str | os.PathLike[str] | None = None,
) -> CacheInfo:
    """Delete cached runs (only voxelscope's own files; the directory itself stays).

    Parameters
    ----------
    cache_dir : path-like, optional
        Default :func:`default_cache_dir`.
    stale_only : bool
        Remove only entries whose source file is gone or changed, and leftovers.
    source : path-like, optional
        Remove only the entries of this run file.

    Returns
    -------
    CacheInfo
        What was removed (``total_bytes`` is the space freed).
    """
    before = cache_info(cache_dir)
    removed = CacheInfo(directory=before.directory, limit_bytes=before.limit_bytes)
    wanted = str(Path(source).expanduser().resolve()) if source is not None else None
    for entry in before.entries:
        if stale_only and not entry.stale:
            continue
        if wanted is not None and entry.source != wanted:
            continue
        removed.total_bytes += _remove_key(before.directory, entry.key)
        removed.entries.append(entry)
    if before.directory.is_dir() and wanted is None:
        now = time.time()
        for p in before.directory.glob(f".{_PREFIX}*.tmp"):
            try:
                if stale_only and not _is_stale_tmp(p, now):
                    continue  # may belong to a build running right now
                size = p.stat().st_size
                p.unlink()
                removed.total_bytes += size
            except OSError:
                pass
    return removed


# --------------------------------------------------------------------------- progress


def terminal_progress(label: str = "preparing run", stream: Any = None) -> ProgressCallback | None:
    """A progress callback that draws a percentage on stderr, or None if it is no terminal.

    Parameters
    ----------
    label : str
        Text before the percentage.
    stream : file-like, optional
        Defaults to ``sys.stderr``.

    Returns
    -------
    callable or None

    Examples
    --------
    >>> import io
    >>> terminal_progress(stream=io.StringIO()) is None   # not a terminal
    True
    """
    out = stream if stream is not None else sys.stderr
    try:
        is_tty = bool(out.isatty())
    except (AttributeError, ValueError):
        is_tty = False
    if not is_tty:
        return None
    state = {"last": -1}

    def callback(fraction: float) -> None:
        percent = int(100 * min(max(fraction, 0.0), 1.0))
        if percent == state["last"] or (state["last"] < 0 and percent >= 100):
            return  # nothing to draw for a run that was ready at once
        state["last"] = percent
        end = "\n" if percent >= 100 else ""
        out.write(f"\r{label}: {percent:3d}%{end}")
        out.flush()

    return callback
