"""Tests of voxelscope.core.companions.

Reference: the BIDS specification's file naming (``<entities>_bold.nii[.gz]`` with
``<entities>_events.tsv`` and the sidecar ``<entities>_bold.json`` beside it; derivative
entities such as ``space-`` and ``desc-``).
"""

from __future__ import annotations

from pathlib import Path

import pytest

from voxelscope.core.companions import Companions, find_companions, run_stem


def _touch(folder: Path, *names: str) -> None:
    for name in names:
        (folder / name).write_text("")


@pytest.mark.parametrize("ext", [".nii", ".nii.gz"])
def test_bold_run(tmp_path, ext):
    _touch(
        tmp_path,
        f"sub-01_task-tt_run-1_bold{ext}",
        "sub-01_task-tt_run-1_events.tsv",
        "sub-01_task-tt_run-1_bold.json",
        "sub-01_task-tt_run-1_confounds.tsv",
        "sub-01_task-tt_run-2_events.tsv",
    )
    c = find_companions(tmp_path / f"sub-01_task-tt_run-1_bold{ext}")
    assert c == Companions(
        events=tmp_path / "sub-01_task-tt_run-1_events.tsv",
        sidecar=tmp_path / "sub-01_task-tt_run-1_bold.json",
        confounds=tmp_path / "sub-01_task-tt_run-1_confounds.tsv",
        sidecars=(tmp_path / "sub-01_task-tt_run-1_bold.json",),
    )


def test_confounds_csv_accepted(tmp_path):
    _touch(tmp_path, "x_bold.nii.gz", "x_confounds.csv")
    assert find_companions(tmp_path / "x_bold.nii.gz").confounds == tmp_path / "x_confounds.csv"


def test_tsv_preferred_over_csv(tmp_path):
    _touch(tmp_path, "x_bold.nii.gz", "x_confounds.csv", "x_confounds.tsv")
    assert find_companions(tmp_path / "x_bold.nii.gz").confounds == tmp_path / "x_confounds.tsv"


def test_run_without_bold_suffix(tmp_path):
    _touch(tmp_path, "myrun.nii", "myrun_events.tsv", "myrun.json", "myrun_confounds.tsv")
    c = find_companions(tmp_path / "myrun.nii")
    assert c.events == tmp_path / "myrun_events.tsv"
    assert c.sidecar == tmp_path / "myrun.json"
    assert c.confounds == tmp_path / "myrun_confounds.tsv"


def test_nothing_beside(tmp_path):
    _touch(tmp_path, "lonely_bold.nii.gz", "other_events.tsv")
    assert find_companions(tmp_path / "lonely_bold.nii.gz") == Companions(None, None, None)


def test_directories_are_not_files(tmp_path):
    _touch(tmp_path, "a_bold.nii")
    (tmp_path / "a_events.tsv").mkdir()
    assert find_companions(tmp_path / "a_bold.nii").events is None


def test_derivative_entities_fall_back_to_raw_names(tmp_path):
    run = "sub-01_task-tt_space-MNI_desc-preproc_bold.nii.gz"
    _touch(
        tmp_path,
        run,
        "sub-01_task-tt_events.tsv",
        "sub-01_task-tt_space-MNI_desc-preproc_bold.json",
        "sub-01_task-tt_desc-confounds_timeseries.tsv",
    )
    c = find_companions(tmp_path / run)
    assert c.events == tmp_path / "sub-01_task-tt_events.tsv"
    assert c.sidecar == tmp_path / "sub-01_task-tt_space-MNI_desc-preproc_bold.json"
    assert c.confounds == tmp_path / "sub-01_task-tt_desc-confounds_timeseries.tsv"


def test_run_stem():
    assert run_stem("a/b/x_bold.nii.gz") == "x_bold"
    assert run_stem("X.NII") == "X"
    assert run_stem("y.nii") == "y"
