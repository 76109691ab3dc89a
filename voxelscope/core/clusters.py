"""Clusters of a statistic map: connected voxels above a threshold, with their peaks.

A cluster is a connected component of the voxels that pass the threshold, found with
:func:`scipy.ndimage.label` under 6-, 18- or 26-connectivity (neighbours sharing a side;
a side or an edge; a side, an edge or a corner). The threshold is applied as:

``"abs"``
    ``|stat| > threshold``; positive and negative voxels that touch form one cluster.
``"signed"`` (default)
    ``stat > threshold`` and ``stat < -threshold`` labelled separately, so a positive and
    a negative cluster never merge.
``"positive"`` / ``"negative"``
    Only one side.

Each cluster carries its size (voxels and mm³ through the affine's voxel volume), its peak
(largest ``|stat|``; the first such voxel in C order on ties) in voxels and in mm, and its
centre of mass in mm (voxel positions weighted by ``|stat|``).

Examples
--------
>>> t = np.zeros((5, 5, 5), dtype=np.float32)
>>> t[1:3, 1:3, 1:3] = 4.0
>>> t[4, 4, 4] = -5.0
>>> table = find_clusters(t, 3.0, affine=np.diag([2.0, 2.0, 2.0, 1.0]))
>>> [(c.sign, c.size_voxels, c.size_mm3, c.peak_value) for c in table.clusters]
[(1, 8, 64.0, 4.0), (-1, 1, 8.0, -5.0)]
"""

from __future__ import annotations

import io
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from .errors import InputError

__all__ = ["CONNECTIVITIES", "Cluster", "ClusterTable", "find_clusters", "structure"]

#: Neighbourhoods accepted by :func:`find_clusters`.
CONNECTIVITIES = (6, 18, 26)

_MODES = ("signed", "abs", "positive", "negative")
_SORTS = ("size", "peak")


def structure(connectivity: int) -> np.ndarray:
    """The 3x3x3 neighbourhood for 6-, 18- or 26-connectivity.

    >>> [int(structure(c).sum()) for c in (6, 18, 26)]
    [7, 19, 27]
    """
    if connectivity not in CONNECTIVITIES:
        raise InputError(f"connectivity must be 6, 18 or 26, not {connectivity!r}")
    return ndimage.generate_binary_structure(3, {6: 1, 18: 2, 26: 3}[connectivity])


@dataclass(frozen=True)
class Cluster:
    """One cluster.

    Attributes
    ----------
    label : int
        Its value in :attr:`ClusterTable.labels` (1-based, in table order).
    sign : int
        +1 positive, -1 negative, 0 for an ``"abs"`` cluster.
    size_voxels : int
    size_mm3 : float
    peak_value : float
        The statistic at the peak (signed).
    peak_voxel : tuple of int
    peak_mm : tuple of float
    centre_mm : tuple of float
        Centre of mass, weighted by ``|stat|``.
    """

    label: int
    sign: int
    size_voxels: int
    size_mm3: float
    peak_value: float
    peak_voxel: tuple[int, int, int]
    peak_mm: tuple[float, float, float]
    centre_mm: tuple[float, float, float]


@dataclass(frozen=True, eq=False)
class ClusterTable:
    """The clusters of one map at one threshold.

    Attributes
    ----------
    clusters : tuple of Cluster
        Sorted as asked.
    labels : ndarray of int32 (X, Y, Z)
        0 outside clusters, else the cluster's ``label``.
    threshold : float
    mode : str
    connectivity : int
    min_voxels : int
    """

    clusters: tuple[Cluster, ...]
    labels: np.ndarray
    threshold: float
    mode: str
    connectivity: int
    min_voxels: int

    def __len__(self) -> int:
        return len(self.clusters)

    def to_tsv(self) -> str:
        """Tab-separated table with a header row (mm to 0.01, t to 0.001).

        >>> t = np.zeros((3, 3, 3)); t[1, 1, 1] = 5.0
        >>> find_clusters(t, 3.0).to_tsv().splitlines()[1].split()[:8]
        ['1', '+', '1', '1.00', '5.000', '1', '1', '1']
        """
        out = io.StringIO()
        head = [
            "cluster",
            "sign",
            "voxels",
            "mm3",
            "peak",
            "peak_i",
            "peak_j",
            "peak_k",
            "peak_x_mm",
            "peak_y_mm",
            "peak_z_mm",
            "centre_x_mm",
            "centre_y_mm",
            "centre_z_mm",
        ]
        out.write("\t".join(head) + "\n")
        for c in self.clusters:
            sign = {1: "+", -1: "-", 0: "+/-"}[c.sign]
            row = [
                str(c.label),
                sign,
                str(c.size_voxels),
                f"{c.size_mm3:.2f}",
                f"{c.peak_value:.3f}",
                *(str(v) for v in c.peak_voxel),
                *(f"{v:.2f}" for v in c.peak_mm),
                *(f"{v:.2f}" for v in c.centre_mm),
            ]
            out.write("\t".join(row) + "\n")
        return out.getvalue()


def _components(
    sel: np.ndarray, stat: np.ndarray, struct: np.ndarray, sign: int
) -> list[tuple[int, np.ndarray, np.ndarray]]:
    """(sign, flat indices in C order, values) of each component of ``sel``."""
    lab, n = ndimage.label(sel, structure=struct)
    if n == 0:
        return []
    flat_lab = lab.ravel()
    idx = np.flatnonzero(flat_lab)
    labs = flat_lab[idx]
    order = np.argsort(labs, kind="stable")  # keeps C order within a label
    idx, labs = idx[order], labs[order]
    bounds = np.searchsorted(labs, np.arange(1, n + 2))
    vals = stat.ravel()
    return [
        (sign, idx[bounds[i] : bounds[i + 1]], vals[idx[bounds[i] : bounds[i + 1]]])
        for i in range(n)
    ]


def find_clusters(
    stat: np.ndarray,
    threshold: float,
    affine: np.ndarray | None = None,
    mask: np.ndarray | None = None,
    mode: str = "signed",
    connectivity: int = 26,
    min_voxels: int = 1,
    sort: str = "size",
) -> ClusterTable:
    """Clusters of voxels beyond a threshold.

    Parameters
    ----------
    stat : ndarray (X, Y, Z)
        A statistic map (NaN never passes the threshold).
    threshold : float
        Voxels with ``|stat| > threshold`` (see the module notes for ``mode``); >= 0.
    affine : ndarray (4, 4), optional
        Voxel -> mm; default identity (1 mm voxels).
    mask : ndarray of bool, optional
        Only these voxels can belong to a cluster.
    mode : {"signed", "abs", "positive", "negative"}
    connectivity : {6, 18, 26}
    min_voxels : int
        Smaller clusters are dropped.
    sort : {"size", "peak"}
        Largest first (ties by larger peak ``|stat|``) or highest peak ``|stat|`` first
        (ties by size).

    Returns
    -------
    ClusterTable

    Examples
    --------
    >>> t = np.zeros((4, 1, 1)); t[0, 0, 0] = t[1, 0, 0] = 3.5; t[3, 0, 0] = 9.0
    >>> [c.size_voxels for c in find_clusters(t, 3.0, sort="peak").clusters]
    [1, 2]
    """
    a = np.asarray(stat, dtype=np.float64)
    if a.ndim != 3:
        raise InputError(f"a cluster table needs a 3D map, not shape {a.shape}")
    if mode not in _MODES:
        raise InputError(f"cluster mode must be one of {', '.join(_MODES)}, not '{mode}'")
    if sort not in _SORTS:
        raise InputError(f"clusters are sorted by 'size' or 'peak', not '{sort}'")
    thr = float(threshold)
    if not np.isfinite(thr) or thr < 0:
        raise InputError(f"the cluster threshold must be a number >= 0, not {threshold!r}")
    if int(min_voxels) < 1:
        raise InputError("the minimum cluster size must be at least 1 voxel")
    struct = structure(int(connectivity))
    aff = np.eye(4) if affine is None else np.asarray(affine, dtype=np.float64)
    valid = np.isfinite(a)
    if mask is not None:
        m = np.asarray(mask, dtype=bool)
        if m.shape != a.shape:
            raise InputError(f"the mask has shape {m.shape} but the map has shape {a.shape}")
        valid &= m
    a0 = np.where(valid, a, 0.0)
    parts: list[tuple[int, np.ndarray, np.ndarray]] = []
    if mode == "abs":
        parts += _components(valid & (np.abs(a0) > thr), a0, struct, 0)
    if mode in ("signed", "positive"):
        parts += _components(valid & (a0 > thr), a0, struct, 1)
    if mode in ("signed", "negative"):
        parts += _components(valid & (a0 < -thr), a0, struct, -1)
    parts = [p for p in parts if p[1].size >= int(min_voxels)]

    voxel_mm3 = round(float(abs(np.linalg.det(aff[:3, :3]))), 9)
    shape = a.shape
    rows = []
    for sign, idx, vals in parts:
        mag = np.abs(vals)
        k = int(np.argmax(mag))  # first maximum in C order
        peak = tuple(int(v) for v in np.unravel_index(int(idx[k]), shape))
        ijk = np.column_stack(np.unravel_index(idx, shape)).astype(np.float64)
        w = mag / mag.sum() if mag.sum() > 0 else np.full(mag.size, 1.0 / mag.size)
        centre_vox = w @ ijk
        rows.append((sign, idx.size, float(vals[k]), peak, centre_vox, idx))
    if sort == "size":
        rows.sort(key=lambda r: (-r[1], -abs(r[2]), r[3]))
    else:
        rows.sort(key=lambda r: (-abs(r[2]), -r[1], r[3]))
    labels = np.zeros(shape, dtype=np.int32)
    flat_labels = labels.reshape(-1)
    clusters = []
    for n, (sign, size, value, peak, centre_vox, idx) in enumerate(rows, start=1):
        flat_labels[idx] = n
        peak_mm = aff[:3, :3] @ np.asarray(peak, dtype=np.float64) + aff[:3, 3]
        centre_mm = aff[:3, :3] @ centre_vox + aff[:3, 3]
        clusters.append(
            Cluster(
                label=n,
                sign=sign,
                size_voxels=int(size),
                size_mm3=float(size) * voxel_mm3,
                peak_value=float(value),
                peak_voxel=peak,  # type: ignore[arg-type]
                peak_mm=tuple(float(v) for v in peak_mm),  # type: ignore[arg-type]
                centre_mm=tuple(float(v) for v in centre_mm),  # type: ignore[arg-type]
            )
        )
    return ClusterTable(
        clusters=tuple(clusters),
        labels=labels,
        threshold=thr,
        mode=mode,
        connectivity=int(connectivity),
        min_voxels=int(min_voxels),
    )
