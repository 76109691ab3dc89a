"""Show mode: only Slices, Signal and Fits; arrows step through marks; Esc restores."""

import itertools

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


def test_each_slide_restores_the_marks_own_model_and_says_so(window, ras_run):
    from voxelscope.core.model import ModelSettings

    assert window.open_run(ras_run["run"], background=False)
    st = window.state
    window.set_contrast_text("tone")
    st.set_voxel(VOXELS[0])
    window.marks_panel.add_current("made under tap")  # the mark keeps the model in use...
    assert st.update_settings(contrast="tap", noise="ols")
    window.marks_panel.add_current("made under tap, OLS")
    made = st.marks[1].model
    assert made == st.settings
    old = Mark(*world(VOXELS[1]), "an old mark without a model", "")
    st.set_marks(MarkList([*st.marks, old]))
    assert st.update_settings(contrast="tone", noise="arp")  # ...whatever comes later
    before = st.settings
    window.show_mode.enter()  # starts at the mark selected in Marks
    banner = window.show_mode.banner
    window.show_mode.go(0)
    assert st.marks[0].model.contrast == "tone" and st.settings == st.marks[0].model
    window.show_mode.step(1)
    assert st.settings == made  # the slide fits under the mark's own model
    assert st.settle_fits()  # (in the background; here at once)
    assert window.fits.model.raw(0, "t") == pytest.approx(
        st.analysis.fit_voxel(st.series, made).fits[0].t, rel=1e-12
    )
    assert "mark's own model" in banner.model.text() and "contrast tap" in banner.model.text()
    assert "OLS" in banner.model.text()
    window.show_mode.step(1)
    assert st.settings == made  # no model saved: the one in use stays, and the slide says so
    assert banner.model.text().startswith("No model saved with this mark")
    window.show_mode.leave()
    assert st.settings == before  # Esc puts back the model from before the show
    assert isinstance(made, ModelSettings)


def _text_px(widget) -> int:
    return widget.fontInfo().pixelSize()


def _tick_rects(axis):
    """The tick label rectangles pyqtgraph would draw for ``axis`` (its own layout code)."""
    from PySide6.QtGui import QImage, QPainter

    img = QImage(10, 10, QImage.Format.Format_RGB32)
    painter = QPainter(img)
    try:
        specs = axis.generateDrawSpecs(painter)
    finally:
        painter.end()
    return [] if specs is None else [rect for rect, _flags, _text in specs[2]]


@pytest.mark.parametrize("size", [(1280, 720), (1920, 1080)])
def test_show_mode_is_readable_from_the_back_of_a_room(demo_window, qapp, size):
    from voxelscope.gui.show import MIN_TEXT_PX

    w = demo_window(size)
    qapp.processEvents()
    normal_views = {k: v.height() for k, v in w.slices.views.items()}
    w.show_mode.enter()
    for _ in range(3):
        qapp.processEvents()
    sig, ws = w.signal, w.workspace
    height = size[1]
    # Signal gets most of the height below the banner, and a real plot
    below = sum(ws.sizes()) - ws.sizes()[ws.indexOf(w.show_mode.banner)]
    assert ws.sizes()[ws.indexOf(sig)] >= 0.5 * below
    assert sig.plot.getViewBox().height() >= 0.17 * height
    assert sig.resid.getViewBox().height() >= 40
    # slices at least as big as in the normal window of the same size
    for name, view in w.slices.views.items():
        assert view.height() >= normal_views[name] - 2, name
    # every Fits row on screen, no sideways scrolling
    table = w.fits.table
    assert table.verticalScrollBar().maximum() == 0
    assert not table.horizontalScrollBar().isVisible()
    # text: 20 px and more everywhere a room has to read it
    banner = w.show_mode.banner
    for label in (banner.title, banner.note, banner.model, banner.hint, w.fits.caption):
        assert _text_px(label) >= MIN_TEXT_PX, label.objectName()
    assert _text_px(w.slices.readout) >= MIN_TEXT_PX
    assert _text_px(table) >= MIN_TEXT_PX
    assert _text_px(w.slices.colour_bar.title) >= MIN_TEXT_PX
    assert w.slices.colour_bar.bar.axis.style["tickFont"].pixelSize() >= MIN_TEXT_PX
    for plot in (sig.plot, sig.resid):
        for name in ("left", "bottom"):
            ax = plot.getAxis(name)
            assert ax.style["tickFont"].pixelSize() >= MIN_TEXT_PX
            if ax.labelText:
                assert f"{MIN_TEXT_PX}px" in ax.labelStyle.get("font-size", "")
    for view in w.slices.views.values():
        assert view.caption.font().pixelSize() >= MIN_TEXT_PX
    # the residuals' tick labels and the two axis titles do not overlap
    rects = _tick_rects(sig.resid.getAxis("left"))
    assert len(rects) >= 2
    for a, b in itertools.pairwise(rects):
        assert not a.intersects(b), (a, b)
    top = sig.plot.getAxis("left").label.sceneBoundingRect()
    low = sig.resid.getAxis("left").label.sceneBoundingRect()
    assert not top.intersects(low)
    # the crosshair runs under a plate, not through the "z = ... mm" caption
    for view in w.slices.views.values():
        plate = view._plates["caption"]
        assert plate.isVisible() and plate.zValue() > view.hline.zValue()
        assert plate.sceneBoundingRect().contains(view.caption.sceneBoundingRect())
    w.show_mode.leave()


def test_time_axis_is_whole_after_show_mode(demo_window, qapp):
    """F5 then Esc used to leave the time axis pinned to its Show-mode width, so the plot
    showed about 215 of 280 s until the program was closed."""
    w = demo_window((1280, 800))
    qapp.processEvents()
    sig = w.signal
    w.show_mode.enter()
    qapp.processEvents()
    w.show_mode.leave()
    for _ in range(3):
        qapp.processEvents()
    w.state.set_voxel((10, 20, 15))
    w.resize(1300, 820)
    for _ in range(3):
        qapp.processEvents()
    for plot in (sig.plot, sig.resid):
        assert plot.getAxis("bottom").fixedWidth is None
        # the plots fit inside the canvas: nothing drawn beyond its right edge
        right = plot.mapRectToScene(plot.boundingRect()).right()
        assert right <= sig.canvas.width() + 1
    lo, hi = sig.plot.viewRange()[0]
    t_end = (w.state.run.n_volumes - 1) * w.state.run.tr
    assert lo <= 0 and hi >= t_end


def test_the_readout_stays_on_screen_in_show_mode_at_1280x720(demo_window, qapp):
    """At Show mode's larger text the readout line ran off the right edge ("Mean 1023 Ur"):
    it now leaves out its least needed parts (the place in mm stays), and the
    whole line is the tooltip."""
    from PySide6.QtGui import QFont, QFontMetrics, QTextDocumentFragment

    w = demo_window((1280, 720))
    w.state.set_voxel((6, 23, 15))
    qapp.processEvents()
    normal = w.slices.readout.text()
    w.show_mode.enter()
    for _ in range(3):
        qapp.processEvents()
    label = w.slices.readout
    plain = QTextDocumentFragment.fromHtml(label.text()).toPlainText()
    font = QFont(label.font())
    font.setBold(True)
    assert QFontMetrics(font).horizontalAdvance(plain) <= label.contentsRect().width()
    assert "World" in plain and "Map" in plain  # the place and the value stay
    if label.text() != normal:  # something was left out: the tooltip has all of it
        assert "Mean" in label.toolTip()
    w.show_mode.leave()
    qapp.processEvents()
    assert "Mean" in w.slices.readout.text() and w.slices.readout.toolTip() == ""
