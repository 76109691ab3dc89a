"""Conformance of every voxel store with voxelscope.core.stores.VoxelSource.

The same checks run against each way a run's values can be served (memory-mapped file,
cache file, memory, the run file itself), as nibabel runs one set of checks against each
of its array proxies. The reference for every value is nibabel's own reading of the file
(``nibabel.load(path).get_fdata()``, which applies ``scl_slope`` / ``scl_inter``), and
for the layout promises the docstrings of :class:`VoxelSource`.
"""

from __future__ import annotations

from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

from voxelscope.core import cache
from voxelscope.core.run import open_run
from voxelscope.core.stores import VoxelSource

SHAPE = (7, 6, 5, 11)
STORAGES = ["memmap", "cache", "memory", "file"]


def _write(path: Path, scaled: bool) -> Path:
    rng = np.random.default_rng(41)
    if scaled:
        img = nib.Nifti1Image(rng.integers(-3000, 3000, SHAPE).astype(np.int16), np.eye(4))
        img.header.set_slope_inter(0.5, 3.0)
    else:
        img = nib.Nifti1Image(rng.normal(100, 5, SHAPE).astype(np.float32), np.eye(4))
    img.header.set_zooms((2.0, 2.0, 2.0, 1.5))
    img.header.set_xyzt_units("mm", "sec")
    nib.save(img, str(path))
    return path


@pytest.fixture(params=[(s, sc) for s in STORAGES for sc in (False, True)],
                ids=lambda p: f"{p[0]}-{'int16-scaled' if p[1] else 'float32'}")  # fmt: skip
def opened(request, tmp_path, monkeypatch):
    """(store, nibabel's array) for one storage kind; the store's kind is checked."""
    storage, scaled = request.param
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "xdg"))
    path = _write(tmp_path / ("r.nii" if storage == "memmap" else "r.nii.gz"), scaled)
    if storage == "file":  # over the cache limit and too big for memory
        monkeypatch.setenv(cache.LIMIT_ENV, "1KB")
        monkeypatch.setattr(cache, "_available_memory", lambda: 1000)
    run = open_run(path, use_cache=storage != "memory", cache_dir=tmp_path / "c")
    assert run.storage == storage
    return run._store, nib.load(str(path)).get_fdata()


def _close(got: np.ndarray, want: np.ndarray) -> None:
    np.testing.assert_allclose(got, want, rtol=1e-6, atol=1e-6)


def test_is_a_voxel_source(opened):
    store, _ref = opened
    assert isinstance(store, VoxelSource)
    assert tuple(store.shape) == SHAPE[:3] and store.layout.shape == SHAPE


def test_row_is_float64_and_equals_nibabel(opened):
    store, ref = opened
    for ijk in [(0, 0, 0), (6, 5, 4), (3, 2, 1)]:
        got = store.row(int(np.ravel_multi_index(ijk, SHAPE[:3])))
        assert got.dtype == np.float64 and got.shape == (SHAPE[3],)
        _close(got, ref[ijk])


def test_rows_follow_the_order_given_and_are_copies(opened):
    store, ref = opened
    flat = np.random.default_rng(1).permutation(np.prod(SHAPE[:3]))[:40].astype(np.int64)
    got = store.rows(flat)
    assert got.dtype == np.float32 and got.shape == (40, SHAPE[3])
    _close(got, ref.reshape(-1, SHAPE[3])[flat])
    got[...] = -1.0  # a copy: the store is unchanged
    _close(store.rows(flat), ref.reshape(-1, SHAPE[3])[flat])


def test_rows_of_a_neighbourhood_follow_the_order_given(opened):
    """A compact set of voxels (a clicked voxel's neighbourhood, as the noise model reads
    it) in shuffled order, with a hole, gives each voxel its own series."""
    store, ref = opened
    box = np.argwhere(np.ones((3, 4, 3), bool)) + np.array([2, 1, 1])
    flat = np.ravel_multi_index(box.T, SHAPE[:3]).astype(np.int64)
    flat = np.random.default_rng(4).permutation(flat)[1:]
    got = store.rows(flat)
    assert got.dtype == np.float32 and got.shape == (flat.size, SHAPE[3])
    _close(got, ref.reshape(-1, SHAPE[3])[flat])


def test_rows_cover_the_ascending_indices(opened):
    store, ref = opened
    flat = np.flatnonzero(np.random.default_rng(2).random(SHAPE[:3]) < 0.5).astype(np.int64)
    seen = []
    for idx, data in store.iter_rows(flat, 9):
        assert 1 <= idx.size <= 9 and data.shape == (idx.size, SHAPE[3])
        assert data.dtype == np.float32
        _close(data, ref.reshape(-1, SHAPE[3])[idx])
        seen.append(idx)
    np.testing.assert_array_equal(np.concatenate(seen), flat)


@pytest.mark.parametrize("block", [1, 13, 1000])
def test_blocks_hold_each_voxel_of_the_mask_once(opened, block):
    store, ref = opened
    mask = np.random.default_rng(3).random(SHAPE[:3]) < 0.6
    seen = []
    for idx, data in store.iter_blocks(mask, block):
        assert idx.dtype == np.int64 and 1 <= idx.size <= block
        assert data.dtype == np.float32 and data.shape == (SHAPE[3], idx.size)
        _close(data, ref[np.unravel_index(idx, SHAPE[:3])].T)
        seen.append(idx)
    seen = np.concatenate(seen)
    np.testing.assert_array_equal(np.sort(seen), np.flatnonzero(mask))
    assert list(store.iter_blocks(np.zeros(SHAPE[:3], bool), block)) == []


def test_volume_equals_nibabel(opened):
    store, ref = opened
    for t in (0, SHAPE[3] - 1):
        got = store.volume(t)
        assert got.dtype == np.float32 and got.shape == SHAPE[:3]
        _close(got, ref[..., t])
