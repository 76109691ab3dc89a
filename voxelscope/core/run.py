"""A 4D fMRI run: header, affine, TR, voxel time series, mean image and brain mask.

:func:`open_run` reads the header of a NIfTI-1 or NIfTI-2 run (``.nii`` or ``.nii.gz``)
and returns a :class:`Run`. The run reads its voxel values through one store
(:class:`voxelscope.core.stores.VoxelSource`), chosen by how the file is stored:

``"memmap"``
    An uncompressed ``.nii`` is memory-mapped as it lies on disk
    (:class:`voxelscope.core.stores.MappedStore`).
``"cache"``
    A compressed run is decompressed once into the voxel-major cache
    (:mod:`voxelscope.core.cache`), which keeps the brain voxels; a time series is then
    one contiguous row. Voxels outside that never change are served exactly; any other
    voxel is read from the file.
``"memory"``
    A compressed run opened with ``use_cache=False`` (or whose cache cannot be written)
    is decompressed into memory in the same voxel-major float32 layout.
``"file"``
    A compressed run too big for the cache and for memory: voxels are read from the file
    on demand (slow, said in a warning).

All values are scaled (``scl_slope`` / ``scl_inter`` applied, as nibabel does). The TR
and the sampling reference time follow :mod:`voxelscope.core.acquisition`; the brain
mask follows :mod:`voxelscope.core.mask`.

Examples
--------
>>> from nibabel.testing import data_path
>>> run = open_run(Path(data_path) / "functional.nii")
>>> run.shape, run.n_volumes, run.tr, run.tr_source, run.axcodes
((17, 21, 3), 20, 2.0, 'header', ('L', 'A', 'S'))
>>> run.timeseries((8, 10, 1)).shape
(20,)
"""

from __future__ import annotations

import math
import os
import threading
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np
from nibabel.affines import apply_affine, voxel_sizes

from voxelscope.core import cache as _cache
from voxelscope.core.acquisition import resolve_tr, sampling_reference
from voxelscope.core.companions import find_companions, merge_sidecars
from voxelscope.core.errors import InputError
from voxelscope.core.images import _check_affine, _check_dtype, load_nifti, nifti_affine
from voxelscope.core.mask import cache_must_keep, cache_selection, mask_rule, summary_mask
from voxelscope.core.rawfile import RawLayout
from voxelscope.core.stores import MappedStore, VoxelSource
from voxelscope.core.summary import BlockSummary, Summary, summarize_volumes
from voxelscope.core.voxelmajor import VoxelStore

__all__ = ["Run", "open_run"]


# --------------------------------------------------------------------------- the run


@dataclass(eq=False)
class Run:
    """An open 4D run. Build it with :func:`open_run`.

    Attributes
    ----------
    path : Path
        The run file.
    shape : tuple of 3 int
        Spatial grid (X, Y, Z).
    n_volumes : int
        Number of volumes T.
    affine : ndarray
        4x4 voxel -> mm by the NIfTI-1 rule (sform, else qform, else pixdim).
    tr : float
        Repetition time in seconds.
    tr_source : str
        ``"argument"``, ``"sidecar"`` or ``"header"``.
    slice_timing : ndarray or None
        Acquisition time of each slice within the TR, seconds (BIDS ``SliceTiming``).
    reference_time_s : float
        Time within each TR at which regressors are sampled: the median of
        ``slice_timing`` when present, else 0.0.
    axcodes : tuple of 3 str
        ``nibabel.aff2axcodes(affine)``, e.g. ``("L", "A", "S")``.
    voxel_size : tuple of 3 float
        mm, the column lengths of the affine.
    warnings : list of str
        One-line notes for the user (TR disagreements, NaN voxels, ...), each said once.
    header : nibabel header
        A 3D float32 copy of the run's header, for writing maps on the run's grid.
    storage : str
        ``"memmap"``, ``"cache"``, ``"memory"`` or ``"file"``.
    affine_source : str
        ``"sform"``, ``"qform"`` or ``"pixdim"``.
    sidecar : Path or None
        The BIDS sidecar that was read.
    cache_path : Path or None
        The cache file serving the data (storage ``"cache"``).
    """

    path: Path
    shape: tuple[int, int, int]
    n_volumes: int
    affine: np.ndarray = field(repr=False)
    tr: float
    tr_source: str
    slice_timing: np.ndarray | None
    reference_time_s: float
    axcodes: tuple[str, str, str]
    voxel_size: tuple[float, float, float]
    warnings: list[str]
    header: Any = field(repr=False)
    storage: str = "memmap"
    affine_source: str = "sform"
    sidecar: Path | None = None
    cache_path: Path | None = None
    sidecars: tuple[Path, ...] = ()
    reference_source: str = "start of each volume"
    mask_source: str = "intensity"
    _store: VoxelSource | None = field(default=None, repr=False)
    _summary: Any = field(default=None, repr=False)
    _mean: np.ndarray | None = field(default=None, repr=False)
    _mask: np.ndarray | None = field(default=None, repr=False)
    _given_mask: np.ndarray | None = field(default=None, repr=False)
    _mask_memo: Any = field(default=None, repr=False)  # cache.MaskMemo of a cached run
    _kept: Any = field(default=None, repr=False)  # cache.KeptValues of a cached run
    _lock: Any = field(default_factory=threading.RLock, repr=False)

    def set_mask(self, mask: np.ndarray, source: str) -> None:
        """Use ``mask`` (bool, the run's grid) as the brain mask instead of the intensity rule.

        Voxels whose time series is NaN or constant are still left out when the mask is
        first used. ``source`` (the mask file) names it in messages and in
        :attr:`mask_source`.
        """
        mask = np.asarray(mask, dtype=bool)
        if mask.shape != self.shape:
            raise InputError(
                f"{source}: mask shape {mask.shape} does not match the grid "
                f"{self._grid_text()} of {self.path}"
            )
        with self._lock:
            self._given_mask = mask.copy()
            self._mask = None
            self.mask_source = str(source)
            if isinstance(self._store, VoxelStore):
                self._store.widen(mask)  # the cache keeps every voxel of the given mask

    # ----------------------------------------------------------------- geometry

    @property
    def n_voxels(self) -> int:
        """X*Y*Z."""
        x, y, z = self.shape
        return x * y * z

    def _grid_text(self) -> str:
        return "x".join(str(n) for n in self.shape)

    def check_voxel(self, ijk: Sequence[int]) -> tuple[int, int, int]:
        """Validate voxel indices and return them as a tuple of int.

        Raises
        ------
        InputError
            ``voxel (i, j, k) is outside the grid XxYxZ of FILE; ...``

        Examples
        --------
        >>> from nibabel.testing import data_path
        >>> run = open_run(Path(data_path) / "functional.nii")
        >>> run.check_voxel((1, 2, 0))
        (1, 2, 0)
        """
        try:
            vals = [float(v) for v in ijk]
        except (TypeError, ValueError):
            raise InputError(f"voxel {ijk!r} is not three integer indices") from None
        if len(vals) != 3 or not all(math.isfinite(v) and v == int(v) for v in vals):
            raise InputError(f"voxel {tuple(ijk)!r} is not three integer indices")
        i, j, k = (int(v) for v in vals)
        if not all(0 <= a < n for a, n in zip((i, j, k), self.shape)):
            limits = ", ".join(f"0 to {n - 1}" for n in self.shape)
            raise InputError(
                f"voxel ({i}, {j}, {k}) is outside the grid {self._grid_text()} of "
                f"{self.path}; give indices from {limits}"
            )
        return i, j, k

    def voxel_to_mm(self, ijk: Any) -> np.ndarray:
        """World coordinates (mm) of voxel indices, shape (3,) or (n, 3).

        Examples
        --------
        >>> from nibabel.testing import data_path
        >>> open_run(Path(data_path) / "functional.nii").voxel_to_mm((0, 0, 0)).tolist()
        [32.0, -40.0, 0.0]
        """
        return apply_affine(self.affine, np.asarray(ijk, dtype=np.float64))

    def mm_to_voxel(self, xyz: Sequence[float]) -> tuple[int, int, int]:
        """Nearest voxel to a world position (mm).

        Raises
        ------
        InputError
            The position is outside the grid (named in the message).

        Examples
        --------
        >>> from nibabel.testing import data_path
        >>> open_run(Path(data_path) / "functional.nii").mm_to_voxel((30.5, -39, 1))
        (0, 0, 0)
        """
        pos = np.asarray(xyz, dtype=np.float64)
        if pos.shape != (3,) or not np.all(np.isfinite(pos)):
            raise InputError(f"position {tuple(np.ravel(xyz))!r} is not three finite mm values")
        frac = apply_affine(np.linalg.inv(self.affine), pos)
        ijk = np.floor(frac + 0.5).astype(np.int64)
        if not all(0 <= a < n for a, n in zip(ijk, self.shape)):
            x, y, z = (float(v) for v in pos)
            raise InputError(
                f"position ({x:g}, {y:g}, {z:g}) mm is outside the grid {self._grid_text()} "
                f"of {self.path} (nearest voxel would be {tuple(int(a) for a in ijk)}); "
                f"give a position inside the run"
            )
        return int(ijk[0]), int(ijk[1]), int(ijk[2])

    # ----------------------------------------------------------------- data

    def timeseries(self, ijk: Sequence[int]) -> np.ndarray:
        """Scaled time series of one voxel, float64 shape (T,).

        Examples
        --------
        >>> from nibabel.testing import data_path
        >>> open_run(Path(data_path) / "functional.nii").timeseries((8, 10, 1)).dtype
        dtype('float64')
        """
        i, j, k = self.check_voxel(ijk)
        flat = (i * self.shape[1] + j) * self.shape[2] + k
        return self._store.row(flat)

    def _check_flat(self, flat_idx: Any) -> np.ndarray:
        idx = np.asarray(flat_idx)
        if idx.ndim != 1 or (idx.size and idx.dtype.kind not in "iu"):
            raise InputError("flat voxel indices must be a 1D array of integers")
        idx = idx.astype(np.int64, copy=False)
        if idx.size and (idx.min() < 0 or idx.max() >= self.n_voxels):
            raise InputError(
                f"flat voxel index outside 0..{self.n_voxels - 1} (grid {self._grid_text()} "
                f"of {self.path})"
            )
        return idx

    def timeseries_many(self, flat_idx: np.ndarray) -> np.ndarray:
        """Time series of many voxels, float32 (n, T), rows in the order given.

        ``flat_idx = np.ravel_multi_index(ijk.T, run.shape)`` (C order).
        """
        return self._store.rows(self._check_flat(flat_idx))

    def iter_rows(
        self, mask: np.ndarray | None = None, chunk_voxels: int = 4096
    ) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        """Iterate over the voxels of a mask in C order, a chunk at a time.

        Parameters
        ----------
        mask : ndarray of bool, optional
            Shape ``run.shape``; default :meth:`mask`.
        chunk_voxels : int
            Voxels per chunk (at most).

        Yields
        ------
        flat_idx : ndarray
            int64 (n,), ascending C-order flat indices (all chunks together are
            ``np.flatnonzero(mask)``).
        data : ndarray
            float32 (n, T), the scaled time series.
        """
        mask = self.mask() if mask is None else np.asarray(mask, dtype=bool)
        if mask.shape != self.shape:
            raise InputError(
                f"mask shape {mask.shape} does not match the grid {self._grid_text()} "
                f"of {self.path}"
            )
        if chunk_voxels < 1:
            raise ValueError("chunk_voxels must be at least 1")
        flat = np.flatnonzero(mask).astype(np.int64)
        if flat.size == 0:
            return
        yield from self._store.iter_rows(flat, int(chunk_voxels))

    def iter_blocks(
        self, mask: np.ndarray | None = None, block_voxels: int = 1024
    ) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        """Iterate over the voxels of a mask in the store's own order, as (T, n) blocks.

        The fast path for whole-volume passes (maps): each block comes straight from the
        layout of the data, without transposing copies. An uncompressed run is walked in
        file order (x fastest, then y, then z) and a block is, where it can be, a
        read-only view of the mapped file; the voxel-major cache and the in-memory store
        are walked in C order and a block is the transpose of their rows (a view where
        the block's voxels are consecutive). Otherwise a block is a float32 copy of just
        its voxels, so memory stays bounded by ``block_voxels * T * 4`` bytes.

        Parameters
        ----------
        mask : ndarray of bool, optional
            Shape ``run.shape``; default :meth:`mask`.
        block_voxels : int
            Voxels per block (at most).

        Yields
        ------
        flat_idx : ndarray
            int64 (n,), C-order flat indices (``np.ravel_multi_index(ijk, run.shape)``)
            of the block's voxels. All blocks together hold each index of
            ``np.flatnonzero(mask)`` once, but not necessarily in ascending order
            (Fortran order for an uncompressed run).
        data : ndarray
            float32 (T, n), the scaled time series as columns. It may be a read-only view
            of the run's data (possibly not contiguous): copy it before changing it.

        Examples
        --------
        >>> from nibabel.testing import data_path
        >>> run = open_run(Path(data_path) / "functional.nii")
        >>> idx, data = next(run.iter_blocks(np.ones(run.shape, bool), block_voxels=100))
        >>> ijk = np.unravel_index(idx[5], run.shape)  # C-order flat index -> (i, j, k)
        >>> data.shape, data.dtype.name, bool(np.allclose(data[:, 5], run.timeseries(ijk)))
        ((20, 100), 'float32', True)
        """
        mask = self.mask() if mask is None else np.asarray(mask, dtype=bool)
        if mask.shape != self.shape:
            raise InputError(
                f"mask shape {mask.shape} does not match the grid {self._grid_text()} "
                f"of {self.path}"
            )
        if block_voxels < 1:
            raise ValueError("block_voxels must be at least 1")
        yield from self._store.iter_blocks(mask, int(block_voxels))

    def volume(self, t: int) -> np.ndarray:
        """Volume ``t`` (0-based) as float32 (X, Y, Z)."""
        if not (isinstance(t, (int, np.integer)) and 0 <= int(t) < self.n_volumes):
            raise InputError(f"volume {t!r} is outside 0..{self.n_volumes - 1} of {self.path}")
        return self._store.volume(int(t))

    def summary(self) -> Summary:
        """Mean, non-finite and constant flags per voxel (one pass over the data, cached)."""
        with self._lock:  # lazy parts may be asked for from several threads at once
            if self._summary is None:
                store = self._store  # only a memory-mapped run is opened without one
                assert isinstance(store, MappedStore)
                self._summary = summarize_volumes(store.raw_batches(), store.layout)
                self._note_summary()
            return self._summary

    def _note_summary(self) -> None:
        bad = int(np.count_nonzero(self._summary.nonfinite))
        if bad:
            self.warnings.append(
                f"{self.path}: {bad} voxels hold NaN or infinite values; they are left "
                f"out of the brain mask"
            )

    def mask_pending(self) -> bool:
        """True when the intensity mask still waits for the summary pass of a plain float32
        memory-mapped file (no summary yet, no mask file given).

        A whole-volume pass may then gather the summary itself and hand it over
        (:meth:`adopt_summary`), so that a map reads the run once instead of twice
        (:func:`voxelscope.core.maps.compute_map`).
        """
        with self._lock:
            store = self._store
            return (
                self._mask is None
                and self._given_mask is None
                and self._summary is None
                and isinstance(store, MappedStore)
                and store.plain
            )

    def adopt_summary(self, summary: Summary) -> None:
        """Use ``summary`` (every voxel's mean, non-finite and constant flags, gathered by a
        pass over the whole run) as the run's summary, unless it already has one."""
        if summary.mean.shape != self.shape:
            raise ValueError(f"summary of shape {summary.mean.shape} for the grid {self.shape}")
        with self._lock:
            if self._summary is None:
                self._summary = summary
                self._note_summary()

    def summary_gatherer(self) -> BlockSummary:
        """An empty :class:`~voxelscope.core.summary.BlockSummary` for this run: a pass
        over its blocks fills it, and :meth:`adopt_summary` takes what it gathered."""
        store = self._store
        assert isinstance(store, MappedStore) and store.plain
        return BlockSummary(self.shape, store.batch_volumes())

    def likely_mask(self, n_volumes: int = 8) -> np.ndarray:
        """A cheap guess at the brain mask from the first volumes: the rule the cache uses
        to choose its voxels (:func:`voxelscope.core.mask.cache_selection`, a margin below
        the intensity threshold and the voxels it encloses). Only a guess: a pass that
        relies on it checks the real mask afterwards."""
        store = self._store
        assert isinstance(store, MappedStore)
        k = int(max(1, min(n_volumes, self.n_volumes)))
        first = np.asarray(store.raw[..., :k]).T  # (k, Z, Y, X) view, as raw_batches
        return cache_selection(summarize_volumes(iter([first]), store.layout))

    def mean_image(self) -> np.ndarray:
        """Mean over time, float32 (X, Y, Z); 0 at voxels with non-finite values.

        The array is cached and read-only.
        """
        with self._lock:
            if self._mean is None:
                mean = np.array(self.summary().mean, dtype=np.float32)
                mean.flags.writeable = False
                self._mean = mean
            return self._mean

    @property
    def kept_values(self) -> Any:
        """Where small results computed from this run may be kept across processes: the
        :class:`~voxelscope.core.cache.KeptValues` beside its cache entry, or None for a
        run not served from the cache."""
        return self._kept

    def mask(self) -> np.ndarray:
        """Brain mask, bool (X, Y, Z), cached and read-only; see :func:`brain_mask`.

        Voxels with a NaN/inf value or a constant time series are always outside.
        """
        with self._lock:
            if self._mask is None and self._given_mask is not None:
                s = self.summary()
                mask = self._given_mask & ~s.nonfinite & ~s.constant
                if not mask.any():
                    raise InputError(
                        f"{self.mask_source}: no voxel of the mask holds a usable time series "
                        f"of {self.path} (all are NaN or constant)",
                        file=self.mask_source,
                        remedy="mask",
                    )
                mask.flags.writeable = False
                self._mask = mask
            if self._mask is None:
                # a cached run keeps the mask it computed the first time (checked there)
                memo, rule = self._mask_memo, mask_rule()
                kept = memo.load(rule) if memo is not None else None
                if kept is not None:
                    mask, fallback = kept
                else:
                    mask, fallback = summary_mask(self.summary())
                    if memo is not None:
                        memo.save(rule, mask, fallback)
                if fallback:
                    self.warnings.append(
                        f"{self.path}: no voxel is bright enough for an intensity mask; "
                        f"using every voxel that varies over time"
                    )
                mask.flags.writeable = False
                self._mask = mask
            return self._mask


# --------------------------------------------------------------------------- opening


def _run_shape(path: Path, img: Any) -> tuple[int, int, int, int]:
    shape = tuple(int(n) for n in img.shape)
    if any(n == 0 for n in shape):
        raise InputError(
            f"{path}: zero-length dimension in shape {shape} (dim field); the file is "
            f"empty or its header is wrong"
        )
    if len(shape) < 4:
        raise InputError(
            f"{path}: a {len(shape)}D image {shape} is not a run; a run needs 4 dimensions "
            f"(x, y, z, time), open it as the anatomy or a map instead"
        )
    if len(shape) > 4 and any(n != 1 for n in shape[4:]):
        raise InputError(
            f"{path}: a {len(shape)}D image {shape} is not a single run; give a 4D file "
            f"(x, y, z, time)"
        )
    x, y, z, t = shape[:4]
    if t < 2:
        raise InputError(f"{path}: the run has only {t} volume; a run needs at least 2")
    return x, y, z, t


def _is_compressed(path: Path) -> bool:
    with open(path, "rb") as f:
        magic = f.read(4)
    name = path.name.lower()
    return (
        magic[:2] == b"\x1f\x8b"
        or magic[:3] == b"BZh"
        or magic == b"\x28\xb5\x2f\xfd"
        or name.endswith((".gz", ".bz2", ".zst"))
    )


def _spatial_header(header: Any, shape: tuple[int, int, int]) -> Any:
    hdr = header.copy()
    hdr.set_data_shape(shape)
    hdr.set_data_dtype(np.float32)
    hdr.set_slope_inter(1.0, 0.0)
    hdr.set_xyzt_units(xyz=hdr.get_xyzt_units()[0])
    return hdr


def open_run(
    path: str | os.PathLike[str],
    tr: float | None = None,
    use_cache: bool = True,
    progress: Callable[[float], bool | None] | None = None,
    cache_dir: str | os.PathLike[str] | None = None,
    sidecars: Sequence[str | os.PathLike[str]] | None = None,
    notify: Callable[[str], None] | None = None,
    keep: Callable[[tuple[int, int, int], np.ndarray], np.ndarray] | None = None,
) -> Run:
    """Open a 4D NIfTI run for fast voxel access.

    Parameters
    ----------
    path : str or path-like
        ``.nii`` or ``.nii.gz``, NIfTI-1 or NIfTI-2. Never modified.
    tr : float, optional
        TR in seconds; overrides the sidecar and the header.
    use_cache : bool
        For a compressed run: build/use the voxel-major disk cache (default). With
        False the run is decompressed into memory instead.
    progress : callable, optional
        ``progress(fraction) -> bool | None`` during decompression; return False to
        cancel (:class:`voxelscope.core.errors.Cancelled`).
    cache_dir : path-like, optional
        Cache directory; default ``platformdirs.user_cache_dir("voxelscope")/runs``.
    sidecars : sequence of path-like, optional
        The JSON sidecars that apply to the run, farthest first and the run's own last
        (BIDS inheritance; :func:`voxelscope.core.companions.find_companions`). Default:
        the companions found for the run.
    notify : callable, optional
        Called with a line to show at once (a big cache announced before it is written);
        without it the line joins :attr:`Run.warnings`.
    keep : callable, optional
        ``keep(shape, affine)`` -> bool mask on the run's grid: voxels the cache of a
        compressed run must hold besides its own choice (a brain mask given from a file,
        applied later with :meth:`Run.set_mask`).

    Returns
    -------
    Run

    Raises
    ------
    InputError
        Missing, not NIfTI, corrupt or truncated, not 4D, zero-sized, unsupported voxel
        type, or no plausible TR. The one-line message names the file.
    voxelscope.core.errors.Cancelled
        The progress callback cancelled the first open.

    Examples
    --------
    >>> from nibabel.testing import data_path
    >>> run = open_run(Path(data_path) / "example4d.nii.gz", use_cache=False)
    >>> run.tr
    2.0
    >>> print(run.warnings[0])  # doctest: +ELLIPSIS
    /...example4d.nii.gz: the header TR (pixdim[4] = 2000, ...) ... as 2000 ms = 2 s ...
    """
    path = Path(path).expanduser()
    img = load_nifti(path, "run")
    header = img.header
    x, y, z, t = _run_shape(path, img)
    dtype = np.dtype(img.dataobj.dtype)
    _check_dtype(path, dtype)
    affine, affine_source = nifti_affine(header)
    _check_affine(path, affine, affine_source)
    notes: list[str] = []
    if affine_source == "pixdim":
        notes.append(
            f"{path}: neither sform_code nor qform_code is set; positions use the voxel "
            f"sizes only (orientation unknown)"
        )

    if sidecars is None:
        sidecars = find_companions(path).sidecars
    sidecar_list = tuple(Path(p) for p in sidecars)
    meta, origin = merge_sidecars(sidecar_list)
    sidecar = sidecar_list[-1] if sidecar_list else None
    slice_dim = header.get_dim_info()[2]
    n_slices = (x, y, z)[slice_dim if slice_dim is not None and slice_dim < 3 else 2]
    tr_s, tr_source, timing, tr_notes = resolve_tr(
        path, header, tr, sidecar, n_slices, meta=meta, origin=origin
    )
    notes.extend(tr_notes)
    reference_s, reference_source = sampling_reference(meta, origin, tr_s, timing)

    slope, inter = float(img.dataobj.slope), float(img.dataobj.inter)
    layout = RawLayout(
        path=path,
        offset=int(img.dataobj.offset),
        dtype=dtype,
        shape=(x, y, z, t),
        slope=slope,
        inter=inter,
        compressed=_is_compressed(path),
    )
    summary = None
    cache_path = None
    mask_memo = kept = None
    if not layout.compressed:
        needed = layout.offset + layout.volume_bytes * t
        size = path.stat().st_size
        if size < needed:
            raise InputError(
                f"{path}: the file is truncated ({size} bytes, the header needs {needed}); "
                f"re-copy or re-export it"
            )
        store: VoxelSource = MappedStore(layout)
        storage = "memmap"
        if progress is not None:
            progress(1.0)  # nothing to prepare: the file is mapped as it lies
    else:
        select, must_keep = cache_selection, cache_must_keep
        if keep is not None:
            extra = np.asarray(keep((x, y, z), np.array(affine, dtype=np.float64)), dtype=bool)

            def select(s: Summary) -> np.ndarray:
                return cache_selection(s) | extra

            def must_keep(s: Summary) -> np.ndarray:
                return cache_must_keep(s) | extra

        opened = _cache.open_store(
            layout,
            select,
            must_keep,
            use_cache=use_cache,
            cache_dir=cache_dir,
            progress=progress,
            notify=notify,
        )
        store, summary, mask_memo = opened.store, opened.summary, opened.mask_memo
        kept = opened.kept
        storage, cache_path = opened.storage, opened.cache_path
        notes.extend(opened.notes)

    affine = np.array(affine, dtype=np.float64)
    run = Run(
        path=path,
        shape=(x, y, z),
        n_volumes=t,
        affine=affine,
        tr=float(tr_s),
        tr_source=tr_source,
        slice_timing=timing,
        reference_time_s=float(reference_s),
        axcodes=tuple(nib.aff2axcodes(affine)),  # type: ignore[arg-type]
        voxel_size=tuple(float(v) for v in voxel_sizes(affine)),  # type: ignore[arg-type]
        warnings=notes,
        header=_spatial_header(header, (x, y, z)),
        storage=storage,
        affine_source=affine_source,
        sidecar=sidecar,
        cache_path=cache_path,
        sidecars=sidecar_list,
        reference_source=reference_source,
        _store=store,
        _summary=summary,
        _mask_memo=mask_memo,
        _kept=kept,
    )
    if summary is not None:
        run._note_summary()
    if isinstance(store, VoxelStore):
        store.notes = run.warnings  # later notes (a failed checksum, file reads) join them
    return run
