"""Marks part: add, rename, reorder (buttons and drag), delete, jump, TSV round trip."""

import csv
import json

import numpy as np
import pytest
from PySide6.QtCore import QModelIndex, Qt

from voxelscope.core.marks import Mark, MarkList

# The ras_run fixture's affine (tests/gui/conftest.py): 3 x 3 x 3.5 mm, origin off centre.
AFFINE = np.diag([3.0, 3.0, 3.5, 1.0])
AFFINE[:3, 3] = (-12.0, -15.0, -9.0)


def world(ijk):
    """Voxel centre in mm: affine @ [i, j, k, 1] (NIfTI sform convention)."""
    return tuple(float(v) for v in (AFFINE @ np.array([*ijk, 1.0]))[:3])


def nearest(xyz):
    """Nearest voxel of a world position: round(inverse affine @ xyz), computed here."""
    frac = np.linalg.solve(AFFINE, np.array([*xyz, 1.0]))[:3]
    return tuple(int(v) for v in np.floor(frac + 0.5))


@pytest.fixture
def opened(window, ras_run):
    assert window.open_run(ras_run["run"], background=False)
    return window


def titles(window):
    return [m.title for m in window.state.marks]


def test_add_saves_the_current_voxel_in_mm(opened, qtbot):
    panel = opened.marks_panel
    opened.state.set_voxel((2, 3, 4))
    with qtbot.waitSignal(opened.state.marks_changed):
        row = panel.add_current("hot spot", "a block response")
    assert row == 0
    m = opened.state.marks[0]
    assert m.xyz_mm == pytest.approx(world((2, 3, 4)), abs=1e-9)
    assert (m.title, m.note) == ("hot spot", "a block response")
    assert panel.model.rowCount() == 1
    assert panel.model.data(panel.model.index(0, 0)) == "hot spot"


def test_add_without_title_gets_a_numbered_title(opened):
    opened.marks_panel.add_current()
    opened.marks_panel.add_current()
    assert titles(opened) == ["Mark 1", "Mark 2"]


def test_shortcut_ctrl_m_adds_a_mark(opened, qtbot):
    opened.state.set_voxel((1, 2, 3))
    qtbot.keyClick(opened, Qt.Key.Key_M, Qt.KeyboardModifier.ControlModifier)
    assert len(opened.state.marks) == 1
    assert opened.state.marks[0].xyz_mm == pytest.approx(world((1, 2, 3)))


def test_rename_and_note_through_the_model(opened, qtbot):
    panel = opened.marks_panel
    panel.add_current("old")
    model = panel.model
    with qtbot.waitSignal(opened.state.marks_changed):
        assert model.setData(model.index(0, 0), "new title", Qt.ItemDataRole.EditRole)
    assert model.setData(model.index(0, 1), "line one\nline two", Qt.ItemDataRole.EditRole)
    assert opened.state.marks[0].title == "new title"
    assert opened.state.marks[0].note == "line one\nline two"
    # the note column shows one line; the edit role gives the full text
    assert model.data(model.index(0, 1)) == "line one line two"
    assert model.data(model.index(0, 1), Qt.ItemDataRole.EditRole) == "line one\nline two"
    assert not model.flags(model.index(0, 2)) & Qt.ItemFlag.ItemIsEditable


def test_note_editor_edits_the_selected_mark(opened):
    panel = opened.marks_panel
    panel.add_current("a")
    panel.add_current("b")
    panel.select(0)
    panel.note.setPlainText("written in the box")
    assert opened.state.marks[0].note == "written in the box"
    assert opened.state.marks[1].note == ""


def test_reorder_with_model_buttons_and_drag(opened):
    panel = opened.marks_panel
    for t in ("a", "b", "c", "d"):
        panel.add_current(t)
    model = panel.model
    assert model.move(0, 2)
    assert titles(opened) == ["b", "c", "a", "d"]
    panel.select(2)
    assert panel.move_selected(-1)
    assert titles(opened) == ["b", "a", "c", "d"]
    assert panel.current_row() == 1
    assert panel.move_selected(1) and panel.move_selected(1)
    assert titles(opened) == ["b", "c", "d", "a"]
    assert not panel.move_selected(1)  # already last
    # drag row 3 ("a") onto the gap before row 0
    mime = model.mimeData([model.index(3, 0)])
    model.dropMimeData(mime, Qt.DropAction.MoveAction, 0, 0, QModelIndex())
    assert titles(opened) == ["a", "b", "c", "d"]
    # drag row 0 to the end (row -1 on no item means "after the last")
    mime = model.mimeData([model.index(0, 0)])
    model.dropMimeData(mime, Qt.DropAction.MoveAction, -1, -1, QModelIndex())
    assert titles(opened) == ["b", "c", "d", "a"]
    assert model.rowCount() == 4


def test_delete(opened, qtbot):
    panel = opened.marks_panel
    for t in ("a", "b", "c"):
        panel.add_current(t)
    with qtbot.waitSignal(opened.state.marks_changed):
        assert panel.delete(1)
    assert titles(opened) == ["a", "c"]
    assert panel.model.rowCount() == 2
    assert not panel.delete(5)


def test_jump_goes_to_the_nearest_voxel(opened):
    panel = opened.marks_panel
    target = world((5, 6, 2))
    off = (target[0] + 1.2, target[1] - 1.4, target[2] + 1.6)  # inside half a voxel
    opened.state.set_marks(MarkList([Mark(*off, "near 5,6,2"), Mark(*world((1, 1, 1)), "b")]))
    assert panel.model.rowCount() == 2
    opened.state.set_voxel((0, 0, 0))
    assert panel.jump(0)
    assert opened.state.voxel == nearest(off) == (5, 6, 2)
    assert panel.jump(1)
    assert opened.state.voxel == (1, 1, 1)


def test_jump_outside_the_grid_is_one_line_not_a_crash(opened):
    opened.state.set_marks(MarkList([Mark(500.0, 0.0, 0.0, "far away")]))
    opened.state.set_voxel((1, 1, 1))
    assert not opened.marks_panel.jump(0)
    assert opened.state.voxel == (1, 1, 1)
    msg = opened.statusBar().currentMessage()
    assert "outside" in msg and "\n" not in msg


def test_tsv_export_import_round_trip(opened, tmp_path):
    panel = opened.marks_panel
    opened.state.set_voxel((2, 3, 4))
    panel.add_current("tabs\tand\\slashes", "two\nlines\tand a tab")
    opened.state.set_voxel((7, 1, 0))
    panel.add_current("second", "")
    before = MarkList(opened.state.marks)
    out = panel.export_tsv(tmp_path / "marks.tsv")
    assert out is not None
    # the file has the documented columns, read with the csv module (TSV, one row per mark)
    with open(out, newline="", encoding="utf-8") as fh:
        rows = list(csv.reader(fh, delimiter="\t", quoting=csv.QUOTE_NONE))
    assert rows[0] == ["x_mm", "y_mm", "z_mm", "title", "note", "model"]
    assert len(rows) == 3
    # each mark keeps the model it was made under, as one line of JSON (outside reader: json)
    assert json.loads(rows[1][5])["contrast"] == opened.state.settings.contrast
    assert [float(v) for v in rows[1][:3]] == pytest.approx(world((2, 3, 4)))
    opened.state.set_marks(MarkList())
    assert panel.model.rowCount() == 0
    assert panel.import_tsv(out)
    assert opened.state.marks == before
    assert panel.model.rowCount() == 2
    # adding instead of replacing
    assert panel.import_tsv(out, replace=False)
    assert len(opened.state.marks) == 4


def test_export_does_not_overwrite_without_force(opened, tmp_path):
    panel = opened.marks_panel
    panel.add_current("a")
    target = tmp_path / "m.tsv"
    target.write_text("keep me\n")
    assert panel.export_tsv(target) is None
    assert target.read_text() == "keep me\n"
    assert "already exists" in opened.statusBar().currentMessage()
    assert panel.export_tsv(target, force=True) == target
    assert target.read_text().startswith("x_mm\t")


def test_bad_marks_file_is_one_line(opened, tmp_path):
    bad = tmp_path / "bad.tsv"
    bad.write_text("x_mm\ty_mm\tz_mm\n1\t2\tthree\n")
    assert not opened.marks_panel.import_tsv(bad)
    msg = opened.statusBar().currentMessage()
    assert "bad.tsv" in msg and "z_mm" in msg and "\n" not in msg


def test_demo_loads_its_marks(window, demo_files):
    from voxelscope.gui.app import _demo_extras, demo_paths

    d = demo_paths()
    assert window.open_run(
        d["run"], d["events"], d["confounds"], None, None, None, d["voxel"], background=False
    )
    _demo_extras(window, d["marks"])
    with open(d["marks"], newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh, delimiter="\t", quoting=csv.QUOTE_NONE))
    assert [m.title for m in window.state.marks] == [r["title"] for r in rows]
    assert window.marks_panel.model.rowCount() == len(rows) > 0


def test_a_new_mark_is_selected_with_its_note_ready(opened, qtbot):
    panel = opened.marks_panel
    opened.docks["Model"].raise_()  # Marks behind Model, as at start
    row = panel.add_current("Hearing area, left")
    assert panel.current_row() == row
    assert panel.note.isEnabled()
    assert "Select a mark" not in panel.note.placeholderText()
    assert "Hearing area, left" in panel.note.placeholderText()
    assert opened.docks["Marks"].isVisible()  # brought forward
    qtbot.waitUntil(panel.note.hasFocus, timeout=2000)
    qtbot.keyClicks(panel.note, "a tone cluster")
    assert opened.state.marks[row].note == "a tone cluster"


def test_titles_are_not_cut(opened, qtbot):
    """A long title gets its full width, or wraps: every word is drawn (tooltip: whole)."""
    panel = opened.marks_panel
    opened.docks["Marks"].raise_()
    title = "Hearing area at the rim of the phantom"
    panel.add_current(title)
    table = panel.table
    qtbot.waitUntil(lambda: table.isVisible(), timeout=2000)
    table.fit_columns()
    fm = table.fontMetrics()
    width, height = table.columnWidth(0), table.rowHeight(0)
    lines = 1 if fm.horizontalAdvance(title) + 12 <= width else 2
    # either the column holds the whole title, or the row is tall enough for it wrapped
    assert lines == 1 or height >= 2 * fm.lineSpacing()
    assert table.model().index(0, 0).data(Qt.ItemDataRole.ToolTipRole).startswith(title)


def test_delete_key_deletes_the_selected_mark_and_undo_brings_it_back(opened, qtbot):
    panel = opened.marks_panel
    opened.docks["Marks"].raise_()
    panel.add_current("a")
    panel.add_current("b")
    panel.select(0)
    panel.table.setFocus()
    qtbot.keyClick(panel.table, Qt.Key.Key_Delete)
    assert titles(opened) == ["b"]
    opened.undo_action.trigger()
    assert titles(opened) == ["a", "b"]
