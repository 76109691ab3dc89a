"""Agreement: our live map against an outside map.

References: numpy.corrcoef over the compared voxels (Pearson r, textbook formula);
linear interpolation reproduces a linear function of position exactly (a fact of the
trade / of trilinear interpolation), so an outside map that is linear in mm, written on
another grid, must read at every voxel as that function at the voxel's mm position;
voxelscope.core.agreement.compare_maps for the disagreement mask.
"""

import nibabel as nib
import numpy as np

from voxelscope.core.agreement import compare_maps
from voxelscope.core.numfmt import format_value, stat_kind
from voxelscope.gui.state import LiveLayer


def _open(window, files):
    assert window.open_run(files["run"], background=False)
    assert window.map_panel.live.flush(20000)
    return window.state, window.agreement


def _linear_map(tmp_path, affine_run, shape_run):
    """A map on a grid twice as fine, shifted by half a voxel: value = 0.3x - 0.2y + 0.1z + 1."""
    aff = np.array(affine_run, float).copy()
    aff[:3, :3] /= 2.0
    aff[:3, 3] -= 0.25 * np.diag(affine_run)[:3]
    shape = tuple(2 * n + 2 for n in shape_run)
    ijk = np.stack(np.meshgrid(*[np.arange(n) for n in shape], indexing="ij"), -1)
    mm = ijk @ aff[:3, :3].T + aff[:3, 3]
    data = (0.3 * mm[..., 0] - 0.2 * mm[..., 1] + 0.1 * mm[..., 2] + 1.0).astype(np.float32)
    path = tmp_path / "theirs_linear.nii.gz"
    nib.save(nib.Nifti1Image(data, aff), str(path))
    return path


def _wait(qtbot, panel):
    qtbot.waitUntil(
        lambda: panel.agreement is not None and panel.compare_job is None, timeout=10000
    )


def test_value_at_voxel_is_their_resampled_value(window, qtbot, ras_run, tmp_path):
    state, panel = _open(window, ras_run)
    path = _linear_map(tmp_path, ras_run["affine"], ras_run["shape"])
    assert panel.load_their_map(path)
    _wait(qtbot, panel)
    window.docks["Agreement"].raise_()  # a part behind another tab draws nothing
    qtbot.waitUntil(lambda: not panel.visibleRegion().isEmpty(), timeout=5000)
    for v in [(4, 5, 3), ras_run["hot"], (1, 1, 1)]:
        state.set_voxel(v)
        x, y, z = state.run.voxel_to_mm(v)
        ours, theirs = panel.value_at(v)
        assert abs(theirs - (0.3 * x - 0.2 * y + 0.1 * z + 1.0)) < 1e-4
        assert ours == float(window.state.model_map.t[v])
        kind = stat_kind(state.map_settings.stat)
        assert f"theirs <b>{format_value(kind, theirs)}</b>" in panel.at_voxel.text()


def test_correlation_equals_numpy_corrcoef(window, qtbot, ras_run):
    _state, panel = _open(window, ras_run)
    assert panel.load_their_map(ras_run["map"])
    _wait(qtbot, panel)
    model = window.state.model_map
    theirs = nib.load(str(ras_run["map"])).get_fdata()  # the same grid: no resampling
    region = model.mask & np.isfinite(theirs)
    r = np.corrcoef(model.t[region].astype(float), theirs[region])[0, 1]
    assert abs(panel.agreement.r - r) < 1e-9
    assert f"r {format_value('r', r)}" in panel.summary.text()
    assert panel.scatter.data.size == int(region.sum())  # fewer than 5000: every voxel


def test_disagreement_overlay(window, qtbot, ras_run):
    state, panel = _open(window, ras_run)
    assert panel.load_their_map(ras_run["map"])
    _wait(qtbot, panel)
    panel.tolerance.setValue(2.0)
    qtbot.waitUntil(lambda: panel.agreement.tolerance == 2.0 and panel.compare_job is None)
    panel.show_differ.setChecked(True)
    layer = state.overlay
    assert isinstance(layer, LiveLayer) and layer.source == "disagreement"
    model = window.state.model_map
    ref = compare_maps(model, panel.theirs, tolerance=2.0)
    np.testing.assert_array_equal(np.isfinite(layer.data), ref.disagree)
    assert state.map_settings.threshold == 0.0
    panel.show_differ.setChecked(False)
    assert state.map_settings.source == "model" and state.map_settings.threshold == 3.0


def test_map_that_does_not_overlap_is_one_line(window, ras_run, tmp_path):
    _state, panel = _open(window, ras_run)
    far = np.diag([3.0, 3.0, 3.0, 1.0])
    far[:3, 3] = 5000.0
    path = tmp_path / "far_map.nii"
    nib.save(nib.Nifti1Image(np.ones((4, 4, 4), np.float32), far), str(path))
    assert not panel.load_their_map(path)
    msg = window.statusBar().currentMessage()
    assert "far_map.nii" in msg and "overlap" in msg and "\n" not in msg


def test_explain_runs_in_background(window, qtbot, ras_run):
    _state, panel = _open(window, ras_run)
    assert panel.load_their_map(ras_run["map"])
    _wait(qtbot, panel)
    panel.explain_button.click()
    assert panel.explain_job is not None
    qtbot.waitUntil(lambda: panel.explain_job is None, timeout=30000)
    assert panel.explanation is not None
    assert panel.statement.text() == panel.explanation.statement


def test_demo_uses_the_pipeline_map(window, qtbot, demo_files):
    from voxelscope.gui.app import demo_paths

    d = demo_paths()
    assert window.open_run(
        d["run"],
        d["events"],
        d["confounds"],
        d["anatomy"],
        d["map"],
        voxel=d["voxel"],
        background=False,
    )
    assert window.map_panel.live.flush(20000)
    panel = window.agreement
    assert panel.their_path == d["map"]
    _wait(qtbot, panel)
    assert np.isfinite(panel.agreement.r)
