"""Opening a run with its companions, anatomy and map: plain functions, no Qt.

The window calls :func:`load_bundle` on a worker thread (see :mod:`voxelscope.gui.workers`);
screenshot mode and the tests call it directly. Everything that can go wrong becomes a
:class:`~voxelscope.core.errors.VoxelscopeError` with one line for the user.

Examples
--------
>>> from pathlib import Path
>>> from nibabel.testing import data_path
>>> b = load_bundle(Path(data_path) / "functional.nii")
>>> b.run.shape, b.analysis is None
((17, 21, 3), True)
"""

from __future__ import annotations

import os
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from voxelscope.core.errors import InputError
from voxelscope.core.images import coverage_note, grid_overlap, load_image, load_on_grid
from voxelscope.core.model import Analysis

__all__ = [
    "Layer",
    "RunBundle",
    "check_nifti_kind",
    "fine_grid",
    "load_backdrop",
    "load_bundle",
    "load_map",
]

#: The backdrop is resampled onto the run grid refined by up to this factor per axis.
MAX_BACKDROP_REFINE = 4


@dataclass(eq=False)
class Layer:
    """A 3D image to draw in Slices.

    Without ``affine``, ``data`` is on (a refinement by ``factor`` of) the run's grid and
    covers exactly the run's field of view (the mean image, maps). With ``affine``, ``data``
    is the image on its own grid at its own resolution (an anatomy), drawn with
    its own transform under the overlay.
    """

    path: Path | None
    data: np.ndarray
    factor: int = 1
    levels: tuple[float, float] = (0.0, 1.0)
    affine: np.ndarray | None = None

    def value_at(self, mm, voxel=None) -> float:
        """The layer's value at a world position (nearest voxel; NaN off its grid).

        >>> Layer(None, np.arange(8.0).reshape(2, 2, 2), affine=np.eye(4)).value_at((1, 0, 1))
        5.0
        """
        if self.affine is None:
            f = self.factor
            i, j, k = (int(v) * f + f // 2 for v in voxel)
            return float(self.data[i, j, k])
        p = np.append(np.asarray(mm, dtype=float).reshape(3), 1.0)
        ijk = np.floor((np.linalg.inv(self.affine) @ p)[:3] + 0.5).astype(int)
        if np.any(ijk < 0) or np.any(ijk >= np.asarray(self.data.shape)):
            return float("nan")
        return float(self.data[tuple(ijk)])


@dataclass(eq=False)
class RunBundle:
    """Everything the window needs from one open: run, model inputs and layers."""

    run: object
    analysis: Analysis | None
    events_path: Path | None
    confounds_path: Path | None
    backdrop: Layer
    file_layer: Layer | None = None
    warnings: list[str] = field(default_factory=list)
    inputs: object = None  # the core's loader.Inputs: companions used, mask, reference time
    atlas: object = None  # the core's atlas.Atlas (region names at the cursor), or None


def fine_grid(shape, affine: np.ndarray, factor: int) -> tuple[tuple[int, int, int], np.ndarray]:
    """A grid ``factor`` times finer than ``(shape, affine)`` over the same field of view.

    Voxel ``a`` of the fine grid has its centre at run voxel ``(a + 0.5) / factor - 0.5``.

    Examples
    --------
    >>> s, a = fine_grid((2, 2, 2), np.eye(4), 2)
    >>> s, float(a[0, 0]), float(a[0, 3])
    ((4, 4, 4), 0.5, -0.25)
    """
    f = int(factor)
    step = np.eye(4)
    step[:3, :3] /= f
    step[:3, 3] = (1.0 / f - 1.0) / 2.0
    return tuple(int(n) * f for n in shape[:3]), np.asarray(affine, float) @ step


def _levels(data: np.ndarray) -> tuple[float, float]:
    finite = data[np.isfinite(data)]
    if finite.size == 0:
        return 0.0, 1.0
    nonzero = finite[finite != 0]
    use = nonzero if nonzero.size > finite.size // 20 else finite
    lo, hi = np.percentile(use, [0.5, 99.5])
    lo = min(float(lo), 0.0) if float(finite.min()) >= 0 else float(lo)
    if hi <= lo:
        hi = lo + 1.0
    return float(lo), float(hi)


def load_backdrop(path: str | os.PathLike[str] | None, run, warnings: list[str]) -> Layer:
    """The run's mean image (on the run's grid), or an anatomical image on its own grid.

    The anatomical image is kept at its own resolution with its affine; Slices draws each
    plane of it with its own transform under the overlay (``Layer.affine``), so a 1 mm
    image over a 3.5 mm run shows its 1 mm detail. Non-finite voxels show as its lowest
    level.
    """
    if path is None:
        mean = np.array(run.mean_image(), dtype=np.float32)
        return Layer(None, mean, 1, _levels(mean))
    path = Path(path)
    img = load_image(path, what="anatomy")
    inside = grid_overlap(img.shape, img.affine, run.shape, run.affine)
    if not inside.any():
        raise InputError(
            f"{path}: its grid does not overlap the run {run.path} at all; check that both "
            "are in the same space (affines)"
        )
    note = coverage_note(path, inside, run.mask(), "the run")
    if note is not None:
        warnings.append(note)
    levels = _levels(img.data)
    data = np.where(np.isfinite(img.data), img.data, levels[0]).astype(np.float32)
    return Layer(path, data, 1, levels, affine=np.asarray(img.affine, dtype=np.float64))


def load_map(path: str | os.PathLike[str], run, warnings: list[str]) -> Layer:
    """A map file resampled onto the run grid (trilinear; NaN where it has no data)."""
    path = Path(path)
    data = load_on_grid(path, run, order=1, warnings=warnings)
    finite = np.abs(data[np.isfinite(data)])
    top = float(finite.max()) if finite.size else 1.0
    top = top if top > 0 else 1.0
    return Layer(path, data.astype(np.float32), 1, (-top, top))


def load_bundle(
    run_path: str | os.PathLike[str],
    events: str | os.PathLike[str] | None = None,
    confounds: str | os.PathLike[str] | None = None,
    anatomy: str | os.PathLike[str] | None = None,
    map_file: str | os.PathLike[str] | None = None,
    tr: float | None = None,
    progress: Callable[[float], bool | None] | None = None,
    mask: str | os.PathLike[str] | None = None,
    bids_root: str | os.PathLike[str] | None = None,
    no_events: bool = False,
    no_confounds: bool = False,
    atlas: str | os.PathLike[str] | None = None,
    atlas_labels: str | os.PathLike[str] | None = None,
) -> RunBundle:
    """Open a run, its events and confounds (found by BIDS names when not given) and layers.

    The run and its companions come through the core's one way in,
    :func:`voxelscope.core.loader.load_inputs`, as on the command line.

    Parameters
    ----------
    run_path : path
        4D ``.nii`` / ``.nii.gz``.
    events, confounds : path, optional
        Default: the BIDS companions beside the run (``find_companions``).
    anatomy : path, optional
        Anatomy; default the run's mean image.
    map_file : path, optional
        A map file, shown over the slices.
    tr : float, optional
        Overrides the sidecar and header TR.
    mask : path or "auto", optional
        Brain mask; default the run's ``desc-brain_mask`` when found, else the intensity
        rule.
    bids_root : path, optional
        The raw dataset a derivative run comes from.
    no_events, no_confounds : bool
        Open without events / confounds and look for none beside the run (a session
        entry that was refused must not be replaced by a companion).
    atlas, atlas_labels : path, optional
        A segmentation image (BIDS dseg) and its label table: region names at the cursor.
    progress : callable, optional
        ``progress(fraction) -> bool | None``; False cancels.

    Returns
    -------
    RunBundle
        ``analysis`` is None when no events file was given or found.

    Raises
    ------
    VoxelscopeError
        One line naming the file and what to do.
    """
    from voxelscope.core.loader import InputRequest, load_inputs

    request = InputRequest(
        run=Path(run_path),
        events=events,
        confounds=confounds,
        tr=tr,
        mask=mask,
        bids_root=bids_root,
        events_required=False,
        no_events=no_events,
        no_confounds=no_confounds,
        atlas=atlas,
        atlas_labels=atlas_labels,
        confound_columns="none",  # the window starts with no confound column (START_SETTINGS)
    )
    got = load_inputs(request, progress=progress)
    warnings = list(got.warnings)
    backdrop = load_backdrop(anatomy, got.run, warnings)
    layer = load_map(map_file, got.run, warnings) if map_file is not None else None
    return RunBundle(
        got.run,
        got.analysis,
        got.events_path if got.analysis is not None else None,
        got.confounds_path if got.analysis is not None else None,
        backdrop,
        layer,
        warnings,
        got,
        got.atlas,
    )


def check_nifti_kind(path: str | os.PathLike[str]) -> int:
    """Number of dimensions with more than one element-ish: 4 for a run, 3 for an image.

    Raises InputError when the file cannot be read as NIfTI.
    """
    from voxelscope.core.images import load_nifti

    img = load_nifti(path, "image")
    shape = [int(n) for n in img.shape]
    while len(shape) > 3 and shape[-1] == 1:
        shape = shape[:-1]
    if len(shape) not in (3, 4):
        raise InputError(f"{path}: a {len(shape)}D image is neither a run (4D) nor a map (3D)")
    return len(shape)
