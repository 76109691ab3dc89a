"""Tests of voxelscope.core.cache: the voxel-major cache of compressed runs.

Each test is named for the promise it protects. References: nibabel's reading of the same
file (``nibabel.load(...).get_fdata()``) for every served value; SHA-256 of the input bytes
before/after for "never touches the input"; the gzip format (RFC 1952: members, each with a
CRC-32 and length trailer) for the multi-member cases, built with the standard library's
``zlib``; platformdirs' documented Linux rule (``$XDG_CACHE_HOME/<app>``) for the default
location; POSIX ``kill(pid, 0)`` for "the writing process is gone".
"""

from __future__ import annotations

import errno
import hashlib
import io
import os
import signal
import subprocess
import sys
import zlib
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from voxelscope.core import cache, rawfile, voxelmajor
from voxelscope.core.cache import (
    cache_clear,
    cache_info,
    default_cache_dir,
    parse_size,
    terminal_progress,
)
from voxelscope.core.errors import Cancelled, InputError
from voxelscope.core.run import open_run

ROOT = Path(__file__).resolve().parents[2]


@pytest.fixture(autouse=True)
def _private_cache(tmp_path, monkeypatch):
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "xdg-cache"))
    monkeypatch.delenv(cache.LIMIT_ENV, raising=False)


def _write_gz(path: Path, seed: int, shape=(7, 6, 5, 11), slope=0.5, inter=3.0) -> np.ndarray:
    """Random int16 everywhere (no background): every voxel varies."""
    rng = np.random.default_rng(seed)
    raw = rng.integers(-2000, 2000, shape).astype(np.int16)
    img = nib.Nifti1Image(raw, np.diag([2.0, 2.0, 2.5, 1.0]))
    img.header.set_slope_inter(slope, inter)
    img.header.set_zooms((2.0, 2.0, 2.5, 1.5))
    img.header.set_xyzt_units("mm", "sec")
    nib.save(img, str(path))
    return raw.astype(np.float64) * slope + inter


def _phantom(shape=(16, 14, 12, 20), seed=0, background=0.0) -> tuple[np.ndarray, np.ndarray]:
    """A bright ellipsoid 'brain' in zeros (or in noise of the given level), float32."""
    rng = np.random.default_rng(seed)
    x, y, z, t = shape
    g = np.meshgrid(*(np.linspace(-1, 1, n) for n in (x, y, z)), indexing="ij")
    brain = (g[0] ** 2 + g[1] ** 2 + g[2] ** 2) < 0.6
    data = rng.normal(0.0, 10.0, shape).astype(np.float32) + 800.0
    data[~brain] = 0.0
    if background:
        data[~brain] = np.abs(rng.normal(0.0, background, (int((~brain).sum()), t)))
    return data, brain


def _save(path: Path, data: np.ndarray) -> Path:
    img = nib.Nifti1Image(data, np.diag([3.0, 3.0, 3.0, 1.0]))
    img.header.set_zooms((3.0, 3.0, 3.0, 2.0))
    img.header.set_xyzt_units("mm", "sec")
    nib.save(img, str(path))
    return path


def _sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _files(directory: Path) -> list[str]:
    return sorted(p.name for p in directory.iterdir()) if directory.exists() else []


def _all_series(run) -> np.ndarray:
    return run.timeseries_many(np.arange(run.n_voxels))


def _ref(path: Path) -> np.ndarray:
    """nibabel's values, (X*Y*Z, T) in C-order voxel rows."""
    data = nib.load(str(path)).get_fdata()
    return data.reshape(-1, data.shape[3])


def _entry(cdir: Path) -> tuple[Path, Path, Path]:
    (meta,) = [p for p in cdir.iterdir() if p.name.endswith(".json")]
    base = meta.name[: -len(".json")]
    return cdir / f"{base}.rows", cdir / f"{base}.summary.npz", meta


def _flip(path: Path, offset: int) -> None:
    with open(path, "r+b") as f:
        f.seek(offset)
        b = f.read(1)
        f.seek(offset)
        f.write(bytes([b[0] ^ 0x5A]))


# --------------------------------------------------------------------------- serving


def test_served_data_equal_nibabel(tmp_path):
    """Every voxel (stored or not) equals nibabel's scaled value (float32 precision)."""
    path = tmp_path / "r_bold.nii.gz"
    _write_gz(path, 1)
    run = open_run(path, cache_dir=tmp_path / "c")
    assert run.storage == "cache" and run.cache_path.parent == tmp_path / "c"
    np.testing.assert_allclose(_all_series(run), _ref(path), rtol=1e-6, atol=1e-5)
    ref = nib.load(str(path)).get_fdata()
    for ijk in [(0, 0, 0), (6, 5, 4), (3, 1, 2)]:
        np.testing.assert_allclose(run.timeseries(ijk), ref[ijk], rtol=1e-6, atol=1e-5)
    np.testing.assert_allclose(run.volume(4), ref[..., 4], rtol=1e-6, atol=1e-5)


def test_cache_keeps_brain_voxels_only(tmp_path):
    """Issue 18: the rows hold the brain mask's voxels (<= 1.15x their float32 data, the
    whole entry included); voxels outside that are zero are served as zeros, exactly."""
    data, _brain = _phantom((24, 22, 20, 100))  # T = 100 as in the example
    path = _save(tmp_path / "p.nii.gz", data)
    run = open_run(path, cache_dir=tmp_path / "c")
    mask = run.mask()
    in_mask = int(mask.sum()) * run.n_volumes * 4
    info = cache_info(tmp_path / "c")
    assert len(info) == 1 and info.entries[0].stored_voxels >= mask.sum()
    assert info.total_bytes <= 1.15 * in_mask, (info.total_bytes, in_mask)
    np.testing.assert_array_equal(_all_series(run), data.reshape(-1, 100))
    assert not any("read from the run file" in w for w in run.warnings)


def test_outside_voxels_that_vary_are_read_from_the_file(tmp_path):
    """Noise outside the brain is not cached, yet every such voxel is answered with the
    file's own values (one pass), and a warning says it is slower."""
    data, brain = _phantom((16, 14, 12, 20), background=20.0)
    path = _save(tmp_path / "n.nii.gz", data)
    run = open_run(path, cache_dir=tmp_path / "c")
    assert cache_info(tmp_path / "c").entries[0].stored_voxels < data[..., 0].size
    outside = tuple(int(v) for v in np.argwhere(~brain)[0])
    np.testing.assert_array_equal(run.timeseries(outside), data[outside])
    np.testing.assert_array_equal(_all_series(run), data.reshape(-1, 20))
    blocks = list(run.iter_blocks(np.ones(run.shape, bool), block_voxels=100))
    got = np.zeros((run.n_voxels, 20), np.float32)
    for idx, y in blocks:
        got[idx] = y.T
    np.testing.assert_array_equal(got, data.reshape(-1, 20))
    np.testing.assert_array_equal(run.volume(7), data[..., 7])
    assert sum("read from the run file" in w for w in run.warnings) == 1


def test_first_volumes_unlike_the_rest_still_store_the_whole_mask(tmp_path, monkeypatch):
    """The stored voxels are chosen from the first batch; a brain voxel dark there but
    bright later is still stored (fetched in a second pass), so maps never go to the file."""
    monkeypatch.setattr(rawfile, "BATCH_BYTES", 16 * 14 * 12 * 4)  # one volume per batch
    data, brain = _phantom((16, 14, 12, 20))
    late = (8, 7, 6)
    assert brain[late]
    data[late][:2] = 0.0  # dark in the first volumes only
    path = _save(tmp_path / "late.nii.gz", data)
    run = open_run(path, cache_dir=tmp_path / "c")
    assert run.mask()[late]
    flat = np.ravel_multi_index(late, run.shape)
    assert run._store._pos[flat] >= 0
    np.testing.assert_array_equal(run.timeseries(late), data[late])


def test_second_open_reuses_the_entry(tmp_path):
    path = tmp_path / "r.nii.gz"
    _write_gz(path, 2)
    first = open_run(path, cache_dir=tmp_path / "c")
    mtime = first.cache_path.stat().st_mtime_ns
    calls = []
    second = open_run(path, cache_dir=tmp_path / "c", progress=calls.append)
    assert second.cache_path == first.cache_path
    assert second.cache_path.stat().st_mtime_ns == mtime
    assert calls == [1.0]
    assert len(cache_info(tmp_path / "c")) == 1


def test_batched_build_equals_nibabel(tmp_path, monkeypatch):
    """Tiny batches (one volume at a time) give the same array as one big batch."""
    monkeypatch.setattr(rawfile, "BATCH_BYTES", 7 * 6 * 5 * 4)
    path = tmp_path / "r.nii.gz"
    _write_gz(path, 3)
    fractions = []
    run = open_run(path, cache_dir=tmp_path / "c", progress=fractions.append)
    np.testing.assert_allclose(_all_series(run), _ref(path), rtol=1e-6, atol=1e-5)
    assert fractions[0] == 0.0 and fractions[-1] == 1.0 and len(fractions) == 12
    assert fractions == sorted(fractions)


def test_pure_zlib_inflater_gives_the_same_entry(tmp_path, monkeypatch):
    """The standard library's inflater (the fallback) and ISA-L's give identical rows, and
    their CRC-32s agree (the same polynomial, RFC 1952)."""
    path = tmp_path / "r.nii.gz"
    _write_gz(path, 31)
    a = open_run(path, cache_dir=tmp_path / "a")
    monkeypatch.setenv(rawfile.INFLATER_ENV, "zlib")
    assert rawfile._zlib_module() is zlib
    b = open_run(path, cache_dir=tmp_path / "b")
    assert a.cache_path.read_bytes() == b.cache_path.read_bytes()
    monkeypatch.delenv(rawfile.INFLATER_ENV)
    blob = os.urandom(100_003)
    assert rawfile.crc32(blob) == zlib.crc32(blob)


# --------------------------------------------------------------------------- staleness


def test_rewritten_file_is_never_served_stale(tmp_path):
    """Rewriting the run (even restoring its old mtime) gives a new entry with new data;
    the gzip trailer's CRC-32 (RFC 1952) is part of the key. The old entry is removed."""
    path = tmp_path / "r.nii.gz"
    old = _write_gz(path, 4)
    st = path.stat()
    run = open_run(path, cache_dir=tmp_path / "c")
    np.testing.assert_allclose(run.timeseries((1, 1, 1)), old[1, 1, 1], rtol=1e-6)
    new = _write_gz(path, 5)
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns))
    run2 = open_run(path, cache_dir=tmp_path / "c")
    np.testing.assert_allclose(run2.timeseries((1, 1, 1)), new[1, 1, 1], rtol=1e-6)
    assert not np.allclose(new[1, 1, 1], old[1, 1, 1])
    assert len(cache_info(tmp_path / "c")) == 1


def _multi_member(path: Path, raw: bytes, member_bytes: int) -> None:
    """A concatenated gzip file (RFC 1952 members), stored blocks (level 0): the size
    does not depend on the content, so an edit keeps the file size."""
    with open(path, "wb") as f:
        for a in range(0, len(raw), member_bytes):
            c = zlib.compressobj(0, zlib.DEFLATED, 31)
            f.write(c.compress(raw[a : a + member_bytes]) + c.flush())


def test_multi_member_gzip_changed_in_an_early_member_is_not_served_stale(tmp_path):
    """Issue 11 item 3: same size, same mtime, same header, same last member; only a voxel
    in the first member changed. The recorded member CRCs catch it."""
    data, _ = _phantom((12, 10, 8, 16))
    img = nib.Nifti1Image(data, np.eye(4))
    img.header.set_zooms((3.0, 3.0, 3.0, 2.0))
    raw = bytearray(img.to_bytes())
    path = tmp_path / "multi.nii.gz"
    _multi_member(path, bytes(raw), 4096)
    st = path.stat()
    run = open_run(path, cache_dir=tmp_path / "c")
    np.testing.assert_array_equal(_all_series(run), data.reshape(-1, 16))
    flat_f = int(np.flatnonzero(run.mask().ravel(order="F"))[0])  # first brain voxel on disk
    ijk = np.unravel_index(flat_f, run.shape, order="F")
    at = 352 + 4 * flat_f  # NIfTI-1 single file: data at byte 352 (the standard), volume 0
    assert at + 4 <= 4096  # inside the first member
    raw[at : at + 4] = np.float32(12345.0).tobytes()
    _multi_member(path, bytes(raw), 4096)
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns))
    assert path.stat().st_size == st.st_size and path.stat().st_mtime_ns == st.st_mtime_ns
    assert cache.cache_key(run._store.layout) == run.cache_path.name[4:-5]  # same old key
    again = open_run(path, cache_dir=tmp_path / "c")
    assert again.timeseries(tuple(int(v) for v in ijk))[0] == 12345.0


@pytest.mark.parametrize("member_bytes", [None, 100, 348, 4096])
def test_key_reads_the_header_as_the_stream_does(tmp_path, monkeypatch, member_bytes):
    """The key's header digest comes from the first inflated bytes read directly; it is
    the one the full stream reader gives, for one member and for members shorter than
    the header (RFC 1952 members built with zlib; those fall back to the stream)."""
    data = np.arange(4 * 3 * 2 * 5, dtype=np.float32).reshape(4, 3, 2, 5)
    raw = nib.Nifti1Image(data, np.eye(4)).to_bytes()
    path = tmp_path / "m_bold.nii.gz"
    if member_bytes is None:
        c = zlib.compressobj(wbits=31)
        path.write_bytes(c.compress(raw) + c.flush())
    else:
        _multi_member(path, raw, member_bytes)
    layout = open_run(path, use_cache=False)._store.layout
    fast = cache._fingerprint(layout)
    monkeypatch.setattr(cache, "_gzip_head", lambda *_a: None)
    assert cache._fingerprint(layout) == fast
    assert fast["header_sha256"] == hashlib.sha256(raw[: layout.offset]).hexdigest()


def test_damaged_gzip_member_is_an_input_error(tmp_path):
    """A wrong CRC-32 in a member's trailer (RFC 1952) is refused with one line."""
    data, _ = _phantom((8, 8, 6, 5))
    path = tmp_path / "bad.nii.gz"
    _multi_member(path, nib.Nifti1Image(data, np.eye(4)).to_bytes(), 2048)
    raw = bytearray(path.read_bytes())
    raw[-8] ^= 0xFF  # the last member's CRC
    path.write_bytes(bytes(raw))
    with pytest.raises(InputError, match="truncated or corrupt"):
        open_run(path, tr=2.0, cache_dir=tmp_path / "c")
    assert not [p for p in (tmp_path / "c").glob("*") if not p.name.startswith(".")]


# --------------------------------------------------------------------------- integrity


def test_flipped_byte_in_cached_rows_is_caught_and_rebuilt(tmp_path):
    """Issue 11 item 2: a flipped byte inside the cached array never reaches a fit; the
    block's CRC-32 fails on first read, the entry is rebuilt and one warning says so."""
    path = tmp_path / "r.nii.gz"
    _write_gz(path, 40)
    open_run(path, cache_dir=tmp_path / "c")
    rows, _, _ = _entry(tmp_path / "c")
    _flip(rows, rows.stat().st_size // 2)
    run = open_run(path, cache_dir=tmp_path / "c")
    np.testing.assert_allclose(_all_series(run), _ref(path), rtol=1e-6, atol=1e-5)
    said = [w for w in run.warnings if "is damaged" in w and "rebuilt" in w]
    assert len(said) == 1
    fresh = open_run(path, cache_dir=tmp_path / "c")  # the rebuilt entry is good
    np.testing.assert_allclose(_all_series(fresh), _ref(path), rtol=1e-6, atol=1e-5)
    assert not any("is damaged" in w for w in fresh.warnings)


def test_flipped_byte_caught_in_map_blocks_too(tmp_path):
    """The views handed to whole-volume passes are checked before they are handed out."""
    data, _ = _phantom((16, 14, 12, 20))
    path = _save(tmp_path / "p.nii.gz", data)
    open_run(path, cache_dir=tmp_path / "c")
    rows, _, _ = _entry(tmp_path / "c")
    _flip(rows, 17)
    run = open_run(path, cache_dir=tmp_path / "c")
    got = np.zeros((run.n_voxels, 20), np.float32)
    for idx, y in run.iter_blocks(block_voxels=64):
        got[idx] = y.T
    m = run.mask().ravel()
    np.testing.assert_array_equal(got[m], data.reshape(-1, 20)[m])
    assert sum("is damaged" in w for w in run.warnings) == 1


@pytest.mark.parametrize("cut", [0, 100, -4])
def test_truncated_rows_file_is_rebuilt(tmp_path, cut):
    path = tmp_path / "r.nii.gz"
    _write_gz(path, 41)
    open_run(path, cache_dir=tmp_path / "c")
    rows, _, _ = _entry(tmp_path / "c")
    blob = rows.read_bytes()
    rows.write_bytes(blob[:cut])
    run = open_run(path, cache_dir=tmp_path / "c")
    np.testing.assert_allclose(_all_series(run), _ref(path), rtol=1e-6, atol=1e-5)
    assert sum("is damaged" in w for w in run.warnings) == 1


@pytest.mark.parametrize("how", ["flip", "truncate", "empty", "garbage"])
def test_damaged_summary_is_rebuilt_not_a_crash(tmp_path, how):
    """Issue 11 item 6: a corrupt or truncated summary file is rebuilt with one warning
    (every later open works, no 'cache clear' needed)."""
    path = tmp_path / "r.nii.gz"
    _write_gz(path, 42)
    open_run(path, cache_dir=tmp_path / "c")
    _, summary, _ = _entry(tmp_path / "c")
    blob = summary.read_bytes()
    if how == "flip":
        _flip(summary, len(blob) // 2)
    elif how == "truncate":
        summary.write_bytes(blob[: len(blob) // 3])
    elif how == "empty":
        summary.write_bytes(b"")
    else:
        summary.write_bytes(os.urandom(len(blob)))
    run = open_run(path, cache_dir=tmp_path / "c")
    assert run.storage == "cache"
    np.testing.assert_allclose(_all_series(run), _ref(path), rtol=1e-6, atol=1e-5)
    assert sum("is damaged" in w for w in run.warnings) == 1
    assert not any("is damaged" in w for w in open_run(path, cache_dir=tmp_path / "c").warnings)


@pytest.mark.parametrize(
    "field,value",
    [("rows_shape", [10, 11]), ("block_rows", 1), ("summary_sha256", "0" * 64), ("x", 1)],
)
def test_tampered_metadata_is_detected(tmp_path, field, value):
    """The metadata decides how the rows are read (shape, type, blocks): any change to it
    (the analogue of a changed ``fortran_order`` in an array header) fails its SHA-256."""
    import json

    path = tmp_path / "r.nii.gz"
    _write_gz(path, 43)
    open_run(path, cache_dir=tmp_path / "c")
    _, _, meta = _entry(tmp_path / "c")
    m = json.loads(meta.read_text())
    m[field] = value
    meta.write_text(json.dumps(m))
    run = open_run(path, cache_dir=tmp_path / "c")
    np.testing.assert_allclose(_all_series(run), _ref(path), rtol=1e-6, atol=1e-5)
    assert sum("is damaged" in w for w in run.warnings) == 1


def test_rows_file_header_bytes_cannot_change_the_layout(tmp_path):
    """The rows file has no header of its own: writing an array header over its first
    bytes (e.g. one saying Fortran order) only damages a block, which the CRC catches."""
    path = tmp_path / "r.nii.gz"
    _write_gz(path, 44)
    open_run(path, cache_dir=tmp_path / "c")
    rows, _, _ = _entry(tmp_path / "c")
    fake = b"\x93NUMPY\x01\x00v\x00{'descr': '<f4', 'fortran_order': True, 'shape': (210, 11), }"
    with open(rows, "r+b") as f:
        f.write(fake)
    run = open_run(path, cache_dir=tmp_path / "c")
    np.testing.assert_allclose(_all_series(run), _ref(path), rtol=1e-6, atol=1e-5)
    assert sum("is damaged" in w for w in run.warnings) == 1


# --------------------------------------------------------------------------- failures


def test_input_bytes_unchanged(tmp_path):
    path = tmp_path / "r.nii.gz"
    _write_gz(path, 6)
    before = _sha(path)
    mtime = path.stat().st_mtime_ns
    run = open_run(path, cache_dir=tmp_path / "c")
    run.mask()
    list(run.iter_rows())
    open_run(path, cache_dir=tmp_path / "c")
    assert _sha(path) == before and path.stat().st_mtime_ns == mtime
    assert _files(tmp_path) == ["c", "r.nii.gz"]  # nothing written beside the input


def test_cancel_midway_leaves_nothing(tmp_path, monkeypatch):
    """progress returning False at half way raises Cancelled and leaves no file; the
    next open builds a correct entry."""
    monkeypatch.setattr(rawfile, "BATCH_BYTES", 7 * 6 * 5 * 4 * 2)
    path = tmp_path / "r.nii.gz"
    _write_gz(path, 7)

    def stop_half(fraction):
        return fraction < 0.5

    with pytest.raises(Cancelled):
        open_run(path, cache_dir=tmp_path / "c", progress=stop_half)
    assert _files(tmp_path / "c") == []
    with pytest.raises(Cancelled):
        open_run(path, use_cache=False, progress=stop_half)
    run = open_run(path, cache_dir=tmp_path / "c")
    np.testing.assert_allclose(_all_series(run), _ref(path), rtol=1e-6, atol=1e-5)


def test_exception_midway_leaves_nothing(tmp_path, monkeypatch):
    monkeypatch.setattr(rawfile, "BATCH_BYTES", 7 * 6 * 5 * 4 * 2)
    path = tmp_path / "r.nii.gz"
    _write_gz(path, 8)

    def boom(fraction):
        if fraction > 0.3:
            raise RuntimeError("disk on fire")

    with pytest.raises(RuntimeError):
        open_run(path, cache_dir=tmp_path / "c", progress=boom)
    assert _files(tmp_path / "c") == []


def test_half_written_entry_is_not_used(tmp_path):
    """An entry without its metadata (a build killed before the end) is rebuilt, not
    served, and needs no warning: it was never complete."""
    path = tmp_path / "r.nii.gz"
    _write_gz(path, 9)
    open_run(path, cache_dir=tmp_path / "c")
    rows, _, meta = _entry(tmp_path / "c")
    meta.unlink()
    rows.write_bytes(b"\xff" * rows.stat().st_size)
    run = open_run(path, cache_dir=tmp_path / "c")
    np.testing.assert_allclose(_all_series(run), _ref(path), rtol=1e-6, atol=1e-5)
    assert not any("is damaged" in w for w in run.warnings)


def test_use_cache_false_writes_nothing(tmp_path):
    path = tmp_path / "r.nii.gz"
    _write_gz(path, 10)
    run = open_run(path, use_cache=False, cache_dir=tmp_path / "c")
    assert run.storage == "memory" and run.cache_path is None
    assert not (tmp_path / "c").exists()
    assert not (tmp_path / "xdg-cache").exists()
    np.testing.assert_allclose(_all_series(run), _ref(path), rtol=1e-6, atol=1e-5)


def test_default_location_honours_xdg_cache_home(tmp_path, monkeypatch):
    """platformdirs on Linux: user_cache_dir(app) = $XDG_CACHE_HOME/app (its docs)."""
    if not sys.platform.startswith("linux"):
        pytest.skip("XDG_CACHE_HOME is the Linux rule")
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "elsewhere"))
    assert default_cache_dir() == tmp_path / "elsewhere" / "voxelscope" / "runs"
    path = tmp_path / "r.nii.gz"
    _write_gz(path, 11)
    run = open_run(path)
    assert run.cache_path.parent == tmp_path / "elsewhere" / "voxelscope" / "runs"


@pytest.mark.parametrize(
    "xdg, home",
    [("/abs/xdg", "/home/u"), ("", "/home/u"), (None, "/home/u"), ("rel/xdg", "/home/u")],
)
def test_default_location_is_the_one_platformdirs_gives(tmp_path, monkeypatch, xdg, home):
    """Our Linux shortcut (the XDG Base Directory rule: an absolute $XDG_CACHE_HOME,
    else $HOME/.cache) against platformdirs itself."""
    import platformdirs

    if not sys.platform.startswith("linux"):
        pytest.skip("the shortcut is the Linux rule")
    if xdg is None:
        monkeypatch.delenv("XDG_CACHE_HOME", raising=False)
    else:
        monkeypatch.setenv("XDG_CACHE_HOME", xdg)
    monkeypatch.setenv("HOME", str(tmp_path) + home)
    want = Path(platformdirs.user_cache_dir("voxelscope", appauthor=False)) / "runs"
    assert default_cache_dir() == want


def test_unwritable_cache_falls_back_to_memory(tmp_path):
    blocker = tmp_path / "a_file"
    blocker.write_text("not a directory")
    path = tmp_path / "r.nii.gz"
    _write_gz(path, 12)
    run = open_run(path, cache_dir=blocker / "sub")
    assert run.storage == "memory"
    assert sum("cache" in w and "memory" in w for w in run.warnings) == 1
    np.testing.assert_allclose(_all_series(run), _ref(path), rtol=1e-6, atol=1e-5)


def _read_only(folder: Path, monkeypatch) -> None:
    """Make a folder read-only; as root (who writes anyway) refuse its writes instead."""
    folder.chmod(0o555)
    if os.access(folder, os.W_OK):
        real = cache.tempfile.mkstemp

        def refuse(*args, dir=None, **kw):
            if dir is not None and Path(dir) == folder:
                raise PermissionError(errno.EACCES, "Permission denied", str(folder))
            return real(*args, dir=dir, **kw)

        monkeypatch.setattr(cache.tempfile, "mkstemp", refuse)


def test_read_only_cache_folder_below_the_top_falls_back_to_memory(tmp_path, monkeypatch):
    """Issue 11 item 6: an existing, read-only cache folder: no crash, one warning, the run
    in memory; an entry already there is still served from it."""
    cdir = tmp_path / "top" / "runs"
    cdir.mkdir(parents=True)
    path = tmp_path / "r.nii.gz"
    _write_gz(path, 13)
    other = tmp_path / "o.nii.gz"
    _write_gz(other, 14)
    open_run(other, cache_dir=cdir)
    _read_only(cdir, monkeypatch)
    try:
        run = open_run(path, cache_dir=cdir)
        assert run.storage == "memory"
        assert sum("cannot write the cache" in w for w in run.warnings) == 1
        np.testing.assert_allclose(_all_series(run), _ref(path), rtol=1e-6, atol=1e-5)
        served = open_run(other, cache_dir=cdir)
        assert served.storage == "cache" and not served.warnings
    finally:
        cdir.chmod(0o755)


@pytest.fixture
def tiny_fs(tmp_path):
    """A 200 KB tmpfs where the machine allows it (root), else None."""
    mnt = tmp_path / "tiny"
    mnt.mkdir()
    ok = (
        sys.platform.startswith("linux")
        and os.geteuid() == 0
        and subprocess.run(
            ["mount", "-t", "tmpfs", "-o", "size=200k", "tmpfs", str(mnt)], capture_output=True
        ).returncode
        == 0
    )
    yield mnt if ok else None
    if ok:
        subprocess.run(["umount", str(mnt)], capture_output=True)


def test_disk_full_during_the_build_falls_back_to_memory(tmp_path, monkeypatch, tiny_fs):
    """Issue 11 item 6: the disk fills while the cache is written: one warning, the run in
    memory, nothing left behind. On a real 200 KB file system where the machine allows it
    (the free-space check is told there is room, so the write itself fails), else with
    ENOSPC injected into the space reservation."""
    data, _ = _phantom((30, 28, 24, 40))  # about 1 MB of brain rows
    path = _save(tmp_path / "big.nii.gz", data)
    if tiny_fs is not None:
        cdir = tiny_fs / "runs"
        real = cache.shutil.disk_usage
        monkeypatch.setattr(cache.shutil, "disk_usage", lambda p: real(p)._replace(free=10**12))
    else:
        cdir = tmp_path / "c"

        def full(fd, offset, length):
            raise OSError(errno.ENOSPC, "No space left on device")

        monkeypatch.setattr(cache.os, "posix_fallocate", full)
    run = open_run(path, cache_dir=cdir)
    assert run.storage == "memory"
    assert sum("cannot write the cache" in w for w in run.warnings) == 1
    np.testing.assert_array_equal(_all_series(run), data.reshape(-1, 40))
    assert [p.name for p in cdir.iterdir()] == []


def test_disk_full_while_writing_the_summary(tmp_path, monkeypatch):
    """ENOSPC injected at the last writes (summary, metadata): memory, one warning, no
    file left, and the next open builds normally."""
    path = tmp_path / "r.nii.gz"
    _write_gz(path, 15)
    real = cache._write_bytes_atomic

    def full(p, data):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(cache, "_write_bytes_atomic", full)
    run = open_run(path, cache_dir=tmp_path / "c")
    assert run.storage == "memory" and sum("No space" in w for w in run.warnings) == 1
    np.testing.assert_allclose(_all_series(run), _ref(path), rtol=1e-6, atol=1e-5)
    assert _files(tmp_path / "c") == []
    monkeypatch.setattr(cache, "_write_bytes_atomic", real)
    assert open_run(path, cache_dir=tmp_path / "c").storage == "cache"


def test_too_little_disk_space_falls_back_to_memory(tmp_path, monkeypatch):
    real = cache.shutil.disk_usage
    monkeypatch.setattr(cache.shutil, "disk_usage", lambda p: real(p)._replace(free=1000))
    path = tmp_path / "r.nii.gz"
    _write_gz(path, 16)
    run = open_run(path, cache_dir=tmp_path / "c")
    assert run.storage == "memory"
    assert sum("MB are free" in w and str(tmp_path / "c") in w for w in run.warnings) == 1
    assert _files(tmp_path / "c") == []
    np.testing.assert_allclose(_all_series(run), _ref(path), rtol=1e-6, atol=1e-5)


_KILLED_CHILD = """
import os, signal, sys
from voxelscope.core import rawfile
from voxelscope.core.run import open_run
rawfile.BATCH_BYTES = 30 * 28 * 24 * 4  # one volume per batch

def die(fraction):
    if fraction >= 0.5:
        os.kill(os.getpid(), signal.SIGKILL)

open_run(sys.argv[1], cache_dir=sys.argv[2], progress=die)
"""


def test_killed_build_leaves_temporaries_that_the_next_open_removes(tmp_path):
    """Issue 11 item 6: a build killed outright (SIGKILL half way) leaves its full-size
    temporaries; the next open sees their process is gone and removes them."""
    data, _ = _phantom((30, 28, 24, 40))
    path = _save(tmp_path / "k.nii.gz", data)
    cdir = tmp_path / "c"
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.run(
        [sys.executable, "-c", _KILLED_CHILD, str(path), str(cdir)], env=env, capture_output=True
    )
    assert proc.returncode == -signal.SIGKILL, proc.stderr.decode()[-500:]
    left = [p for p in cdir.iterdir() if p.name.endswith(".tmp")]
    assert left and max(p.stat().st_size for p in left) > 100_000
    run = open_run(path, cache_dir=cdir)
    assert not [p for p in cdir.iterdir() if p.name.endswith(".tmp")]
    np.testing.assert_array_equal(_all_series(run), data.reshape(-1, 40))
    info = cache_info(cdir)
    assert info.total_bytes == sum(p.stat().st_size for p in cdir.iterdir())


def test_temporaries_of_a_running_build_are_kept(tmp_path):
    """A temporary whose writer is alive (another process) is not touched; one whose
    writer is gone is removed; one older than a day is removed whoever wrote it."""
    cdir = tmp_path / "c"
    cdir.mkdir()
    sleeper = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        host = cache._HOST
        alive = cdir / f".vxs-{'a' * 32}.rows.{host}.{sleeper.pid}.x1.tmp"
        dead_pid = subprocess.run(
            [sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True
        ).stdout.strip()
        gone = cdir / f".vxs-{'b' * 32}.rows.{host}.{dead_pid}.x2.tmp"
        old = cdir / f".vxs-{'c' * 32}.rows.otherhost.1.x3.tmp"
        for p in (alive, gone, old):
            p.write_bytes(b"\0" * 100)
        os.utime(old, (1e9, 1e9))
        path = tmp_path / "r.nii.gz"
        _write_gz(path, 17)
        open_run(path, cache_dir=cdir)
        assert alive.exists() and not gone.exists() and not old.exists()
    finally:
        sleeper.kill()
        sleeper.wait()


# --------------------------------------------------------------------------- size limit


def _entry_bytes(tmp_path) -> int:
    probe = tmp_path / "probe.nii.gz"
    _write_gz(probe, 99)
    open_run(probe, cache_dir=tmp_path / "probe")
    return cache_info(tmp_path / "probe").total_bytes


def test_lru_eviction_keeps_the_cache_under_its_limit(tmp_path, monkeypatch):
    """Issue 18: with room for two entries, a third evicts the least recently used one
    (last use = last open, not creation), said in one line."""
    size = _entry_bytes(tmp_path)
    monkeypatch.setenv(cache.LIMIT_ENV, str(int(2.5 * size)))
    cdir = tmp_path / "c"
    runs = [tmp_path / f"r{i}.nii.gz" for i in range(3)]
    for i, p in enumerate(runs):
        _write_gz(p, 50 + i)
    open_run(runs[0], cache_dir=cdir)
    open_run(runs[1], cache_dir=cdir)
    for e in cache_info(cdir):  # r0 created first but used last
        if e.source.endswith("r0.nii.gz"):
            os.utime(e.data_path.with_suffix(".json"), (2e9, 2e9))
        else:
            os.utime(e.data_path.with_suffix(".json"), (1.5e9, 1.5e9))
    run = open_run(runs[2], cache_dir=cdir)
    assert [w for w in run.warnings if "least recently used" in w] == [
        w for w in run.warnings if "removed 1 least recently used" in w
    ] and len(run.warnings) == 1
    left = {Path(e.source).name for e in cache_info(cdir)}
    assert left == {"r0.nii.gz", "r2.nii.gz"}
    assert cache_info(cdir).total_bytes <= 2.5 * size


def test_run_bigger_than_the_limit_is_not_cached(tmp_path, monkeypatch):
    """A run whose entry alone exceeds the limit is refused from the cache with one line
    and held in memory; nothing is written (issue 11 item 8)."""
    monkeypatch.setenv(cache.LIMIT_ENV, "1KB")
    path = tmp_path / "r.nii.gz"
    _write_gz(path, 18)
    run = open_run(path, cache_dir=tmp_path / "c")
    assert run.storage == "memory"
    assert sum("more than the cache limit" in w for w in run.warnings) == 1
    assert _files(tmp_path / "c") == []
    np.testing.assert_allclose(_all_series(run), _ref(path), rtol=1e-6, atol=1e-5)


def test_big_cache_is_announced_before_it_is_written(tmp_path, monkeypatch):
    """Issue 11 item 8: one line with the size, said before any cache file exists."""
    monkeypatch.setattr(cache, "ANNOUNCE_BYTES", 1)
    path = tmp_path / "r.nii.gz"
    _write_gz(path, 19)
    cdir = tmp_path / "c"
    said = []

    def notify(line):
        said.append((line, _files(cdir)))

    run = open_run(path, cache_dir=cdir, notify=notify)
    assert len(said) == 1
    line, files_then = said[0]
    assert "writing a" in line and "MB fast-access copy of the run" in line
    assert files_then == []
    assert run.storage == "cache" and not run.warnings


def test_cache_larger_than_its_file_is_announced(tmp_path, monkeypatch):
    """Issue 17 item 10: a copy larger than the compressed run (int16 stored as float32) is
    announced with both sizes before it is written; below the floor it is not."""
    monkeypatch.setattr(cache, "ANNOUNCE_BYTES", 10**15)
    path = tmp_path / "r.nii.gz"
    _write_gz(path, 21)
    said: list[str] = []
    open_run(path, cache_dir=tmp_path / "quiet", notify=said.append)
    assert said == []  # a few kB: not worth a line
    monkeypatch.setattr(cache, "ANNOUNCE_LARGER_MIN_BYTES", 1)
    open_run(path, cache_dir=tmp_path / "c", notify=said.append)
    assert len(said) == 1
    assert "fast-access copy of the run" in said[0] and "compressed" in said[0]
    assert "voxel-major" not in said[0]


def test_bad_limit_variable_is_one_clear_line(tmp_path, monkeypatch):
    monkeypatch.setenv(cache.LIMIT_ENV, "lots")
    path = tmp_path / "r.nii.gz"
    _write_gz(path, 20)
    with pytest.raises(InputError, match="VOXELSCOPE_CACHE_LIMIT='lots' is not a size"):
        open_run(path, cache_dir=tmp_path / "c")


def test_parse_size():
    assert parse_size("20GB") == 20 * 10**9 and parse_size("2GiB") == 2 * 2**30
    assert parse_size("1.5t") == 1.5e12 and parse_size(" 500 mb ") == 5 * 10**8
    for bad in ("", "GB", "-1GB", "1XB", "inf", "nan"):
        with pytest.raises(ValueError):
            parse_size(bad)


# --------------------------------------------------------------------------- listing


def test_cache_info_and_clear(tmp_path):
    cdir = tmp_path / "c"
    for i in range(2):
        _write_gz(tmp_path / f"r{i}.nii.gz", 20 + i)
        open_run(tmp_path / f"r{i}.nii.gz", cache_dir=cdir)
    (cdir / "someone_elses.txt").write_text("keep me")
    info = cache_info(cdir)
    assert len(info) == 2
    assert {Path(e.source).name for e in info} == {"r0.nii.gz", "r1.nii.gz"}
    ours = [p for p in cdir.iterdir() if p.name.startswith("vxs-")]
    assert info.total_bytes == sum(p.stat().st_size for p in ours)
    assert all(not e.stale and e.shape == (7, 6, 5, 11) and e.last_used > 0 for e in info)
    (tmp_path / "r0.nii.gz").unlink()
    stale = cache_clear(cdir, stale_only=True)
    assert [Path(e.source).name for e in stale] == ["r0.nii.gz"]
    assert len(cache_info(cdir)) == 1
    removed = cache_clear(cdir)
    assert len(removed) == 1 and removed.total_bytes > 0
    assert _files(cdir) == ["someone_elses.txt"]
    assert cache_info(cdir).total_bytes == 0


def test_cache_clear_one_run(tmp_path):
    """Issue 18: clearing one run removes its entry only (the path may be relative)."""
    cdir = tmp_path / "c"
    for i in range(2):
        _write_gz(tmp_path / f"r{i}.nii.gz", 60 + i)
        open_run(tmp_path / f"r{i}.nii.gz", cache_dir=cdir)
    os.chdir(tmp_path)
    removed = cache_clear(cdir, source="r1.nii.gz")
    assert [Path(e.source).name for e in removed] == ["r1.nii.gz"]
    assert [Path(e.source).name for e in cache_info(cdir)] == ["r0.nii.gz"]
    assert len(cache_clear(cdir, source="nothing.nii.gz")) == 0


def test_cache_info_of_missing_directory(tmp_path):
    info = cache_info(tmp_path / "nowhere")
    assert len(info) == 0 and info.total_bytes == 0
    assert len(cache_clear(tmp_path / "nowhere")) == 0


def test_terminal_progress():
    assert terminal_progress(stream=io.StringIO()) is None

    class FakeTTY(io.StringIO):
        def isatty(self):
            return True

    out = FakeTTY()
    cb = terminal_progress("building", stream=out)
    for f in (0.0, 0.25, 0.251, 1.0):
        cb(f)
    text = out.getvalue()
    assert text.count("%") == 3 and "building:  25%" in text and text.endswith("100%\n")
    quiet = FakeTTY()
    cb2 = terminal_progress(stream=quiet)
    cb2(1.0)  # a run that was ready at once draws nothing
    assert quiet.getvalue() == ""


def test_a_click_outside_reads_the_file_once_for_its_neighbourhood(tmp_path, monkeypatch):
    """A noisy voxel outside the brain costs one pass over the file, which brings its
    neighbours too: the next click beside it reads nothing (values equal nibabel's)."""
    data, brain = _phantom((16, 14, 12, 20), background=20.0)
    path = _save(tmp_path / "n.nii.gz", data)
    run = open_run(path, cache_dir=tmp_path / "c")
    passes = []
    real = voxelmajor.read_voxels
    monkeypatch.setattr(
        voxelmajor, "read_voxels", lambda *a, **k: passes.append(1) or real(*a, **k)
    )
    np.testing.assert_array_equal(run.timeseries((0, 0, 0)), data[0, 0, 0])
    np.testing.assert_array_equal(run.timeseries((1, 1, 0)), data[1, 1, 0])
    assert len(passes) == 1 and not brain[0, 0, 0] and not brain[1, 1, 0]


def test_a_given_mask_wider_than_the_cache_is_kept_after_one_rebuild(tmp_path, monkeypatch):
    """A brain mask from a file (e.g. a derivative's) reaching past the cached voxels into
    noisy background: the entry is rebuilt once to hold all of it (said once); passes over
    that mask then never read the run file, and the next open needs no rebuild."""
    data, brain = _phantom((16, 14, 12, 20), background=20.0)
    path = _save(tmp_path / "n.nii.gz", data)
    wide = np.zeros(brain.shape, bool)
    wide[2:14, 2:12, 2:10] = True  # a box around the ellipsoid: background included
    run = open_run(path, cache_dir=tmp_path / "c")
    assert (wide & ~brain).any()
    run.set_mask(wide, source="wide_mask.nii.gz")
    assert sum("given mask" in w for w in run.warnings) == 1
    passes = []
    real = voxelmajor.read_voxels
    monkeypatch.setattr(
        voxelmajor, "read_voxels", lambda *a, **k: passes.append(1) or real(*a, **k)
    )
    got = {}
    for idx, y in run.iter_blocks(block_voxels=50):
        for n, f in enumerate(idx.tolist()):
            got[f] = y[:, n]
    m = run.mask()
    assert sorted(got) == np.flatnonzero(m).tolist() and passes == []
    flat = data.reshape(-1, 20)
    for i, y in got.items():
        np.testing.assert_array_equal(y, flat[i])
    again = open_run(path, cache_dir=tmp_path / "c")
    again.set_mask(wide, source="wide_mask.nii.gz")
    assert not any("given mask" in w for w in again.warnings)
    memory = open_run(path, use_cache=False)
    memory.set_mask(wide, source="wide_mask.nii.gz")
    assert len(passes) == 1  # held in memory: the mask's voxels read once, now
    np.testing.assert_array_equal(memory.timeseries_many(np.flatnonzero(wide)), flat[wide.ravel()])


def test_run_too_big_for_cache_and_memory_is_read_from_the_file(tmp_path, monkeypatch):
    """Over the cache limit and too big for memory: every voxel is still answered (from
    the file, values equal nibabel's), with one line saying why it is slow."""
    monkeypatch.setenv(cache.LIMIT_ENV, "1KB")
    monkeypatch.setattr(cache, "_available_memory", lambda: 1000)
    data, _ = _phantom((16, 14, 12, 20))
    path = _save(tmp_path / "p.nii.gz", data)
    run = open_run(path, cache_dir=tmp_path / "c")
    assert run.storage == "file"
    assert sum("do not fit in memory" in w for w in run.warnings) == 1
    np.testing.assert_array_equal(_all_series(run), data.reshape(-1, 20))
    np.testing.assert_array_equal(run.timeseries((8, 7, 6)), data[8, 7, 6])


@settings(max_examples=30)
@given(
    which=st.sampled_from(["rows", "summary", "meta"]),
    where=st.floats(0, 1),
    mask=st.integers(1, 255),
)
def test_any_flipped_byte_never_changes_a_served_value(tmp_path_factory, which, where, mask):
    """Fault injection: one byte of any cache file XOR-ed with any mask. Every served value
    still equals nibabel's; a damaged rows or summary file is said exactly once (a metadata
    change that leaves the same JSON, e.g. one whitespace for another, may pass unsaid)."""
    import shutil

    base = tmp_path_factory.mktemp("flip")
    path = base / "r.nii.gz"
    _write_gz(path, 77, shape=(6, 5, 4, 9))
    cdir = base / "c"
    open_run(path, cache_dir=cdir)
    rows, summary, meta = _entry(cdir)
    target = {"rows": rows, "summary": summary, "meta": meta}[which]
    blob = bytearray(target.read_bytes())
    at = min(len(blob) - 1, int(where * len(blob)))
    blob[at] ^= mask
    target.write_bytes(bytes(blob))
    run = open_run(path, cache_dir=cdir)
    np.testing.assert_allclose(_all_series(run), _ref(path), rtol=1e-6, atol=1e-5)
    said = sum("is damaged" in w for w in run.warnings)
    assert said == 1 if which != "meta" else said <= 1
    shutil.rmtree(base)


def test_mask_file_given_to_the_loader_is_kept_by_the_first_build(tmp_path, monkeypatch):
    """The one way in passes a given mask to the first build: its voxels are cached at
    once (no rebuild, no file reads), even where it reaches into noisy background."""
    from voxelscope.core.loader import InputRequest, load_inputs

    data, brain = _phantom((16, 14, 12, 20), background=20.0)
    path = _save(tmp_path / "sub-x_task-y_bold.nii.gz", data)
    wide = np.zeros(brain.shape, np.uint8)
    wide[2:14, 2:12, 2:10] = 1
    mask_path = tmp_path / "wide_mask.nii.gz"
    nib.save(nib.Nifti1Image(wide, nib.load(str(path)).affine), str(mask_path))
    builds = []
    real = cache.build
    monkeypatch.setattr(cache, "build", lambda *a, **k: builds.append(1) or real(*a, **k))
    got = load_inputs(
        InputRequest(run=path, mask=mask_path, tr=2.0, use_cache=True, events_required=False)
    )
    run = got.run
    assert run.storage == "cache" and run.mask_source == str(mask_path)
    assert builds == [1] and not any("given mask" in w for w in got.warnings)
    flat = np.flatnonzero(run.mask())
    assert (run._store._pos[flat] >= 0).all()
    np.testing.assert_array_equal(run.timeseries_many(flat), data.reshape(-1, 20)[flat])


def test_two_threads_meeting_a_damaged_block_rebuild_once(tmp_path):
    """A map in a worker thread and a click in the window can meet the same damaged block:
    the entry is rebuilt once, both get nibabel's values, one warning."""
    from concurrent.futures import ThreadPoolExecutor

    path = tmp_path / "r.nii.gz"
    _write_gz(path, 78)
    open_run(path, cache_dir=tmp_path / "c")
    rows, _, _ = _entry(tmp_path / "c")
    _flip(rows, 5)
    run = open_run(path, cache_dir=tmp_path / "c")
    with ThreadPoolExecutor(4) as pool:
        results = list(pool.map(lambda _: _all_series(run), range(4)))
    for got in results:
        np.testing.assert_allclose(got, _ref(path), rtol=1e-6, atol=1e-5)
    assert sum("is damaged" in w for w in run.warnings) == 1


def test_small_gzip_holding_a_big_run_is_refused_from_the_cache(tmp_path, monkeypatch):
    """Issue 11 item 8, scaled down: a 100 KB gzip holding 32 MiB of uint8 whose every
    voxel varies would need a cache of over 100 MB; above a 100 MB limit it is refused in one
    line before any cache file is written, and the run is still served (from memory)."""
    x, y, z, t = 128, 128, 64, 32
    ramp = (np.arange(x * y * z, dtype=np.uint32) % 251).astype(np.uint8).reshape(x, y, z)
    data = np.empty((x, y, z, t), np.uint8)
    for v in range(t):
        data[..., v] = ramp + np.uint8(v)
    path = tmp_path / "bomb.nii.gz"
    nib.save(nib.Nifti1Image(data, np.eye(4)), str(path))
    assert path.stat().st_size < 2_000_000 and data.nbytes == 32 * 2**20
    monkeypatch.setenv(cache.LIMIT_ENV, "100MB")
    said = []
    run = open_run(path, tr=2.0, cache_dir=tmp_path / "c", notify=said.append)
    assert run.storage == "memory" and said == []
    assert sum("more than the cache limit of 100.0 MB" in w for w in run.warnings) == 1
    assert not (tmp_path / "c").exists() or _files(tmp_path / "c") == []
    for ijk in [(0, 0, 0), (127, 5, 63), (64, 64, 32)]:
        np.testing.assert_array_equal(run.timeseries(ijk), data[ijk])


# --------------------------------------------------------------------------- kept masks


def _mask_file(cdir: Path) -> Path:
    rows, _summary, _meta = _entry(cdir)
    return rows.with_name(rows.name[: -len(".rows")] + cache.MASK_SUFFIX)


def _phantom_run(tmp_path: Path) -> Path:
    data, _brain = _phantom(seed=5)
    hole = np.random.default_rng(1).normal(50.0, 5.0, (3, 3, 3, data.shape[3]))
    data[6:9, 5:8, 4:7] = hole  # dim but varying: a hole the rule fills
    data[1, 1, 1] = 900.0  # an island the rule drops
    return _save(tmp_path / "r_bold.nii.gz", data)


def _recomputed(run) -> np.ndarray:
    from voxelscope.core.mask import summary_mask

    return summary_mask(run.summary())[0]


def test_kept_mask_equals_the_recomputed_one_and_skips_the_rule(tmp_path, monkeypatch):
    """Issue 18: the first use of a cached run's mask keeps it beside the entry; a later
    open serves it without applying the rule again, equal to the rule's own result."""
    from voxelscope.core import run as run_module

    path = _phantom_run(tmp_path)
    first = open_run(path, cache_dir=tmp_path / "c")
    assert not _mask_file(tmp_path / "c").exists()  # written when first asked for
    want = first.mask().copy()
    assert _mask_file(tmp_path / "c").exists()

    def no_rule(_s):
        raise AssertionError("the mask rule ran although its result was kept")

    monkeypatch.setattr(run_module, "summary_mask", no_rule)
    second = open_run(path, cache_dir=tmp_path / "c")
    got = second.mask()
    np.testing.assert_array_equal(got, want)
    monkeypatch.undo()
    np.testing.assert_array_equal(got, _recomputed(second))
    assert not got.flags.writeable
    assert got[7, 6, 5] and not got[1, 1, 1]  # the hole filled, the island dropped


def _count_rule_runs(monkeypatch) -> list[int]:
    from voxelscope.core import run as run_module

    calls: list[int] = []
    real = run_module.summary_mask

    def counted(s):
        calls.append(1)
        return real(s)

    monkeypatch.setattr(run_module, "summary_mask", counted)
    return calls


def test_kept_mask_of_another_rule_version_is_recomputed(tmp_path, monkeypatch):
    from voxelscope.core import mask as mask_module

    path = _phantom_run(tmp_path)
    want = open_run(path, cache_dir=tmp_path / "c").mask().copy()
    calls = _count_rule_runs(monkeypatch)
    monkeypatch.setattr(mask_module, "MASK_RULE_VERSION", mask_module.MASK_RULE_VERSION + 1)
    np.testing.assert_array_equal(open_run(path, cache_dir=tmp_path / "c").mask(), want)
    assert calls == [1]
    # and kept again under the new rule
    np.testing.assert_array_equal(open_run(path, cache_dir=tmp_path / "c").mask(), want)
    assert calls == [1]


def test_kept_mask_of_another_summary_is_never_served(tmp_path, monkeypatch):
    """A mask file with a valid checksum but made for another run (copied under this
    run's key) is recomputed: it names the other entry and the other summary."""
    path = _phantom_run(tmp_path)
    other = tmp_path / "o"
    other.mkdir()
    data, _ = _phantom(seed=6)
    data[:8] = 0.0
    other_path = _save(other / "r_bold.nii.gz", data)
    open_run(other_path, cache_dir=tmp_path / "oc").mask()
    want = open_run(path, cache_dir=tmp_path / "c").mask().copy()
    _mask_file(tmp_path / "c").write_bytes(_mask_file(tmp_path / "oc").read_bytes())
    calls = _count_rule_runs(monkeypatch)
    np.testing.assert_array_equal(open_run(path, cache_dir=tmp_path / "c").mask(), want)
    assert calls == [1]


@settings(max_examples=25, deadline=None)
@given(where=st.floats(0, 1), xor=st.integers(1, 255), cut=st.booleans())
def test_damaged_kept_mask_is_recomputed_never_served(tmp_path_factory, where, xor, cut):
    """Fault injection: one byte of the kept mask XOR-ed with any value, or the file cut
    short there: the mask served is the rule's own result."""
    import shutil

    base = tmp_path_factory.mktemp("maskflip")
    path = _phantom_run(base)
    want = open_run(path, cache_dir=base / "c").mask().copy()
    target = _mask_file(base / "c")
    blob = bytearray(target.read_bytes())
    at = min(len(blob) - 1, int(where * len(blob)))
    if cut:
        del blob[at:]
    else:
        blob[at] ^= xor
    target.write_bytes(bytes(blob))
    run = open_run(path, cache_dir=base / "c")
    np.testing.assert_array_equal(run.mask(), want)
    np.testing.assert_array_equal(run.mask(), _recomputed(run))
    shutil.rmtree(base)


def test_kept_mask_that_cannot_be_written_is_computed_each_time(tmp_path, monkeypatch):
    path = _phantom_run(tmp_path)
    want = open_run(path, cache_dir=tmp_path / "c").mask().copy()
    _mask_file(tmp_path / "c").unlink()

    def refuse(*_a, **_k):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(cache, "_write_bytes_atomic", refuse)
    run = open_run(path, cache_dir=tmp_path / "c")
    np.testing.assert_array_equal(run.mask(), want)
    assert not _mask_file(tmp_path / "c").exists()
    assert not [p for p in (tmp_path / "c").iterdir() if p.name.endswith(".tmp")]


def test_kept_mask_goes_with_its_entry(tmp_path):
    """cache info counts it, cache clear removes it with the entry."""
    path = _phantom_run(tmp_path)
    open_run(path, cache_dir=tmp_path / "c").mask()
    kept = _mask_file(tmp_path / "c")
    info = cache_info(tmp_path / "c")
    assert info.total_bytes == sum(p.stat().st_size for p in (tmp_path / "c").iterdir())
    assert kept.stat().st_size > 0
    cache_clear(tmp_path / "c")
    assert _files(tmp_path / "c") == []


# --------------------------------------------------------------------------- kept values
# (the smoothness each design gets from a cached run: tests/core/test_noise.py)


def _kept_file(cdir: Path) -> Path:
    rows, _summary, _meta = _entry(cdir)
    return rows.with_name(rows.name[: -len(".rows")] + cache.KEPT_SUFFIX)


def test_kept_values_are_served_exactly_and_only_for_their_entry(tmp_path):
    """Floats come back bit for bit (``float.hex``); a file copied from another run's
    entry (valid checksum, other key and summary) serves nothing."""
    path = _phantom_run(tmp_path)
    run = open_run(path, cache_dir=tmp_path / "c")
    values = (0.1, 1.0 / 3.0, 5e-324, -0.0, 1e308)
    run.kept_values.put("x", values)
    got = open_run(path, cache_dir=tmp_path / "c").kept_values.get("x")
    assert [v.hex() for v in got] == [v.hex() for v in values]
    other = tmp_path / "o"
    other.mkdir()
    data, _ = _phantom(seed=6)
    other_run = open_run(_save(other / "r_bold.nii.gz", data), cache_dir=tmp_path / "oc")
    other_run.kept_values.put("x", (9.0,))
    _kept_file(tmp_path / "c").write_bytes(_kept_file(tmp_path / "oc").read_bytes())
    assert open_run(path, cache_dir=tmp_path / "c").kept_values.get("x") is None


def test_kept_values_keep_the_newest_few(tmp_path):
    run = open_run(_phantom_run(tmp_path), cache_dir=tmp_path / "c")
    kept = run.kept_values
    for i in range(cache.KEPT_MAX + 3):
        kept.put(f"n{i}", (float(i),))
    assert kept.get("n0") is None and kept.get("n2") is None
    assert kept.get("n3") == (3.0,) and kept.get(f"n{cache.KEPT_MAX + 2}") == (
        float(cache.KEPT_MAX + 2),
    )


@settings(max_examples=25, deadline=None)
@given(where=st.floats(0, 1), xor=st.integers(1, 255), cut=st.booleans())
def test_damaged_kept_values_are_never_served(tmp_path_factory, where, xor, cut):
    """Fault injection: one byte XOR-ed with any value, or the file cut short there:
    the value is either served exactly as it was put, or not at all (never another)."""
    import shutil

    base = tmp_path_factory.mktemp("keptflip")
    path = _phantom_run(base)
    open_run(path, cache_dir=base / "c").kept_values.put("name", (1.5, 2.5, 3.5))
    target = _kept_file(base / "c")
    blob = bytearray(target.read_bytes())
    at = min(len(blob) - 1, int(where * len(blob)))
    if cut:
        del blob[at:]
    else:
        blob[at] ^= xor
    target.write_bytes(bytes(blob))
    assert open_run(path, cache_dir=base / "c").kept_values.get("name") is None
    shutil.rmtree(base)


def test_kept_values_that_cannot_be_written_are_not_kept(tmp_path, monkeypatch):
    run = open_run(_phantom_run(tmp_path), cache_dir=tmp_path / "c")

    def refuse(*_a, **_k):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(cache, "_write_bytes_atomic", refuse)
    run.kept_values.put("x", (1.0,))
    assert run.kept_values.get("x") is None
    assert not _kept_file(tmp_path / "c").exists()
    assert not [p for p in (tmp_path / "c").iterdir() if p.name.endswith(".tmp")]


def test_kept_values_go_with_their_entry(tmp_path):
    """cache info counts them, cache clear removes them with the entry; nothing is kept
    for an entry that is gone."""
    path = _phantom_run(tmp_path)
    run = open_run(path, cache_dir=tmp_path / "c")
    run.kept_values.put("x", (1.0,))
    info = cache_info(tmp_path / "c")
    assert info.total_bytes == sum(p.stat().st_size for p in (tmp_path / "c").iterdir())
    assert _kept_file(tmp_path / "c").stat().st_size > 0
    cache_clear(tmp_path / "c")
    assert _files(tmp_path / "c") == []
    run.kept_values.put("y", (2.0,))  # its entry was cleared under it
    assert _files(tmp_path / "c") == []
