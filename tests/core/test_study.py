"""Listing a study (voxelscope/core/study.py) against a BIDS tree built here.

BIDS specification (from memory): runs live in ``sub-<label>[/ses-<label>]/func`` of the raw
dataset and of each derivatives dataset under ``derivatives/``; companions are found by
entities and the inheritance principle (tested in tests/core/test_bids.py).
"""

from __future__ import annotations

import json

import pytest

from voxelscope.core.errors import InputError
from voxelscope.core.study import list_study


def _touch(path, text=""):
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(text)
    return path


@pytest.fixture
def tree(tmp_path):
    raw = tmp_path / "raw"
    _touch(raw / "dataset_description.json", json.dumps({"Name": "r", "BIDSVersion": "1.8"}))
    _touch(raw / "task-a_bold.json", json.dumps({"RepetitionTime": 2}))
    for sub, ses in (("01", "1"), ("01", "2"), ("02", None)):
        func = raw / f"sub-{sub}" / (f"ses-{ses}" if ses else "") / "func"
        stem = f"sub-{sub}" + (f"_ses-{ses}" if ses else "") + "_task-a_run-1"
        _touch(func / f"{stem}_bold.nii.gz")
        if (sub, ses) != ("02", None):  # sub-02 has no events
            _touch(func / f"{stem}_events.tsv", "onset\tduration\n")
    prep = raw / "derivatives" / "prep"
    _touch(
        prep / "dataset_description.json", json.dumps({"Name": "p", "DatasetType": "derivative"})
    )
    dfunc = prep / "sub-01" / "ses-1" / "func"
    _touch(dfunc / "sub-01_ses-1_task-a_run-1_space-X_desc-preproc_bold.nii.gz")
    _touch(dfunc / "sub-01_ses-1_task-a_run-1_space-X_desc-brain_mask.nii.gz")
    _touch(dfunc / "sub-01_ses-1_task-a_run-1_desc-confounds_timeseries.tsv", "a\n1\n")
    _touch(raw / "derivatives" / "broken" / "dataset_description.json", "{oops")
    return raw


def test_lists_raw_and_derivative_runs_with_found_and_missing(tree):
    study = list_study(tree)
    rows = [
        (r.dataset, r.subject, r.session, r.task, r.run, tuple(r.missing())) for r in study.runs
    ]
    assert rows[:3] == [
        ("raw", "01", "1", "a", "1", ("confounds", "mask")),
        ("raw", "01", "2", "a", "1", ("confounds", "mask")),
        ("raw", "02", "", "a", "1", ("events", "confounds", "mask")),
    ]
    prep = [r for r in study.runs if r.dataset == "prep"]
    assert len(prep) == 1 and prep[0].missing() == [] and prep[0].label == "space-X_desc-preproc"
    assert prep[0].events.name == "sub-01_ses-1_task-a_run-1_events.tsv"  # from the raw tree
    broken = [r for r in study.runs if r.dataset == "broken"]
    assert len(broken) == 1 and "not valid JSON" in broken[0].problem
    assert study.summary() == (
        "2 subject(s), 2 session(s), 1 task(s), 4 run(s); 1 without events; "
        "1 with a problem (see the note)"
    )


def test_a_derivatives_dataset_on_its_own(tree):
    study = list_study(tree / "derivatives" / "prep")
    assert [r.dataset for r in study.runs] == ["prep"]
    assert study.runs[0].found("events")


def test_not_a_study_is_one_clear_line(tmp_path):
    with pytest.raises(InputError, match="not a BIDS dataset"):
        list_study(tmp_path)
    with pytest.raises(InputError, match="not a folder"):
        list_study(tmp_path / "nope")
    _touch(tmp_path / "dataset_description.json", "{}")
    with pytest.raises(InputError, match="no BOLD runs"):
        list_study(tmp_path)
