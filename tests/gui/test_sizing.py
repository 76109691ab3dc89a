"""Every part of the right-hand column and Map fits its dock: no text is cut off at the right.

The measure is Qt's own font metrics and style geometry, taken here independently of the
helpers in :mod:`voxelscope.gui.sizing`: a widget's text must fit the room the widget has,
and the widget must lie inside the part's visible area (the scroll viewport when the part
scrolls). 1280 x 800 and 1600 x 1000 are common laptop and desktop screens (common practice).
"""

import json
import re

import pytest
from PySide6.QtCore import QPoint, QSize
from PySide6.QtWidgets import (
    QAbstractButton,
    QAbstractSpinBox,
    QComboBox,
    QLabel,
    QPushButton,
    QScrollArea,
    QStyle,
    QStyleOptionComboBox,
    QWidget,
)

from voxelscope.gui.sizing import ElidedLabel, FlowButtons, breakable

PARTS = ("Model", "Checks", "Agreement", "Marks", "Map")


def _late_voxel(root):
    truth = json.loads((root / "demo_truth.json").read_text())
    feats = {f["name"]: f for f in truth["features"]} if "features" in truth else truth
    late = feats["late_cluster"]
    return tuple(late.get("centre_voxel", late.get("voxel")))


def _area(part: QWidget) -> QWidget:
    """What the user sees of a part: the viewport of its outermost scroll area, else itself."""
    if isinstance(part, QScrollArea):
        return part.viewport()
    for scroll in part.findChildren(QScrollArea):
        if scroll.parentWidget() is part:
            return scroll.viewport()
    return part


def _text_problem(wd: QWidget) -> str | None:
    """Why ``wd`` does not show its whole text (None when it does)."""
    fm = wd.fontMetrics()
    if isinstance(wd, QLabel):
        text = wd.text()
        if not text or (wd.pixmap() is not None and not wd.pixmap().isNull()):
            return None
        room = wd.contentsRect().width() - 2 * wd.margin() - 2 * max(wd.indent(), 0)
        if wd.wordWrap():
            if wd.heightForWidth(wd.width()) > wd.height() + 1:
                return f"wrapped text taller ({wd.heightForWidth(wd.width())}) than {wd.height()}"
            if "<" not in text:  # plain text: every word must fit
                widest = max(fm.horizontalAdvance(p) for p in re.split(r"[\s\u200b]+", text))
                if widest > room:
                    return f"word {widest} px wider than {room}"
            return None
        need = fm.horizontalAdvance(text) if "<" not in text else wd.sizeHint().width()
        return None if need <= wd.width() else f"text {need} px in {wd.width()}"
    if isinstance(wd, QComboBox):
        opt = QStyleOptionComboBox()
        wd.initStyleOption(opt)
        field = wd.style().subControlRect(
            QStyle.ComplexControl.CC_ComboBox, opt, QStyle.SubControl.SC_ComboBoxEditField, wd
        )
        need = fm.horizontalAdvance(wd.currentText()) + 2
        if not wd.itemIcon(wd.currentIndex()).isNull():
            need += wd.iconSize().width() + 4
        return None if need <= field.width() else f"{need} px in a field of {field.width()}"
    if isinstance(wd, QAbstractSpinBox):
        edit = wd.lineEdit()
        need = fm.horizontalAdvance(edit.text()) + 4  # QLineEdit's text margins (2 + 2)
        return None if need <= edit.width() else f"{need} px in {edit.width()}"
    if isinstance(wd, QAbstractButton) and wd.text():
        need = wd.sizeHint().width()
        return None if need <= wd.width() else f"button wants {need} px, has {wd.width()}"
    return None


def _problems(part: QWidget) -> list[str]:
    area = _area(part)
    out = []
    body = area.parentWidget().widget() if isinstance(area.parentWidget(), QScrollArea) else None
    if body is not None and body.width() > area.width():
        out.append(f"content {body.width()} px wider than the visible {area.width()} px")
    kinds = (QLabel, QAbstractButton, QComboBox, QAbstractSpinBox)
    for wd in part.findChildren(QWidget):
        if not isinstance(wd, kinds) or not wd.isVisibleTo(part) or wd.width() <= 0:
            continue
        if isinstance(wd.parentWidget(), (QAbstractSpinBox, QComboBox)):
            continue  # the line edit inside a spin box is measured with the spin box
        name = f"{type(wd).__name__} {wd.objectName()!r} {str(getattr(wd, 'text', str)())[:30]!r}"
        left = wd.mapTo(area, QPoint(0, 0)).x()
        right = wd.mapTo(area, QPoint(wd.width(), 0)).x()
        if left < 0 or right > area.width() + 1:
            out.append(f"{name}: x {left}..{right} outside 0..{area.width()}")
        why = _text_problem(wd)
        if why:
            out.append(f"{name}: {why}")
    return out


@pytest.mark.parametrize("size", [(1280, 800), (1600, 1000)])
def test_right_column_and_map_show_all_their_text(
    demo_window, qtbot, qapp, demo_files, tmp_path, size
):
    """At the late cluster voxel (long flag sentence, long numbers) nothing is cut at the
    right in Model, Checks, Agreement, Marks or Map, and the numbers table of Checks shows
    both its columns whole without a sideways scroll bar."""
    w = demo_window(size)
    marks = w.docks["Marks"].widget()
    marks.model.add((54.0, -18.0, -2.0), "a long title for the late cluster peak", "note")
    w.state.set_voxel(_late_voxel(demo_files))
    found = {}
    for name in PARTS:
        dock = w.docks[name]
        dock.raise_()
        if name == "Checks":
            panel = dock.widget()
            qtbot.waitUntil(lambda p=panel: p.checks is not None and p.is_current(), timeout=20000)
        for _ in range(5):
            qapp.processEvents()
        found[name] = _problems(dock.widget())
    assert found == {name: [] for name in PARTS}

    checks = w.docks["Checks"]
    checks.raise_()
    qapp.processEvents()
    table = checks.widget().table
    assert table.model().rowCount() >= 8
    assert not table.horizontalScrollBar().isVisible()
    view = table.viewport().width()
    assert table.columnWidth(0) + table.columnWidth(1) <= view
    fm = table.fontMetrics()
    for r in range(table.model().rowCount()):
        value = table.model().index(r, 1).data()
        assert fm.horizontalAdvance(value) <= table.columnWidth(1), value
        assert table.rowViewportPosition(r) >= 0


def test_flow_buttons_wrap_instead_of_cutting(qtbot):
    """Narrow: one button per row at full text width; wide: up to max_columns per row."""
    box = FlowButtons(max_columns=3, spacing=3)
    qtbot.addWidget(box)
    buttons = [box.add(QPushButton(t)) for t in ("Autocorrelation", "Timing", "Edge", "Spectrum")]
    cell = max(b.sizeHint().width() for b in buttons)
    box.resize(QSize(cell + 10, box.heightForWidth(cell + 10)))
    box.show()
    assert box.columns() == 1
    assert len({b.y() for b in buttons}) == 4
    for b in buttons:
        assert b.width() >= b.sizeHint().width()
        assert b.geometry().right() < box.width()
    wide = 3 * cell + 6 + 50
    box.resize(QSize(wide, box.heightForWidth(wide)))
    assert box.columns() == 3
    assert box.heightForWidth(wide) == 2 * buttons[0].sizeHint().height() + 3
    assert box.minimumSizeHint().width() == cell


def test_elided_label_keeps_its_full_text(qtbot):
    label = ElidedLabel("contrast 'tone', OLS, df 210, 23424 voxels, 95 ms", min_width=40)
    qtbot.addWidget(label)
    label.resize(90, 20)
    label.show()
    assert label.text().endswith("…")
    assert label.fontMetrics().horizontalAdvance(label.text()) <= 90
    assert label.full_text().startswith("contrast 'tone'")
    assert label.toolTip() == label.full_text()
    assert label.minimumSizeHint().width() == 40
    label.resize(600, 20)
    assert label.text() == label.full_text()


def test_breakable_lets_a_file_name_wrap(qtbot):
    """A zero-width space is a break opportunity (Unicode line breaking, UAX #14, class ZW)."""
    name = "sub-demo_task-tonetap_run-1_pipeline-t.nii.gz"
    assert breakable(name).replace("\u200b", "") == name
    label = QLabel(breakable(name))
    label.setWordWrap(True)
    qtbot.addWidget(label)
    wide = label.fontMetrics().horizontalAdvance(name)
    assert label.heightForWidth(wide // 2) > label.heightForWidth(wide + 10)
