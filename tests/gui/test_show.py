"""Show mode: only Slices, Signal and Fits; arrows step through marks; Esc restores."""

import numpy as np
import pytest
from PySide6.QtCore import Qt
from PySide6.QtGui import QImage

from voxelscope.core.marks import Mark, MarkList

AFFINE = np.diag([3.0, 3.0, 3.5, 1.0])
AFFINE[:3, 3] = (-12.0, -15.0, -9.0)  # the ras_run fixture's affine (tests/gui/conftest.py)
VOXELS = [(2, 3, 4), (6, 8, 1), (4, 4, 4)]


def world(ijk, offset=(0.0, 0.0, 0.0)):
    return tuple(float(v) for v in (AFFINE @ np.array([*ijk, 1.0]))[:3] + np.array(offset))


def nearest(xyz):
    """round(inverse(affine) @ xyz): the nearest voxel, computed independently here."""
    frac = np.linalg.solve(AFFINE, np.array([*xyz, 1.0]))[:3]
    return tuple(int(v) for v in np.floor(frac + 0.5))


@pytest.fixture
def shown(window, ras_run):
    assert window.open_run(ras_run["run"], background=False)
    marks = [
        Mark(*world(v, (0.9, -1.1, 1.2)), f"mark {n}", f"note {n}")
        for n, v in enumerate(VOXELS, start=1)
    ]
    window.state.set_marks(MarkList(marks))
    return window


def visible_docks(window):
    return {t for t, d in window.docks.items() if d.isVisible()}


def test_show_mode_keeps_only_slices_signal_and_fits(shown):
    before = visible_docks(shown)
    assert {"Model", "Fits"} <= before
    shown.show_mode.enter()
    assert shown.show_mode.active
    assert visible_docks(shown) == set()  # Fits sits beside the slices, out of its dock
    assert shown.slices.isVisible() and shown.signal.isVisible() and shown.fits.isVisible()
    assert shown.fits.parent() is shown.show_mode.top
    assert not shown.menuBar().isVisible()
    banner = shown.show_mode.banner
    assert banner.isVisible()
    assert banner.title.text() == "mark 1" and banner.note.text() == "note 1"
    assert banner.title.font().pixelSize() >= 30 or banner.title.fontInfo().pixelSize() >= 30
    assert shown.state.voxel == nearest(shown.state.marks[0].xyz_mm) == VOXELS[0]


def test_arrows_step_through_marks_in_show_mode(shown, qtbot):
    view = shown.slices.views["axial"]
    shown.show_mode.enter()
    qtbot.keyClick(view, Qt.Key.Key_Right)
    assert shown.state.voxel == VOXELS[1]
    assert shown.show_mode.banner.title.text() == "mark 2"
    qtbot.keyClick(view, Qt.Key.Key_PageDown)
    assert shown.state.voxel == VOXELS[2]
    qtbot.keyClick(view, Qt.Key.Key_Right)  # already the last mark: stays
    assert shown.state.voxel == VOXELS[2]
    qtbot.keyClick(view, Qt.Key.Key_Left)
    assert shown.state.voxel == VOXELS[1]
    qtbot.keyClick(view, Qt.Key.Key_PageUp)
    assert shown.state.voxel == VOXELS[0]
    qtbot.keyClick(view, Qt.Key.Key_End)
    assert shown.state.voxel == VOXELS[2]
    qtbot.keyClick(view, Qt.Key.Key_Home)
    assert shown.state.voxel == VOXELS[0]
    assert shown.marks_panel.current_row() == 0


def test_arrows_move_the_voxel_outside_show_mode(shown, qtbot):
    view = shown.slices.views["axial"]
    shown.state.set_voxel((4, 4, 4))
    qtbot.keyClick(view, Qt.Key.Key_Right)
    assert shown.state.voxel == (5, 4, 4)  # R-A-S run: display right is +i


def test_escape_restores_the_layout_and_looks(shown, qtbot):
    shown.docks["Map"].hide()
    before = visible_docks(shown)
    sheet = shown.styleSheet()
    width = shown.signal.curves["gamma"].opts["pen"].widthF()
    cross = shown.slices.views["axial"].vline.pen.widthF()
    shown.show_mode.enter()
    assert shown.signal.curves["gamma"].opts["pen"].widthF() > width
    assert shown.slices.views["axial"].vline.pen.widthF() > cross
    qtbot.keyClick(shown.slices.views["coronal"], Qt.Key.Key_Escape)
    assert not shown.show_mode.active
    assert visible_docks(shown) == before
    assert shown.menuBar().isVisible() and shown.statusBar().isVisible()
    assert shown.styleSheet() == sheet
    assert not shown.show_mode.banner.isVisible()
    assert shown.signal.curves["gamma"].opts["pen"].widthF() == pytest.approx(width)
    assert shown.slices.views["axial"].vline.pen.widthF() == pytest.approx(cross)
    assert shown.docks["Fits"].widget() is shown.fits  # back in its dock
    assert shown.workspace.count() == 2  # no banner, no Show mode row left behind


def test_f5_action_toggles(shown):
    shown.show_action.trigger()
    assert shown.show_mode.active and shown.show_action.isChecked()
    shown.show_action.trigger()
    assert not shown.show_mode.active and not shown.show_action.isChecked()


def test_show_mode_without_marks_says_so(window, ras_run, qtbot):
    assert window.open_run(ras_run["run"], background=False)
    window.state.set_voxel((3, 3, 3))
    window.show_mode.enter()
    assert "No marks" in window.show_mode.banner.title.text()
    qtbot.keyClick(window.slices.views["axial"], Qt.Key.Key_Right)
    assert window.state.voxel == (3, 3, 3)
    window.show_mode.leave()


def test_demo_in_show_mode_renders_at_1600x1000(qapp, demo_files, tmp_path):
    from voxelscope.gui.app import launch

    out = tmp_path / "show.png"
    assert launch(demo=True, show=True, screenshot=str(out), size=(1600, 1000)) == 0
    img = QImage(str(out)).convertToFormat(QImage.Format.Format_RGB888)
    assert (img.width(), img.height()) == (1600, 1000)
    arr = np.frombuffer(img.constBits(), np.uint8).reshape(img.height(), img.bytesPerLine())
    top = arr[:60, : img.width() * 3].astype(float)
    assert top.var() > 100.0  # the banner with the first mark's title is drawn at the top
