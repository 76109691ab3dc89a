"""The one way in (voxelscope/core/loader.py): cheap checks first, one warning list, masks.

References: the BIDS specification (events.tsv beside the run; derivatives sidecar fields
``SliceTimingCorrected`` and ``StartTime``; ``desc-brain_mask``), nibabel for writing and
resampling images, and plain arithmetic for the onset-shift identity.
"""

from __future__ import annotations

import json

import nibabel as nib
import numpy as np
import pytest

from voxelscope.core.errors import InputError
from voxelscope.core.loader import InputRequest, load_inputs, resolve_inputs
from voxelscope.core.model import ModelSettings

TR = 2.0
EVENTS = "onset\tduration\ttrial_type\n6\t12\ttone\n30\t12\ttap\n54\t12\ttone\n78\t12\ttap\n"
AFFINE = np.diag([3.0, 3.0, 3.0, 1.0])


def _write(tmp_path, name="sub-01_task-x_bold.nii.gz", data=None, sidecar=None, events=True):
    rng = np.random.default_rng(3)
    if data is None:
        data = 1000 + rng.standard_normal((5, 6, 4, 60)) * 10
    img = nib.Nifti1Image(np.asarray(data, np.float32), AFFINE)
    img.header.set_xyzt_units("mm", "sec")
    img.header["pixdim"][4] = TR
    path = tmp_path / name
    nib.save(img, path)
    stem = name.split("_bold")[0]
    if events:
        (tmp_path / f"{stem}_events.tsv").write_text(EVENTS)
    if sidecar is not None:
        (tmp_path / f"{stem}_bold.json").write_text(json.dumps(sidecar))
    return path


def _cache_files(tmp_path_factory):
    root = tmp_path_factory.getbasetemp() / "cache"
    return [p for p in root.rglob("*") if p.is_file()] if root.exists() else []


def test_missing_events_fails_before_any_cache_is_built(tmp_path, tmp_path_factory):
    """A named events file that does not exist is reported before the run is decompressed."""
    run = _write(tmp_path, events=False)
    before = _cache_files(tmp_path_factory)
    with pytest.raises(InputError, match="events file not found"):
        load_inputs(InputRequest(run, events=tmp_path / "nope_events.tsv"))
    with pytest.raises(InputError, match="no events file given and none found"):
        load_inputs(InputRequest(run))
    assert _cache_files(tmp_path_factory) == before


def test_unreadable_sidecar_fails_before_any_cache_is_built(tmp_path, tmp_path_factory):
    run = _write(tmp_path)
    (tmp_path / "sub-01_task-x_bold.json").write_text("{not json")
    before = _cache_files(tmp_path_factory)
    with pytest.raises(InputError, match=r"sub-01_task-x_bold\.json: the sidecar is not valid"):
        load_inputs(InputRequest(run))
    assert _cache_files(tmp_path_factory) == before


@pytest.mark.parametrize("name", ["sub-01_task-x_bold.nii", "sub-01_task-x_bold.nii.gz"])
def test_nan_warning_is_in_the_list_for_both_storages(tmp_path, name):
    """The drift the issue found: the NaN warning reached the window for .nii.gz only."""
    data = 1000 + np.random.default_rng(1).standard_normal((5, 6, 4, 60)) * 10
    data[0, 0, 0, 3] = np.nan
    got = load_inputs(InputRequest(_write(tmp_path, name, data=data)))
    assert any("NaN or infinite" in w for w in got.warnings)
    assert got.analysis is not None and got.events_path.name == "sub-01_task-x_events.tsv"


@pytest.mark.parametrize("start, atol", [(0.75, 1e-12), (0.975, 5e-4)])
def test_start_time_sets_the_reference_like_an_onset_shift(tmp_path, start, atol):
    """Sampling at StartTime s into each TR equals shifting every onset by -StartTime
    (regressors are functions of time since onset: x(t - onset) sampled at n*TR + s is
    x((n*TR) - (onset - s))); common practice, and BIDS for the meaning of StartTime.
    Exact when s is a multiple of the TR/16 regressor grid (0.75 s here); otherwise equal
    up to the grid's linear interpolation (measured at most 2.3e-4 at 0.975 s, peak about 1.1)."""
    run = _write(
        tmp_path, sidecar={"RepetitionTime": TR, "SliceTimingCorrected": True, "StartTime": start}
    )
    got = load_inputs(InputRequest(run, summarize=False))
    assert got.run.reference_time_s == start
    assert f"StartTime {start:g} s" in got.files_line()
    plain = load_inputs(InputRequest(_write(tmp_path / "..", "sub-02_task-x_bold.nii")))
    assert plain.run.reference_time_s == 0.0
    for kernel in ("double-gamma", "boxcar", "gamma"):
        a = got.analysis.design(kernel, ModelSettings()).column("tone")
        b = plain.analysis.design(kernel, ModelSettings(onset_shift_s=-start)).column("tone")
        np.testing.assert_allclose(a, b, rtol=0, atol=atol)


@pytest.mark.parametrize("start", [-0.1, 2.0, 5.0, "soon"])
def test_start_time_outside_the_tr_is_one_clear_line(tmp_path, start):
    run = _write(
        tmp_path, sidecar={"RepetitionTime": TR, "SliceTimingCorrected": True, "StartTime": start}
    )
    with pytest.raises(InputError, match=r"_bold\.json: StartTime .* below|_bold\.json: StartTime"):
        load_inputs(InputRequest(run, summarize=False))


def test_corrected_run_sets_raw_slice_timing_aside(tmp_path):
    """BIDS: after slice-timing correction SliceTiming no longer describes the data."""
    side = {
        "RepetitionTime": TR,
        "SliceTiming": [0.0, 1.0, 0.5, 1.5],
        "SliceTimingCorrected": True,
        "StartTime": 0.5,
    }
    got = load_inputs(InputRequest(_write(tmp_path, sidecar=side), summarize=False))
    assert got.run.slice_timing is None and got.run.reference_time_s == 0.5
    assert "SliceTiming set aside" in got.run.reference_source
    side = {"RepetitionTime": TR, "SliceTiming": [0.0, 1.0, 0.5, 1.5]}
    got = load_inputs(InputRequest(_write(tmp_path, sidecar=side), summarize=False))
    assert got.run.reference_time_s == 0.75 and "median SliceTiming" in got.run.reference_source


def test_mask_file_becomes_the_runs_mask(tmp_path):
    run = _write(tmp_path)
    m = np.zeros((5, 6, 4), np.uint8)
    m[1:4, 1:5, 1:3] = 1
    mask = tmp_path / "sub-01_task-x_desc-brain_mask.nii.gz"
    nib.save(nib.Nifti1Image(m, AFFINE), mask)
    got = load_inputs(InputRequest(run))  # found by its BIDS name
    assert got.mask_source == "file" and got.used_files()["mask"] == str(mask)
    np.testing.assert_array_equal(got.run.mask(), m.astype(bool))
    auto = load_inputs(InputRequest(run, mask="auto"))
    assert auto.mask_source == "intensity" and auto.used_files()["mask"] is None


def test_mask_on_another_grid_is_resampled_and_said(tmp_path):
    run = _write(tmp_path)
    fine = np.zeros((10, 12, 8), np.uint8)
    fine[2:8, 2:10, 2:6] = 1  # the same box as voxels 1..3, 1..4, 1..2 of the run
    aff = np.diag([1.5, 1.5, 1.5, 1.0])
    aff[:3, 3] = -0.75
    path = tmp_path / "mask_fine.nii"
    nib.save(nib.Nifti1Image(fine, aff), path)
    got = load_inputs(InputRequest(run, mask=path))
    assert any("nearest neighbour" in w for w in got.warnings)
    expect = np.zeros((5, 6, 4), bool)
    expect[1:4, 1:5, 1:3] = True
    np.testing.assert_array_equal(got.run.mask(), expect)


def test_empty_mask_is_one_clear_line(tmp_path):
    run = _write(tmp_path)
    path = tmp_path / "empty_mask.nii"
    nib.save(nib.Nifti1Image(np.zeros((5, 6, 4), np.uint8), AFFINE), path)
    with pytest.raises(InputError, match=r"empty_mask\.nii: the mask has no voxel inside"):
        load_inputs(InputRequest(run, mask=path))


def test_request_lists_its_inputs_and_never_modifies_them(tmp_path):
    run = _write(tmp_path)
    before = {p: p.read_bytes() for p in tmp_path.iterdir()}
    req = InputRequest(run, mask="auto")
    assert req.auto_mask and req.input_paths() == [run]
    load_inputs(req)
    assert {p: p.read_bytes() for p in tmp_path.iterdir()} == before
    r = resolve_inputs(InputRequest(run))
    assert r.events.name == "sub-01_task-x_events.tsv" and r.mask is None


def test_gzip_run_is_not_read_for_a_missing_run(tmp_path):
    with pytest.raises(InputError, match="run file not found"):
        load_inputs(InputRequest(tmp_path / "missing_bold.nii.gz"))


def test_events_options_go_through_the_one_way_in(tmp_path):
    """Issue 13 options reach the core loader: the condition column, onsets in volumes
    (times the TR) and the events file's own notes in the one warning list."""
    run = _write(tmp_path, "sub-01_task-x_bold.nii", events=False)
    (tmp_path / "sub-01_task-x_events.tsv").write_text(
        "onset\tduration\ttrial_type\thand\n3\t6\tpress\tL\n15\tn/a\tpress\tR\n27\t6\tpress\tL\n"
    )
    got = load_inputs(InputRequest(run, condition_column="hand", onset_unit="volumes"))
    assert got.analysis.condition_names == ("L", "R")
    np.testing.assert_allclose(got.analysis.conditions[0].onsets, [6.0, 54.0])  # volumes * TR
    np.testing.assert_allclose(got.analysis.conditions[0].durations, [12.0, 12.0])
    assert any("1 event(s) have duration n/a" in w for w in got.warnings)
    assert got.analysis.events_file.condition_candidates == ("trial_type", "hand")
    one = load_inputs(InputRequest(run, condition_column="none"))
    assert one.analysis.condition_names == ("x",)  # named after the task


def test_explicit_no_events_and_no_confounds_find_no_companions(tmp_path):
    """An explicit "no events" / "no confounds" (a session's refused entry) is distinct
    from "not given": a BIDS-named companion beside the run is not picked up instead."""
    run = _write(tmp_path, name="sub-01_task-x_bold.nii")
    (tmp_path / "sub-01_task-x_desc-confounds_timeseries.tsv").write_text("a\tb\n" + "1\t2\n" * 60)
    found = resolve_inputs(InputRequest(run))
    assert found.events is not None and found.confounds is not None  # not given: found
    refused = resolve_inputs(
        InputRequest(run, no_events=True, no_confounds=True, events_required=False)
    )
    assert refused.events is None and refused.confounds is None
    got = load_inputs(InputRequest(run, no_events=True, no_confounds=True, events_required=False))
    assert got.analysis is None and got.confounds is None
    assert got.used_files()["events"] is None and got.used_files()["confounds"] is None
    assert any("without events (none chosen)" in w for w in got.warnings)
    # the command line still needs events: refusing them is the same one line as none found
    with pytest.raises(InputError, match="no events file given"):
        resolve_inputs(InputRequest(run, no_events=True))
    # the two ways of saying it cannot be mixed
    with pytest.raises(ValueError):
        InputRequest(run, events=tmp_path / "e.tsv", no_events=True)


def test_explicit_no_events_skips_an_ambiguous_companion(tmp_path):
    run = _write(tmp_path, name="sub-01_task-x_bold.nii")
    (tmp_path / "sub-01_task-x_acq-b_events.tsv").write_text(EVENTS)
    (tmp_path / "sub-01_task-x_acq-c_events.tsv").write_text(EVENTS)
    refused = resolve_inputs(InputRequest(run, no_events=True, events_required=False))
    assert refused.events is None
