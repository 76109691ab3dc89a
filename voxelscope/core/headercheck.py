"""Checks of a NIfTI file's raw header before any library interprets it.

A damaged or hostile header (negative dimensions, ``dim[0]`` outside 1..7, a NaN scaling
intercept, a data offset inside the header or far beyond the end of the file, an unknown
data type) is refused here with one line that names the file, the header field and its
value, instead of failing somewhere deep in a reader. The field layout is the one the
NIfTI-1 and NIfTI-2 standards define (NIfTI Data Format Working Group); the byte offsets
below are those of the standards' header structs.

Examples
--------
>>> import tempfile, nibabel as nib, numpy as np
>>> from pathlib import Path
>>> p = Path(tempfile.mkdtemp()) / "x.nii"
>>> nib.save(nib.Nifti1Image(np.zeros((2, 2, 2, 3), np.float32), np.eye(4)), p)
>>> check_nifti_header(p, "run")
>>> b = bytearray(p.read_bytes()); b[40:42] = (9).to_bytes(2, "little")
>>> _ = p.write_bytes(bytes(b))
>>> check_nifti_header(p, "run")
Traceback (most recent call last):
...
voxelscope.core.errors.InputError: ...x.nii: header field dim[0] is 9; it must be 1 to 7 ...
"""

from __future__ import annotations

import bz2
import gzip
import math
import os
import struct
import zlib
from pathlib import Path

from .errors import InputError

__all__ = ["MAX_VOXELS", "check_nifti_header"]

#: NIfTI data type codes (the standards' DT_* table) that a reader may meet.
_DATATYPES = {2, 4, 8, 16, 32, 64, 128, 256, 512, 768, 1024, 1280, 1536, 1792, 2048, 2304}
#: More elements than this (about 1.1e12) is not an fMRI run or image.
MAX_VOXELS = 2**40
#: gzip cannot compress by more than about 1032:1, so a data offset beyond this many times
#: the compressed size cannot lie inside the file.
_GZIP_MAX_RATIO = 1100


def _head_bytes(path: Path, n: int = 544) -> tuple[bytes, bool]:
    with open(path, "rb") as fh:
        magic = fh.read(3)
    compressed = magic[:2] == b"\x1f\x8b" or magic == b"BZh"
    if magic[:2] == b"\x1f\x8b":
        with gzip.open(path, "rb") as g:
            return g.read(n), True
    if magic == b"BZh":
        with bz2.open(path, "rb") as b:
            return b.read(n), True
    with open(path, "rb") as fh:
        return fh.read(n), compressed


def _fail(path: Path, field: str, problem: str, fix: str = "re-export the file") -> InputError:
    return InputError(f"{path}: header field {field} {problem}; {fix}")


def check_nifti_header(path: str | os.PathLike[str], what: str = "image") -> None:
    """Raise :class:`InputError` for a NIfTI header that no reader should trust.

    Files that are not NIfTI at all (another magic, a short file) pass: the reader then
    says "not a NIfTI image". Unreadable files raise one line saying so.
    """
    p = Path(path)
    try:
        head, compressed = _head_bytes(p)
    except PermissionError:
        raise InputError(
            f"{p}: the {what} file is unreadable (permission denied); check its permissions"
        ) from None
    except (OSError, EOFError, zlib.error) as err:
        raise InputError(
            f"{p}: cannot read the {what} file ({getattr(err, 'strerror', None) or err}); "
            "it may be truncated or corrupt, re-copy or re-export it"
        ) from None
    if len(head) < 348:
        return
    for endian in ("<", ">"):
        size = struct.unpack_from(endian + "i", head, 0)[0]
        if size in (348, 540):
            break
    else:
        return  # not NIfTI: the reader says so
    if size == 540:
        if len(head) < 540:
            return
        dims = struct.unpack_from(endian + "8q", head, 16)
        datatype = struct.unpack_from(endian + "h", head, 12)[0]
        vox_offset = float(struct.unpack_from(endian + "q", head, 168)[0])
        slope, inter = struct.unpack_from(endian + "2d", head, 176)
        minimum_offset = 544
    else:
        dims = struct.unpack_from(endian + "8h", head, 40)
        datatype = struct.unpack_from(endian + "h", head, 70)[0]
        vox_offset = struct.unpack_from(endian + "f", head, 108)[0]
        slope, inter = struct.unpack_from(endian + "2f", head, 112)
        minimum_offset = 352
    single_file = head[344:348] in (b"n+1\x00",) or head[4:8] == b"n+2\x00"
    ndim = dims[0]
    if not 1 <= ndim <= 7:
        raise _fail(p, "dim[0]", f"is {ndim}; it must be 1 to 7 (the number of dimensions)")
    n_elements = 1
    for k in range(1, ndim + 1):
        if dims[k] == 0:
            raise _fail(
                p,
                f"dim[{k}]",
                "is 0, a zero-length dimension",
                "the file is empty or its header is wrong",
            )
        if dims[k] < 0:
            raise _fail(p, f"dim[{k}]", f"is {dims[k]}; every dimension must be at least 1")
        n_elements *= int(dims[k])
    if n_elements > MAX_VOXELS:
        raise _fail(
            p, "dim", f"gives {n_elements:.3g} voxel values, far more than any {what} holds"
        )
    if datatype not in _DATATYPES:
        raise _fail(p, "datatype", f"is {datatype}, which is not a NIfTI data type code")
    if not math.isfinite(vox_offset):
        raise _fail(p, "vox_offset", f"is {vox_offset}; it must be a finite byte offset")
    if single_file and vox_offset < minimum_offset:
        raise _fail(
            p,
            "vox_offset",
            f"is {vox_offset:g}; in a single-file NIfTI the data start at byte "
            f"{minimum_offset} or later",
        )
    file_size = p.stat().st_size
    limit = file_size * (_GZIP_MAX_RATIO if compressed else 1)
    if single_file and vox_offset > limit:
        raise _fail(
            p,
            "vox_offset",
            f"is {vox_offset:g}, beyond the end of the data ({file_size} bytes on disk)",
            "the file is truncated or its header is wrong; re-copy or re-export it",
        )
    if not math.isfinite(slope):
        raise _fail(p, "scl_slope", f"is {slope}; it must be a finite number (or 0: no scaling)")
    if slope != 0 and not math.isfinite(inter):
        raise _fail(p, "scl_inter", f"is {inter}; with a scaling slope it must be finite")
