"""A small synthetic run with a BIDS events file, shared by the command-line tests."""

from __future__ import annotations

import nibabel as nib
import numpy as np

EVENTS = (
    "onset\tduration\ttrial_type\n"
    "6\t12\ttone\n30\t12\ttap\n54\t12\ttone\n78\t12\ttap\n102\t12\ttone\n"
)


def write_run(
    tmp_path,
    data: np.ndarray,
    tr: float,
    affine=None,
    name: str = "sub-01_task-x_bold.nii",
):
    """Write ``data`` (X, Y, Z, T) as a float32 NIfTI run with TR in its header and the
    BIDS-named events file beside it; returns (run path, events path)."""
    affine = np.diag([3.0, 3.0, 3.5, 1.0]) if affine is None else affine
    img = nib.Nifti1Image(np.asarray(data, dtype=np.float32), affine)
    img.header.set_xyzt_units("mm", "sec")
    img.header["pixdim"][4] = tr
    path = tmp_path / name
    nib.save(img, path)
    stem = name.removesuffix(".gz").removesuffix("_bold.nii")
    events = tmp_path / f"{stem}_events.tsv"
    events.write_text(EVENTS)
    return path, events
