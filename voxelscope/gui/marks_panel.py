"""Marks: saved places with a title and a note; add, rename, reorder, delete, jump, TSV.

The list lives in the state (``ViewerState.marks``, a core
:class:`~voxelscope.core.marks.MarkList`); :class:`MarksModel` is a table model over it and
the only place that edits it in the window. Every edit emits ``state.marks_changed``, so
the session autosave and Show mode see it. Marks are kept in world coordinates (mm) and a
jump goes to the nearest voxel of the open run (``Run.mm_to_voxel``).

The window gets the part through :func:`install` (one line in ``main_window``): a Marks
dock tabbed with Model, **Marks ▸ Add mark** (Ctrl+M or M), import and export as TSV.
"""

from __future__ import annotations

import os
from pathlib import Path

from PySide6.QtCore import QAbstractTableModel, QMimeData, QModelIndex, Qt, Signal
from PySide6.QtGui import QAction, QKeySequence, QTextCursor
from PySide6.QtWidgets import (
    QAbstractItemView,
    QDialog,
    QDialogButtonBox,
    QDockWidget,
    QFileDialog,
    QFormLayout,
    QHBoxLayout,
    QHeaderView,
    QLabel,
    QLineEdit,
    QMenu,
    QMessageBox,
    QPlainTextEdit,
    QPushButton,
    QStyledItemDelegate,
    QStyleOptionViewItem,
    QTableView,
    QVBoxLayout,
    QWidget,
)

from voxelscope.core.errors import VoxelscopeError
from voxelscope.core.marks import Mark, MarkList, read_marks_tsv, write_marks_tsv
from voxelscope.core.numfmt import format_xyz
from voxelscope.gui.sizing import FlowButtons
from voxelscope.gui.state import ViewerState

__all__ = ["MARKS_FILTER", "AddMarkDialog", "MarksModel", "MarksPanel", "MarksTable", "install"]

MARKS_FILTER = "Marks (*.tsv);;All files (*)"
_MIME = "application/x-voxelscope-mark-row"
COLUMNS = ("Title", "Note", "Position (mm)")
NO_MARK_SELECTED = "Select a mark to read or edit its note."


def _short(title: str, limit: int = 30) -> str:
    """A title short enough for the Edit menu and the status bar."""
    line = " ".join(title.split())
    return line if len(line) <= limit else line[: limit - 1] + "…"


def _one_line(text: str, limit: int = 90) -> str:
    line = " ".join(text.split())
    return line if len(line) <= limit else line[: limit - 1] + "…"


class MarksModel(QAbstractTableModel):
    """Table model over ``state.marks``: Title and Note editable, rows movable.

    Every change goes through the core :class:`MarkList` operations and is followed by
    ``state.marks_changed``. A change made elsewhere (import, session) resets the model.
    """

    def __init__(self, state: ViewerState, parent=None) -> None:
        super().__init__(parent)
        self.state = state
        self._own = False
        state.marks_changed.connect(self._on_marks)

    @property
    def marks(self) -> MarkList:
        return self.state.marks

    def _changed(self, text: str, before: list, merge: str = "") -> None:
        """One undo step for an edit this model just made (see ViewerState.record_marks)."""
        self._own = True
        try:
            self.state.record_marks(text, before, merge)
        finally:
            self._own = False

    def _on_marks(self) -> None:
        if not self._own:
            self.beginResetModel()
            self.endResetModel()

    # ------------------------------------------------------------------ operations

    def add(self, xyz_mm, title: str | None = None, note: str = "", row: int | None = None) -> int:
        """Add a mark (at the end or before ``row``); returns its row."""
        before = list(self.marks)
        n = len(self.marks)
        row = n if row is None else max(0, min(int(row), n))
        self.beginInsertRows(QModelIndex(), row, row)
        mark = self.marks.add(xyz_mm, title, note, index=row, model=self.state.settings)
        self.endInsertRows()
        self._changed(f"add mark '{_short(mark.title)}'", before)
        return row

    def rename(self, row: int, title: str) -> Mark:
        before = list(self.marks)
        old = self.marks[row].title
        mark = self.marks.rename(row, title)
        self._row_changed(row, f"rename mark '{_short(old)}'", before)
        return mark

    def set_note(self, row: int, note: str) -> Mark:
        """Change a note; typing on in the same note is one undo step."""
        before = list(self.marks)
        mark = self.marks.set_note(row, note)
        self._row_changed(row, f"note of '{_short(mark.title)}'", before, merge=f"note {row}")
        return mark

    def move(self, source: int, destination: int) -> bool:
        """Move the mark at ``source`` so that it ends up at row ``destination``."""
        n = len(self.marks)
        if not (0 <= source < n and 0 <= destination < n) or source == destination:
            return False
        before = list(self.marks)
        # Qt counts the destination before the move: moving down lands before row dst + 1.
        qt_dest = destination + 1 if destination > source else destination
        if not self.beginMoveRows(QModelIndex(), source, source, QModelIndex(), qt_dest):
            return False
        self.marks.move(source, destination)
        self.endMoveRows()
        self._changed(f"move mark '{_short(self.marks[destination].title)}'", before)
        return True

    def delete(self, row: int) -> Mark:
        self.marks[row]  # raises InputError for a row that does not exist
        before = list(self.marks)
        self.beginRemoveRows(QModelIndex(), row, row)
        mark = self.marks.delete(row)
        self.endRemoveRows()
        self._changed(f"delete mark '{_short(mark.title)}'", before)
        return mark

    def _row_changed(self, row: int, text: str, before: list, merge: str = "") -> None:
        self.dataChanged.emit(self.index(row, 0), self.index(row, len(COLUMNS) - 1))
        self._changed(text, before, merge)

    # ------------------------------------------------------------------ Qt model

    def rowCount(self, parent=QModelIndex()) -> int:  # noqa: B008
        return 0 if parent.isValid() else len(self.marks)

    def columnCount(self, parent=QModelIndex()) -> int:  # noqa: B008
        return 0 if parent.isValid() else len(COLUMNS)

    def data(self, index, role=Qt.ItemDataRole.DisplayRole):
        if not index.isValid() or index.row() >= len(self.marks):
            return None
        m = self.marks[index.row()]
        col = index.column()
        if role == Qt.ItemDataRole.DisplayRole:
            if col == 0:
                return m.title
            if col == 1:
                return _one_line(m.note)
            return format_xyz(m.xyz_mm)
        if role == Qt.ItemDataRole.EditRole:
            return m.title if col == 0 else m.note if col == 1 else None
        if role == Qt.ItemDataRole.ToolTipRole:
            return f"{m.title}\n{m.note}" if m.note else m.title
        return None

    def setData(self, index, value, role=Qt.ItemDataRole.EditRole) -> bool:
        if not index.isValid() or role != Qt.ItemDataRole.EditRole:
            return False
        if index.column() == 0:
            self.rename(index.row(), str(value))
            return True
        if index.column() == 1:
            self.set_note(index.row(), str(value))
            return True
        return False

    def headerData(self, section, orientation, role=Qt.ItemDataRole.DisplayRole):
        if role != Qt.ItemDataRole.DisplayRole:
            return None
        if orientation == Qt.Orientation.Horizontal:
            return COLUMNS[section] if 0 <= section < len(COLUMNS) else None
        return str(section + 1)

    def flags(self, index):
        base = Qt.ItemFlag.ItemIsDropEnabled
        if not index.isValid():
            return base
        f = base | Qt.ItemFlag.ItemIsEnabled | Qt.ItemFlag.ItemIsSelectable
        f |= Qt.ItemFlag.ItemIsDragEnabled
        if index.column() in (0, 1):
            f |= Qt.ItemFlag.ItemIsEditable
        return f

    # drag and drop: rows move inside the list -------------------------------------------

    def supportedDropActions(self):
        return Qt.DropAction.MoveAction

    def supportedDragActions(self):
        return Qt.DropAction.MoveAction

    def mimeTypes(self) -> list[str]:
        return [_MIME]

    def mimeData(self, indexes) -> QMimeData:
        data = QMimeData()
        rows = sorted({i.row() for i in indexes if i.isValid()})
        data.setData(_MIME, (str(rows[0]) if rows else "").encode())
        return data

    def dropMimeData(self, data, action, row, column, parent) -> bool:
        if action != Qt.DropAction.MoveAction or not data.hasFormat(_MIME):
            return False
        try:
            source = int(bytes(data.data(_MIME)).decode())
        except ValueError:
            return False
        n = len(self.marks)
        if row < 0:
            row = parent.row() if parent.isValid() else n
        destination = row - 1 if row > source else row
        self.move(source, max(0, min(destination, n - 1)))
        # The move is done here; returning False keeps the view from also removing the row.
        return False

    def moveRows(self, source_parent, source_row, count, dest_parent, dest_child) -> bool:
        if count != 1 or source_parent.isValid() or dest_parent.isValid():
            return False
        dest = dest_child - 1 if dest_child > source_row else dest_child
        return self.move(source_row, dest)


class AddMarkDialog(QDialog):
    """Title and note for a new mark at the current voxel."""

    def __init__(self, default_title: str, where: str, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setWindowTitle("Add mark")
        form = QFormLayout(self)
        form.addRow(QLabel(where))
        self.title = QLineEdit(default_title)
        self.title.selectAll()
        form.addRow("Title", self.title)
        self.note = QPlainTextEdit()
        self.note.setPlaceholderText("What to look at here (shown large in Show mode)")
        self.note.setMinimumSize(300, 110)
        form.addRow("Note", self.note)
        buttons = QDialogButtonBox(
            QDialogButtonBox.StandardButton.Ok | QDialogButtonBox.StandardButton.Cancel
        )
        buttons.accepted.connect(self.accept)
        buttons.rejected.connect(self.reject)
        form.addRow(buttons)


class _OneLine(QStyledItemDelegate):
    """Draws a cell on one line, cut with "…" (the note column of a wrapping table)."""

    def initStyleOption(self, option, index) -> None:
        super().initStyleOption(option, index)
        option.features &= ~QStyleOptionViewItem.ViewItemFeature.WrapText


class MarksTable(QTableView):
    """The marks list: its columns always share the visible width (no sideways scrolling).

    The title is never cut: it gets the width its longest title needs, and when the part
    is too narrow for that and a note column, the note column is left out (the whole note
    is in the box below) and long titles wrap onto a second line. Notes are cut with "…";
    the tooltip shows title and note in full. The world position keeps its full width.
    """

    NOTE_MIN = 80

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setHorizontalScrollBarPolicy(Qt.ScrollBarPolicy.ScrollBarAlwaysOff)
        self.setTextElideMode(Qt.TextElideMode.ElideRight)
        self.setWordWrap(True)
        self.horizontalHeader().setMinimumSectionSize(40)
        self.verticalHeader().setSectionResizeMode(QHeaderView.ResizeMode.ResizeToContents)
        self._one_line = _OneLine(self)
        self.setItemDelegateForColumn(1, self._one_line)

    def setModel(self, model) -> None:
        super().setModel(model)
        hh = self.horizontalHeader()
        hh.setSectionResizeMode(0, QHeaderView.ResizeMode.Interactive)
        hh.setSectionResizeMode(1, QHeaderView.ResizeMode.Stretch)
        hh.setSectionResizeMode(2, QHeaderView.ResizeMode.Fixed)
        model.modelReset.connect(self.fit_columns)
        model.rowsInserted.connect(self.fit_columns)
        model.dataChanged.connect(self.fit_columns)
        self.fit_columns()

    def fit_columns(self, *_args) -> None:
        """Share the viewport's width out between title, note and position."""
        hh = self.horizontalHeader()
        if hh.count() < 3:
            return
        width = self.viewport().width()
        pos = max(self.sizeHintForColumn(2), hh.sectionSizeHint(2))
        rest = max(0, width - pos)
        fm = self.fontMetrics()
        model = self.model()
        titles = [model.index(r, 0).data() or "" for r in range(min(model.rowCount(), 200))]
        need = max([hh.sectionSizeHint(0)] + [fm.horizontalAdvance(t) + 16 for t in titles])
        show_note = rest - need >= self.NOTE_MIN
        self.setColumnHidden(1, not show_note)
        hh.resizeSection(2, pos)
        title = need if show_note else rest
        hh.resizeSection(0, max(hh.minimumSectionSize(), title))

    def resizeEvent(self, ev) -> None:
        super().resizeEvent(ev)
        self.fit_columns()


class MarksPanel(QWidget):
    """Marks: the list, buttons to add, go to, move, delete, import and export, the note."""

    jumped = Signal(int)

    def __init__(self, state: ViewerState, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setObjectName("marks_panel")
        self.state = state
        self.model = MarksModel(state, self)
        lay = QVBoxLayout(self)
        lay.setContentsMargins(6, 4, 6, 4)
        lay.setSpacing(4)
        top = FlowButtons(max_columns=5, spacing=4)
        top.setObjectName("marks_buttons")
        self.add_button = QPushButton("Add mark")
        self.add_button.setToolTip("Save the current voxel as a mark (Ctrl+M)")
        self.go_button = QPushButton("Go to")
        self.go_button.setToolTip("Go to the selected mark (or click its row)")
        self.up_button = QPushButton("Up")
        self.up_button.setToolTip("Move the selected mark up the list (or drag its row)")
        self.down_button = QPushButton("Down")
        self.down_button.setToolTip("Move the selected mark down the list")
        self.delete_button = QPushButton("Delete")
        self.delete_button.setToolTip("Delete the selected mark (Edit > Undo brings it back)")
        for b in (
            self.add_button,
            self.go_button,
            self.up_button,
            self.down_button,
            self.delete_button,
        ):
            b.setObjectName("small_button")
            top.add(b)
        lay.addWidget(top)
        self.table = MarksTable()
        self.table.setObjectName("marks_table")
        self.table.setModel(self.model)
        self.table.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        self.table.setSelectionMode(QAbstractItemView.SelectionMode.SingleSelection)
        self.table.setEditTriggers(
            QAbstractItemView.EditTrigger.DoubleClicked
            | QAbstractItemView.EditTrigger.EditKeyPressed
        )
        self.table.setDragEnabled(True)
        self.table.setAcceptDrops(True)
        self.table.setDropIndicatorShown(True)
        self.table.setDragDropMode(QAbstractItemView.DragDropMode.InternalMove)
        self.table.setDefaultDropAction(Qt.DropAction.MoveAction)
        self.table.setAlternatingRowColors(True)
        self.table.setShowGrid(False)
        self.table.verticalHeader().setMinimumSectionSize(24)
        lay.addWidget(self.table, 3)
        note_label = QLabel("Note of the selected mark")
        note_label.setObjectName("hint")
        lay.addWidget(note_label)
        self.note = QPlainTextEdit()
        self.note.setObjectName("mark_note")
        self.note.setPlaceholderText(NO_MARK_SELECTED)
        self.note.setMaximumHeight(110)
        self.note.setEnabled(False)
        lay.addWidget(self.note, 1)
        bottom = QHBoxLayout()
        self.import_button = QPushButton("Import…")
        self.import_button.setToolTip("Read marks from a TSV file (x_mm, y_mm, z_mm, title, note)")
        self.export_button = QPushButton("Export…")
        self.export_button.setToolTip("Write the marks to a TSV file")
        bottom.addWidget(self.import_button)
        bottom.addWidget(self.export_button)
        bottom.addStretch(1)
        self.count = QLabel("")
        self.count.setObjectName("hint")
        bottom.addWidget(self.count)
        lay.addLayout(bottom)

        self.add_button.clicked.connect(lambda: self.ask_add())
        self.go_button.clicked.connect(lambda: self.jump(self.current_row()))
        self.up_button.clicked.connect(lambda: self.move_selected(-1))
        self.down_button.clicked.connect(lambda: self.move_selected(1))
        self.delete_button.clicked.connect(lambda: self.delete(self.current_row()))
        self.import_button.clicked.connect(self.ask_import)
        self.export_button.clicked.connect(self.ask_export)
        self.delete_action = QAction("Delete mark", self.table)
        self.delete_action.setShortcut(QKeySequence("Del"))
        self.delete_action.setShortcutContext(Qt.ShortcutContext.WidgetShortcut)
        self.delete_action.triggered.connect(lambda: self.delete(self.current_row()))
        self.table.addAction(self.delete_action)
        self.table.clicked.connect(lambda idx: self.jump(idx.row()))
        self.table.activated.connect(lambda idx: self.jump(idx.row()))
        self.table.selectionModel().currentRowChanged.connect(lambda *_: self._show_note())
        self.note.textChanged.connect(self._note_edited)
        self._seen = list(state.marks)  # the marks as last shown (to select what changed)
        self.model.modelReset.connect(self._select_changed)
        self.model.modelReset.connect(self._refresh)
        # after the model's own slot (which resets it): remember the marks now shown
        state.marks_changed.connect(lambda: setattr(self, "_seen", list(self.state.marks)))
        self.model.rowsInserted.connect(self._refresh)
        self.model.rowsRemoved.connect(self._refresh)
        self.model.rowsMoved.connect(self._refresh)
        self.model.dataChanged.connect(lambda *_: self._show_note())
        state.run_changed.connect(self._refresh)
        self._refresh()

    # ------------------------------------------------------------------ helpers

    def current_row(self) -> int:
        idx = self.table.currentIndex()
        return idx.row() if idx.isValid() else -1

    def select(self, row: int) -> None:
        if 0 <= row < self.model.rowCount():
            self.table.selectRow(row)
            self.table.setCurrentIndex(self.model.index(row, 0))

    def _select_changed(self) -> None:
        """After an undo, a redo or an import: select the first mark that changed (or the
        row where one went), so the list shows what the step did."""
        before, now = self._seen, list(self.state.marks)
        self._seen = now
        if before == now or not now:
            return
        row = next((i for i, (a, b) in enumerate(zip(before, now)) if a != b), None)
        if row is None:
            row = min(len(before), len(now)) - (len(now) < len(before))
        row = max(0, min(row, len(now) - 1))
        self.select(row)
        self.table.scrollTo(self.model.index(row, 0))

    def _refresh(self, *args) -> None:
        n = len(self.state.marks)
        has_run = self.state.run is not None
        self.add_button.setEnabled(has_run)
        row = self.current_row()
        for b in (self.go_button, self.delete_button):
            b.setEnabled(0 <= row < n)
        self.up_button.setEnabled(0 < row < n)
        self.down_button.setEnabled(0 <= row < n - 1)
        self.export_button.setEnabled(n > 0)
        self.count.setText(f"{n} mark{'s' if n != 1 else ''}")
        self._show_note()

    def _show_note(self) -> None:
        row = self.current_row()
        n = len(self.state.marks)
        self.note.blockSignals(True)
        if 0 <= row < n:
            mark = self.state.marks[row]
            if self.note.toPlainText() != mark.note:
                self.note.setPlainText(mark.note)
            self.note.setEnabled(True)
            self.note.setPlaceholderText(f"Write a note for '{_short(mark.title)}' here.")
        else:
            self.note.setPlainText("")
            self.note.setEnabled(False)
            self.note.setPlaceholderText(NO_MARK_SELECTED)
        self.note.blockSignals(False)
        self.up_button.setEnabled(0 < row < n)
        self.down_button.setEnabled(0 <= row < n - 1)
        for b in (self.go_button, self.delete_button):
            b.setEnabled(0 <= row < n)

    def _note_edited(self) -> None:
        row = self.current_row()
        if 0 <= row < len(self.state.marks):
            self.model.set_note(row, self.note.toPlainText())

    def _message(self, text: str) -> None:
        self.state.message.emit(text)

    # ------------------------------------------------------------------ actions

    def add_current(self, title: str | None = None, note: str = "") -> int:
        """Save the current voxel (its centre in mm) as a mark; returns its row, -1 if no run."""
        run = self.state.run
        if run is None:
            self._message("Open a run first: a mark saves the current voxel.")
            return -1
        xyz = tuple(float(v) for v in run.voxel_to_mm(self.state.voxel))
        row = self.model.add(xyz, title, note)
        self.select(row)
        self.note_here()
        self._message(
            f"Added mark {row + 1}: {self.state.marks[row].title}; write its note below "
            "(Edit > Undo takes it back)"
        )
        return row

    def note_here(self) -> None:
        """Show the Marks part and put the cursor in the selected mark's note."""
        dock = self.parent()
        while dock is not None and not isinstance(dock, QDockWidget):
            dock = dock.parent()
        if dock is not None:
            dock.show()
            dock.raise_()
        self.note.setFocus(Qt.FocusReason.OtherFocusReason)
        self.note.moveCursor(QTextCursor.MoveOperation.End)

    def ask_add(self, offscreen: bool | None = None) -> int:
        """Ask for a title and a note (a dialog on screen; offscreen the default title)."""
        if self.state.run is None:
            return self.add_current()
        if offscreen is None:
            from PySide6.QtGui import QGuiApplication

            offscreen = QGuiApplication.platformName() in ("offscreen", "minimal")
        if offscreen:
            return self.add_current()
        i, j, k = self.state.voxel
        mm = format_xyz(self.state.run.voxel_to_mm(self.state.voxel))
        where = f"Voxel ({i}, {j}, {k}) at {mm} mm"
        dialog = AddMarkDialog(f"Mark {len(self.state.marks) + 1}", where, self)
        if dialog.exec() != QDialog.DialogCode.Accepted:
            return -1
        return self.add_current(dialog.title.text().strip() or None, dialog.note.toPlainText())

    def jump(self, row: int) -> bool:
        """Go to the voxel nearest a mark."""
        if not 0 <= row < len(self.state.marks):
            return False
        self.select(row)
        ok = self.state.jump_to_mark(row)
        if ok:
            self.jumped.emit(row)
        return ok

    def move_selected(self, step: int) -> bool:
        row = self.current_row()
        target = row + int(step)
        if not self.model.move(row, target):
            return False
        self.select(target)
        return True

    def delete(self, row: int) -> bool:
        if not 0 <= row < len(self.state.marks):
            return False
        mark = self.model.delete(row)
        self.select(min(row, len(self.state.marks) - 1))
        self._message(f"Deleted mark '{_short(mark.title)}'. Edit > Undo (Ctrl+Z) brings it back.")
        return True

    def import_tsv(self, path: str | os.PathLike[str], replace: bool = True) -> bool:
        """Read marks from a TSV file (replacing the list, or added after it)."""
        try:
            marks = read_marks_tsv(path)
        except VoxelscopeError as err:
            self._message(str(err))
            self._last_error = str(err)
            return False
        if not replace:
            marks = MarkList([*self.state.marks, *marks])
        self.state.set_marks(marks, saved=replace, text=f"import marks from {Path(path).name}")
        self._message(f"Read {len(marks)} marks from {Path(path).name}")
        return True

    def export_tsv(self, path: str | os.PathLike[str], force: bool = False) -> Path | None:
        """Write the marks as TSV (atomically; an existing file only with ``force``)."""
        try:
            out = write_marks_tsv(self.state.marks, path, force=force)
        except VoxelscopeError as err:
            self._message(str(err))
            return None
        self.state.marks_saved()
        self._message(f"Wrote {len(self.state.marks)} marks to {out}")
        return out

    def _folder(self) -> str:
        run = self.state.run
        return str(Path(run.path).parent) if run is not None else ""

    def ask_import(self) -> None:
        path, _ = QFileDialog.getOpenFileName(self, "Import marks", self._folder(), MARKS_FILTER)
        if not path:
            return
        replace = True
        if len(self.state.marks):
            box = QMessageBox(self)
            box.setWindowTitle("Import marks")
            box.setText(f"There are {len(self.state.marks)} marks already.")
            add = box.addButton("Add to them", QMessageBox.ButtonRole.AcceptRole)
            box.addButton("Replace them", QMessageBox.ButtonRole.DestructiveRole)
            cancel = box.addButton(QMessageBox.StandardButton.Cancel)
            box.exec()
            if box.clickedButton() is cancel:
                return
            replace = box.clickedButton() is not add
        self.import_tsv(path, replace=replace)

    def ask_export(self) -> Path | None:
        """Ask where to write the marks as TSV; the file written, None if cancelled."""
        start = str(Path(self._folder()) / "marks.tsv") if self._folder() else "marks.tsv"
        path, _ = QFileDialog.getSaveFileName(self, "Export marks", start, MARKS_FILTER)
        if not path:
            return None
        # the file dialog has already asked before overwriting
        return self.export_tsv(path, force=True)


def install(window) -> MarksPanel:
    """Add the Marks part (tabbed with Model) and Marks ▸ Add mark (Ctrl+M, M)."""
    from PySide6.QtCore import Qt as _Qt

    panel = MarksPanel(window.state)
    window.marks_panel = panel
    window.add_part("Marks", panel, _Qt.DockWidgetArea.RightDockWidgetArea, tab_with="Model")
    if "Model" in window.docks:
        window.docks["Model"].raise_()
    act = QAction("Add &mark", window)
    act.setShortcuts([QKeySequence("Ctrl+M"), QKeySequence("M")])
    act.setToolTip("Save the current voxel as a mark with a title and a note")
    act.triggered.connect(lambda: panel.ask_add())
    window.addAction(act)
    window.add_mark_action = act
    from voxelscope.gui.menus import menu_named

    view = menu_named(window, "View")
    if view is not None:
        seps = [a for a in view.actions() if a.isSeparator()]
        toggle = window.docks["Marks"].toggleViewAction()
        if seps:
            view.insertAction(seps[0], toggle)
        else:
            view.addAction(toggle)
    menu = QMenu("&Marks", window)
    menu.addAction(act)
    imp = QAction("Import marks…", window)
    imp.triggered.connect(panel.ask_import)
    exp = QAction("Export marks…", window)
    exp.triggered.connect(panel.ask_export)
    menu.addAction(imp)
    menu.addAction(exp)
    help_menu = menu_named(window, "Help")
    if help_menu is not None:
        window.menuBar().insertMenu(help_menu.menuAction(), menu)
    else:
        window.menuBar().addMenu(menu)
    window.marks_menu = menu
    return panel
