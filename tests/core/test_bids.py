"""Companions by BIDS entities (voxelscope/core/bids.py, companions.py, loader.py).

Every rule checked here is the BIDS specification's (cited from memory): the file-name
structure and entity table ("sub", "ses", "task", "acq", "ce", "rec", "dir", "run", "echo"
identify an acquisition; "space", "res", "den", "desc" are derivative entities), the
inheritance principle (a metadata file applies to every file that has all its entities;
sidecars at dataset, subject, session and file level all apply, the nearest winning), the
derivatives layout (``derivatives/<pipeline>/`` under the raw dataset, or
``DatasetType: derivative``), and the preprocessed-BOLD sidecar fields
``SliceTimingCorrected`` / ``StartTime`` and the ``desc-brain_mask`` image.
"""

from __future__ import annotations

import json
import os

import nibabel as nib
import numpy as np
import pytest

from voxelscope.core import bids
from voxelscope.core.bids import IDENTIFYING, applies_to, find_dataset, find_for_run, parse_name
from voxelscope.core.companions import find_companions, merge_sidecars
from voxelscope.core.errors import InputError
from voxelscope.core.loader import InputRequest, load_inputs

EVENTS = "onset\tduration\ttrial_type\n4\t10\tgain\n30\t10\tloss\n"
AFF = np.diag([4.0, 4.0, 4.0, 1.0])
SHAPE = (6, 7, 4)
T = 40
PREP = "space-MNI_res-2_desc-preproc_bold"


def _json(path, obj):
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(obj))
    return path


def _text(path, text=EVENTS):
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(text)
    return path


def _nifti(path, data=None, affine=AFF, tr=2.0):
    path.parent.mkdir(parents=True, exist_ok=True)
    if data is None:
        data = 1000 + np.random.default_rng(len(str(path))).standard_normal((*SHAPE, T))
    img = nib.Nifti1Image(np.asarray(data, np.float32), affine)
    img.header.set_xyzt_units("mm", "sec")
    if np.ndim(data) == 4:
        img.header["pixdim"][4] = tr
    nib.save(img, path)
    return path


@pytest.fixture
def study(tmp_path):
    """A raw dataset with a derivatives dataset under it: two subjects with sessions, a
    subject without, a distractor subject ``sub-011``, sidecars at every level."""
    raw = tmp_path / "raw"
    _json(raw / "dataset_description.json", {"Name": "t", "BIDSVersion": "1.8.0"})
    _json(
        raw / "task-gamble_bold.json",
        {"RepetitionTime": 2.0, "SliceTiming": [0.0, 1.0, 0.5, 1.5], "Level": "dataset"},
    )
    _json(raw / "sub-01" / "sub-01_task-gamble_bold.json", {"Level": "subject", "S": 1})
    ses = raw / "sub-01" / "ses-1"
    _json(ses / "sub-01_ses-1_task-gamble_bold.json", {"Level": "session", "E": 1})
    func = ses / "func"
    for r in (1, 2):
        _nifti(func / f"sub-01_ses-1_task-gamble_run-{r}_bold.nii.gz")
        _text(func / f"sub-01_ses-1_task-gamble_run-{r}_events.tsv")
    _json(func / "sub-01_ses-1_task-gamble_run-1_bold.json", {"Level": "file", "F": 1})
    _text(raw / "sub-01" / "ses-2" / "func" / "sub-01_ses-2_task-gamble_run-1_events.tsv")
    _text(raw / "sub-011" / "ses-1" / "func" / "sub-011_ses-1_task-gamble_run-1_events.tsv")
    _json(raw / "sub-011" / "sub-011_task-gamble_bold.json", {"Level": "distractor"})
    _nifti(raw / "sub-02" / "func" / "sub-02_task-gamble_run-1_bold.nii.gz")
    _text(raw / "sub-02" / "func" / "sub-02_task-gamble_run-1_events.tsv")

    prep = raw / "derivatives" / "prep"
    _json(prep / "dataset_description.json", {"Name": "p", "DatasetType": "derivative"})
    dfunc = prep / "sub-01" / "ses-1" / "func"
    stem = f"sub-01_ses-1_task-gamble_run-1_{PREP}"
    run = _nifti(dfunc / f"{stem}.nii.gz")
    _json(
        dfunc / f"{stem}.json",
        {"SliceTimingCorrected": True, "StartTime": 0.975, "Level": "derivative"},
    )
    mask = np.zeros(SHAPE, np.uint8)
    mask[1:5, 1:6, 1:3] = 1
    _nifti(dfunc / "sub-01_ses-1_task-gamble_run-1_space-MNI_res-2_desc-brain_mask.nii.gz", mask)
    _nifti(dfunc / "sub-01_ses-1_task-gamble_run-1_space-T1w_desc-brain_mask.nii.gz", 1 - mask)
    _text(dfunc / "sub-01_ses-1_task-gamble_run-1_desc-confounds_timeseries.tsv", "a\n" + "1\n" * T)
    _text(dfunc / "sub-01_ses-1_task-gamble_run-2_desc-confounds_timeseries.tsv", "b\n" + "1\n" * T)
    return {"raw": raw, "prep": prep, "run": run, "func": func, "dfunc": dfunc}


def test_parse_name_follows_the_entity_structure():
    """BIDS file-name structure: key-value pairs, then suffix, then extension."""
    n = parse_name("sub-01_ses-pre_task-gamble_acq-mb_dir-AP_run-3_echo-2_bold.nii.gz")
    assert list(n.entities) == ["sub", "ses", "task", "acq", "dir", "run", "echo"]
    assert (n.suffix, n.extension) == ("bold", ".nii.gz")
    assert n.identifying() == n.entities
    d = parse_name("sub-01_task-a_space-MNI152NLin2009cAsym_res-2_desc-preproc_bold.nii.gz")
    assert d.identifying() == {"sub": "01", "task": "a"}
    assert parse_name("sub-01_sub-02_bold.nii") is None  # an entity given twice
    assert set(IDENTIFYING) == {"sub", "ses", "task", "acq", "ce", "rec", "dir", "run", "echo"}


def test_inheritance_subset_rule():
    """Inheritance principle: a file applies when all its entities are the run's."""
    run = parse_name("sub-01_ses-1_task-a_run-1_bold.nii.gz")
    assert applies_to(parse_name("task-a_bold.json"), run)
    assert applies_to(parse_name("sub-01_task-a_bold.json"), run)
    assert not applies_to(parse_name("sub-011_task-a_bold.json"), run)
    assert not applies_to(parse_name("sub-01_task-a_acq-x_bold.json"), run)
    assert not applies_to(parse_name("task-b_bold.json"), run)


def test_derivative_run_finds_raw_events_and_every_sidecar_level(study):
    c = find_companions(study["run"])
    func, dfunc, raw = study["func"], study["dfunc"], study["raw"]
    assert c.events == func / "sub-01_ses-1_task-gamble_run-1_events.tsv"  # not run-2, sub-011
    assert c.confounds == dfunc / "sub-01_ses-1_task-gamble_run-1_desc-confounds_timeseries.tsv"
    assert c.mask.name == "sub-01_ses-1_task-gamble_run-1_space-MNI_res-2_desc-brain_mask.nii.gz"
    # farthest first: raw dataset, subject, session, file; then the derivative's own sidecar
    assert [p.relative_to(raw).as_posix() for p in c.sidecars] == [
        "task-gamble_bold.json",
        "sub-01/sub-01_task-gamble_bold.json",
        "sub-01/ses-1/sub-01_ses-1_task-gamble_bold.json",
        "sub-01/ses-1/func/sub-01_ses-1_task-gamble_run-1_bold.json",
        f"derivatives/prep/sub-01/ses-1/func/sub-01_ses-1_task-gamble_run-1_{PREP}.json",
    ]
    assert c.sidecar == c.sidecars[-1]
    meta, origin = merge_sidecars(c.sidecars)
    assert meta["Level"] == "derivative" and origin["Level"] == c.sidecars[-1]  # nearest wins
    assert (meta["S"], meta["E"], meta["F"], meta["RepetitionTime"]) == (1, 1, 1, 2.0)


def test_raw_run_nearest_sidecar_wins(study):
    run = study["func"] / "sub-01_ses-1_task-gamble_run-1_bold.nii.gz"
    c = find_companions(run)
    assert len(c.sidecars) == 4 and c.dataset.derivative is False
    meta, _ = merge_sidecars(c.sidecars)
    assert meta["Level"] == "file"
    run2 = study["func"] / "sub-01_ses-1_task-gamble_run-2_bold.nii.gz"
    meta2, _ = merge_sidecars(find_companions(run2).sidecars)
    assert meta2["Level"] == "session"  # run 2 has no file-level sidecar
    c2 = find_companions(study["raw"] / "sub-02" / "func" / "sub-02_task-gamble_run-1_bold.nii.gz")
    assert c2.events.name == "sub-02_task-gamble_run-1_events.tsv"
    assert [p.name for p in c2.sidecars] == ["task-gamble_bold.json"]  # not sub-01's, sub-011's


def test_loader_uses_start_time_and_sets_raw_slice_timing_aside(study):
    got = load_inputs(InputRequest(study["run"]))
    assert got.run.reference_time_s == 0.975 and got.run.slice_timing is None
    assert "SliceTiming set aside" in got.run.reference_source
    assert got.mask_source == "file" and int(got.run.mask().sum()) == 4 * 5 * 2
    used = got.used_files()
    assert used["events"].endswith("ses-1/func/sub-01_ses-1_task-gamble_run-1_events.tsv")
    assert len(used["sidecars"]) == 5 and used["mask"].endswith("res-2_desc-brain_mask.nii.gz")
    raw_run = study["func"] / "sub-01_ses-1_task-gamble_run-1_bold.nii.gz"
    raw = load_inputs(InputRequest(raw_run))
    assert raw.run.reference_time_s == 0.75  # median of the 4 raw slice times, 4 slices


def test_raw_slice_timing_with_the_wrong_slice_count_is_set_aside_and_said(study):
    _json(
        study["func"] / "sub-01_ses-1_task-gamble_run-1_bold.json",
        {"SliceTiming": [0.0, 0.5, 1.0]},  # the grid has 4 slices
    )
    got = load_inputs(
        InputRequest(study["func"] / "sub-01_ses-1_task-gamble_run-1_bold.nii.gz", summarize=False)
    )
    assert got.run.reference_time_s == 0.0
    assert any("SliceTiming has 3 values but the run has 4 slices" in w for w in got.warnings)


def test_two_candidate_events_files_name_both(study):
    extra = _text(study["func"] / "sub-01_ses-1_task-gamble_run-1_desc-old_events.tsv")
    with pytest.raises(InputError, match="2 events files match this run") as err:
        load_inputs(InputRequest(study["run"]))
    assert str(extra) in str(err.value) and err.value.remedy == "choose_events"
    chosen = study["func"] / "sub-01_ses-1_task-gamble_run-1_events.tsv"
    assert load_inputs(InputRequest(study["run"], events=chosen)).events_path == chosen


def test_bad_dataset_description_is_one_clear_line(study):
    (study["prep"] / "dataset_description.json").write_text("{oops")
    with pytest.raises(InputError, match=r"prep/dataset_description\.json: .* not valid JSON"):
        load_inputs(InputRequest(study["run"]))


def test_bids_root_for_a_derivatives_dataset_elsewhere(study, tmp_path):
    """A derivatives dataset outside the raw one: ``DatasetType: derivative``; its raw
    dataset is named with --bids-root."""
    out = tmp_path / "elsewhere"
    _json(out / "dataset_description.json", {"Name": "o", "DatasetType": "derivative"})
    src = study["run"]
    run = out / "sub-01" / "ses-1" / "func" / src.name
    run.parent.mkdir(parents=True)
    run.write_bytes(src.read_bytes())
    assert find_companions(run).events is None
    ds = find_dataset(run)
    assert ds.derivative and ds.raw_root is None
    c = find_companions(run, bids_root=study["raw"])
    assert c.events == study["func"] / "sub-01_ses-1_task-gamble_run-1_events.tsv"
    with pytest.raises(InputError, match="--bids-root is not a folder"):
        find_companions(run, bids_root=tmp_path / "nope")


def test_mask_on_another_grid_is_resampled(study):
    fine = np.zeros((12, 14, 8), np.uint8)
    fine[2:10, 2:12, 2:6] = 1  # the run's voxels 1..4, 1..5, 1..2 at twice the resolution
    aff = np.diag([2.0, 2.0, 2.0, 1.0])
    aff[:3, 3] = -1.0
    dfunc = study["dfunc"]
    (dfunc / "sub-01_ses-1_task-gamble_run-1_space-MNI_res-2_desc-brain_mask.nii.gz").unlink()
    _nifti(
        dfunc / "sub-01_ses-1_task-gamble_run-1_space-MNI_res-1_desc-brain_mask.nii.gz", fine, aff
    )
    got = load_inputs(InputRequest(study["run"]))
    assert any("resampled onto the run's grid by nearest neighbour" in w for w in got.warnings)
    assert int(got.run.mask().sum()) == 4 * 5 * 2


def test_only_the_folders_the_entities_name_are_listed(study, monkeypatch):
    """No scan of the dataset: 30 more subjects change nothing in what is listed."""
    for i in range(30):
        _text(study["raw"] / f"sub-1{i:02d}" / "func" / f"sub-1{i:02d}_task-gamble_events.tsv")
    listed = []
    real = os.scandir

    def spy(path="."):
        listed.append(os.path.abspath(path))
        return real(path)

    monkeypatch.setattr(bids.os, "scandir", spy)
    find_for_run(study["run"])
    raw, prep = study["raw"], study["prep"]
    expect = {
        str(p)
        for p in (
            raw,
            raw / "sub-01",
            raw / "sub-01" / "ses-1",
            study["func"],
            prep,
            prep / "sub-01",
            prep / "sub-01" / "ses-1",
            study["dfunc"],
        )
    }
    assert set(listed) <= expect and len(listed) <= 3 * len(expect)
