"""On-disk cache of compressed runs' voxel-major rows: keys, entries, limits, listing.

A ``.nii.gz`` run stores volume after volume, so one voxel's time series is scattered
through the whole gzip stream. On first open the run is decompressed once into
voxel-major rows (:func:`voxelscope.core.voxelmajor.build`), written here; later opens
memory-map them, and a time series is one row. This module decides where the rows live
and when they may be used; :mod:`voxelscope.core.voxelmajor` builds and serves them,
:mod:`voxelscope.core.rawfile` reads the run file, :mod:`voxelscope.core.summary` keeps
the per-voxel facts.

What is stored (:class:`~voxelscope.core.voxelmajor.VoxelStore`)
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
    vxs-<key>.mask          the run's brain mask, once a command has computed it
                            (:class:`MaskMemo`), so later opens skip the mask rule
    vxs-<key>.kept          small results computed from the run (the smoothness of
                            its noise, per design), each under a digest of all it
                            depends on (:class:`KeptValues`)

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
  rows are checked against a CRC-32 per block of about ``voxelmajor.BLOCK_BYTES``, once per
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
import sys
import tempfile
import threading
import time
import zlib
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from voxelscope.core.errors import InputError
from voxelscope.core.rawfile import (
    ProgressCallback,
    RawLayout,
    crc32,
    is_gzip,
    open_stream,
    read_error,
    report_progress,
)
from voxelscope.core.summary import Summary
from voxelscope.core.voxelmajor import (
    Allocate,
    Built,
    CacheCorrupt,
    CheckedRows,
    Select,
    VoxelStore,
    block_crcs,
    block_rows,
    build,
)

__all__ = [
    "ANNOUNCE_BYTES",
    "ANNOUNCE_LARGER_MIN_BYTES",
    "DEFAULT_LIMIT_BYTES",
    "KEPT_SUFFIX",
    "LIMIT_ENV",
    "MASK_SUFFIX",
    "CacheEntry",
    "CacheInfo",
    "CacheUnavailable",
    "KeptValues",
    "MaskMemo",
    "Opened",
    "cache_clear",
    "cache_info",
    "cache_key",
    "cache_limit_bytes",
    "default_cache_dir",
    "open_store",
    "parse_size",
    "terminal_progress",
]

#: Format of the cached files; part of the key, so a new format never reads an old file.
FORMAT_VERSION = 2

#: Default limit of the whole cache folder (bytes); ``VOXELSCOPE_CACHE_LIMIT`` overrides it.
DEFAULT_LIMIT_BYTES = 20 * 10**9

#: Environment variable holding the cache limit, e.g. ``20GB``, ``500MB`` or bytes.
LIMIT_ENV = "VOXELSCOPE_CACHE_LIMIT"

#: Entries at least this big are announced (one line) before they are written.
ANNOUNCE_BYTES = 10**9
#: Entries larger than the compressed file they copy are announced too, from this size on
#: (a few MB more on disk are not worth a line).
ANNOUNCE_LARGER_MIN_BYTES = 32 * 10**6

#: Temporary files older than this (seconds) are stale whoever wrote them.
STALE_TMP_SECONDS = 24 * 3600

_PREFIX = "vxs-"
#: Name ending of the brain mask kept beside an entry (:class:`MaskMemo`).
MASK_SUFFIX = ".mask"
#: Name ending of the small results kept beside an entry (:class:`KeptValues`).
KEPT_SUFFIX = ".kept"
#: At most this many results are kept per entry; the oldest go first.
KEPT_MAX = 64
_TAIL_BYTES = 64
_HOST = hashlib.sha256(socket.gethostname().encode()).hexdigest()[:8]

Notify = Callable[[str], None]


class CacheUnavailable(InputError):
    """The cache cannot be used for this run (the run itself is fine)."""


# --------------------------------------------------------------------------- locations


def default_cache_dir() -> Path:
    """Directory for cached runs: ``user_cache_dir("voxelscope")/runs``.

    On Linux this honours ``XDG_CACHE_HOME`` (``$XDG_CACHE_HOME/voxelscope/runs``).

    Examples
    --------
    >>> default_cache_dir().name
    'runs'
    """
    if sys.platform.startswith("linux") and not hasattr(sys, "getandroidapilevel"):
        # the XDG Base Directory rule, as platformdirs applies it on Linux (without
        # importing it: a few ms of every command's start-up): $XDG_CACHE_HOME when it
        # is an absolute path, else $HOME/.cache
        base = os.environ.get("XDG_CACHE_HOME", "")
        home = os.environ.get("HOME", "")
        if not os.path.isabs(base) and os.path.isabs(home):
            base = os.path.join(home, ".cache")
        if os.path.isabs(base):
            return Path(base) / "voxelscope" / "runs"
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


def _gzip_head(path: Path, n: int) -> bytes | None:
    """The first ``n`` inflated bytes of a gzip file, reading only the compressed bytes
    they need (the stream reader reads and inflates a megabyte at a time); None when the
    first member is shorter."""
    d = zlib.decompressobj(31)
    out = b""
    with open(path, "rb") as f:
        buf = b""
        while len(out) < n and not d.eof:
            if not buf:
                buf = f.read(1 << 14)
                if not buf:
                    break
            out += d.decompress(buf, n - len(out))
            buf = d.unconsumed_tail
    return out if len(out) == n else None


def _fingerprint(layout: RawLayout) -> dict[str, Any]:
    path = layout.path.resolve()
    st = path.stat()
    header_bytes = _gzip_head(path, layout.offset) if is_gzip(path) else None
    if header_bytes is None:
        with open_stream(layout) as f:
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
    if not is_gzip(path):  # no member table to check: cover the whole compressed file
        crc = 0
        with open(path, "rb") as f:
            while chunk := f.read(1 << 22):
                crc = crc32(chunk, crc)
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


def _mask_path(directory: Path, key: str) -> Path:
    return directory / f"{_PREFIX}{key}{MASK_SUFFIX}"


def _kept_path(directory: Path, key: str) -> Path:
    return directory / f"{_PREFIX}{key}{KEPT_SUFFIX}"


def _beside(directory: Path, key: str) -> tuple[Path, Path]:
    """The files kept beside an entry (they go with it)."""
    return _mask_path(directory, key), _kept_path(directory, key)


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
        return bool(same and crc32(memoryview(np.ascontiguousarray(after))) == tail_crc)
    finally:
        del raw


# --------------------------------------------------------------------------- entries


@dataclass
class _Loaded:
    rows: CheckedRows
    built: Built
    data_path: Path
    summary_sha256: str


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
        built = Built(
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
    rows = CheckedRows(data, block_rows, crcs, where)
    return _Loaded(rows, built, data_path, str(meta["summary_sha256"]))


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


def _summary_blob(built: Built, crcs: np.ndarray) -> bytes:
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


@dataclass(frozen=True)
class MaskMemo:
    """The brain mask of a cached run, kept beside its entry (``vxs-<key>.mask``).

    The mask rule's last steps (the largest connected part, holes filled) take about a
    tenth of a second on a 2 mm grid; a run opened from the cache reads the mask it
    computed the first time instead.

    The file is a SHA-256 of everything after it, one line of JSON (the mask rule, the
    entry's key, the SHA-256 of the summary the mask was computed from, the grid, whether
    the rule fell back to every valid voxel) and the mask's bits. It is used only when
    the checksum holds and every field matches; anything else (another rule, another
    summary, a damaged or missing file) gives None, and the caller computes the mask
    again and saves it over the old one. It is written atomically, like the entry.

    Examples
    --------
    >>> d = Path(tempfile.mkdtemp())
    >>> memo = MaskMemo(d / "vxs-k.mask", "k", "0" * 64, (2, 2, 1))
    >>> memo.load("rule 1") is None
    True
    >>> memo.save("rule 1", np.array([[[True], [False]], [[False], [True]]]), False)
    >>> mask, fallback = memo.load("rule 1")
    >>> mask[:, :, 0].tolist(), fallback, memo.load("rule 2") is None
    ([[True, False], [False, True]], False, True)
    """

    path: Path
    key: str
    summary_sha256: str
    shape: tuple[int, int, int]

    def _head(self, rule: str, fallback: bool) -> dict[str, Any]:
        return {
            "rule": rule,
            "key": self.key,
            "summary_sha256": self.summary_sha256,
            "shape": [int(n) for n in self.shape],
            "fallback": bool(fallback),
        }

    def load(self, rule: str) -> tuple[np.ndarray, bool] | None:
        """``(mask, fallback)`` as saved under ``rule`` for this summary, else None."""
        try:
            blob = self.path.read_bytes()
        except OSError:
            return None
        digest, body = blob[:32], blob[32:]
        if hashlib.sha256(body).digest() != digest:
            return None
        line, sep, bits = body.partition(b"\n")
        try:
            head = json.loads(line)
        except (ValueError, UnicodeDecodeError, RecursionError):
            return None
        if not isinstance(head, dict) or not sep:
            return None
        if head != self._head(rule, bool(head.get("fallback"))):
            return None
        n = int(np.prod(self.shape))
        if len(bits) != -(-n // 8):
            return None
        packed = np.frombuffer(bits, dtype=np.uint8)
        mask = np.unpackbits(packed, count=n).astype(bool).reshape(self.shape)
        return mask, bool(head["fallback"])

    def save(self, rule: str, mask: np.ndarray, fallback: bool) -> None:
        """Keep ``mask`` for later opens; a cache that cannot be written is left as it is
        (the mask is then computed again next time)."""
        mask = np.asarray(mask, dtype=bool)
        if mask.shape != tuple(self.shape):
            raise ValueError(f"mask shape {mask.shape} is not the run's {self.shape}")
        line = json.dumps(self._head(rule, fallback), sort_keys=True).encode()
        body = line + b"\n" + np.packbits(mask.ravel()).tobytes()
        try:
            _write_bytes_atomic(self.path, hashlib.sha256(body).digest() + body)
        except OSError:
            pass


_KEPT_LOCK = threading.Lock()


@dataclass(frozen=True)
class KeptValues:
    """Small results computed from a cached run, kept beside its entry (``vxs-<key>.kept``).

    A result (a few floats) is stored under a name the caller makes from everything the
    result depends on beyond the run's data (a SHA-256 of the design, the mask, the
    method's version...); the run's data are vouched for by the entry's key and the
    SHA-256 of its summary, which head the file. The file is a SHA-256 of everything
    after it, one line of JSON (the entry's key and summary digest) and one JSON object of
    names to lists of floats written exactly (``float.hex``). A result is served only
    when the checksum holds, the head matches and the name is there; anything else gives
    None and the caller computes the result (and puts it back). At most
    :data:`KEPT_MAX` results are kept, the oldest dropped first. Writes are atomic, like
    the entry's; a cache that cannot be written keeps nothing and says nothing.

    Examples
    --------
    >>> d = Path(tempfile.mkdtemp())
    >>> _ = (d / "vxs-k.json").write_text("{}")  # the entry it belongs to
    >>> kept = KeptValues(d / "vxs-k.kept", "k", "0" * 64)
    >>> kept.get("a") is None
    True
    >>> kept.put("a", (0.1, 2.5, 0.0))
    >>> kept.get("a"), kept.get("b")
    ((0.1, 2.5, 0.0), None)
    >>> KeptValues(kept.path, "k", "1" * 64).get("a") is None  # another summary
    True
    """

    path: Path
    key: str
    summary_sha256: str

    def _head(self) -> dict[str, Any]:
        return {"key": self.key, "summary_sha256": self.summary_sha256, "format": 1}

    def _read(self) -> dict[str, list[str]]:
        try:
            blob = self.path.read_bytes()
        except OSError:
            return {}
        digest, body = blob[:32], blob[32:]
        if hashlib.sha256(body).digest() != digest:
            return {}
        line, sep, rest = body.partition(b"\n")
        try:
            head = json.loads(line)
            values = json.loads(rest)
        except (ValueError, UnicodeDecodeError, RecursionError):
            return {}
        if not sep or head != self._head() or not isinstance(values, dict):
            return {}
        return values

    def get(self, name: str) -> tuple[float, ...] | None:
        """The floats kept under ``name`` for this entry and summary, else None."""
        got = self._read().get(name)
        if not isinstance(got, list):
            return None
        try:
            return tuple(float.fromhex(v) for v in got)
        except (TypeError, ValueError):
            return None

    def put(self, name: str, values: Sequence[float]) -> None:
        """Keep ``values`` under ``name`` (replacing what was there)."""
        text = [float(v).hex() for v in values]
        if not self.path.with_name(f"{_PREFIX}{self.key}.json").exists():
            return  # the entry is gone (rebuilt elsewhere, cleared): nothing to keep beside
        with _KEPT_LOCK:
            kept = self._read()
            kept.pop(name, None)
            kept[name] = text
            while len(kept) > KEPT_MAX:
                kept.pop(next(iter(kept)))
            body = (
                json.dumps(self._head(), sort_keys=True).encode()
                + b"\n"
                + json.dumps(kept).encode()
            )
            try:
                _write_bytes_atomic(self.path, hashlib.sha256(body).digest() + body)
            except OSError:
                pass


@dataclass
class Opened:
    """What :func:`open_store` gives: the store, its summary, where, and what to say, and
    for a run served from the cache, where its brain mask and small results are kept."""

    store: VoxelStore
    summary: Summary
    storage: str  # "cache", "memory" or "file"
    cache_path: Path | None
    notes: list[str] = field(default_factory=list)
    mask_memo: MaskMemo | None = None
    kept: KeptValues | None = None


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


def _store_from(layout, built: Built, rows, recover, notes) -> VoxelStore:
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
    built = build(layout, select, final, _memory_rows(layout, None, why), progress)
    notes.extend(why)
    rows = None if built.rows is None else CheckedRows(built.rows, block_rows(1), None, "")
    store = _store_from(layout, built, rows, None, notes)
    storage = "memory" if rows is not None else "file"
    return Opened(store, built.summary, storage, None, notes)


def _open_cached(layout, select, final, directory, progress, notify, limit, notes) -> Opened:
    try:
        fp = _fingerprint(layout)
    except (OSError, EOFError, zlib.error) as err:
        raise read_error(layout, err) from None
    except Exception as err:  # the ISA-L inflater's own error type
        if type(err).__name__ in ("IsalError", "error"):
            raise read_error(layout, err) from None
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

    def made(built: Built, rows: CheckedRows) -> VoxelStore:
        store = _store_from(layout, built, rows, recover, notes)
        store._widen = widen
        return store

    loaded = _load_entry(directory, key, fp, layout, notes)
    if loaded is not None:
        _touch(_names(directory, key)[2])
        report_progress(progress, 1.0, layout)
        store = made(loaded.built, loaded.rows)
        memo, kept = _memo(directory, key, loaded)
        return Opened(store, loaded.built.summary, "cache", loaded.data_path, notes, memo, kept)

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
        try:
            source_bytes = layout.path.stat().st_size
        except OSError:
            source_bytes = 0
        larger = need > source_bytes and need >= ANNOUNCE_LARGER_MIN_BYTES
        if need >= ANNOUNCE_BYTES or larger:
            than = f", {_gb(source_bytes)} compressed" if source_bytes else ""
            line = (
                f"{layout.path}: writing a {_gb(need)} fast-access copy of the run{than}, "
                f"in {directory} (all copies stay under {_gb(limit)}; "
                "voxelscope cache clear removes them)"
            )
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
            built = build(layout, select, final, allocate, progress)
            rows = built.rows
            # no flush: the pages reach the disk in their own time, and a block that
            # does not (a power cut) fails its checksum instead of being served
            crcs = block_crcs(rows, block_rows(layout.shape[3]))
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
                "block_rows": block_rows(layout.shape[3]),
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
    memo, kept = _memo(directory, key, loaded)
    return Opened(store, loaded.built.summary, "cache", loaded.data_path, notes, memo, kept)


def _memo(directory: Path, key: str, loaded: _Loaded) -> tuple[MaskMemo, KeptValues]:
    shape = tuple(int(n) for n in loaded.built.summary.mean.shape)
    mask = MaskMemo(_mask_path(directory, key), key, loaded.summary_sha256, shape)  # type: ignore[arg-type]
    return mask, KeptValues(_kept_path(directory, key), key, loaded.summary_sha256)


def _tail_crc(path: Path, data_end: int) -> int:
    with open(path, "rb") as f:
        f.seek(data_end)
        return crc32(f.read())


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
    return [p for p in (*_names(directory, key), *_beside(directory, key)) if p.exists()]


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
    for p in (meta_path, data_path, summary_path, *_beside(directory, key)):
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
