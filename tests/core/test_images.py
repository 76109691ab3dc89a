"""Tests of voxelscope.core.images: 3D images and their resampling into a run's grid.

References: nibabel's reading of the files (``get_fdata``, ``img.affine``); nibabel's test
images anatomical.nii (33x41x25, 2 mm) and functional.nii (17x21x3, 4x4x8 mm), whose voxel
centres coincide (every functional centre is an anatomical centre: checked below through
nibabel's affines, not assumed); ``nibabel.as_closest_canonical`` for a reoriented copy;
``nibabel.processing.resample_from_to`` and ``scipy.ndimage.affine_transform`` as
independent resamplers.
"""

from __future__ import annotations

from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from nibabel.affines import apply_affine
from nibabel.testing import data_path
from scipy import ndimage

from voxelscope.core.errors import InputError
from voxelscope.core.images import (
    grid_overlap,
    load_image,
    load_on_grid,
    nifti_affine,
    resample_to_grid,
)
from voxelscope.core.run import open_run

DATA = Path(data_path)
ANAT = DATA / "anatomical.nii"
FUNC = DATA / "functional.nii"


@pytest.fixture(autouse=True)
def _private_cache(tmp_path, monkeypatch):
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "xdg-cache"))


def test_load_image_matches_nibabel():
    img = nib.load(str(ANAT))
    ours = load_image(ANAT)
    assert ours.data.dtype == np.float32 and ours.shape == (33, 41, 25)
    np.testing.assert_array_equal(ours.data, img.get_fdata().astype(np.float32))
    np.testing.assert_allclose(ours.affine, img.affine, atol=1e-12)
    assert ours.axcodes == nib.aff2axcodes(img.affine) == ("L", "A", "S")


def test_anatomical_on_functional_grid_at_coinciding_centres():
    """Linear and nearest resampling give the anatomical value itself where the target
    voxel centre is a source voxel centre (indices from nibabel's affines)."""
    anat = nib.load(str(ANAT))
    func = nib.load(str(FUNC))
    shape = func.shape[:3]
    ijk = np.stack(np.unravel_index(np.arange(np.prod(shape)), shape), axis=1)
    src = apply_affine(np.linalg.inv(anat.affine), apply_affine(func.affine, ijk))
    np.testing.assert_allclose(src, np.round(src), atol=1e-9)  # they do coincide
    src = np.round(src).astype(int)
    expect = anat.get_fdata()[src[:, 0], src[:, 1], src[:, 2]].reshape(shape)
    run = open_run(FUNC)
    for order in (0, 1):
        got = load_on_grid(ANAT, run, order=order, warnings=[])
        np.testing.assert_allclose(got, expect, rtol=1e-6)


def test_linear_resampling_matches_nibabel_processing():
    """Off-grid target (shifted by a third of a voxel, rotated 10 degrees): our trilinear
    values equal nibabel.processing.resample_from_to (order 1) where both are defined."""
    from nibabel.processing import resample_from_to

    anat = nib.load(str(ANAT))
    c, s = np.cos(np.radians(10)), np.sin(np.radians(10))
    rot = np.array([[c, -s, 0, 0], [s, c, 0, 0], [0, 0, 1, 0], [0, 0, 0, 1]])
    target_affine = rot @ np.diag([3.0, 3.0, 3.0, 1.0])
    target_affine[:3, 3] = [-10.0, -30.0, -5.0 + 2.0 / 3.0]
    target_shape = (14, 16, 10)
    as_float = nib.Nifti1Image(anat.get_fdata(), anat.affine)  # output keeps the input type
    ref = resample_from_to(
        as_float, (target_shape, target_affine), order=1, mode="constant", cval=np.nan
    ).get_fdata()
    ours = resample_to_grid(
        load_image(ANAT).data, anat.affine, target_shape, target_affine, order=1
    )
    both = np.isfinite(ref) & np.isfinite(ours)
    assert both.sum() > 500
    np.testing.assert_allclose(ours[both], ref[both], rtol=1e-5, atol=1e-3)
    # ours is NaN only outside the source grid (scipy reference: affine_transform coords)
    inside = grid_overlap(anat.shape, anat.affine, target_shape, target_affine)
    np.testing.assert_array_equal(np.isfinite(ours), inside)


def test_nearest_resampling_matches_scipy():
    """order=0 keeps labels: equal to scipy.ndimage.affine_transform(order=0) inside."""
    rng = np.random.default_rng(3)
    labels = rng.integers(0, 5, (9, 8, 7)).astype(np.float32)
    affine = np.diag([2.0, 2.0, 2.0, 1.0])
    target_affine = np.diag([1.3, 1.7, 1.1, 1.0])
    target_affine[:3, 3] = [0.4, -0.2, 0.3]
    shape = (12, 9, 11)
    ours = resample_to_grid(labels, affine, shape, target_affine, order=0)
    m = np.linalg.inv(affine) @ target_affine
    ref = ndimage.affine_transform(
        labels, m[:3, :3], m[:3, 3], output_shape=shape, order=0, mode="nearest"
    )
    ok = np.isfinite(ours)
    assert ok.sum() > 100 and np.all(np.isin(ours[ok], np.arange(5)))
    np.testing.assert_array_equal(ours[ok], ref[ok])


def test_reoriented_copy_comes_back_exactly():
    """nibabel.as_closest_canonical flips L-A-S data to R-A-S; resampled back onto the
    original grid it reproduces the original values (centres coincide)."""
    anat = nib.load(str(ANAT))
    canon = nib.as_closest_canonical(anat)
    assert nib.aff2axcodes(canon.affine) == ("R", "A", "S")
    for order in (0, 1):
        back = resample_to_grid(
            canon.get_fdata(), canon.affine, anat.shape, anat.affine, order=order
        )
        np.testing.assert_allclose(back, anat.get_fdata(), rtol=1e-6)


def test_partial_overlap_warns_and_is_nan_outside(tmp_path):
    """A map covering only the left half of the run: NaN elsewhere and a coverage warning."""
    run = open_run(FUNC)
    half = np.ones((8, 21, 3), np.float32) * 5
    path = tmp_path / "half_map.nii.gz"
    nib.save(nib.Nifti1Image(half, run.affine), str(path))
    notes: list[str] = []
    got = load_on_grid(path, run, warnings=notes)
    assert np.all(got[:8] == 5) and np.all(np.isnan(got[8:]))
    assert len(notes) == 1 and "half_map.nii.gz" in notes[0] and "covers only" in notes[0]
    with pytest.warns(UserWarning, match="covers only"):
        load_on_grid(path, run)


def test_full_coverage_is_quiet(tmp_path):
    run = open_run(FUNC)
    notes: list[str] = []
    load_on_grid(ANAT, run, warnings=notes)
    assert notes == []


def test_no_overlap_is_an_input_error(tmp_path):
    path = tmp_path / "far_map.nii"
    affine = np.diag([2.0, 2.0, 2.0, 1.0])
    affine[:3, 3] = 1000.0
    nib.save(nib.Nifti1Image(np.ones((5, 5, 5), np.float32), affine), str(path))
    run = open_run(FUNC)
    with pytest.raises(InputError, match="does not overlap") as err:
        load_on_grid(path, run)
    assert "far_map.nii" in str(err.value) and "\n" not in str(err.value)
    with pytest.raises(InputError, match="does not overlap"):
        load_on_grid(path, (run.shape, run.affine))


def test_load_image_bad_inputs(tmp_path):
    four = tmp_path / "four.nii"
    nib.save(nib.Nifti1Image(np.ones((3, 3, 3, 2), np.float32), np.eye(4)), str(four))
    with pytest.raises(InputError, match=r"four\.nii"):
        load_image(four)
    one = tmp_path / "one.nii"
    nib.save(nib.Nifti1Image(np.full((3, 3, 3, 1), 2.0, np.float32), np.eye(4)), str(one))
    assert load_image(one).shape == (3, 3, 3)
    text = tmp_path / "text.nii.gz"
    text.write_text("hello")
    with pytest.raises(InputError, match=r"text\.nii\.gz"):
        load_image(text)
    with pytest.raises(InputError, match="not found"):
        load_image(tmp_path / "gone.nii")


def test_load_image_applies_scaling(tmp_path):
    """scl_slope / scl_inter applied (NIfTI-1: value = raw * slope + inter)."""
    raw = np.arange(27, dtype=np.int16).reshape(3, 3, 3)
    img = nib.Nifti1Image(raw, np.eye(4))
    img.header.set_slope_inter(2.0, -1.0)
    path = tmp_path / "scaled.nii"
    nib.save(img, str(path))
    np.testing.assert_array_equal(load_image(path).data, raw * 2.0 - 1.0)


def test_nifti_affine_rule_on_headers():
    """NIfTI-1 standard: sform (code > 0) before qform (code > 0) before pixdim."""
    h = nib.Nifti1Header()
    h.set_data_shape((2, 2, 2))
    s_aff = np.diag([-3.0, 3.0, 3.0, 1.0])
    q_aff = np.diag([2.0, 2.0, 2.0, 1.0])
    h.set_sform(s_aff, code=4)
    h.set_qform(q_aff, code=1)
    np.testing.assert_allclose(nifti_affine(h)[0], s_aff)
    h.set_sform(s_aff, code=0)
    np.testing.assert_allclose(nifti_affine(h)[0], q_aff)
    h.set_qform(q_aff, code=0)
    aff, source = nifti_affine(h)
    assert source == "pixdim"
    np.testing.assert_allclose(aff, np.diag([2.0, 2.0, 2.0, 1.0]))


def test_resample_rejects_other_orders():
    with pytest.raises(ValueError):
        resample_to_grid(np.zeros((2, 2, 2)), np.eye(4), (2, 2, 2), np.eye(4), order=3)


# ----------------------------------------------------------------- file signatures (issue 17)


def _text_named(tmp_path, name: str) -> Path:
    p = tmp_path / name
    p.write_text("onset\tduration\ttrial_type\n0\t10\ttap\n")
    return p


def test_text_named_nii_gz_is_not_a_gzip_image_for_every_opener(tmp_path):
    """A text file named .nii.gz: one line saying it is not gzip-compressed, wherever it is
    opened (run, mask, anatomy, outside map); the gzip signature 1f 8b is RFC 1952's."""
    from voxelscope.core.loader import InputRequest, load_inputs

    fake = _text_named(tmp_path, "sub-01_task-x_bold.nii.gz")
    good = tmp_path / "run.nii"
    nib.save(nib.Nifti1Image(np.ones((3, 3, 3, 4), np.float32), np.eye(4)), good)
    attempts = {
        "run": lambda: open_run(fake),
        "mask": lambda: load_inputs(InputRequest(good, mask=fake, events_required=False)),
        "image": lambda: load_image(fake),
        "map": lambda: load_on_grid(fake, ((3, 3, 3), np.eye(4))),
    }
    for what, attempt in attempts.items():
        with pytest.raises(InputError) as err:
            attempt()
        line = str(err.value)
        assert "\n" not in line
        assert line.startswith(str(fake)), what
        assert "not a gzip-compressed NIfTI image" in line, what
        assert "text file starting 'onset" in line, what
        assert "gzip file" not in line  # the library's own words are not passed on


def test_uncompressed_nifti_named_gz_is_told_to_rename(tmp_path):
    p = tmp_path / "x.nii.gz"
    img = nib.Nifti1Image(np.ones((2, 2, 2), np.float32), np.eye(4))
    p.write_bytes(img.to_bytes())
    with pytest.raises(InputError, match=r"uncompressed NIfTI header\); rename it to end in \.nii"):
        load_image(p)


def test_gzip_named_nii_is_told_to_rename(tmp_path):
    good = tmp_path / "x.nii.gz"
    nib.save(nib.Nifti1Image(np.ones((2, 2, 2), np.float32), np.eye(4)), good)
    p = tmp_path / "y.nii"
    p.write_bytes(good.read_bytes())
    with pytest.raises(InputError, match=r"gzip-compressed but its name ends in \.nii"):
        load_image(p)


def test_binary_and_empty_files_named_gz(tmp_path):
    p = tmp_path / "b.nii.gz"
    p.write_bytes(b"\x00\x01\x02\x03" * 10)
    with pytest.raises(InputError, match="starts with the bytes 00 01 02 03"):
        load_image(p)
    p.write_bytes(b"")
    with pytest.raises(InputError, match="the file is empty"):
        load_image(p)
