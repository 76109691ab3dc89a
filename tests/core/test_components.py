"""Connected parts with numpy only (voxelscope.core.components).

Outside reference: ``scipy.ndimage.label`` (26-connectivity with a 3x3x3 structure of
ones; 6 with its default cross) and ``scipy.ndimage.binary_fill_holes`` (default
structure), on random images: noise of any density, bright blobs (hollow ones included),
ties between parts of equal size, and degenerate grids (one voxel thick).
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import ndimage

from voxelscope.core.components import component_runs, fill_holes, largest_component

CUBE = np.ones((3, 3, 3), dtype=bool)


def _scipy_largest(mask: np.ndarray, structure=CUBE) -> np.ndarray:
    labels, n = ndimage.label(mask, structure=structure)
    if n == 0:
        return np.zeros(mask.shape, dtype=bool)
    sizes = np.bincount(labels.ravel())
    sizes[0] = 0
    return labels == int(np.argmax(sizes))


def _blobs(rng: np.random.Generator, shape, n_blobs: int, hollow: bool) -> np.ndarray:
    g = np.meshgrid(*(np.arange(n) for n in shape), indexing="ij")
    mask = rng.random(shape) < 0.03  # specks
    for _ in range(n_blobs):
        c = [rng.uniform(0, n) for n in shape]
        r = rng.uniform(1.5, 5)
        d = np.sqrt(sum((gi - ci) ** 2 for gi, ci in zip(g, c)))
        mask |= d < r
        if hollow:
            mask &= ~(d < r / 2)
    return mask


@settings(max_examples=150, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    shape=st.tuples(st.integers(1, 13), st.integers(1, 13), st.integers(1, 13)),
    density=st.floats(0.02, 0.95),
)
def test_random_noise_equals_scipy_ndimage(seed, shape, density):
    """Noise of any density: the same largest part (26 and 6) and the same filled holes as
    scipy.ndimage (reference library)."""
    mask = np.random.default_rng(seed).random(shape) < density
    np.testing.assert_array_equal(largest_component(mask), _scipy_largest(mask))
    cross = ndimage.generate_binary_structure(3, 1)
    np.testing.assert_array_equal(
        largest_component(mask, connectivity=6), _scipy_largest(mask, cross)
    )
    np.testing.assert_array_equal(fill_holes(mask), ndimage.binary_fill_holes(mask))


@settings(max_examples=60, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n_blobs=st.integers(1, 5), hollow=st.booleans())
def test_blobs_equal_scipy_ndimage(seed, n_blobs, hollow):
    """Brain-like images (bright balls, hollow or not, and specks): scipy.ndimage (reference
    library) gives the same part and the same filled holes."""
    mask = _blobs(np.random.default_rng(seed), (18, 15, 12), n_blobs, hollow)
    biggest = largest_component(mask)
    np.testing.assert_array_equal(biggest, _scipy_largest(mask))
    np.testing.assert_array_equal(fill_holes(biggest), ndimage.binary_fill_holes(biggest))


@pytest.mark.parametrize("second", [(0, 0, 5), (4, 0, 0), (0, 4, 0), (4, 4, 4)])
def test_ties_keep_the_part_that_comes_first(second):
    """Two parts of the same size: the one whose first voxel comes first in C order, as
    scipy.ndimage.label numbers them (reference library)."""
    mask = np.zeros((6, 6, 7), dtype=bool)
    mask[0, 0, 0:2] = True
    i, j, k = second
    mask[i, j, k : k + 2] = True
    ours = largest_component(mask)
    np.testing.assert_array_equal(ours, _scipy_largest(mask))
    assert ours[0, 0, 0] and not ours[i, j, k]


def test_corner_and_face_contacts():
    """Diagonal neighbours join under 26-connectivity only; an empty image has no part."""
    mask = np.zeros((3, 3, 3), dtype=bool)
    mask[0, 0, 0] = mask[1, 1, 1] = mask[2, 2, 2] = True
    assert largest_component(mask).sum() == 3
    assert largest_component(mask, connectivity=6).sum() == 1
    empty = np.zeros((2, 3, 4), dtype=bool)
    assert not largest_component(empty).any() and not fill_holes(empty).any()
    _line, start, stop, root = component_runs(mask)
    assert root.tolist() == [0, 0, 0] and (stop - start).tolist() == [1, 1, 1]


def test_holes_open_to_any_face_are_not_filled():
    """A cavity joined to a face by a 6-connected channel stays; a sealed one is filled;
    a diagonal gap does not open a hole (background is 6-connected)."""
    mask = np.ones((7, 7, 7), dtype=bool)
    mask[2:5, 2:5, 2:5] = False  # sealed cavity
    sealed = fill_holes(mask)
    assert sealed.all()
    mask[3, 3, 5:] = False  # a channel to the last face
    np.testing.assert_array_equal(fill_holes(mask), mask)
    diag = np.ones((5, 5, 5), dtype=bool)
    diag[2, 2, 2] = False
    diag[3, 3, 3] = diag[4, 4, 4] = False  # touches the hole at an edge only
    filled = fill_holes(diag)
    assert filled[2, 2, 2] and not filled[4, 4, 4]
    np.testing.assert_array_equal(filled, ndimage.binary_fill_holes(diag))


def test_bad_arguments_are_one_line_errors():
    with pytest.raises(ValueError, match="3D"):
        component_runs(np.ones((3, 3), dtype=bool))
    with pytest.raises(ValueError, match="6 or 26"):
        component_runs(np.ones((3, 3, 3), dtype=bool), connectivity=18)
