"""Voxel-major on-disk cache for compressed runs.

A ``.nii.gz`` run stores volume after volume, so one voxel's time series is scattered
through the whole gzip stream: reading it means decompressing everything. On first open
we therefore decompress the run once, volume batch by volume batch, and write a
*voxel-major* copy: a float32 ``.npy`` array of shape ``(X*Y*Z, T)`` in C order, where
row ``np.ravel_multi_index((i, j, k), (X, Y, Z))`` is the (scaled) time series of voxel
``(i, j, k)``. Later opens memory-map it, and a time series is one contiguous row.

Layout of the cache directory (``platformdirs.user_cache_dir("voxelscope")/runs``, which
honours ``XDG_CACHE_HOME``; or an explicit ``cache_dir``)::

    vxs-<key>.npy          the (X*Y*Z, T) float32 array
    vxs-<key>.summary.npz  mean image, non-finite and constant voxel flags
    vxs-<key>.json         metadata, written last: an entry without it is never used

Safety rules:

* **Never stale.** The key is a SHA-256 of the resolved path, the file size, its
  ``mtime_ns``, a digest of the header bytes (the first ``vox_offset`` bytes of the
  decompressed stream) and a digest of the last 64 bytes of the file (for gzip, the
  trailer holding the CRC-32 and length of the whole uncompressed stream). A rewritten
  file gets a new key; the old entry is removed when the new one is written.
* **Atomic.** Every file is written under a temporary name in the cache directory and
  moved into place with :func:`os.replace`; the metadata JSON comes last. A build that is
  cancelled (the progress callback returns False) or fails removes its temporary files.
* **Read-only input.** The run is only ever opened for reading.
* **Bounded memory.** The stream is read in batches of whole volumes, about
  :data:`BATCH_BYTES` of float32 at a time (two raw batches in flight: one being
  decompressed by a worker thread while the other is transposed), whatever the file size.

Examples
--------
>>> info = cache_info(cache_dir=Path(tempfile.mkdtemp()))
>>> len(info), info.total_bytes
(0, 0)
"""

from __future__ import annotations

import errno
import hashlib
import json
import os
import shutil
import sys
import tempfile
import time
import zlib
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from nibabel.openers import ImageOpener

from voxelscope.core.errors import InputError, VoxelscopeError

__all__ = [
    "BATCH_BYTES",
    "CacheEntry",
    "CacheInfo",
    "CacheUnavailable",
    "Cancelled",
    "RawLayout",
    "Summary",
    "build_voxel_major",
    "cache_clear",
    "cache_info",
    "cache_key",
    "default_cache_dir",
    "open_or_build",
    "summarize_volumes",
    "terminal_progress",
]

#: Format of the cached files; part of the key, so a new format never reads an old file.
FORMAT_VERSION = 1

#: Target size of one batch of volumes as float32 (the raw batch is at most this big too).
BATCH_BYTES = 64 * 1024 * 1024

_PREFIX = "vxs-"
_TAIL_BYTES = 64

ProgressCallback = Callable[[float], "bool | None"]


class Cancelled(VoxelscopeError):
    """The user cancelled a long operation (the progress callback returned False)."""


class CacheUnavailable(InputError):
    """The cache directory cannot be created or written (the run itself is fine)."""


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


@dataclass
class CacheInfo:
    """Entries of a cache directory; iterable over :class:`CacheEntry`."""

    directory: Path
    entries: list[CacheEntry] = field(default_factory=list)
    total_bytes: int = 0

    def __iter__(self) -> Iterator[CacheEntry]:
        return iter(self.entries)

    def __len__(self) -> int:
        return len(self.entries)


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


# --------------------------------------------------------------------------- keys


def _open_raw(path: Path, compressed: bool):
    """Binary reader of the decompressed stream (nibabel's opener picks gzip, bz2, zstd)."""
    if compressed:
        return ImageOpener(str(path), "rb")
    return open(path, "rb")


def _fingerprint(layout: RawLayout) -> dict[str, Any]:
    path = layout.path.resolve()
    st = path.stat()
    with _open_raw(path, layout.compressed) as f:
        header_bytes = f.read(layout.offset)
    with open(path, "rb") as f:
        f.seek(max(0, st.st_size - _TAIL_BYTES))
        tail = f.read()
    return {
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


def cache_key(layout: RawLayout) -> str:
    """Key of a run's cache entry (hex SHA-256 of its fingerprint, 32 characters).

    The fingerprint holds the resolved path, size, ``mtime_ns``, a digest of the header
    bytes and of the file's last bytes, shape, data type and scaling.
    """
    return _key_of(_fingerprint(layout))


def _key_of(fingerprint: dict[str, Any]) -> str:
    text = json.dumps(fingerprint, sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()[:32]


def _names(directory: Path, key: str) -> tuple[Path, Path, Path]:
    base = directory / f"{_PREFIX}{key}"
    return (
        base.with_name(base.name + ".npy"),
        base.with_name(base.name + ".summary.npz"),
        base.with_name(base.name + ".json"),
    )


# --------------------------------------------------------------------------- building


def _report(progress: ProgressCallback | None, fraction: float, layout: RawLayout) -> None:
    if progress is not None and progress(float(fraction)) is False:
        raise Cancelled(f"{layout.path}: opening was cancelled; nothing was kept")


def _read_error(layout: RawLayout, err: BaseException) -> InputError:
    text = " ".join(str(err).split()) or type(err).__name__
    return InputError(
        f"{layout.path}: the voxel data cannot be read ({text[:160]}); the file is "
        f"truncated or corrupt, re-copy or re-export it"
    )


def build_voxel_major(
    layout: RawLayout,
    out: np.ndarray,
    progress: ProgressCallback | None = None,
    batch_bytes: int | None = None,
) -> Summary:
    """Read a run's volumes in batches and write them voxel-major into ``out``.

    Parameters
    ----------
    layout : RawLayout
        Where the data are.
    out : ndarray
        float32, shape (X*Y*Z, T), C order: a writable memmap or an in-memory array.
    progress : callable, optional
        Called as ``progress(fraction)`` with fraction in [0, 1]; returning False
        cancels with :class:`Cancelled`.
    batch_bytes : int, optional
        Float32 size of one batch of volumes (bounds the extra memory); default
        :data:`BATCH_BYTES`.

    Returns
    -------
    Summary
        Mean image, non-finite and constant voxel flags.

    Raises
    ------
    InputError
        The stream is truncated or corrupt (including a gzip CRC mismatch).
    Cancelled
        The progress callback returned False.
    """
    x, y, z, t = layout.shape
    n_vox = x * y * z
    if out.shape != (n_vox, t) or out.dtype != np.float32:
        raise ValueError("out must be float32 of shape (X*Y*Z, T)")
    out4 = out.reshape(x, y, z, t)
    if batch_bytes is None:
        batch_bytes = BATCH_BYTES
    batch = int(max(1, min(t, batch_bytes // max(1, n_vox * 4))))
    slope = np.float32(layout.slope)
    inter = np.float32(layout.inter)
    scaled = not (layout.slope == 1.0 and layout.inter == 0.0)
    total = np.zeros((z, y, x), dtype=np.float64)
    vmin = vmax = None
    starts = list(range(0, t, batch))
    # two raw buffers: a worker thread decompresses batch n+1 (zlib releases the GIL)
    # while this thread scales and transposes batch n
    bufs = [bytearray(batch * layout.volume_bytes) for _ in range(min(2, len(starts)))]
    _report(progress, 0.0, layout)
    try:
        f = _open_raw(layout.path, layout.compressed)
    except OSError as err:
        raise _read_error(layout, err) from None

    def read_batch(n: int) -> memoryview:
        t0 = starts[n]
        nbytes = (min(t, t0 + batch) - t0) * layout.volume_bytes
        view = memoryview(bufs[n % len(bufs)])[:nbytes]
        got = f.readinto(view)
        if got != nbytes:
            raise EOFError(f"data end after {t0 + got // layout.volume_bytes} of {t} volumes")
        if n == len(starts) - 1 and layout.compressed:
            while f.read(1 << 20):  # drain to the end: gzip checks the CRC and length here
                pass
        return view

    with f, ThreadPoolExecutor(max_workers=1) as pool:
        try:
            f.seek(layout.offset)
            pending = pool.submit(read_batch, 0)
            for n, t0 in enumerate(starts):
                t1 = min(t, t0 + batch)
                view = pending.result()
                if n + 1 < len(starts):
                    pending = pool.submit(read_batch, n + 1)
                v = np.frombuffer(view, dtype=layout.dtype).reshape(t1 - t0, z, y, x)
                for k in range(z):  # plane by plane: reads runs of x, writes runs of t
                    dst = out4[:, :, k, t0:t1]
                    src = v[:, k].transpose(2, 1, 0)
                    if scaled:
                        np.multiply(src, slope, out=dst, dtype=np.float32, casting="unsafe")
                        if inter != 0:
                            np.add(dst, inter, out=dst)
                    else:
                        dst[...] = src
                with np.errstate(invalid="ignore", over="ignore"):
                    total += v.sum(axis=0, dtype=np.float64)
                    bmin, bmax = v.min(axis=0), v.max(axis=0)
                if vmin is None:
                    vmin, vmax = bmin, bmax
                else:
                    vmin = np.minimum(vmin, bmin)
                    vmax = np.maximum(vmax, bmax)
                del v, view
                _report(progress, t1 / t, layout)
        except (EOFError, OSError, zlib.error, ValueError) as err:  # BadGzipFile is an OSError
            raise _read_error(layout, err) from None
    return _summary(total / t, vmin, vmax, layout)


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


def summarize_volumes(volumes: Iterator[np.ndarray], layout: RawLayout) -> Summary:
    """Summary from raw (unscaled) batches shaped (B, Z, Y, X); used for memory-mapped runs."""
    total = None
    vmin = vmax = None
    for v in volumes:
        with np.errstate(invalid="ignore", over="ignore"):
            s = v.sum(axis=0, dtype=np.float64)
            bmin, bmax = v.min(axis=0), v.max(axis=0)
        if total is None:
            total, vmin, vmax = s, bmin, bmax
        else:
            total += s
            vmin = np.minimum(vmin, bmin)
            vmax = np.maximum(vmax, bmax)
    return _summary(total / layout.shape[3], vmin, vmax, layout)


def _tmp_name(directory: Path, final: Path) -> Path:
    fd, name = tempfile.mkstemp(prefix=f".{final.name}.", suffix=".tmp", dir=directory)
    os.close(fd)
    return Path(name)


def _write_json_atomic(path: Path, data: dict[str, Any]) -> None:
    tmp = _tmp_name(path.parent, path)
    try:
        tmp.write_text(json.dumps(data, indent=1, sort_keys=True))
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
        try:
            os.posix_fallocate(fh.fileno(), 0, size)
        except OSError as err:
            if err.errno in (errno.ENOSPC, errno.EDQUOT, errno.EFBIG):
                raise
            # the file system cannot preallocate: carry on (the free-space check was done)


def _load_entry(directory: Path, key: str, fp: dict[str, Any]):
    data_path, summary_path, meta_path = _names(directory, key)
    try:
        meta = json.loads(meta_path.read_text())
    except (OSError, ValueError):
        return None
    if meta.get("fingerprint") != fp:
        return None
    x, y, z, t = fp["shape"]
    try:
        data = np.load(data_path, mmap_mode="r")
        with np.load(summary_path) as npz:
            summary = Summary(
                mean=np.asarray(npz["mean"], dtype=np.float32),
                nonfinite=np.asarray(npz["nonfinite"], dtype=bool),
                constant=np.asarray(npz["constant"], dtype=bool),
            )
    except (OSError, ValueError, KeyError, EOFError):
        return None
    if data.shape != (x * y * z, t) or data.dtype != np.float32:
        return None
    if summary.mean.shape != (x, y, z):
        return None
    return data, summary, data_path


def open_or_build(
    layout: RawLayout,
    cache_dir: str | os.PathLike[str] | None = None,
    progress: ProgressCallback | None = None,
) -> tuple[np.ndarray, Summary, Path]:
    """Memory-map a run's cache entry, building it first when missing or stale.

    Parameters
    ----------
    layout : RawLayout
        The compressed run.
    cache_dir : path-like, optional
        Cache directory; default :func:`default_cache_dir`.
    progress : callable, optional
        ``progress(fraction) -> bool | None``; False cancels (:class:`Cancelled`).

    Returns
    -------
    data : numpy.memmap
        float32 (X*Y*Z, T), read-only.
    summary : Summary
    data_path : Path
        The ``.npy`` file.

    Raises
    ------
    InputError
        Corrupt input, or the cache directory cannot be written.
    Cancelled
        Cancelled by the callback; no entry is left behind.
    """
    directory = _resolve_dir(cache_dir)
    try:
        fp = _fingerprint(layout)
    except (OSError, EOFError, zlib.error) as err:
        raise _read_error(layout, err) from None
    key = _key_of(fp)
    found = _load_entry(directory, key, fp)
    if found is not None:
        _report(progress, 1.0, layout)
        return found
    try:
        directory.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise CacheUnavailable(
            f"{directory}: cannot create the cache directory ({err.strerror}); "
            f"give a writable cache directory or open without the cache"
        ) from None
    data_path, summary_path, meta_path = _names(directory, key)
    x, y, z, t = layout.shape
    tmp_data = _tmp_name(directory, data_path)
    tmp_summary = _tmp_name(directory, summary_path)
    try:
        need = x * y * z * t * 4
        free = shutil.disk_usage(directory).free
        if free < need + (need >> 5):
            raise CacheUnavailable(
                f"{directory}: the cache needs {need / 1e6:.0f} MB but only {free / 1e6:.0f} MB "
                f"are free; free disk space, give another cache directory or open without "
                f"the cache"
            )
        try:
            mm = np.lib.format.open_memmap(
                tmp_data, mode="w+", dtype=np.float32, shape=(x * y * z, t)
            )
            _reserve(tmp_data)
        except OSError as err:
            raise CacheUnavailable(
                f"{directory}: cannot write the cache ({err.strerror}); free disk space, "
                f"give another cache directory or open without the cache"
            ) from None
        try:
            summary = build_voxel_major(layout, mm, progress)
            mm.flush()
        finally:
            del mm
        with open(tmp_summary, "wb") as fh:
            np.savez(fh, mean=summary.mean, nonfinite=summary.nonfinite, constant=summary.constant)
        os.replace(tmp_data, data_path)
        os.replace(tmp_summary, summary_path)
        _write_json_atomic(
            meta_path,
            {
                "fingerprint": fp,
                "key": key,
                "created": time.time(),
                "data": data_path.name,
                "summary": summary_path.name,
                "nbytes": int(data_path.stat().st_size + summary_path.stat().st_size),
            },
        )
    finally:
        tmp_data.unlink(missing_ok=True)
        tmp_summary.unlink(missing_ok=True)
    _remove_older_entries(directory, fp["source"], keep=key)
    found = _load_entry(directory, key, fp)
    if found is None:  # pragma: no cover - only if someone deletes it under our feet
        raise InputError(f"{directory}: the cache entry vanished while opening; open again")
    return found


# --------------------------------------------------------------------------- listing


def _entry_files(directory: Path, key: str) -> list[Path]:
    return [p for p in _names(directory, key) if p.exists()]


def _list(directory: Path) -> list[tuple[str, dict[str, Any] | None]]:
    """(key, metadata or None) for every key with files in the directory."""
    if not directory.is_dir():
        return []
    keys: dict[str, dict[str, Any] | None] = {}
    for p in directory.iterdir():
        name = p.name
        if not name.startswith(_PREFIX):
            continue
        key = name[len(_PREFIX) :].split(".", 1)[0]
        keys.setdefault(key, None)
        if name.endswith(".json"):
            try:
                keys[key] = json.loads(p.read_text())
            except (OSError, ValueError):
                pass
    return sorted(keys.items())


def _is_stale(fp: dict[str, Any]) -> bool:
    try:
        st = Path(fp["source"]).stat()
    except (OSError, KeyError, TypeError):
        return True
    return int(st.st_size) != fp.get("size") or int(st.st_mtime_ns) != fp.get("mtime_ns")


def cache_info(cache_dir: str | os.PathLike[str] | None = None) -> CacheInfo:
    """List the cached runs and their total size on disk.

    Parameters
    ----------
    cache_dir : path-like, optional
        Default :func:`default_cache_dir`.

    Returns
    -------
    CacheInfo
        ``directory``, ``entries`` (:class:`CacheEntry`, incomplete leftovers marked
        stale) and ``total_bytes`` (all voxelscope files there, leftovers included).
    """
    directory = _resolve_dir(cache_dir)
    info = CacheInfo(directory=directory)
    for key, meta in _list(directory):
        files = _entry_files(directory, key)
        size = sum(p.stat().st_size for p in files)
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
    for key, meta in _list(directory):
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


def cache_clear(
    cache_dir: str | os.PathLike[str] | None = None, stale_only: bool = False
) -> CacheInfo:
    """Delete cached runs (only voxelscope's own files; the directory itself stays).

    Parameters
    ----------
    cache_dir : path-like, optional
        Default :func:`default_cache_dir`.
    stale_only : bool
        Remove only entries whose source file is gone or changed, and leftovers.

    Returns
    -------
    CacheInfo
        What was removed (``total_bytes`` is the space freed).
    """
    before = cache_info(cache_dir)
    removed = CacheInfo(directory=before.directory)
    for entry in before.entries:
        if stale_only and not entry.stale:
            continue
        removed.total_bytes += _remove_key(before.directory, entry.key)
        removed.entries.append(entry)
    if before.directory.is_dir():
        for p in before.directory.glob(f".{_PREFIX}*.tmp"):
            try:
                if stale_only and time.time() - p.stat().st_mtime < 24 * 3600:
                    continue  # may belong to a build running right now
                removed.total_bytes += p.stat().st_size
                p.unlink()
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
