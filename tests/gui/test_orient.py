"""Display layout against nibabel's own orientation arithmetic (outside reference)."""

import itertools

import numpy as np
import pytest
from nibabel.affines import apply_affine
from nibabel.orientations import aff2axcodes, inv_ornt_aff

from voxelscope.gui.orient import DisplayGrid


def _affines():
    """Every permutation and flip of the three axes, with random voxel sizes (seeded)."""
    rng = np.random.default_rng(20240611)
    for perm in itertools.permutations(range(3)):
        for signs in itertools.product((-1.0, 1.0), repeat=3):
            a = np.zeros((4, 4))
            for col, (row, s) in enumerate(zip(perm, signs)):
                a[row, col] = s * rng.uniform(1.0, 4.0)
            a[:3, 3] = rng.uniform(-50, 50, 3)
            a[3, 3] = 1.0
            yield a


@pytest.mark.parametrize("affine", list(_affines()))
def test_display_matches_nibabel_and_world_directions(affine):
    """to_voxel agrees with nibabel.orientations.inv_ornt_aff (nibabel, outside reference),
    and display axes run towards R, A, S in world space (apply_affine)."""
    shape = (4, 5, 6)
    g = DisplayGrid(shape, affine)
    back = inv_ornt_aff(g.transform, shape)  # display index -> stored index (nibabel)
    rng = np.random.default_rng(3)
    vol = rng.random(shape)
    disp = g.display(vol)
    assert disp.shape == g.display_shape
    for _ in range(20):
        d = tuple(int(rng.integers(0, n)) for n in g.display_shape)
        v = g.to_voxel(d)
        assert tuple(np.rint(apply_affine(back, d)).astype(int)) == v
        assert g.to_display(v) == d
        assert disp[d] == vol[v]
        for axis in range(3):
            step = list(d)
            if step[axis] + 1 < g.display_shape[axis]:
                step[axis] += 1
                w0 = apply_affine(affine, v)
                w1 = apply_affine(affine, g.to_voxel(step))
                # one display step towards + means towards R, A or S in world mm
                assert w1[axis] > w0[axis]


def test_letters_and_las_example():
    """functional.nii's affine is L-A-S (nibabel.aff2axcodes); display flips only i."""
    las = np.diag([-4.0, 4.0, 8.0, 1.0])
    assert aff2axcodes(las) == ("L", "A", "S")
    g = DisplayGrid((17, 21, 3), las)
    assert g.flipped == (True, False, False)
    assert g.display_voxel_mm == (4.0, 4.0, 8.0)
    assert DisplayGrid.letters(0) == ("L", "R")
    assert DisplayGrid.letters(2) == ("I", "S")
