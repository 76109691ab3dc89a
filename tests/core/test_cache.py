"""Tests of voxelscope.core.cache: the voxel-major cache of compressed runs.

References: nibabel's reading of the same .nii.gz (``nibabel.load(...).get_fdata()``) for
the served values; SHA-256 of the input bytes before/after for "never touches the input";
the gzip format (RFC 1952) for the trailer CRC-32 that makes a rewritten file detectable;
platformdirs' documented Linux rule (``$XDG_CACHE_HOME/<app>``) for the default location.
"""

from __future__ import annotations

import hashlib
import io
import os
import sys
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

from voxelscope.core import cache
from voxelscope.core.cache import (
    Cancelled,
    cache_clear,
    cache_info,
    default_cache_dir,
    terminal_progress,
)
from voxelscope.core.run import open_run


@pytest.fixture(autouse=True)
def _private_cache(tmp_path, monkeypatch):
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "xdg-cache"))


def _write_gz(path: Path, seed: int, shape=(7, 6, 5, 11), slope=0.5, inter=3.0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    raw = rng.integers(-2000, 2000, shape).astype(np.int16)
    img = nib.Nifti1Image(raw, np.diag([2.0, 2.0, 2.5, 1.0]))
    img.header.set_slope_inter(slope, inter)
    img.header.set_zooms((2.0, 2.0, 2.5, 1.5))
    img.header.set_xyzt_units("mm", "sec")
    nib.save(img, str(path))
    return raw.astype(np.float64) * slope + inter


def _sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _files(directory: Path) -> list[str]:
    return sorted(p.name for p in directory.iterdir()) if directory.exists() else []


def _all_series(run) -> np.ndarray:
    return run.timeseries_many(np.arange(run.n_voxels))


def test_served_data_equal_nibabel(tmp_path):
    """The cache holds nibabel's scaled values (float32 precision), row = C-order voxel."""
    path = tmp_path / "r_bold.nii.gz"
    _write_gz(path, 1)
    ref = nib.load(str(path)).get_fdata()
    run = open_run(path, cache_dir=tmp_path / "c")
    assert run.storage == "cache" and run.cache_path.parent == tmp_path / "c"
    stored = np.load(run.cache_path, mmap_mode="r")
    assert stored.shape == (run.n_voxels, run.n_volumes) and stored.dtype == np.float32
    np.testing.assert_allclose(stored, ref.reshape(-1, ref.shape[3]), rtol=1e-6, atol=1e-5)
    for ijk in [(0, 0, 0), (6, 5, 4), (3, 1, 2)]:
        np.testing.assert_allclose(run.timeseries(ijk), ref[ijk], rtol=1e-6, atol=1e-5)


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
    monkeypatch.setattr(cache, "BATCH_BYTES", 7 * 6 * 5 * 4)
    path = tmp_path / "r.nii.gz"
    _write_gz(path, 3)
    fractions = []
    run = open_run(path, cache_dir=tmp_path / "c", progress=fractions.append)
    ref = nib.load(str(path)).get_fdata()
    np.testing.assert_allclose(_all_series(run), ref.reshape(-1, 11), rtol=1e-6, atol=1e-5)
    assert fractions[0] == 0.0 and fractions[-1] == 1.0 and len(fractions) == 12
    assert fractions == sorted(fractions)


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
    assert path.stat().st_mtime_ns == st.st_mtime_ns
    run2 = open_run(path, cache_dir=tmp_path / "c")
    assert run2.cache_path != run.cache_path
    np.testing.assert_allclose(run2.timeseries((1, 1, 1)), new[1, 1, 1], rtol=1e-6)
    assert not np.allclose(new[1, 1, 1], old[1, 1, 1])
    entries = cache_info(tmp_path / "c").entries
    assert len(entries) == 1 and entries[0].data_path == run2.cache_path


def test_input_bytes_unchanged(tmp_path):
    path = tmp_path / "r.nii.gz"
    _write_gz(path, 6)
    before = _sha(path)
    mtime = path.stat().st_mtime_ns
    run = open_run(path, cache_dir=tmp_path / "c")
    run.mask()
    list(run.iter_chunks())
    open_run(path, cache_dir=tmp_path / "c")
    assert _sha(path) == before and path.stat().st_mtime_ns == mtime
    assert _files(tmp_path) == ["c", "r.nii.gz"]  # nothing written beside the input


def test_cancel_midway_leaves_nothing(tmp_path, monkeypatch):
    """progress returning False at half way raises Cancelled and leaves no file; the
    next open builds a correct entry."""
    monkeypatch.setattr(cache, "BATCH_BYTES", 7 * 6 * 5 * 4 * 2)
    path = tmp_path / "r.nii.gz"
    ref = _write_gz(path, 7)

    def stop_half(fraction):
        return fraction < 0.5

    with pytest.raises(Cancelled):
        open_run(path, cache_dir=tmp_path / "c", progress=stop_half)
    assert _files(tmp_path / "c") == []
    with pytest.raises(Cancelled):
        open_run(path, use_cache=False, progress=stop_half)
    run = open_run(path, cache_dir=tmp_path / "c")
    np.testing.assert_allclose(_all_series(run), ref.reshape(-1, 11), rtol=1e-6, atol=1e-5)


def test_exception_midway_leaves_nothing(tmp_path, monkeypatch):
    monkeypatch.setattr(cache, "BATCH_BYTES", 7 * 6 * 5 * 4 * 2)
    path = tmp_path / "r.nii.gz"
    _write_gz(path, 8)

    def boom(fraction):
        if fraction > 0.3:
            raise RuntimeError("disk on fire")

    with pytest.raises(RuntimeError):
        open_run(path, cache_dir=tmp_path / "c", progress=boom)
    assert _files(tmp_path / "c") == []


def test_half_written_entry_is_not_used(tmp_path):
    """An entry without its metadata (a build killed before the end), or with bad
    metadata or a wrong-size array, is rebuilt, not served."""
    path = tmp_path / "r.nii.gz"
    ref = _write_gz(path, 9).reshape(-1, 11)
    run = open_run(path, cache_dir=tmp_path / "c")
    npy = run.cache_path
    meta = npy.with_name(npy.name[: -len(".npy")] + ".json")
    assert meta.exists()
    del run
    # 1) metadata missing, array garbage
    meta.unlink()
    garbage = np.lib.format.open_memmap(npy, mode="r+")
    garbage[:] = -1.0
    garbage.flush()
    del garbage
    run = open_run(path, cache_dir=tmp_path / "c")
    np.testing.assert_allclose(_all_series(run), ref, rtol=1e-6, atol=1e-5)
    del run
    # 2) metadata that is not JSON
    meta.write_text("{half")
    run = open_run(path, cache_dir=tmp_path / "c")
    np.testing.assert_allclose(_all_series(run), ref, rtol=1e-6, atol=1e-5)
    del run
    # 3) array cut short
    npy.write_bytes(npy.read_bytes()[:200])
    run = open_run(path, cache_dir=tmp_path / "c")
    np.testing.assert_allclose(_all_series(run), ref, rtol=1e-6, atol=1e-5)


def test_use_cache_false_writes_nothing(tmp_path):
    path = tmp_path / "r.nii.gz"
    ref = _write_gz(path, 10).reshape(-1, 11)
    run = open_run(path, use_cache=False, cache_dir=tmp_path / "c")
    assert run.storage == "memory" and run.cache_path is None
    assert not (tmp_path / "c").exists()
    assert not (tmp_path / "xdg-cache").exists()
    np.testing.assert_allclose(_all_series(run), ref, rtol=1e-6, atol=1e-5)


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


def test_unwritable_cache_falls_back_to_memory(tmp_path):
    blocker = tmp_path / "a_file"
    blocker.write_text("not a directory")
    path = tmp_path / "r.nii.gz"
    ref = _write_gz(path, 12).reshape(-1, 11)
    run = open_run(path, cache_dir=blocker / "sub")
    assert run.storage == "memory"
    assert any("cache" in w and "memory" in w for w in run.warnings)
    np.testing.assert_allclose(_all_series(run), ref, rtol=1e-6, atol=1e-5)


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
    assert all(not e.stale and e.shape == (7, 6, 5, 11) for e in info)
    # a stale entry: its source is deleted
    (tmp_path / "r0.nii.gz").unlink()
    stale = cache_clear(cdir, stale_only=True)
    assert [Path(e.source).name for e in stale] == ["r0.nii.gz"]
    assert len(cache_info(cdir)) == 1
    removed = cache_clear(cdir)
    assert len(removed) == 1 and removed.total_bytes > 0
    assert _files(cdir) == ["someone_elses.txt"]
    assert cache_info(cdir).total_bytes == 0


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


def test_leftover_temp_files_from_a_killed_build(tmp_path):
    """A build killed outright leaves only temporary names: never read as an entry,
    counted by cache_info and removed by cache_clear."""
    cdir = tmp_path / "c"
    cdir.mkdir()
    leftover = cdir / ".vxs-0123456789abcdef0123456789abcdef.npy.x1y2.tmp"
    leftover.write_bytes(b"\0" * 1000)
    path = tmp_path / "r.nii.gz"
    ref = _write_gz(path, 13).reshape(-1, 11)
    run = open_run(path, cache_dir=cdir)
    np.testing.assert_allclose(_all_series(run), ref, rtol=1e-6, atol=1e-5)
    info = cache_info(cdir)
    assert len(info) == 1
    assert info.total_bytes == sum(p.stat().st_size for p in cdir.iterdir())
    removed = cache_clear(cdir)
    assert removed.total_bytes == info.total_bytes
    assert _files(cdir) == []


def test_too_little_disk_space_falls_back_to_memory(tmp_path, monkeypatch):
    """Not enough free space for the cache: said in one line, run held in memory instead,
    and nothing is left in the cache directory."""
    import shutil as _shutil

    real = _shutil.disk_usage

    def tiny(path):
        u = real(path)
        return type(u)(u.total, u.used, 1000)

    monkeypatch.setattr(cache.shutil, "disk_usage", tiny)
    path = tmp_path / "r.nii.gz"
    ref = _write_gz(path, 14).reshape(-1, 11)
    run = open_run(path, cache_dir=tmp_path / "c")
    assert run.storage == "memory"
    assert any("MB are free" in w and str(tmp_path / "c") in w for w in run.warnings)
    assert _files(tmp_path / "c") == []
    np.testing.assert_allclose(_all_series(run), ref, rtol=1e-6, atol=1e-5)
