"""The brain mask of a run: the intensity rule, and the supersets the cache keeps.

A voxel is in the mask when its time series is finite and not constant and its mean
exceeds :data:`MASK_FRACTION` of a robust maximum (the :data:`MASK_PERCENTILE`-th
percentile of the valid means); the largest connected part is kept and enclosed holes
are filled (:func:`brain_mask`). :func:`summary_mask` applies that rule to a run's
:class:`~voxelscope.core.summary.Summary`; :func:`cache_selection` and
:func:`cache_must_keep` are the cheaper supersets a compressed run's cache stores, so
maps over the mask never read the file.

Examples
--------
>>> m = np.zeros((5, 5, 5)); m[1:4, 1:4, 1:4] = 100.0
>>> int(brain_mask(m).sum())
27
"""

from __future__ import annotations

import math

import numpy as np

from voxelscope.core import components
from voxelscope.core.summary import Summary

__all__ = [
    "MASK_FRACTION",
    "MASK_PERCENTILE",
    "MASK_RULE_VERSION",
    "brain_mask",
    "cache_must_keep",
    "cache_selection",
    "mask_rule",
    "percentile_of",
    "summary_mask",
]

#: Brain mask: keep voxels whose mean exceeds this fraction of the robust maximum ...
MASK_FRACTION = 0.2
#: ... where the robust maximum is this percentile of the valid voxels' means.
MASK_PERCENTILE = 98.0
#: Version of :func:`summary_mask`'s rule. Raise it whenever the rule would give another
#: mask for the same summary: masks kept in the cache name the rule they were computed
#: by (:func:`mask_rule`) and are computed again when it differs.
MASK_RULE_VERSION = 1


def mask_rule() -> str:
    """The rule :func:`summary_mask` applies, as the cache records it beside a kept mask.

    >>> mask_rule()
    'intensity rule 1: mean > 0.2 x percentile 98.0; largest 26-connected part; holes filled'
    """
    return (
        f"intensity rule {MASK_RULE_VERSION}: mean > {MASK_FRACTION} x percentile "
        f"{MASK_PERCENTILE}; largest 26-connected part; holes filled"
    )


def percentile_of(values: np.ndarray, percentile: float) -> float:
    """The ``percentile``-th percentile of finite float64 ``values`` (at least one), equal
    to ``np.percentile``'s default (linear) method, which would import ``numpy.ma`` (through
    ``np.unique``; about 15 ms of every run's first mask).

    The value at the virtual index ``(n - 1) q`` of the sorted values, linearly between
    its two neighbours with numpy's own formula on each side of a half (checked equal in
    tests/core/test_mask.py).

    >>> percentile_of(np.array([1.0, 2.0, 3.0, 4.0]), 50.0)
    2.5
    """
    values = np.asarray(values, dtype=np.float64).ravel()
    n = values.size
    virtual = (n - 1) * (percentile / 100)
    if virtual >= n - 1:
        return float(values.max())
    if virtual <= 0:
        return float(values.min())
    lo = math.floor(virtual)
    gamma = virtual - lo
    part = np.partition(values, (lo, lo + 1))
    a, b = float(part[lo]), float(part[lo + 1])
    diff = b - a
    return b - diff * (1 - gamma) if gamma >= 0.5 else a + diff * gamma


def brain_mask(
    mean: np.ndarray,
    valid: np.ndarray | None = None,
    fraction: float = MASK_FRACTION,
    percentile: float = MASK_PERCENTILE,
    largest_component: bool = True,
    fill_holes: bool = True,
) -> np.ndarray:
    """Intensity-based brain mask of a mean image.

    A voxel is in the mask when it is *valid* (finite, and not constant over time when
    ``valid`` says so) and its mean exceeds ``fraction`` times the ``percentile``-th
    percentile of the valid means (a robust maximum, insensitive to a few hot voxels).
    Optionally the largest 26-connected component is kept and enclosed holes are
    filled (filled voxels must be valid too); both with numpy only
    (:mod:`voxelscope.core.components`, the same result as ``scipy.ndimage``'s).

    Parameters
    ----------
    mean : ndarray
        3D mean image.
    valid : ndarray of bool, optional
        Voxels allowed in the mask; default: finite means.
    fraction : float
        Default :data:`MASK_FRACTION` (0.2).
    percentile : float
        Default :data:`MASK_PERCENTILE` (98).
    largest_component, fill_holes : bool

    Returns
    -------
    ndarray of bool

    Examples
    --------
    >>> m = np.zeros((5, 5, 5)); m[1:4, 1:4, 1:4] = 100.0; m[2, 2, 2] = 1.0
    >>> int(brain_mask(m).sum()), int(brain_mask(m, fill_holes=False).sum())
    (27, 26)
    """
    mean = np.asarray(mean, dtype=np.float64)
    ok = np.isfinite(mean)
    if valid is not None:
        ok &= np.asarray(valid, dtype=bool)
    if not ok.any():
        return np.zeros(mean.shape, dtype=bool)
    ref = percentile_of(mean[ok], percentile)
    mask = ok & (mean > fraction * ref) if ref > 0 else ok & (mean > 0)
    if largest_component and mask.any():
        mask = components.largest_component(mask, connectivity=26)
    if fill_holes and mask.any():
        mask = components.fill_holes(mask) & ok
    return mask


def summary_mask(s: Summary) -> tuple[np.ndarray, bool]:
    """The run's brain mask from its summary, and whether the fallback was used.

    The one rule of :meth:`voxelscope.core.run.Run.mask`; the cache keeps a superset of
    it (:func:`cache_must_keep`).
    """
    valid = ~s.nonfinite & ~s.constant
    mask = brain_mask(s.mean, valid)
    if not mask.any() and valid.any():
        return valid.copy(), True
    return mask, False


def _enclosed(mask: np.ndarray) -> np.ndarray:
    """Voxels outside ``mask`` that meet it in all six axis directions.

    A superset of the holes that :func:`voxelscope.core.components.fill_holes` fills: a hole's
    straight path to the edge of the grid must cross the mask (numpy only, no scipy).

    Examples
    --------
    >>> m = np.zeros((5, 5, 5), bool); m[1:4, 1:4, 1:4] = True; m[2, 2, 2] = False
    >>> np.argwhere(_enclosed(m)).tolist()
    [[2, 2, 2]]
    """
    out = ~mask
    for ax in range(3):
        fwd = np.logical_or.accumulate(mask, axis=ax)
        bwd = np.flip(np.logical_or.accumulate(np.flip(mask, ax), axis=ax), ax)
        out &= fwd & bwd
    return out


def _mask_superset(s: Summary, fraction: float, valid: np.ndarray) -> np.ndarray:
    """The intensity rule of :func:`brain_mask` without its connected-part steps: every voxel over
    the threshold (any component) and every voxel they enclose; contains the mask."""
    mean = np.asarray(s.mean, dtype=np.float64)
    ok = valid & np.isfinite(mean)
    if not ok.any():
        return ok
    ref = percentile_of(mean[ok], MASK_PERCENTILE)
    over = ok & (mean > fraction * ref) if ref > 0 else ok & (mean > 0)
    if not over.any():
        return ok  # the mask falls back to every valid voxel
    return (over | _enclosed(over)) & ok


def cache_selection(s: Summary) -> np.ndarray:
    """Voxels the cache stores, chosen from the summary of the first volumes: the mask
    rule with a margin (three quarters of the intensity fraction). Voxels that are zero in
    every one of those volumes are left to the final check (they are background)."""
    valid = ~s.nonfinite & ~(s.constant & (s.mean == 0))
    return _mask_superset(s, 0.75 * MASK_FRACTION, valid)


def cache_must_keep(s: Summary) -> np.ndarray:
    """A superset of the run's brain mask from the whole run's summary.

    The cache stores all of it, so maps over the mask never read the file.
    """
    return _mask_superset(s, MASK_FRACTION, ~s.nonfinite & ~s.constant)
