"""``voxelscope cache info`` and ``voxelscope cache clear`` (voxelscope/cli/cache.py)."""

from __future__ import annotations

from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

from voxelscope.cli import main
from voxelscope.core.run import open_run


@pytest.fixture(autouse=True)
def _own_cache(tmp_path, monkeypatch):
    """A cache folder of this test's own (the shared one holds other tests' entries)."""
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "own-cache"))
    monkeypatch.delenv("VOXELSCOPE_CACHE_LIMIT", raising=False)


def test_cache_info_and_clear(tmp_path, capsys):
    data = np.random.default_rng(0).standard_normal((4, 5, 3, 12)).astype(np.float32) + 100
    path = tmp_path / "r.nii.gz"
    nib.save(nib.Nifti1Image(data, np.eye(4)), path)
    run = open_run(path, tr=2.0)  # builds the fast-access copy under XDG_CACHE_HOME
    np.testing.assert_array_equal(run.timeseries((1, 2, 1)), data[1, 2, 1])
    assert main(["cache", "info"]) == 0
    out = capsys.readouterr().out
    assert ("1 cached run(s)" in out and str(path.resolve()) in out) or "r.nii.gz" in out
    assert main(["cache", "clear"]) == 0
    assert "removed 1 cached run(s)" in capsys.readouterr().out
    assert main(["cache", "info"]) == 0
    assert "0 cached run(s)" in capsys.readouterr().out


def test_cache_clear_one_run_and_info_lists_last_use(tmp_path, capsys):
    """Issue 18: ``cache clear RUN`` removes that run's entry only; ``cache info`` lists
    each run with its size and last use, and the limit."""
    paths = []
    for i in range(2):
        data = np.random.default_rng(i).standard_normal((4, 5, 3, 12)).astype(np.float32)
        paths.append(tmp_path / f"r{i}.nii.gz")
        nib.save(nib.Nifti1Image(data + 100, np.eye(4)), paths[-1])
        open_run(paths[-1], tr=2.0)
    assert main(["cache", "info"]) == 0
    out = capsys.readouterr().out
    assert "last use" in out and "2 cached run(s)" in out and "(limit 18.6 GB)" in out
    assert main(["cache", "clear", str(paths[0])]) == 0
    assert "removed 1 cached run(s)" in capsys.readouterr().out
    assert main(["cache", "info"]) == 0
    out = capsys.readouterr().out
    assert "1 cached run(s)" in out and "r1.nii.gz" in out and "r0.nii.gz" not in out


def test_fit_on_a_damaged_cache_gives_the_same_numbers_and_says_so(tmp_path, capsys, monkeypatch):
    """Issue 11 item 2, end to end: bytes flipped all through the cached rows of the demo
    run do not change ``voxelscope fit`` (reference: the numbers of the first, clean run);
    its warnings say the cache was damaged and rebuilt; exit 0."""
    import json
    import shutil

    from voxelscope.core import cache

    sample = Path(__file__).resolve().parents[2] / "sample_data" / "study"
    prep = sample / "derivatives" / "prep" / "sub-demo" / "func"
    stem = "sub-demo_task-tonetap_run-1"
    for path in (
        prep / f"{stem}_space-phantom_desc-preproc_bold.nii.gz",
        prep / f"{stem}_space-phantom_desc-preproc_bold.json",
        sample / "sub-demo" / "func" / f"{stem}_events.tsv",
    ):
        shutil.copy(path, tmp_path / path.name)
    run = tmp_path / f"{stem}_space-phantom_desc-preproc_bold.nii.gz"
    argv = ["fit", str(run), "--voxel", "6", "23", "15", "--format", "json"]
    assert main(argv) == 0
    clean = json.loads(capsys.readouterr().out)
    (rows,) = cache.default_cache_dir().glob("vxs-*.rows")
    blob = bytearray(rows.read_bytes())
    for at in range(0, len(blob), 997):
        blob[at] ^= 0x41
    rows.write_bytes(bytes(blob))
    assert main(argv) == 0
    again = json.loads(capsys.readouterr().out)
    assert again["fits"] == clean["fits"]
    said = [w for w in again["warnings"] if "is damaged" in w and "rebuilt" in w]
    assert len(said) == 1


def test_big_cache_is_announced_on_stderr_before_the_fit(tmp_path, capsys, monkeypatch):
    """Issue 11 item 8 on the command line: the line with the size reaches stderr as the
    cache is about to be written (not only with the warnings at the end)."""
    import shutil

    from voxelscope.core import cache

    monkeypatch.setattr(cache, "ANNOUNCE_BYTES", 1)
    sample = Path(__file__).resolve().parents[2] / "sample_data" / "study"
    prep = sample / "derivatives" / "prep" / "sub-demo" / "func"
    stem = "sub-demo_task-tonetap_run-1"
    for path in (
        prep / f"{stem}_space-phantom_desc-preproc_bold.nii.gz",
        sample / "sub-demo" / "func" / f"{stem}_events.tsv",
    ):
        shutil.copy(path, tmp_path / path.name)
    run = tmp_path / f"{stem}_space-phantom_desc-preproc_bold.nii.gz"
    assert main(["fit", str(run), "--voxel", "6", "23", "15", "--format", "json"]) == 0
    err = capsys.readouterr().err
    assert err.count("fast-access copy of the run") == 1 and "voxelscope: " in err
    assert " MB fast-access copy of the run" in err and "voxel-major" not in err
