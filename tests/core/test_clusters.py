"""Tests of voxelscope.core.clusters against scipy.ndimage (reference library):
``scipy.ndimage.label`` with ``generate_binary_structure(3, 1|2|3)`` on the thresholded map,
``scipy.ndimage.center_of_mass`` and ``nibabel.affines.apply_affine`` for positions."""

from __future__ import annotations

import numpy as np
import pytest
from nibabel.affines import apply_affine
from scipy import ndimage

from voxelscope.core.clusters import find_clusters, structure
from voxelscope.core.errors import InputError


def _smooth_map(seed, shape=(14, 12, 10)):
    rng = np.random.default_rng(seed)
    return ndimage.gaussian_filter(rng.standard_normal(shape), 1.2) * 8


AFFINE = np.array(
    [[-3.0, 0.0, 0.0, 40.0], [0.0, 3.0, 0.3, -60.0], [0.0, 0.0, 3.5, -20.0], [0, 0, 0, 1]]
)


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("connectivity,rank", [(6, 1), (18, 2), (26, 3)])
def test_signed_clusters_equal_ndimage_label(seed, connectivity, rank):
    """Positive and negative components equal scipy.ndimage.label of t > thr and t < -thr
    with the matching structure; sizes, peaks and |t|-weighted centres of mass agree."""
    t = _smooth_map(seed)
    thr = 1.0
    table = find_clusters(t, thr, affine=AFFINE, connectivity=connectivity)
    st = ndimage.generate_binary_structure(3, rank)
    expected = []
    for sign, sel in ((1, t > thr), (-1, t < -thr)):
        lab, n = ndimage.label(sel, structure=st)
        for k in range(1, n + 1):
            comp = lab == k
            vals = np.where(comp, np.abs(t), 0.0)
            peak = np.unravel_index(np.argmax(vals), t.shape)
            com = ndimage.center_of_mass(np.abs(t), lab, k)
            expected.append((sign, int(comp.sum()), peak, com, frozenset(np.flatnonzero(comp))))
    assert len(table) == len(expected) > 3
    got = {frozenset(np.flatnonzero(table.labels == c.label)): c for c in table.clusters}
    for sign, size, peak, com, members in expected:
        c = got[members]
        assert c.sign == sign and c.size_voxels == size
        assert c.peak_voxel == tuple(int(v) for v in peak)
        assert c.peak_value == pytest.approx(float(t[peak]))
        np.testing.assert_allclose(c.peak_mm, apply_affine(AFFINE, peak), atol=1e-9)
        np.testing.assert_allclose(c.centre_mm, apply_affine(AFFINE, com), atol=1e-9)
        assert c.size_mm3 == pytest.approx(size * abs(np.linalg.det(AFFINE[:3, :3])))
    sizes = [c.size_voxels for c in table.clusters]
    assert sizes == sorted(sizes, reverse=True)
    assert [c.label for c in table.clusters] == list(range(1, len(table) + 1))


def test_abs_mode_merges_touching_signs_and_min_size_and_sort():
    t = np.zeros((6, 3, 3))
    t[1, 1, 1], t[2, 1, 1] = 4.0, -6.0  # touching, opposite signs
    t[4, 1, 1] = 9.0
    signed = find_clusters(t, 3.0, connectivity=6)
    assert sorted(c.size_voxels for c in signed.clusters) == [1, 1, 1]
    absolute = find_clusters(t, 3.0, mode="abs", connectivity=6)
    _lab, n = ndimage.label(np.abs(t) > 3.0, structure=structure(6))
    assert len(absolute) == n == 2
    big = absolute.clusters[0]
    assert big.size_voxels == 2 and big.peak_value == -6.0 and big.sign == 0
    assert len(find_clusters(t, 3.0, mode="abs", min_voxels=2)) == 1
    by_peak = find_clusters(t, 3.0, mode="abs", sort="peak")
    assert [c.peak_value for c in by_peak.clusters] == [9.0, -6.0]
    assert [c.peak_value for c in find_clusters(t, 3.0, mode="negative").clusters] == [-6.0]
    assert [c.peak_value for c in find_clusters(t, 3.0, mode="positive", sort="peak").clusters] == [
        9.0,
        4.0,
    ]


def test_connectivity_matters_on_a_diagonal():
    """Two voxels touching at a corner are one cluster under 26-connectivity and two under 6
    or 18 (definition of the neighbourhoods; common practice)."""
    t = np.zeros((3, 3, 3))
    t[0, 0, 0] = t[1, 1, 1] = 5.0
    assert len(find_clusters(t, 1.0, connectivity=26)) == 1
    assert len(find_clusters(t, 1.0, connectivity=18)) == 2
    t2 = np.zeros((3, 3, 3))
    t2[0, 0, 1] = t2[1, 1, 1] = 5.0  # share an edge
    assert len(find_clusters(t2, 1.0, connectivity=18)) == 1
    assert len(find_clusters(t2, 1.0, connectivity=6)) == 2


def test_mask_nan_threshold_and_errors():
    t = np.full((3, 3, 3), 5.0)
    t[0, 0, 0] = np.nan
    m = np.ones_like(t, dtype=bool)
    m[2] = False
    table = find_clusters(t, 5.0)
    assert len(table) == 0  # strictly above the threshold
    table = find_clusters(t, 4.0, mask=m)
    assert table.clusters[0].size_voxels == 17
    assert table.labels[0, 0, 0] == 0 and table.labels[2].sum() == 0
    tsv = table.to_tsv().splitlines()
    assert tsv[0].split("\t")[:3] == ["cluster", "sign", "voxels"] and len(tsv) == 2
    for kwargs, msg in [
        ({"connectivity": 8}, "6, 18 or 26"),
        ({"mode": "both"}, "mode"),
        ({"sort": "name"}, "sorted"),
        ({"min_voxels": 0}, "at least 1"),
    ]:
        with pytest.raises(InputError, match=msg):
            find_clusters(t, 1.0, **kwargs)
    with pytest.raises(InputError, match="threshold"):
        find_clusters(t, -1.0)
    with pytest.raises(InputError, match="3D"):
        find_clusters(np.zeros((3, 3)), 1.0)
