"""The coordinate box under Slices, the reset-view button and the atlas region in the
readout (issue 17 item 6)."""

from __future__ import annotations

import nibabel as nib
import numpy as np
import pytest
from nibabel.affines import apply_affine
from PySide6.QtCore import Qt

from voxelscope.core.errors import InputError
from voxelscope.gui.goto import parse_position


def _open(window, spec, **kw):
    assert window.open_run(spec["run"], background=False, **kw), window.last_error
    return window.state


def _type(qtbot, box, text):
    box.edit.setFocus()
    box.edit.clear()
    qtbot.keyClicks(box.edit, text)
    qtbot.keyClick(box.edit, Qt.Key.Key_Return)


def test_parse_position_forms_and_errors():
    assert parse_position("1 2 3", "voxel") == ("voxel", (1.0, 2.0, 3.0))
    assert parse_position("[1.5, -2, 3e1]", "mm") == ("mm", (1.5, -2.0, 30.0))
    assert parse_position("1 2 3 mm", "voxel")[0] == "mm"
    for bad, needle in [
        ("1 2", "type three numbers"),
        ("1 2 x", "'x' is not a number"),
        ("1 2 3 4", "type three numbers"),
        ("1 2 nan", "'nan' is not a number"),
        ("1.5 2 3", "whole numbers"),
    ]:
        with pytest.raises(InputError, match=needle):
            parse_position(bad, "voxel")


def test_enter_goes_to_a_voxel_or_a_world_position(window, qtbot, permuted_run):
    """Voxel indices and mm (through the run's affine, nearest voxel, as `fit --mm`)."""
    st = _open(window, permuted_run)
    box = window.slices.goto
    _type(qtbot, box, "3 4 2")
    assert st.voxel == (3, 4, 2)
    target = (5, 2, 1)
    mm = apply_affine(permuted_run["affine"], target) + 0.4  # off-centre: nearest voxel
    _type(qtbot, box, " ".join(f"{v:.2f}" for v in mm) + " mm")
    assert st.voxel == target
    assert not box.edit.property("invalid")


def test_bad_text_or_outside_the_grid_is_one_status_line(window, qtbot, ras_run):
    st = _open(window, ras_run)
    box = window.slices.goto
    before = st.voxel
    _type(qtbot, box, "2 3")
    msg = window.statusBar().currentMessage()
    assert msg.startswith("Go to: ") and "three numbers" in msg and "\n" not in msg
    assert box.edit.property("invalid") and st.voxel == before
    _type(qtbot, box, "50 3 2")
    msg = window.statusBar().currentMessage()
    assert "outside" in msg or "out of" in msg or "grid" in msg, msg
    assert st.voxel == before
    _type(qtbot, box, "900 0 0 mm")
    assert "outside the grid" in window.statusBar().currentMessage()
    assert st.voxel == before
    box.edit.setText("1 1 1")  # typing clears the red mark
    assert not box.edit.property("invalid")


def test_reset_view_undoes_zoom_and_pan(window, qtbot, ras_run):
    _open(window, ras_run)
    view = window.slices.views["axial"]
    start = view.box.viewRange()
    view.box.scaleBy((0.5, 0.5))
    view.box.translateBy(x=4.0, y=-3.0)
    assert view.box.viewRange() != start
    qtbot.mouseClick(window.slices.goto.reset, Qt.MouseButton.LeftButton)
    assert np.allclose(view.box.viewRange(), start)
    assert "zoom" in view.toolTip() and "Home" in window.slices.goto.reset.toolTip()


def test_atlas_region_in_the_readout(window, qtbot, ras_run, tmp_path):
    """The region at the cursor, from an atlas on another (flipped, finer) grid, equals the
    lookup through nibabel.affines.apply_affine; File > Open atlas works on an open run."""
    aff = np.diag([-1.5, 1.5, 1.75, 1.0])
    aff[:3, 3] = (20.0, -15.0, -9.0)
    labels = np.zeros((30, 24, 16), np.int16)
    labels[:15] = 2  # x > ~-2.5 mm in world (the flipped axis)
    atlas = tmp_path / "atlas-test_dseg.nii.gz"
    nib.save(nib.Nifti1Image(labels, aff), atlas)
    (tmp_path / "atlas-test_dseg.tsv").write_text("index\tname\n2\tright <b>part</b>\n")
    st = _open(window, ras_run, atlas=str(atlas))
    readout = window.slices.readout
    for ijk in [(0, 0, 0), (8, 10, 6), (4, 5, 3), (2, 7, 1)]:
        st.set_voxel(ijk)
        mm = apply_affine(ras_run["affine"], ijk)
        a = np.floor(apply_affine(np.linalg.inv(aff), mm) + 0.5).astype(int)
        inside = np.all(a >= 0) and np.all(a < labels.shape)
        want = (
            "outside the atlas"
            if not inside
            else ("right &lt;b&gt;part&lt;/b&gt;" if labels[tuple(a)] == 2 else "background")
        )
        assert f"<b>Region</b> {want}" in readout.text(), (ijk, readout.text())
    st.set_atlas(None)
    assert "Region" not in readout.text()
    assert window.open_atlas(str(atlas))
    assert "Region" in readout.text() and "named regions" in window.statusBar().currentMessage()
    (tmp_path / "atlas-test_dseg.tsv").write_text("index\tname\n2\t\n")
    assert not window.open_atlas(str(atlas))
    assert "row 2, column name" in window.last_error
