"""Tests of the raw NIfTI header checks (voxelscope/core/headercheck.py).

Outside reference: nibabel's own test images (``nibabel.testing.data_path``) are real,
valid NIfTI files and must pass untouched; damaged copies must fail naming the field. The
byte offsets are those of the NIfTI-1 standard's header struct (dim at 40, datatype at 70,
vox_offset at 108, scl_slope at 112, scl_inter at 116), cross-checked against nibabel's
``Nifti1Header`` field offsets below.
"""

from __future__ import annotations

import gzip
import struct
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from nibabel.testing import data_path

from voxelscope.core.errors import InputError
from voxelscope.core.headercheck import check_nifti_header


@pytest.mark.parametrize(
    "name", ["functional.nii", "anatomical.nii", "example4d.nii.gz", "example_nifti2.nii.gz"]
)
def test_real_images_from_nibabel_pass(name):
    path = Path(data_path) / name
    if not path.exists():
        pytest.skip(f"{name} not shipped with this nibabel")
    check_nifti_header(path, "image")


def test_offsets_match_nibabels_header_layout():
    """Reference: nibabel's structured dtype of the NIfTI-1 header."""
    dt = nib.Nifti1Header.template_dtype
    assert dt.fields["dim"][1] == 40
    assert dt.fields["datatype"][1] == 70
    assert dt.fields["vox_offset"][1] == 108
    assert dt.fields["scl_slope"][1] == 112
    assert dt.fields["scl_inter"][1] == 116


def _image(tmp_path, big_endian=False):
    img = nib.Nifti1Image(np.zeros((3, 4, 5, 6), np.float32), np.eye(4))
    p = tmp_path / "r.nii"
    if big_endian:
        hdr = img.header.as_byteswapped(">")
        img = nib.Nifti1Image(np.zeros((3, 4, 5, 6), ">f4"), np.eye(4), header=hdr)
    nib.save(img, p)
    return p


def _patch(p, offset, fmt, *values):
    raw = bytearray(p.read_bytes())
    struct.pack_into(fmt, raw, offset, *values)
    p.write_bytes(bytes(raw))
    return p


@pytest.mark.parametrize(
    ("offset", "fmt", "value", "says"),
    [
        (44, "h", -1, "dim[2] is -1"),
        (46, "h", 0, "dim[3] is 0, a zero-length dimension"),
        (40, "h", 0, "dim[0] is 0"),
        (40, "h", 8, "dim[0] is 8"),
        (70, "h", 3, "datatype is 3"),
        (108, "f", float("inf"), "vox_offset is inf"),
        (108, "f", 200.0, "vox_offset is 200"),
        (112, "f", float("nan"), "scl_slope is nan"),
        (116, "f", float("inf"), "scl_inter is inf"),
    ],
)
@pytest.mark.parametrize("big_endian", [False, True])
def test_damaged_fields_are_named(tmp_path, offset, fmt, value, says, big_endian):
    p = _image(tmp_path, big_endian)
    _patch(p, offset, (">" if big_endian else "<") + fmt, value)
    with pytest.raises(InputError) as info:
        check_nifti_header(p, "run")
    assert f"header field {says}" in str(info.value)


def test_nan_intercept_without_slope_is_allowed(tmp_path):
    """NIfTI-1: scl_slope 0 means no scaling, whatever the intercept says (the standard)."""
    p = _patch(_image(tmp_path), 112, "<2f", 0.0, float("nan"))
    check_nifti_header(p, "run")


def test_compressed_header_is_checked(tmp_path):
    p = _patch(_image(tmp_path), 44, "<h", -2)
    gz = tmp_path / "r.nii.gz"
    gz.write_bytes(gzip.compress(p.read_bytes()))
    with pytest.raises(InputError, match=r"dim\[2\] is -2"):
        check_nifti_header(gz, "run")


def test_not_nifti_and_short_files_pass_to_the_reader(tmp_path):
    p = tmp_path / "x.nii"
    p.write_bytes(b"hello")
    check_nifti_header(p)
    p.write_bytes(b"\0" * 400)
    check_nifti_header(p)
