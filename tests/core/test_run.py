"""Tests of voxelscope.core.run: opening runs, geometry, TR, scaling, masks, bad input.

Outside references used here:
- nibabel's own reading of the same files (``nibabel.load(...).get_fdata()``,
  ``img.affine``, ``nibabel.affines.apply_affine``, ``nibabel.aff2axcodes``);
- real images shipped with nibabel (``nibabel.testing.data_path``): functional.nii
  (17x21x3x20, 4x4x8 mm, TR 2 s, L-A-S), example4d.nii.gz (header TR 2000 "s"),
  example_nifti2.nii.gz (NIfTI-2);
- the NIfTI-1 standard (nifti1.h): sform before qform before pixdim; xyzt_units codes
  mm = 2, s = 8, ms = 16, us = 24 (codes from memory, cross-checked against the bytes
  nibabel writes); scl_slope / scl_inter give value = raw * slope + inter;
- the BIDS specification: sidecar RepetitionTime and SliceTiming in seconds.
"""

from __future__ import annotations

import gzip
import hashlib
import json
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from nibabel.affines import apply_affine
from nibabel.testing import data_path

from voxelscope.core.errors import InputError
from voxelscope.core.mask import brain_mask
from voxelscope.core.run import open_run

DATA = Path(data_path)
FUNCTIONAL = DATA / "functional.nii"
EXAMPLE4D = DATA / "example4d.nii.gz"
NIFTI2 = DATA / "example_nifti2.nii.gz"


@pytest.fixture(autouse=True)
def _private_cache(tmp_path, monkeypatch):
    """Every test gets its own cache directory; the user's cache is never touched."""
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "xdg-cache"))


def _save(path: Path, data, affine=None, slope=None, inter=None, tr=2.0, cls=nib.Nifti1Image):
    img = cls(data, np.diag([3.0, 3.0, 3.5, 1.0]) if affine is None else affine)
    if slope is not None:
        img.header.set_slope_inter(slope, inter)
    zooms = list(img.header.get_zooms())
    if len(zooms) >= 4:
        zooms[3] = tr
        img.header.set_zooms(zooms)
    img.header.set_xyzt_units("mm", "sec")
    nib.save(img, str(path))
    return path


def _sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


STORES = [
    pytest.param(".nii", True, "memmap", id="memmap"),
    pytest.param(".nii.gz", True, "cache", id="cache"),
    pytest.param(".nii.gz", False, "memory", id="memory"),
]


# --------------------------------------------------------------------- real data


def test_functional_timeseries_match_nibabel():
    """Time series of functional.nii equal nibabel's get_fdata() at random voxels."""
    ref = nib.load(str(FUNCTIONAL)).get_fdata()
    run = open_run(FUNCTIONAL)
    assert run.storage == "memmap"
    assert run.shape == ref.shape[:3] and run.n_volumes == ref.shape[3]
    rng = np.random.default_rng(11)
    for _ in range(25):
        ijk = tuple(int(rng.integers(n)) for n in run.shape)
        ts = run.timeseries(ijk)
        assert ts.dtype == np.float64 and ts.shape == (20,)
        np.testing.assert_array_equal(ts, ref[ijk])


def test_functional_geometry_matches_nibabel():
    """mm coordinates, orientation and voxel sizes of functional.nii, against nibabel's
    apply_affine / aff2axcodes / header zooms; the file is L-A-S (nibabel test data README)."""
    img = nib.load(str(FUNCTIONAL))
    run = open_run(FUNCTIONAL)
    np.testing.assert_allclose(run.affine, img.affine, rtol=0, atol=1e-12)
    assert run.axcodes == nib.aff2axcodes(img.affine) == ("L", "A", "S")
    np.testing.assert_allclose(run.voxel_size, img.header.get_zooms()[:3])
    assert run.tr == pytest.approx(float(img.header.get_zooms()[3])) and run.tr_source == "header"
    rng = np.random.default_rng(12)
    ijk = np.stack([rng.integers(0, n, 40) for n in run.shape], axis=1)
    np.testing.assert_allclose(run.voxel_to_mm(ijk), apply_affine(img.affine, ijk), atol=1e-9)
    np.testing.assert_allclose(run.voxel_to_mm(ijk[0]), apply_affine(img.affine, ijk[0]))
    # mm -> nearest voxel: a point within a third of a voxel of a centre maps back to it
    inv = np.linalg.inv(img.affine)
    for row in ijk:
        jitter = rng.uniform(-1 / 3, 1 / 3, 3)
        xyz = apply_affine(img.affine, row + jitter)
        assert run.mm_to_voxel(xyz) == tuple(int(v) for v in row)
        np.testing.assert_allclose(apply_affine(inv, xyz), row + jitter, atol=1e-9)


def test_functional_many_chunks_volume_mean_match_nibabel():
    """timeseries_many / iter_rows / volume / mean_image against nibabel's get_fdata()
    (float32 results, so a relative tolerance of float32 precision)."""
    ref = nib.load(str(FUNCTIONAL)).get_fdata()
    run = open_run(FUNCTIONAL)
    rng = np.random.default_rng(13)
    flat = rng.integers(0, run.n_voxels, 50)
    many = run.timeseries_many(flat)
    assert many.dtype == np.float32 and many.shape == (50, 20)
    np.testing.assert_allclose(many, ref.reshape(-1, 20)[flat], rtol=1e-6)
    np.testing.assert_allclose(run.volume(7), ref[..., 7], rtol=1e-6)
    np.testing.assert_allclose(run.mean_image(), ref.mean(axis=3), rtol=1e-6)
    mask = rng.random(run.shape) < 0.4
    parts = list(run.iter_rows(mask, chunk_voxels=37))
    idx = np.concatenate([p[0] for p in parts])
    np.testing.assert_array_equal(idx, np.flatnonzero(mask))
    np.testing.assert_allclose(
        np.concatenate([p[1] for p in parts]), ref.reshape(-1, 20)[idx], rtol=1e-6
    )


def test_example4d_header_tr_2000_s_is_not_used_silently():
    """example4d.nii.gz's header says TR = 2000 with unit seconds (nibabel test data);
    we must warn and read it as 2000 ms = 2 s, never 2000 s."""
    hdr = nib.load(str(EXAMPLE4D)).header
    assert float(hdr.get_zooms()[3]) == 2000.0 and hdr.get_xyzt_units()[1] == "sec"
    run = open_run(EXAMPLE4D)
    assert run.tr == pytest.approx(2.0) and run.tr_source == "header"
    assert any("2000" in w and "implausible" in w for w in run.warnings)
    run2 = open_run(EXAMPLE4D, tr=2.5)
    assert run2.tr == 2.5 and run2.tr_source == "argument"
    assert not any("implausible" in w for w in run2.warnings)


def test_example4d_data_match_nibabel_through_cache():
    """example4d.nii.gz served from the voxel-major cache equals nibabel's get_fdata()."""
    ref = nib.load(str(EXAMPLE4D)).get_fdata()
    run = open_run(EXAMPLE4D)
    assert run.storage == "cache"
    for ijk in [(0, 0, 0), (64, 48, 12), (127, 95, 23), (10, 80, 5)]:
        np.testing.assert_array_equal(run.timeseries(ijk), ref[ijk])
    np.testing.assert_array_equal(run.volume(1), ref[..., 1].astype(np.float32))


def test_nifti2_real_file():
    """example_nifti2.nii.gz (nibabel test data) opens as NIfTI-2 and matches nibabel."""
    img = nib.load(str(NIFTI2))
    assert isinstance(img, nib.Nifti2Image)
    run = open_run(NIFTI2, use_cache=False)
    np.testing.assert_allclose(run.affine, img.affine, atol=1e-12)
    np.testing.assert_array_equal(run.timeseries((5, 6, 7)), img.get_fdata()[5, 6, 7])
    assert isinstance(run.header, nib.Nifti2Header)


# --------------------------------------------------------------------- synthetic


@pytest.mark.parametrize("suffix,use_cache,storage", STORES)
def test_scaling_applied_every_store(tmp_path, suffix, use_cache, storage):
    """scl_slope/scl_inter (NIfTI-1: value = raw * slope + inter) are applied; checked
    against the integers we wrote (independent) and nibabel's get_fdata()."""
    rng = np.random.default_rng(21)
    raw = rng.integers(-3000, 3000, (6, 5, 4, 9)).astype(np.int16)
    path = _save(tmp_path / f"s{suffix}", raw, slope=0.25, inter=-7.5)
    run = open_run(path, use_cache=use_cache, cache_dir=tmp_path / "c")
    assert run.storage == storage
    expect = raw.astype(np.float64) * 0.25 - 7.5
    np.testing.assert_allclose(nib.load(str(path)).get_fdata(), expect)
    for ijk in [(0, 0, 0), (5, 4, 3), (2, 3, 1)]:
        np.testing.assert_allclose(run.timeseries(ijk), expect[ijk], rtol=1e-7, atol=1e-6)
    flat = rng.permutation(run.n_voxels)[:30]
    np.testing.assert_allclose(
        run.timeseries_many(flat), expect.reshape(-1, 9)[flat], rtol=1e-6, atol=1e-5
    )
    np.testing.assert_allclose(run.volume(3), expect[..., 3], rtol=1e-6, atol=1e-5)
    full = np.ones(run.shape, dtype=bool)
    idx, data = zip(*run.iter_rows(full, chunk_voxels=17))
    np.testing.assert_array_equal(np.concatenate(idx), np.arange(run.n_voxels))
    np.testing.assert_allclose(np.concatenate(data), expect.reshape(-1, 9), rtol=1e-6, atol=1e-5)
    np.testing.assert_allclose(run.mean_image(), expect.mean(axis=3), rtol=1e-6, atol=1e-5)


@pytest.mark.parametrize("suffix", [".nii", ".nii.gz"])
def test_nifti2_written_by_nibabel(tmp_path, suffix):
    """NIfTI-2 files (nibabel.Nifti2Image) open with the same values as nibabel reads."""
    rng = np.random.default_rng(22)
    data = rng.normal(100, 10, (4, 5, 6, 7)).astype(np.float32)
    path = _save(tmp_path / f"n2{suffix}", data, cls=nib.Nifti2Image, tr=1.5)
    run = open_run(path, cache_dir=tmp_path / "c")
    assert run.tr == 1.5
    np.testing.assert_array_equal(
        run.timeseries((3, 4, 5)), nib.load(str(path)).get_fdata()[3, 4, 5]
    )


def _codes_image(tmp_path, sform_code, qform_code):
    data = np.arange(2 * 3 * 4 * 3, dtype=np.float32).reshape(2, 3, 4, 3) + 1
    img = nib.Nifti1Image(data, None)
    s_aff = np.array([[-2.0, 0, 0, 10], [0, 2.5, 0, -20], [0, 0, 3, 5], [0, 0, 0, 1]])
    q_aff = np.array([[0, 0, 3.0, 1], [2.0, 0, 0, 2], [0, 2.5, 0, 3], [0, 0, 0, 1]])
    img.header.set_sform(s_aff, code=sform_code)
    img.header.set_qform(q_aff, code=qform_code)
    if sform_code == qform_code == 0:  # pixdim of its own (set_qform wrote the qform's)
        img.header.set_zooms((1.5, 1.75, 2.25, 2.0))
    else:
        img.header.set_zooms((*img.header.get_zooms()[:3], 2.0))
    img.header.set_xyzt_units("mm", "sec")
    path = tmp_path / f"codes_{sform_code}{qform_code}.nii"
    nib.save(img, str(path))
    return path, s_aff, q_aff


def test_sform_wins_over_qform(tmp_path):
    """NIfTI-1 standard: when sform_code > 0 the sform gives the affine."""
    path, s_aff, _ = _codes_image(tmp_path, 1, 1)
    run = open_run(path)
    np.testing.assert_allclose(run.affine, s_aff, atol=1e-6)
    np.testing.assert_allclose(run.affine, nib.load(str(path)).affine, atol=1e-6)
    assert run.affine_source == "sform"


def test_qform_when_sform_code_is_zero(tmp_path):
    """NIfTI-1 standard: sform_code 0 and qform_code > 0 -> the qform (quaternion) affine."""
    path, _, q_aff = _codes_image(tmp_path, 0, 2)
    run = open_run(path)
    header = nib.load(str(path)).header
    np.testing.assert_allclose(run.affine, header.get_qform(), atol=1e-6)
    np.testing.assert_allclose(run.affine[:3, :3], q_aff[:3, :3], atol=1e-5)
    assert run.affine_source == "qform" and run.axcodes == nib.aff2axcodes(q_aff)


def test_pixdim_when_no_code_is_set(tmp_path):
    """NIfTI-1 standard, method 1 (both codes 0): x = pixdim[1]*i, y = pixdim[2]*j,
    z = pixdim[3]*k, no offset; a warning says the orientation is unknown."""
    path, _, _ = _codes_image(tmp_path, 0, 0)
    run = open_run(path)
    np.testing.assert_allclose(run.affine, np.diag([1.5, 1.75, 2.25, 1.0]))
    assert run.affine_source == "pixdim"
    assert any("orientation unknown" in w for w in run.warnings)


@pytest.mark.parametrize(
    "unit,value,code,expected",
    [("sec", 2.5, 10, 2.5), ("msec", 2500.0, 18, 2.5), ("usec", 1_500_000.0, 26, 1.5)],
)
def test_xyzt_units_time(tmp_path, unit, value, code, expected):
    """NIfTI-1 xyzt_units: the time unit of pixdim[4] is s (8), ms (16) or us (24), plus
    mm (2) for space (codes from memory; the byte nibabel writes is checked too)."""
    img = nib.Nifti1Image(np.ones((2, 2, 2, 4), np.float32), np.eye(4))
    img.header.set_zooms((1, 1, 1, value))
    img.header.set_xyzt_units("mm", unit)
    assert int(img.header["xyzt_units"]) == code
    path = tmp_path / "u.nii"
    nib.save(img, str(path))
    run = open_run(path)
    assert run.tr == pytest.approx(expected, rel=1e-7) and run.tr_source == "header"
    assert not any("implausible" in w for w in run.warnings)


def test_header_tr_still_implausible_asks_for_tr(tmp_path):
    """A header TR that is implausible even as ms (5e6 'seconds') is an InputError."""
    path = _save(tmp_path / "bad_tr.nii", np.ones((2, 2, 2, 4), np.float32), tr=5e6)
    with pytest.raises(InputError, match="TR") as err:
        open_run(path)
    assert str(path) in str(err.value) and err.value.remedy == "tr"  # the TR fixes it
    assert open_run(path, tr=1.0).tr == 1.0


def test_header_tr_too_short_in_ms_asks_for_tr(tmp_path):
    """pixdim[4] = 0.5 with unit ms would be a 0.5 ms TR: implausible, InputError."""
    img = nib.Nifti1Image(np.ones((2, 2, 2, 4), np.float32), np.eye(4))
    img.header.set_zooms((1, 1, 1, 0.5))
    img.header.set_xyzt_units("mm", "msec")
    path = tmp_path / "short.nii"
    nib.save(img, str(path))
    with pytest.raises(InputError, match="TR") as err:
        open_run(path)
    assert err.value.remedy == "tr" and "give the TR in seconds" in str(err.value)


def test_no_tr_anywhere(tmp_path):
    path = _save(tmp_path / "no_tr.nii", np.ones((2, 2, 2, 4), np.float32), tr=0.0)
    with pytest.raises(InputError, match=r"no usable TR.*give the TR in seconds") as err:
        open_run(path)
    assert err.value.remedy == "tr" and err.value.field == "TR"


@pytest.mark.parametrize("bad", [0.0, -2.0, float("nan"), 2000.0])
def test_bad_tr_argument(tmp_path, bad):
    path = _save(tmp_path / "r.nii", np.ones((2, 2, 2, 4), np.float32))
    with pytest.raises(InputError, match="TR"):
        open_run(path, tr=bad)


def _bold(tmp_path, tr_header=2.0, sidecar=None, n_slices=4):
    rng = np.random.default_rng(31)
    data = rng.normal(500, 5, (3, 3, n_slices, 6)).astype(np.float32)
    path = _save(tmp_path / "sub-01_task-tt_bold.nii", data, tr=tr_header)
    if sidecar is not None:
        text = sidecar if isinstance(sidecar, str) else json.dumps(sidecar)
        (tmp_path / "sub-01_task-tt_bold.json").write_text(text)
    return path


def test_sidecar_tr_wins_and_disagreement_is_warned(tmp_path):
    """BIDS: RepetitionTime (seconds) in the sidecar; it is preferred over the header,
    and a disagreement is said in the warnings."""
    path = _bold(tmp_path, tr_header=2.0, sidecar={"RepetitionTime": 1.25})
    run = open_run(path)
    assert run.tr == 1.25 and run.tr_source == "sidecar"
    assert any("sidecar" in w and "header" in w for w in run.warnings)
    assert run.sidecar == tmp_path / "sub-01_task-tt_bold.json"


def test_sidecar_agreeing_with_header_is_quiet(tmp_path):
    path = _bold(tmp_path, tr_header=1.25, sidecar={"RepetitionTime": 1.25})
    run = open_run(path)
    assert run.tr == 1.25 and run.tr_source == "sidecar" and run.warnings == []


def test_argument_wins_over_sidecar(tmp_path):
    path = _bold(tmp_path, sidecar={"RepetitionTime": 1.25})
    run = open_run(path, tr=3.0)
    assert run.tr == 3.0 and run.tr_source == "argument"


def test_slice_timing_sets_reference_time(tmp_path):
    """BIDS SliceTiming (seconds, one per slice): kept as an array; regressors are sampled
    at its median (our documented choice)."""
    timing = [0.0, 0.6, 0.3, 0.9]
    path = _bold(tmp_path, sidecar={"RepetitionTime": 1.2, "SliceTiming": timing})
    run = open_run(path)
    np.testing.assert_array_equal(run.slice_timing, timing)
    assert run.reference_time_s == pytest.approx(0.45)  # median of 0, .3, .6, .9


def test_no_slice_timing_reference_zero(tmp_path):
    run = open_run(_bold(tmp_path, sidecar={"RepetitionTime": 2.0}))
    assert run.slice_timing is None and run.reference_time_s == 0.0


@pytest.mark.parametrize(
    "timing", [[0.0, 0.5], [0.0, 0.5, 1.0, 2.5], ["a", 0, 0, 0], [0, 500, 1000, 1500]]
)
def test_bad_slice_timing_is_ignored_with_warning(tmp_path, timing):
    path = _bold(tmp_path, sidecar={"RepetitionTime": 2.0, "SliceTiming": timing})
    run = open_run(path)
    assert run.slice_timing is None and run.reference_time_s == 0.0
    assert any("SliceTiming" in w for w in run.warnings)


@pytest.mark.parametrize("text", ["{not json", "[1, 2]", '{"RepetitionTime": "fast"}'])
def test_bad_sidecar_is_an_input_error(tmp_path, text):
    path = _bold(tmp_path, sidecar=text)
    with pytest.raises(InputError) as err:
        open_run(path)
    assert "sub-01_task-tt_bold.json" in str(err.value)


def _nan_run(tmp_path):
    """A bright 4x4x4 block inside a dim box; two NaN voxels and one constant voxel in it."""
    rng = np.random.default_rng(41)
    data = rng.normal(10, 1, (10, 10, 10, 12)).astype(np.float32)
    data[3:7, 3:7, 3:7] += 1000
    data[4, 4, 4, 5] = np.nan
    data[5, 5, 5, :] = np.nan
    data[3, 4, 5, :] = 1000.0
    return _save(tmp_path / "nan.nii", data), data


def test_nan_and_constant_voxels_leave_the_mask_said_once(tmp_path):
    """NaN voxels are outside the mask and named once in the warnings; constant ones too."""
    path, data = _nan_run(tmp_path)
    run = open_run(path)
    mask = run.mask()
    assert not mask[4, 4, 4] and not mask[5, 5, 5] and not mask[3, 4, 5]
    expect = np.zeros(mask.shape, bool)
    expect[3:7, 3:7, 3:7] = True
    expect[4, 4, 4] = expect[5, 5, 5] = expect[3, 4, 5] = False
    np.testing.assert_array_equal(mask, expect)
    run.mask()
    run.mean_image()
    nan_notes = [w for w in run.warnings if "NaN" in w]
    assert len(nan_notes) == 1 and "2 voxels" in nan_notes[0]
    mean = run.mean_image()
    assert np.all(np.isfinite(mean)) and mean[5, 5, 5] == 0.0
    np.testing.assert_allclose(mean[6, 6, 6], np.mean(data[6, 6, 6], dtype=np.float64), rtol=1e-6)
    chunks = list(run.iter_rows())
    assert sum(len(c[0]) for c in chunks) == int(expect.sum())
    assert all(np.all(np.isfinite(c[1])) for c in chunks)


def test_nan_voxels_said_once_for_compressed_runs(tmp_path):
    _, data = _nan_run(tmp_path)
    path = _save(tmp_path / "nan.nii.gz", data)
    run = open_run(path, cache_dir=tmp_path / "c")
    run.mask()
    assert len([w for w in run.warnings if "NaN" in w]) == 1
    assert not run.mask()[5, 5, 5]


def test_brain_mask_rule():
    """The documented rule, recomputed with numpy: valid and mean > 0.2 * 98th percentile;
    largest 26-connected component kept; enclosed holes filled (scipy.ndimage reference)."""
    from scipy import ndimage

    rng = np.random.default_rng(42)
    mean = rng.uniform(0, 50, (12, 12, 12))
    mean[2:9, 2:9, 2:9] = rng.uniform(800, 1000, (7, 7, 7))
    mean[5, 5, 5] = 10.0  # a hole
    mean[11, 11, 11] = 900.0  # an island
    raw = brain_mask(mean, largest_component=False, fill_holes=False)
    np.testing.assert_array_equal(raw, mean > 0.2 * np.percentile(mean, 98))
    full = brain_mask(mean)
    labels, _ = ndimage.label(raw, structure=np.ones((3, 3, 3)))
    biggest = labels == np.argmax(np.bincount(labels.ravel())[1:]) + 1
    np.testing.assert_array_equal(full, ndimage.binary_fill_holes(biggest))
    assert full[5, 5, 5] and not full[11, 11, 11]


def test_spatial_header_writes_maps(tmp_path):
    """Run.header is a 3D float32 header: a map saved with it reloads with the run's affine."""
    run = open_run(FUNCTIONAL)
    out = tmp_path / "map.nii.gz"
    nib.save(nib.Nifti1Image(run.mean_image().copy(), run.affine, run.header), str(out))
    back = nib.load(str(out))
    assert back.shape == run.shape and back.get_data_dtype() == np.float32
    np.testing.assert_allclose(back.affine, run.affine, atol=1e-6)
    np.testing.assert_allclose(back.get_fdata(), run.mean_image(), rtol=1e-6)


def test_check_voxel_and_mm_errors_name_the_grid():
    run = open_run(FUNCTIONAL)
    with pytest.raises(InputError) as err:
        run.check_voxel((17, 0, 0))
    msg = str(err.value)
    assert msg.startswith("voxel (17, 0, 0) is outside the grid 17x21x3 of ")
    assert str(FUNCTIONAL) in msg and "\n" not in msg
    with pytest.raises(InputError, match="17x21x3"):
        run.mm_to_voxel((500.0, 0.0, 0.0))
    with pytest.raises(InputError):
        run.timeseries((0, -1, 0))
    with pytest.raises(InputError):
        run.timeseries_many(np.array([run.n_voxels]))
    with pytest.raises(InputError):
        run.volume(20)


def test_five_d_with_trailing_one_is_accepted(tmp_path):
    data = np.random.default_rng(5).normal(size=(3, 3, 3, 5, 1)).astype(np.float32)
    run = open_run(_save(tmp_path / "r5.nii", data))
    assert run.shape == (3, 3, 3) and run.n_volumes == 5
    np.testing.assert_array_equal(run.timeseries((1, 2, 0)), data[1, 2, 0, :, 0])


def test_input_file_is_never_modified(tmp_path):
    path = _save(tmp_path / "keep.nii", np.random.default_rng(6).normal(size=(3, 3, 3, 4)))
    before = _sha(path)
    run = open_run(path)
    run.mask()
    list(run.iter_rows())
    assert _sha(path) == before


# --------------------------------------------------------------------- bad input


def _assert_input_error(path: Path, **kw) -> str:
    with pytest.raises(InputError) as err:
        open_run(path, **kw)
    msg = str(err.value)
    assert str(path) in msg and "\n" not in msg
    return msg


def test_truncated_gz(tmp_path):
    rng = np.random.default_rng(51)
    path = _save(tmp_path / "t.nii.gz", rng.normal(size=(8, 8, 8, 10)).astype(np.float32))
    blob = path.read_bytes()
    path.write_bytes(blob[: len(blob) // 2])
    msg = _assert_input_error(path, cache_dir=tmp_path / "c")
    assert "truncated or corrupt" in msg
    assert not (tmp_path / "c").exists() or list((tmp_path / "c").iterdir()) == []


def test_corrupt_gz(tmp_path):
    """Bytes flipped inside the deflate stream: zlib or the gzip CRC-32 check rejects it."""
    rng = np.random.default_rng(52)
    path = _save(tmp_path / "c.nii.gz", rng.normal(size=(8, 8, 8, 10)).astype(np.float32))
    blob = bytearray(path.read_bytes())
    mid = len(blob) // 2
    blob[mid : mid + 16] = bytes(16)
    path.write_bytes(bytes(blob))
    _assert_input_error(path, use_cache=False)


def test_truncated_uncompressed(tmp_path):
    path = _save(tmp_path / "t.nii", np.ones((8, 8, 8, 10), np.float32))
    path.write_bytes(path.read_bytes()[:5000])
    assert "truncated" in _assert_input_error(path)


def test_not_nifti(tmp_path):
    path = tmp_path / "notes.nii"
    path.write_text("this is not an image\n" * 40)
    assert "NIfTI" in _assert_input_error(path)


def test_missing_file(tmp_path):
    assert "not found" in _assert_input_error(tmp_path / "absent.nii.gz")


def test_three_d_is_not_a_run(tmp_path):
    path = _save(tmp_path / "anat.nii", np.ones((4, 4, 4), np.float32))
    assert "3D" in _assert_input_error(path)


def test_five_d_is_not_a_run(tmp_path):
    path = _save(tmp_path / "five.nii", np.ones((2, 2, 2, 3, 2), np.float32))
    assert "5D" in _assert_input_error(path)


def test_zero_length_dimension(tmp_path):
    path = _save(tmp_path / "empty.nii", np.zeros((4, 4, 0, 5), np.int16))
    assert "zero-length" in _assert_input_error(path)


def test_single_volume_is_not_a_run(tmp_path):
    path = _save(tmp_path / "one.nii", np.ones((4, 4, 4, 1), np.float32))
    _assert_input_error(path)


def test_complex_voxels_are_refused(tmp_path):
    path = _save(tmp_path / "cplx.nii", np.ones((2, 2, 2, 3), np.complex64))
    assert "datatype" in _assert_input_error(path)


def test_gzip_named_nii_opens_as_compressed(tmp_path):
    """Content decides: a gzip stream is treated as compressed even if named .nii.gz."""
    data = np.random.default_rng(7).normal(size=(3, 4, 5, 6)).astype(np.float32)
    plain = _save(tmp_path / "p.nii", data)
    gz = tmp_path / "q.nii.gz"
    gz.write_bytes(gzip.compress(plain.read_bytes()))
    run = open_run(gz, use_cache=False)
    assert run.storage == "memory"
    np.testing.assert_array_equal(run.timeseries((2, 3, 4)), data[2, 3, 4])


@pytest.mark.parametrize("suffix,use_cache,storage", STORES)
def test_big_endian_file(tmp_path, suffix, use_cache, storage):
    """A big-endian file (the header's byte order, NIfTI-1) reads as nibabel reads it."""
    rng = np.random.default_rng(23)
    raw = rng.integers(-3000, 3000, (5, 4, 3, 6)).astype(np.int16)
    img = nib.Nifti1Image(raw, np.eye(4), header=nib.Nifti1Header(endianness=">"))
    img.header.set_slope_inter(2.0, 1.0)
    img.header.set_zooms((1.0, 1.0, 1.0, 2.0))
    path = tmp_path / f"big{suffix}"
    nib.save(img, str(path))
    back = nib.load(str(path))
    assert back.header.endianness == ">"
    run = open_run(path, use_cache=use_cache, cache_dir=tmp_path / "c")
    assert run.storage == storage
    np.testing.assert_array_equal(run.timeseries((4, 3, 2)), raw[4, 3, 2] * 2.0 + 1.0)
    np.testing.assert_allclose(
        run.timeseries_many(np.arange(run.n_voxels)), back.get_fdata().reshape(-1, 6), rtol=1e-7
    )


def test_mask_falls_back_to_varying_voxels_for_negative_means(tmp_path):
    """Demeaned data (means around or below 0) give no intensity mask: every finite,
    varying voxel is used instead, and the warnings say so."""
    rng = np.random.default_rng(43)
    data = rng.normal(-5.0, 1.0, (4, 4, 4, 8)).astype(np.float32)
    data[0, 0, 0] = 3.0  # constant
    run = open_run(_save(tmp_path / "demeaned.nii", data))
    expect = np.ones((4, 4, 4), bool)
    expect[0, 0, 0] = False
    np.testing.assert_array_equal(run.mask(), expect)
    assert any("intensity mask" in w for w in run.warnings)


def test_lazy_parts_are_thread_safe():
    """Mask and mean asked for from several threads at once are computed once."""
    from concurrent.futures import ThreadPoolExecutor

    run = open_run(FUNCTIONAL)
    with ThreadPoolExecutor(4) as pool:
        masks = list(pool.map(lambda _: run.mask(), range(8)))
    assert all(m is masks[0] for m in masks)


def test_random_oblique_affines_round_trip(tmp_path):
    """Random oblique sform affines (rotation from a QR factorisation, random voxel sizes and
    flips): voxel_to_mm equals nibabel's apply_affine, axcodes equal nibabel.aff2axcodes,
    and mm_to_voxel(voxel_to_mm(ijk)) gives ijk back."""
    rng = np.random.default_rng(61)
    data = np.ones((6, 7, 5, 3), np.float32) + rng.random((6, 7, 5, 3), dtype=np.float32)
    for n in range(6):
        q, _ = np.linalg.qr(rng.normal(size=(3, 3)))
        affine = np.eye(4)
        affine[:3, :3] = q * rng.uniform(0.8, 4.0, 3) * rng.choice([-1, 1], 3)
        affine[:3, 3] = rng.uniform(-100, 100, 3)
        img = nib.Nifti1Image(data, affine)
        img.header.set_zooms((*img.header.get_zooms()[:3], 2.0))
        path = tmp_path / f"oblique{n}.nii"
        nib.save(img, str(path))
        saved = nib.load(str(path)).affine  # float32 header precision
        run = open_run(path)
        assert run.axcodes == nib.aff2axcodes(saved)
        ijk = np.stack([rng.integers(0, k, 20) for k in run.shape], axis=1)
        np.testing.assert_allclose(run.voxel_to_mm(ijk), apply_affine(saved, ijk), atol=1e-9)
        for row in ijk:
            assert run.mm_to_voxel(run.voxel_to_mm(row)) == tuple(int(v) for v in row)


@pytest.mark.parametrize("suffix,use_cache,storage", STORES)
def test_returned_arrays_are_plain_writable_copies(tmp_path, suffix, use_cache, storage):
    """Volumes and time series handed out are ordinary arrays that callers may change
    without touching the run (float32 data without scaling could otherwise be file views)."""
    data = np.random.default_rng(8).normal(size=(3, 4, 5, 6)).astype(np.float32)
    run = open_run(
        _save(tmp_path / f"f{suffix}", data), use_cache=use_cache, cache_dir=tmp_path / "c"
    )
    assert run.storage == storage
    for arr in (
        run.volume(2),
        run.timeseries((1, 1, 1)),
        run.timeseries_many(np.arange(5)),
        next(run.iter_rows())[1],
    ):
        assert type(arr) is np.ndarray and arr.flags.writeable
        arr[...] = 0
    np.testing.assert_array_equal(run.volume(2), data[..., 2])
    np.testing.assert_array_equal(run.timeseries((1, 1, 1)), data[1, 1, 1])


@pytest.mark.parametrize("suffix,use_cache,storage", STORES)
@pytest.mark.parametrize("scaled", [False, True], ids=["float32", "int16-scaled"])
def test_iter_blocks_equal_nibabel_every_store(tmp_path, suffix, use_cache, storage, scaled):
    """iter_blocks yields float32 (T, n) blocks whose columns equal nibabel's get_fdata() at
    the C-order flat indices given (np.unravel_index in C order, as nibabel's array is
    indexed); every in-mask voxel appears exactly once, none outside the mask; blocks are
    at most block_voxels wide. Random masks with gaps, so blocks are partly contiguous."""
    rng = np.random.default_rng(31)
    shape = (7, 6, 5, 11)
    if scaled:
        raw = rng.integers(-3000, 3000, shape).astype(np.int16)
        path = _save(tmp_path / f"b{suffix}", raw, slope=0.5, inter=3.0)
    else:
        path = _save(tmp_path / f"b{suffix}", rng.normal(100, 5, shape).astype(np.float32))
    ref = nib.load(str(path)).get_fdata()
    run = open_run(path, use_cache=use_cache, cache_dir=tmp_path / "c")
    assert run.storage == storage
    for mask in (np.ones(shape[:3], bool), rng.random(shape[:3]) < 0.6):
        for block in (1, 4, 37, 1024):
            seen = []
            for idx, Y in run.iter_blocks(mask, block_voxels=block):
                assert idx.dtype == np.int64 and Y.dtype == np.float32
                assert Y.shape == (11, idx.size) and 1 <= idx.size <= block
                expect = ref[np.unravel_index(idx, shape[:3])].T  # (T, n)
                np.testing.assert_allclose(Y, expect, rtol=1e-6)
                seen.append(idx)
            seen = np.concatenate(seen)
            assert seen.size == int(mask.sum()) and np.unique(seen).size == seen.size
            np.testing.assert_array_equal(np.sort(seen), np.flatnonzero(mask))
            assert mask.ravel()[seen].all()


@pytest.mark.parametrize("suffix,use_cache,storage", STORES)
def test_iter_blocks_never_let_callers_change_the_run(tmp_path, suffix, use_cache, storage):
    """A block is either a read-only view of the run's data (writing raises) or a copy
    (writing leaves the run as it was); nibabel's reading of the file is the reference."""
    data = np.random.default_rng(32).normal(size=(4, 3, 5, 6)).astype(np.float32)
    path = _save(tmp_path / f"w{suffix}", data)
    run = open_run(path, use_cache=use_cache, cache_dir=tmp_path / "c")
    assert run.storage == storage
    for mask in (np.ones(run.shape, bool), np.arange(60).reshape(run.shape) % 3 == 0):
        for _idx, Y in run.iter_blocks(mask, block_voxels=8):
            if Y.flags.writeable:
                Y[...] = -1.0
            else:
                with pytest.raises(ValueError):
                    Y[0, 0] = -1.0
    np.testing.assert_array_equal(run.volume(2), nib.load(str(path)).get_fdata()[..., 2])
    full = np.concatenate([Y for _i, Y in run.iter_blocks(np.ones(run.shape, bool))], axis=1)
    np.testing.assert_array_equal(np.sort(full.ravel()), np.sort(data.ravel()))


def test_iter_blocks_default_mask_and_bad_masks():
    """Without a mask iter_blocks covers run.mask(); a mask of the wrong shape is a one-line
    InputError; an empty mask yields nothing (functional.nii from nibabel's test data)."""
    run = open_run(FUNCTIONAL)
    idx = np.concatenate([i for i, _ in run.iter_blocks()])
    np.testing.assert_array_equal(np.sort(idx), np.flatnonzero(run.mask()))
    assert list(run.iter_blocks(np.zeros(run.shape, bool))) == []
    with pytest.raises(InputError, match="mask shape"):
        next(run.iter_blocks(np.ones((2, 2, 2), bool)))


def test_memmap_blocks_release_pages_and_stay_correct(tmp_path, monkeypatch):
    """Released pages of a mapped run are read back from the file on demand: blocks kept
    from before a release still hold nibabel's values (reference: nibabel get_fdata)."""
    import voxelscope.core.stores as stores

    monkeypatch.setattr(stores, "RELEASE_COLUMNS", 1)
    monkeypatch.setattr(stores, "RELEASE_LAG_BLOCKS", 0)
    rng = np.random.default_rng(9)
    data = (500 + rng.standard_normal((30, 20, 12, 15)) * 5).astype(np.float32)
    path = tmp_path / "big.nii"
    nib.save(nib.Nifti1Image(data, np.eye(4)), path)
    run = open_run(path, tr=2.0)
    calls = []
    store = run._store
    orig = store.release
    monkeypatch.setattr(store, "release", lambda a, b: (calls.append((a, b)), orig(a, b)))
    ref = nib.load(path).get_fdata().reshape(-1, 15)  # C-order flat index -> series
    kept = list(run.iter_blocks(np.ones(run.shape, bool), block_voxels=1024))
    assert calls  # pages were released while iterating
    for idx, Y in kept:
        np.testing.assert_array_equal(Y.T, ref[idx].astype(np.float32))


@settings(max_examples=60)
@given(
    seed=st.integers(0, 2**31 - 1),
    n_blobs=st.integers(1, 4),
    hollow=st.booleans(),
    constant_share=st.floats(0.0, 0.3),
)
def test_cache_keeps_a_superset_of_the_mask(seed, n_blobs, hollow, constant_share):
    """The cache decides which voxels to keep without scipy (a threshold and the voxels it
    encloses along the axes); that choice must contain the run's mask, whose holes are
    filled and components chosen by scipy.ndimage (the outside reference here) on random
    images of bright blobs, hollow ones included, with constant and NaN voxels."""
    from voxelscope.core.mask import cache_must_keep, summary_mask
    from voxelscope.core.summary import Summary

    rng = np.random.default_rng(seed)
    shape = (14, 12, 10)
    g = np.meshgrid(*(np.arange(n) for n in shape), indexing="ij")
    mean = rng.uniform(0, 30, shape)
    for _ in range(n_blobs):
        c = [rng.uniform(0, n) for n in shape]
        r = rng.uniform(2, 5)
        d = np.sqrt(sum((gi - ci) ** 2 for gi, ci in zip(g, c)))
        mean[d < r] = rng.uniform(500, 1000)
        if hollow:
            mean[d < r / 2] = rng.uniform(0, 40)
    constant = rng.random(shape) < constant_share
    nonfinite = rng.random(shape) < 0.02
    s = Summary(mean=mean.astype(np.float32), nonfinite=nonfinite, constant=constant & ~nonfinite)
    mask, _fallback = summary_mask(s)
    keep = cache_must_keep(s)
    assert not (mask & ~keep).any()
