"""``voxelscope cache info`` and ``voxelscope cache clear`` (voxelscope/cli/cache.py)."""

from __future__ import annotations

import nibabel as nib
import numpy as np

from voxelscope.cli import main
from voxelscope.core.run import open_run


def test_cache_info_and_clear(tmp_path, capsys):
    data = np.random.default_rng(0).standard_normal((4, 5, 3, 12)).astype(np.float32) + 100
    path = tmp_path / "r.nii.gz"
    nib.save(nib.Nifti1Image(data, np.eye(4)), path)
    run = open_run(path, tr=2.0)  # builds the voxel-major cache under XDG_CACHE_HOME
    np.testing.assert_array_equal(run.timeseries((1, 2, 1)), data[1, 2, 1])
    assert main(["cache", "info"]) == 0
    out = capsys.readouterr().out
    assert ("1 cached run(s)" in out and str(path.resolve()) in out) or "r.nii.gz" in out
    assert main(["cache", "clear"]) == 0
    assert "removed 1 cached run(s)" in capsys.readouterr().out
    assert main(["cache", "info"]) == 0
    assert "0 cached run(s)" in capsys.readouterr().out
