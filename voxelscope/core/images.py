"""Single 3D images (anatomies, maps) and their resampling onto a run.

An image on any grid and in any orientation is brought into the run's display grid through
the two affines: for every voxel centre of the target grid we find its world position (mm),
then the matching (fractional) voxel of the source image, and sample the source there with
:func:`scipy.ndimage.map_coordinates` (``order=0`` nearest neighbour for labels,
``order=1`` trilinear for intensities). Target voxels that fall outside the source grid
are NaN.

The affine of a NIfTI file follows the NIfTI-1 rule (see :func:`nifti_affine`).

Examples
--------
>>> import numpy as np
>>> data = np.arange(8, dtype=np.float32).reshape(2, 2, 2)
>>> same = resample_to_grid(data, np.eye(4), (2, 2, 2), np.eye(4))
>>> bool(np.array_equal(same, data))
True
"""

from __future__ import annotations

import gzip
import os
import warnings as _warnings
import zlib
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np

from voxelscope.core.errors import InputError

__all__ = [
    "GZIP_MAGIC",
    "Image3D",
    "check_signature",
    "coverage_note",
    "grid_overlap",
    "load_image",
    "load_nifti",
    "load_on_grid",
    "nifti_affine",
    "resample_to_grid",
]

#: Fraction of the run's brain-mask voxels a map must cover before we stay quiet.
MIN_COVERAGE = 0.9

# Target voxels handled per map_coordinates call (bounds the coordinate arrays to ~100 MB).
_RESAMPLE_BLOCK = 4_000_000

_READ_ERRORS = (OSError, EOFError, ValueError, zlib.error, gzip.BadGzipFile, MemoryError)


@dataclass(eq=False)
class Image3D:
    """A single 3D image in world space.

    Attributes
    ----------
    path : Path
        The file it was read from.
    data : ndarray
        float32, shape (X, Y, Z), scaled values (slope and intercept applied).
    affine : ndarray
        4x4 voxel -> mm matrix (NIfTI-1 rule for NIfTI files).
    axcodes : tuple of str
        Orientation codes of the affine, e.g. ``("L", "A", "S")``.
    """

    path: Path
    data: np.ndarray
    affine: np.ndarray
    axcodes: tuple[str, str, str]

    @property
    def shape(self) -> tuple[int, int, int]:
        """Grid shape (X, Y, Z)."""
        return tuple(int(n) for n in self.data.shape)  # type: ignore[return-value]


def nifti_affine(header: Any) -> tuple[np.ndarray, str]:
    """Voxel -> mm affine of a NIfTI header by the NIfTI-1 rule.

    The NIfTI-1 standard (nifti1.h, "3 different methods") orders the sources as:
    the sform matrix when ``sform_code > 0``; else the quaternion qform when
    ``qform_code > 0``; else (method 1, "old" Analyze compatibility) only the voxel
    sizes: ``x = pixdim[1] * i``, ``y = pixdim[2] * j``, ``z = pixdim[3] * k``, with no
    orientation and no offset.

    Parameters
    ----------
    header : nibabel.Nifti1Header or nibabel.Nifti2Header

    Returns
    -------
    affine : ndarray
        4x4 float64.
    source : str
        ``"sform"``, ``"qform"`` or ``"pixdim"``.

    Examples
    --------
    >>> h = nib.Nifti1Header()
    >>> h.set_data_shape((2, 2, 2))
    >>> h.set_zooms((2.0, 3.0, 4.0))
    >>> h.set_sform(np.diag([5.0, 5.0, 5.0, 1.0]), code=0)
    >>> h.set_qform(np.diag([2.0, 3.0, 4.0, 1.0]), code=0)
    >>> nifti_affine(h)[1]
    'pixdim'
    """
    if int(header["sform_code"]) > 0:
        return np.asarray(header.get_sform(), dtype=np.float64), "sform"
    if int(header["qform_code"]) > 0:
        return np.asarray(header.get_qform(), dtype=np.float64), "qform"
    pixdim = np.asarray(header["pixdim"], dtype=np.float64)[1:4]
    return np.diag([*pixdim.tolist(), 1.0]), "pixdim"


def load_nifti(path: str | os.PathLike[str], what: str = "image") -> Any:
    """Open a NIfTI-1 or NIfTI-2 single file (``.nii`` / ``.nii.gz``) with nibabel.

    Only the header is read; voxel data stay on disk. Every failure becomes an
    :class:`InputError` whose one line names the file and what to do.

    Parameters
    ----------
    path : str or path-like
    what : str
        Word used in messages (``"run"``, ``"image"``, ``"map"``).

    Returns
    -------
    nibabel.Nifti1Image or nibabel.Nifti2Image
    """
    from voxelscope.core.headercheck import check_nifti_header
    from voxelscope.core.outputs import note_input

    path = Path(path).expanduser()
    if not path.exists():
        raise InputError(f"{path}: file not found; check the {what} path")
    if not path.is_file():
        raise InputError(f"{path}: not a file; give the path of a .nii or .nii.gz {what}")
    if not os.access(path, os.R_OK):
        raise InputError(
            f"{path}: the {what} file is unreadable (permission denied); check its permissions"
        )
    note_input(path)  # from here on, no output of this command may replace it
    check_signature(path, what)
    check_nifti_header(path, what)
    try:
        # nibabel logs header repairs; the user gets our one line instead
        with nib.imageglobals.LoggingOutputSuppressor():
            img = nib.load(str(path), mmap=False)
    except nib.spatialimages.HeaderDataError as err:
        raise InputError(
            f"{path}: the NIfTI header is invalid ({_one_line(err)}); re-export the {what}"
        ) from None
    except PermissionError:
        raise InputError(
            f"{path}: the {what} file is unreadable (permission denied); check its permissions"
        ) from None
    except nib.filebasedimages.ImageFileError:
        raise InputError(
            f"{path}: not a NIfTI image (the name must end in .nii or .nii.gz and the file "
            f"start with a NIfTI header); give the {what} as a .nii or .nii.gz file"
        ) from None
    except _READ_ERRORS as err:
        raise InputError(
            f"{path}: cannot read the NIfTI header ({_one_line(err)}); the file may be "
            f"truncated or corrupt, re-copy or re-export it"
        ) from None
    if not isinstance(img, nib.Nifti1Image):  # Nifti2Image is a subclass
        raise InputError(
            f"{path}: a {type(img).__name__} is not a single-file NIfTI; "
            f"convert the {what} to .nii or .nii.gz"
        )
    return img


#: The first two bytes of every gzip stream (RFC 1952, section 2.3.1).
GZIP_MAGIC = b"\x1f\x8b"


def _looks_like(head: bytes) -> str:
    """A few words on what a file's first bytes look like, for an error message."""
    from voxelscope.core.inputs import excerpt

    if not head:
        return "the file is empty"
    sizes = {int.from_bytes(head[:4], "little"), int.from_bytes(head[:4], "big")}
    if len(head) >= 4 and sizes & {348, 540}:  # sizeof_hdr of NIfTI-1 / NIfTI-2
        return "it holds an uncompressed NIfTI header"
    if b"\x00" not in head:
        try:
            text = head.decode("utf-8")
        except UnicodeDecodeError:
            text = None
        if text is not None:
            first = text.strip().splitlines()[0] if text.strip() else ""
            return f"it is a text file starting '{excerpt(first, 24)}'"
    return "it starts with the bytes " + " ".join(f"{b:02x}" for b in head[:4])


def check_signature(path: str | os.PathLike[str], what: str = "image") -> None:
    """Refuse a file whose first bytes contradict its name, with one line saying why.

    A name ending in ``.gz`` promises a gzip stream, which starts with the bytes
    ``1f 8b`` (RFC 1952); a name ending in ``.nii`` promises an uncompressed NIfTI file.
    Checking the signature first gives "not a gzip-compressed NIfTI image" instead of a
    library's message about gzip internals.

    Examples
    --------
    >>> import tempfile
    >>> p = Path(tempfile.mkdtemp()) / "notes_bold.nii.gz"
    >>> _ = p.write_text("onset,duration")
    >>> check_signature(p, "run")  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    voxelscope.core.errors.InputError: ...: not a gzip-compressed NIfTI image (it is a text file ...
    """
    path = Path(path)
    try:
        with open(path, "rb") as fh:
            head = fh.read(512)
    except OSError:
        return  # the reader says what is wrong with the file itself
    name = path.name.lower()
    gz = head[:2] == GZIP_MAGIC
    if name.endswith(".gz") and not gz:
        found = _looks_like(head)
        fix = (
            "rename it to end in .nii"
            if found.endswith("NIfTI header")
            else f"give the {what} as a .nii or .nii.gz image"
        )
        raise InputError(f"{path}: not a gzip-compressed NIfTI image ({found}); {fix}")
    if name.endswith(".nii") and gz:
        raise InputError(
            f"{path}: the file is gzip-compressed but its name ends in .nii; rename it to "
            "end in .nii.gz"
        )


def _one_line(err: BaseException) -> str:
    text = " ".join(str(err).split()) or type(err).__name__
    return text[:200]


def _check_dtype(path: Path, dtype: np.dtype) -> None:
    if dtype.fields is not None or dtype.kind not in "iuf":
        raise InputError(
            f"{path}: voxel type {dtype} (datatype field) is not supported; "
            f"save the image as integers or floats"
        )


def _check_affine(path: Path, affine: np.ndarray, source: str) -> None:
    lin = affine[:3, :3]
    if not np.all(np.isfinite(affine)) or abs(np.linalg.det(lin)) < 1e-12:
        raise InputError(
            f"{path}: the voxel-to-mm affine ({source}) is singular or not finite; "
            f"fix the header's sform/qform or pixdim"
        )


def load_image(path: str | os.PathLike[str], what: str = "image") -> Image3D:
    """Read a 3D image (or a 4D image with a single volume) as float32.

    Parameters
    ----------
    path : str or path-like
        ``.nii`` or ``.nii.gz`` (NIfTI-1 or NIfTI-2).
    what : str
        Word used in messages (``"image"``, ``"anatomy"``, ``"atlas"``, ``"mask"``).

    Returns
    -------
    Image3D
        Scaled data (``scl_slope``/``scl_inter`` applied), NIfTI-1 affine, axis codes.

    Raises
    ------
    InputError
        Not NIfTI, corrupt, not 3D, zero-sized, unsupported voxel type.

    Examples
    --------
    >>> from nibabel.testing import data_path
    >>> img = load_image(Path(data_path) / "anatomical.nii")
    >>> img.shape, img.axcodes
    ((33, 41, 25), ('L', 'A', 'S'))
    """
    path = Path(path)
    img = load_nifti(path, what)
    shape = tuple(int(n) for n in img.shape)
    if any(n == 0 for n in shape):
        raise InputError(f"{path}: zero-length dimension in shape {shape} (dim field)")
    while len(shape) > 3 and shape[-1] == 1:
        shape = shape[:-1]
    if len(shape) != 3:
        raise InputError(
            f"{path}: a {len(shape)}D image with shape {tuple(img.shape)} is not a single 3D "
            f"volume; give one volume (for a run, open it as the run)"
        )
    _check_dtype(path, img.header.get_data_dtype())
    affine, source = nifti_affine(img.header)
    _check_affine(path, affine, source)
    try:
        data = np.asanyarray(img.dataobj)
    except _READ_ERRORS as err:
        raise InputError(
            f"{path}: cannot read the voxel data ({_one_line(err)}); the file is truncated "
            f"or corrupt, re-copy or re-export it"
        ) from None
    data = np.asarray(data, dtype=np.float32).reshape(shape)
    return Image3D(
        path=path,
        data=data,
        affine=affine,
        axcodes=tuple(nib.aff2axcodes(affine)),  # type: ignore[arg-type]
    )


def _grid_transform(affine: np.ndarray, target_affine: np.ndarray) -> np.ndarray:
    """Matrix taking target voxel indices to source voxel indices."""
    return np.linalg.inv(np.asarray(affine, np.float64)) @ np.asarray(target_affine, np.float64)


def _source_coords(m: np.ndarray, target_shape: Sequence[int], start: int, stop: int):
    """Source voxel coordinates (3, n) of flat target voxels start..stop (C order)."""
    flat = np.arange(start, stop, dtype=np.int64)
    ijk = np.stack(np.unravel_index(flat, tuple(target_shape))).astype(np.float64)
    return m[:3, :3] @ ijk + m[:3, 3:4]


def _inside(coords: np.ndarray, shape: Sequence[int]) -> np.ndarray:
    """True where a source coordinate lies within the voxels (centre +- half a voxel)."""
    ok = np.ones(coords.shape[1], dtype=bool)
    for axis, n in enumerate(shape):
        c = coords[axis]
        ok &= (c >= -0.5) & (c < n - 0.5)
    return ok


def resample_to_grid(
    data: np.ndarray,
    affine: np.ndarray,
    target_shape: Sequence[int],
    target_affine: np.ndarray,
    order: int = 1,
) -> np.ndarray:
    """Resample a 3D array into another grid through the two voxel -> mm affines.

    Each target voxel centre is mapped to world space with ``target_affine`` and back
    into the source grid with ``inv(affine)``; the source is sampled there with
    :func:`scipy.ndimage.map_coordinates`. A target voxel whose centre falls outside
    the source voxels (beyond half a voxel past the outer centres) is NaN. Near the
    border, linear interpolation uses the nearest edge value rather than a fill value,
    so the outer half voxel is kept. NaN in the source spreads to the neighbours that
    interpolate from it.

    Parameters
    ----------
    data : ndarray
        Source values, shape (X, Y, Z).
    affine : ndarray
        4x4 source voxel -> mm.
    target_shape : sequence of 3 int
    target_affine : ndarray
        4x4 target voxel -> mm.
    order : {0, 1}
        0 nearest neighbour (labels, masks), 1 trilinear (intensities, statistics).

    Returns
    -------
    ndarray
        float32, shape ``target_shape``, NaN outside the source grid.

    Examples
    --------
    >>> src = np.arange(4, dtype=np.float32).reshape(4, 1, 1)
    >>> # target voxel size 0.5 mm along x, starting at the first source centre
    >>> tgt_aff = np.diag([0.5, 1.0, 1.0, 1.0])
    >>> resample_to_grid(src, np.eye(4), (3, 1, 1), tgt_aff).ravel().tolist()
    [0.0, 0.5, 1.0]
    """
    if order not in (0, 1):
        raise ValueError("order must be 0 (nearest) or 1 (linear)")
    data = np.asarray(data)
    if data.ndim != 3:
        raise ValueError(f"data must be 3D, got shape {data.shape}")
    target_shape = tuple(int(n) for n in target_shape)
    m = _grid_transform(affine, target_affine)
    if data.shape == target_shape and np.allclose(m, np.eye(4), atol=1e-6):
        return np.array(data, dtype=np.float32, copy=True)
    from scipy import ndimage  # here, not at start-up (about 0.25 s)

    src = np.asarray(data, dtype=np.float32 if data.dtype.itemsize <= 4 else np.float64)
    n_target = int(np.prod(target_shape))
    out = np.empty(n_target, dtype=np.float32)
    for start in range(0, n_target, _RESAMPLE_BLOCK):
        stop = min(n_target, start + _RESAMPLE_BLOCK)
        coords = _source_coords(m, target_shape, start, stop)
        inside = _inside(coords, data.shape)
        vals = np.full(stop - start, np.nan, dtype=np.float32)
        if inside.any():
            vals[inside] = ndimage.map_coordinates(
                src, coords[:, inside], order=order, mode="nearest", prefilter=False
            )
        out[start:stop] = vals
    return out.reshape(target_shape)


def coverage_note(
    source: Any, inside: np.ndarray, mask: np.ndarray | None, name: str
) -> str | None:
    """The warning for an image that covers too little of a target grid, or None.

    ``inside`` marks the target voxels the image covers (:func:`grid_overlap`); the share
    is taken over ``mask`` (all voxels when it is None or empty) and must reach
    :data:`MIN_COVERAGE`.

    >>> inside = np.zeros((4, 1, 1), bool); inside[0] = True
    >>> coverage_note("half.nii", inside, None, "the run")
    'half.nii covers only 25% of the run; the rest is shown as empty'
    """
    region = mask if mask is not None and np.any(mask) else np.ones(inside.shape, dtype=bool)
    fraction = float(np.count_nonzero(inside & region)) / float(np.count_nonzero(region))
    if fraction >= MIN_COVERAGE:
        return None
    where = f"the brain mask of {name}" if mask is not None else name
    return f"{source} covers only {100 * fraction:.0f}% of {where}; the rest is shown as empty"


def grid_overlap(
    shape: Sequence[int],
    affine: np.ndarray,
    target_shape: Sequence[int],
    target_affine: np.ndarray,
) -> np.ndarray:
    """Boolean target-grid array: True where a target voxel centre lies in the source grid.

    Examples
    --------
    >>> grid_overlap((2, 2, 2), np.eye(4), (4, 1, 1), np.eye(4)).ravel().tolist()
    [True, True, False, False]
    """
    target_shape = tuple(int(n) for n in target_shape)
    m = _grid_transform(affine, target_affine)
    n_target = int(np.prod(target_shape))
    out = np.empty(n_target, dtype=bool)
    for start in range(0, n_target, _RESAMPLE_BLOCK):
        stop = min(n_target, start + _RESAMPLE_BLOCK)
        out[start:stop] = _inside(_source_coords(m, target_shape, start, stop), shape)
    return out.reshape(target_shape)


def _target_of(run_or_shape_affine: Any) -> tuple[tuple[int, int, int], np.ndarray, Any, str]:
    """(shape, affine, mask or None, name) from a Run or a (shape, affine) pair."""
    if hasattr(run_or_shape_affine, "shape") and hasattr(run_or_shape_affine, "affine"):
        run = run_or_shape_affine
        mask = run.mask() if callable(getattr(run, "mask", None)) else None
        name = str(getattr(run, "path", "the run"))
        return tuple(int(n) for n in run.shape[:3]), np.asarray(run.affine), mask, name
    shape, affine = run_or_shape_affine
    return tuple(int(n) for n in shape), np.asarray(affine), None, "the target grid"


def load_on_grid(
    path: str | os.PathLike[str],
    run_or_shape_affine: Any,
    order: int = 1,
    warnings: list[str] | None = None,
) -> np.ndarray:
    """Load a 3D image and resample it into a run's grid (or any ``(shape, affine)``).

    Parameters
    ----------
    path : str or path-like
        The map or anatomy (``.nii`` / ``.nii.gz``).
    run_or_shape_affine : Run or (shape, affine)
        The target grid. With a :class:`~voxelscope.core.run.Run`, coverage is measured on
        its brain mask; with a pair, on the whole grid.
    order : {0, 1}
        0 nearest neighbour for labels, 1 linear for intensities and statistics.
    warnings : list of str, optional
        Messages are appended here; without a list they are issued as ``UserWarning``.

    Returns
    -------
    ndarray
        float32 in the target shape, NaN where the image has no data.

    Raises
    ------
    InputError
        Unreadable image, or its grid does not overlap the target grid at all.

    Notes
    -----
    A warning is given when the image covers less than :data:`MIN_COVERAGE` (90 %) of the
    target's mask voxels (or of all target voxels when no mask is known).

    Examples
    --------
    >>> from nibabel.testing import data_path
    >>> from voxelscope.core.run import open_run
    >>> run = open_run(Path(data_path) / "functional.nii")
    >>> t1 = load_on_grid(Path(data_path) / "anatomical.nii", run)
    >>> t1.shape
    (17, 21, 3)
    """
    img = load_image(path)
    shape, affine, mask, name = _target_of(run_or_shape_affine)
    inside = grid_overlap(img.shape, img.affine, shape, affine)
    if not inside.any():
        raise InputError(
            f"{img.path}: its grid {'x'.join(map(str, img.shape))} does not overlap "
            f"{name} ({'x'.join(map(str, shape))}) at all; check that both are in the "
            f"same space (affines)"
        )
    out = resample_to_grid(img.data, img.affine, shape, affine, order=order)
    msg = coverage_note(img.path, inside, mask, name)
    if msg is not None:
        if warnings is not None:
            warnings.append(msg)
        else:
            _warnings.warn(msg, UserWarning, stacklevel=2)
    return out
