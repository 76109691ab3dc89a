"""Write 3D maps as NIfTI files on a run's grid, atomically.

A map is written as float32 with the run's affine (sform and qform, with the codes of the
run's header) and the run's spatial header fields (voxel sizes, units, orientation codes).
The file is first written under a temporary name in the destination folder and then moved
over the final name with :func:`os.replace`: a reader never sees half a file, and an
interrupted write leaves the old file (or nothing) behind. A path that resolves to one of
the inputs (the run, a mask, ...) is always refused, with or without ``force``.

Examples
--------
>>> import tempfile
>>> from pathlib import Path
>>> out = Path(tempfile.mkdtemp()) / "t.nii.gz"
>>> data = np.zeros((2, 3, 4), dtype=np.float32)
>>> _ = write_map(out, data, affine=np.diag([2.0, 2.0, 3.0, 1.0]))
>>> img = nib.load(out)
>>> img.shape, img.get_data_dtype().name, float(img.affine[2, 2])
((2, 3, 4), 'float32', 3.0)
"""

from __future__ import annotations

import gzip
import os
from collections.abc import Iterable
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np

from .atomic import write_bytes
from .errors import InputError
from .outputs import guard_output

__all__ = ["check_output_path", "write_map"]


def check_output_path(
    path: str | os.PathLike[str],
    inputs: Iterable[str | os.PathLike[str] | None] = (),
    force: bool = False,
) -> Path:
    """Check that a map can be written to ``path``; returns it as a Path.

    Parameters
    ----------
    path : path-like
        Must end in ``.nii`` or ``.nii.gz``; its folder must exist.
    inputs : iterable of path-like
        Files that must never be overwritten (None entries are skipped).
    force : bool
        Allow replacing an existing file (never an input).

    Raises
    ------
    InputError
        Wrong suffix, missing folder, the path is an input, or it exists without ``force``.

    Examples
    --------
    >>> check_output_path("/tmp/a.txt")  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    voxelscope.core.errors.InputError: /tmp/a.txt: a map is written as NIfTI; name the ...
    """
    out = Path(path).expanduser()
    name = out.name.lower()
    if not (name.endswith(".nii") or name.endswith(".nii.gz")):
        raise InputError(f"{out}: a map is written as NIfTI; name the output .nii or .nii.gz")
    if out.is_dir():
        raise InputError(f"{out} is a folder; give a file name for the map")
    if not out.parent.is_dir():
        raise InputError(f"{out}: the folder {out.parent} does not exist; create it first")
    return guard_output(out, inputs, force=force)


def _header_for(data: np.ndarray, affine: np.ndarray, header: Any | None) -> nib.Nifti1Header:
    if header is not None:
        hdr = header.copy()
        if not isinstance(hdr, nib.Nifti1Header):  # pragma: no cover - defensive
            hdr = nib.Nifti1Header.from_header(hdr)
    else:
        hdr = nib.Nifti1Header()
    hdr.set_data_shape(data.shape)
    hdr.set_data_dtype(data.dtype if data.dtype == np.float64 else np.float32)
    hdr.set_slope_inter(1.0, 0.0)
    sform_code = int(hdr["sform_code"]) or 1
    qform_code = int(hdr["qform_code"]) or 1
    hdr.set_sform(affine, code=sform_code)
    hdr.set_qform(affine, code=qform_code)
    hdr["cal_min"] = 0.0
    hdr["cal_max"] = 0.0
    hdr["intent_code"] = 0
    return hdr


def write_map(
    path: str | os.PathLike[str],
    data: np.ndarray,
    run: Any | None = None,
    affine: np.ndarray | None = None,
    header: Any | None = None,
    inputs: Iterable[str | os.PathLike[str] | None] = (),
    force: bool = True,
    description: str | None = None,
    notes: list[str] | None = None,
) -> Path:
    """Write a 3D map as float32 NIfTI, atomically; returns the path written.

    The map never holds an infinity: values too large for float32 (above about 3.4e38, for
    example the variance of a run stored in huge units) make the whole map float64 instead,
    with a line in ``notes``; infinities in ``data`` are refused.

    Parameters
    ----------
    path : path-like
        ``.nii`` or ``.nii.gz`` (compressed by the suffix).
    data : ndarray, 3D
        Converted to float32.
    run : Run, optional
        Gives the affine, the spatial header and an input that must not be overwritten.
    affine, header : optional
        Used when there is no run (``affine`` overrides the run's).
    inputs : iterable of path-like
        Further files that must never be overwritten.
    force : bool
        Replace an existing output (default True; front ends pass their ``--force``).
    description : str, optional
        Stored in the header's ``descrip`` field (at most 79 characters).
    notes : list of str, optional
        Receives a line when the map had to be written as float64.

    Raises
    ------
    InputError
        Bad output path (see :func:`check_output_path`), a shape that does not match the
        run, or a failed write (the message names the file).
    """
    arr = np.asarray(data)
    if arr.ndim != 3:
        raise InputError(f"{path}: a map must be 3D, not shape {arr.shape}")
    ins = list(inputs)
    if run is not None:
        ins.append(getattr(run, "path", None))
        if tuple(run.shape) != arr.shape:
            raise InputError(
                f"{path}: the map has shape {arr.shape} but the run grid is {tuple(run.shape)}"
            )
        if affine is None:
            affine = run.affine
        if header is None:
            header = getattr(run, "header", None)
    if affine is None:
        affine = np.eye(4)
    affine = np.asarray(affine, dtype=np.float64)
    out = check_output_path(path, ins, force=force)
    arr = np.asarray(arr, dtype=np.float64)
    if np.isinf(arr).any():
        raise InputError(
            f"{out}: the map holds infinite values; this is a bug in the statistic, please "
            "report it (nothing was written)"
        )
    f32_max = float(np.finfo(np.float32).max)
    finite = arr[np.isfinite(arr)]
    if finite.size and float(np.abs(finite).max()) > f32_max:
        if notes is not None:
            notes.append(
                f"{out}: values reach {float(np.abs(finite).max()):.3g}, beyond the float32 "
                "range; the map is written as float64 so no value becomes infinite"
            )
    else:
        arr = arr.astype(np.float32)
    hdr = _header_for(arr, affine, header)
    if description is not None:
        hdr["descrip"] = description.encode("ascii", "replace")[:79]
    img = nib.Nifti1Image(arr, affine, header=hdr)
    img.set_sform(affine, code=int(hdr["sform_code"]))
    img.set_qform(affine, code=int(hdr["qform_code"]))
    # The map is small: build the file in memory and write it through the project's one
    # atomic writer (temporary file beside the output, then os.replace).
    data = img.to_bytes()
    if out.name.lower().endswith(".gz"):
        data = gzip.compress(data, compresslevel=6, mtime=0)
    write_bytes(out, data, force=force, inputs=ins)
    return out
