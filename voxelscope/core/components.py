"""Connected parts of a 3D boolean image with numpy only: the largest one, and filled holes.

The brain mask keeps the largest 26-connected part of the voxels over its intensity
threshold and fills the holes it encloses (:func:`voxelscope.core.mask.brain_mask`).
Importing scipy for that costs more than the rest of a whole-volume map's fixed work, so
the two steps are done here on *runs*: the stretches of consecutive True voxels along the
last axis (the one that is contiguous in C order). Two runs on neighbouring lines touch
when their stretches overlap (26-connectivity: overlap after widening by one voxel, on
any of the 8 neighbouring lines; 6-connectivity: real overlap, on the 4 lines that share
a face). Runs are joined by repeated hooking of each tree's root onto the smallest root
it touches, with path halving until every run points at its root (the smallest run of
its part), a few rounds for any shape. The work is proportional to the number of runs
and touching pairs, not to the voxels (tests/core/test_components.py checks both
functions against ``scipy.ndimage.label`` and ``scipy.ndimage.binary_fill_holes`` on
random blobs).

Examples
--------
>>> m = np.zeros((4, 4, 4), bool); m[:2, :2, :2] = True; m[3, 3, 3] = True
>>> int(largest_component(m).sum()), bool(largest_component(m)[3, 3, 3])
(8, False)
>>> c = np.ones((3, 3, 3), bool); c[1, 1, 1] = False
>>> bool(fill_holes(c)[1, 1, 1])
True
"""

from __future__ import annotations

import numpy as np

__all__ = ["component_runs", "fill_holes", "largest_component"]

#: Neighbouring lines (offsets along the first two axes) that come after a line, per
#: connectivity: the other half are the same pairs seen from the other side.
_LINE_STEPS = {26: ((0, 1), (1, -1), (1, 0), (1, 1)), 6: ((0, 1), (1, 0))}


def _runs(mask: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``(line, start, stop)`` of every run of True along the last axis, in C order.

    ``line`` is the C-order index of the run's line over the first two axes; the run
    covers ``[start, stop)`` of the last axis.
    """
    x, y, z = mask.shape
    padded = np.zeros((x * y, z + 2), dtype=np.int8)
    padded[:, 1:-1] = mask.reshape(x * y, z)
    step = np.diff(padded, axis=1).ravel()  # (x*y, z+1): +1 where a run starts, -1 after it
    up = np.flatnonzero(step == 1)
    down = np.flatnonzero(step == -1)
    return up // (z + 1), up % (z + 1), down % (z + 1)


def _roots(n: int, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """The root (smallest member) of every node's part of the graph with edges ``a``-``b``.

    Each round hooks every root onto the smallest root across its edges, then halves paths
    until every node points at a root; roots only ever decrease, so there are no cycles.
    """
    parent = np.arange(n, dtype=np.int64)
    while a.size:
        ra, rb = parent[a], parent[b]
        lo = np.minimum(ra, rb)
        hi = np.maximum(ra, rb)
        apart = lo != hi
        if not apart.any():
            break
        a, b = a[apart], b[apart]  # pairs already joined stay joined
        np.minimum.at(parent, hi[apart], lo[apart])
        while True:
            up = parent[parent]
            if np.array_equal(up, parent):
                break
            parent = up
    return parent


def component_runs(
    mask: np.ndarray, connectivity: int = 26
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Runs of a 3D boolean image and the connected part each belongs to.

    Parameters
    ----------
    mask : ndarray of bool, 3D
    connectivity : {26, 6}
        Voxels touching at a corner, edge or face (26), or at a face only (6).

    Returns
    -------
    line, start, stop : ndarray of int64
        Every run of True along the last axis, in C order: its line (the C-order index
        over the first two axes) and its stretch ``[start, stop)`` on the last axis.
    root : ndarray of int64
        Per run, the index of the first run (in C order) of its connected part; parts are
        therefore numbered in the order their first voxel comes in C order.

    Examples
    --------
    >>> m = np.zeros((3, 1, 4), bool); m[0, 0, :2] = m[1, 0, 2:] = m[2, 0, 0] = True
    >>> [r.tolist() for r in component_runs(m)]
    [[0, 1, 2], [0, 2, 0], [2, 4, 1], [0, 0, 2]]
    >>> component_runs(m, connectivity=6)[3].tolist()
    [0, 1, 2]
    """
    mask = np.asarray(mask, dtype=bool)
    if mask.ndim != 3:
        raise ValueError(f"component_runs needs a 3D image, not {mask.ndim}D")
    if connectivity not in _LINE_STEPS:
        raise ValueError(f"connectivity must be 6 or 26, not {connectivity}")
    x, y, z = mask.shape
    line, start, stop = _runs(mask)
    n = line.size
    if n == 0:
        return line, start, stop, line.copy()
    width = z + 2  # keys line * width + position keep the lines apart
    start_key = line * width + start  # ascending: runs come in C order
    stop_key = line * width + stop
    reach = 1 if connectivity == 26 else 0  # stretches overlap after widening by this
    li, lj = np.divmod(line, y)
    pairs_a, pairs_b = [], []
    for di, dj in _LINE_STEPS[connectivity]:
        ok = (li + di < x) & (lj + dj >= 0) & (lj + dj < y)
        if not ok.any():
            continue
        src = np.flatnonzero(ok)
        other = (line[src] + di * y + dj) * width
        # runs on the other line with stop >= start - reach + 1 ... start <= stop + reach - 1
        first = np.searchsorted(stop_key, other + start[src] - reach + 1, side="left")
        last = np.searchsorted(start_key, other + stop[src] + reach - 1, side="right")
        count = np.maximum(last - first, 0)
        if not count.any():
            continue
        a = np.repeat(src, count)
        offsets = np.arange(int(count.sum())) - np.repeat(np.cumsum(count) - count, count)
        pairs_a.append(a)
        pairs_b.append(np.repeat(first, count) + offsets)
    if pairs_a:
        root = _roots(n, np.concatenate(pairs_a), np.concatenate(pairs_b))
    else:
        root = np.arange(n, dtype=np.int64)
    return line, start, stop, root


def _paint(shape: tuple[int, int, int], line, start, stop) -> np.ndarray:
    """The boolean image holding the given runs."""
    x, y, z = shape
    edge = np.zeros(x * y * (z + 1) + 1, dtype=np.int8)
    edge[line * (z + 1) + start] += 1
    edge[line * (z + 1) + stop] -= 1
    inside = np.cumsum(edge[:-1], dtype=np.int8).reshape(x * y, z + 1)[:, :z]
    return inside.reshape(shape).astype(bool)


def largest_component(mask: np.ndarray, connectivity: int = 26) -> np.ndarray:
    """The largest connected part of a 3D boolean image (all False if there is none).

    Of parts of equal size, the one whose first voxel comes first in C order is kept, as
    the first label of ``scipy.ndimage.label`` would be.

    Examples
    --------
    >>> m = np.zeros((5, 1, 5), bool); m[0, 0, :2] = m[3, 0, 1:3] = True
    >>> np.argwhere(largest_component(m)).tolist()
    [[0, 0, 0], [0, 0, 1]]
    """
    mask = np.asarray(mask, dtype=bool)
    line, start, stop, root = component_runs(mask, connectivity)
    if line.size == 0:
        return np.zeros(mask.shape, dtype=bool)
    size = np.bincount(root, weights=stop - start, minlength=line.size)
    best = int(np.argmax(size))  # the first of equal sizes: the smallest root
    keep = root == best
    return _paint(mask.shape, line[keep], start[keep], stop[keep])


def fill_holes(mask: np.ndarray) -> np.ndarray:
    """``mask`` with every enclosed hole filled.

    A hole is a 6-connected part of the False voxels that does not reach the outer sides of
    the grid (what ``scipy.ndimage.binary_fill_holes`` fills with its default structure).

    Examples
    --------
    >>> m = np.ones((3, 5, 3), bool); m[1, 1, 1] = False  # a hole
    >>> m[1, 4, 1] = False  # ... and a dent in an outer side: not a hole
    >>> int((fill_holes(m) & ~m).sum())
    1
    """
    mask = np.asarray(mask, dtype=bool)
    x, y, z = mask.shape
    line, start, stop, root = component_runs(~mask, connectivity=6)
    if line.size == 0:
        return mask.copy()
    li, lj = np.divmod(line, y)
    face = (start == 0) | (stop == z) | (li == 0) | (li == x - 1) | (lj == 0) | (lj == y - 1)
    open_part = np.zeros(line.size, dtype=bool)
    open_part[root[face]] = True
    hole = ~open_part[root]
    if not hole.any():
        return mask.copy()
    return mask | _paint(mask.shape, line[hole], start[hole], stop[hole])
