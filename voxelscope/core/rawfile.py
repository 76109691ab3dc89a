"""Reading a run file's raw voxel data in order: where the data sit, and the inflaters.

:class:`RawLayout` says where a NIfTI file's voxel data lie and how they are scaled;
:func:`stream_batches` walks a (compressed or plain) file's volumes once, a batch at a
time, inflating the next batch in a worker thread. A gzip stream is inflated member by
member, recording each member's trailer (end offset, CRC-32, length) so the cache can
check later that the file did not change. The inflater is ISA-L's zlib-compatible
module when installed, else zlib (``VOXELSCOPE_INFLATER=zlib`` forces zlib).

Examples
--------
>>> from nibabel.testing import data_path
>>> import nibabel as nib
>>> img = nib.load(Path(data_path) / "example4d.nii.gz")
>>> layout = RawLayout(Path(data_path) / "example4d.nii.gz", int(img.dataobj.offset),
...                    np.dtype(img.dataobj.dtype), img.shape, 1.0, 0.0, True)
>>> [(t0, t1, v.shape) for t0, t1, v, _ in stream_batches(layout)]
[(0, 2, (2, 24, 96, 128))]
"""

from __future__ import annotations

import os
import struct
import zlib
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from voxelscope.core.errors import Cancelled, InputError

__all__ = [
    "BATCH_BYTES",
    "INFLATER_ENV",
    "GzipStream",
    "ProgressCallback",
    "RawLayout",
    "crc32",
    "is_gzip",
    "open_stream",
    "read_error",
    "report_progress",
    "scale_raw",
    "stream_batches",
]

#: Target size of one batch of volumes as float32 (the raw batch is at most this big too).
BATCH_BYTES = 16 * 1024 * 1024

#: ``VOXELSCOPE_INFLATER=zlib`` forces the standard library's inflater (the fallback).
INFLATER_ENV = "VOXELSCOPE_INFLATER"

_READ_BYTES = 1 << 20  # compressed bytes read at a time
_PIECE = 1 << 20  # decompressed bytes produced at a time

ProgressCallback = Callable[[float], "bool | None"]


def _zlib_module():
    """The inflater: ISA-L's zlib-compatible module when installed, else zlib."""
    if os.environ.get(INFLATER_ENV, "").strip().lower() != "zlib":
        try:
            from isal import isal_zlib

            return isal_zlib
        except ImportError:  # pragma: no cover - isal is a dependency, zlib the fallback
            pass
    return zlib


def crc32(data: Any, value: int = 0) -> int:
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


def is_gzip(path: Path) -> bool:
    with open(path, "rb") as f:
        return f.read(2) == b"\x1f\x8b"


class GzipStream:
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

    def __enter__(self) -> GzipStream:
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


def open_stream(layout: RawLayout):
    if not layout.compressed:
        return _PlainStream(layout.path)
    if is_gzip(layout.path):
        return GzipStream(layout.path)
    return _OtherStream(layout.path)


def read_error(layout: RawLayout, err: BaseException) -> InputError:
    text = " ".join(str(err).split()) or type(err).__name__
    return InputError(
        f"{layout.path}: the voxel data cannot be read ({text[:160]}); the file is "
        f"truncated or corrupt, re-copy or re-export it"
    )


def report_progress(progress: ProgressCallback | None, fraction: float, layout: RawLayout) -> None:
    if progress is not None and progress(float(fraction)) is False:
        raise Cancelled(f"{layout.path}: opening was cancelled; nothing was kept")


def stream_batches(
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
        f = open_stream(layout)
    except OSError as err:
        raise read_error(layout, err) from None

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
                report_progress(progress, t1 / t, layout)
        except (EOFError, OSError, zlib.error, ValueError) as err:
            raise read_error(layout, err) from None
        except Exception as err:  # the ISA-L inflater's own error type
            if type(err).__name__ in ("IsalError", "error"):
                raise read_error(layout, err) from None
            raise


def scale_raw(raw: np.ndarray, layout: RawLayout, out: np.ndarray | None = None) -> np.ndarray:
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
