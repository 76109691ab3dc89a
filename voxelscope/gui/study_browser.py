"""File → Open study…: a browser of a study's runs and their companions, found or missing.

The listing comes from :func:`voxelscope.core.study.list_study` (no Qt there); this module
only shows it: one row per run (subject, session, task, run, which dataset and the other
entities), one column per companion (events, sidecars, confounds, brain mask) saying found or
missing, the paths in the tooltips. Double-click a row, or select it and press **Open run**,
and the window opens that run with all of its companions, through the same one way in as
File → Open run. Select several runs of one subject (Ctrl- or Shift-click) and they open
together: the first as the shown run, the others added (File → Add runs…), fitted at the
same place and combined by fixed effects.
"""

from __future__ import annotations

from pathlib import Path

from PySide6.QtCore import (
    QAbstractTableModel,
    QModelIndex,
    QPersistentModelIndex,
    QSortFilterProxyModel,
    Qt,
)
from PySide6.QtGui import QBrush, QColor
from PySide6.QtWidgets import (
    QAbstractItemView,
    QDialog,
    QHBoxLayout,
    QHeaderView,
    QLabel,
    QLineEdit,
    QPushButton,
    QTableView,
    QVBoxLayout,
    QWidget,
)

from voxelscope.core.study import Study, StudyRun
from voxelscope.gui.plaintext import plain_tooltip

__all__ = ["StudyBrowser", "StudyModel"]

_INDEX = QModelIndex | QPersistentModelIndex
_ROOT = QModelIndex()
_FOUND = QColor("#2F6B3B")
_MISSING = QColor("#A23B2A")


class StudyModel(QAbstractTableModel):
    """Rows of a :class:`~voxelscope.core.study.Study` for a QTableView."""

    HEADERS = ("subject", "session", "task", "run", "from", "events", "sidecars", "confounds",
               "mask", "note")  # fmt: skip
    TIPS = (
        "sub- entity",
        "ses- entity",
        "task- entity",
        "run- entity",
        "the dataset (raw, or a derivatives folder) and the run's other entities",
        "the events file found by entities (raw dataset included)",
        "every sidecar that applies, farthest first; the nearest wins",
        "the confounds table beside the run",
        "the brain mask made for the run (desc-brain_mask)",
        "a problem to solve before opening",
    )

    def __init__(self, parent=None) -> None:
        super().__init__(parent)
        self.study: Study | None = None

    def set_study(self, study: Study | None) -> None:
        self.beginResetModel()
        self.study = study
        self.endResetModel()

    def run_at(self, row: int) -> StudyRun | None:
        if self.study is None or not 0 <= row < len(self.study.runs):
            return None
        return self.study.runs[row]

    def rowCount(self, parent: _INDEX = _ROOT) -> int:
        return 0 if parent.isValid() or self.study is None else len(self.study.runs)

    def columnCount(self, parent: _INDEX = _ROOT) -> int:
        return 0 if parent.isValid() else len(self.HEADERS)

    def headerData(self, section, orientation, role=Qt.ItemDataRole.DisplayRole):
        if orientation == Qt.Orientation.Horizontal:
            if role == Qt.ItemDataRole.DisplayRole:
                return self.HEADERS[section]
            if role == Qt.ItemDataRole.ToolTipRole:
                return self.TIPS[section]
        return None

    def _companion(self, r: StudyRun, col: int):
        role = self.HEADERS[col]
        value = getattr(r, role)
        if role == "sidecars":
            return (f"{len(value)} found" if value else "missing"), value
        return ("found" if value else "missing"), value

    def data(self, index: _INDEX, role=Qt.ItemDataRole.DisplayRole):
        r = self.run_at(index.row()) if index.isValid() else None
        if r is None:
            return None
        col = index.column()
        if role in (Qt.ItemDataRole.DisplayRole, Qt.ItemDataRole.ToolTipRole):
            if col <= 3:
                text = (r.subject, r.session, r.task, r.run)[col] or "–"
                return text if role == Qt.ItemDataRole.DisplayRole else plain_tooltip(r.path)
            if col == 4:
                text = r.dataset + (f" · {r.label}" if r.label else "")
                return text if role == Qt.ItemDataRole.DisplayRole else plain_tooltip(r.path)
            if col == 9:
                return (
                    r.problem if role == Qt.ItemDataRole.DisplayRole else plain_tooltip(r.problem)
                )
            text, value = self._companion(r, col)
            if role == Qt.ItemDataRole.DisplayRole:
                return text
            if not value:
                return plain_tooltip(f"no {self.HEADERS[col]} found for {r.path.name}")
            paths = value if isinstance(value, tuple) else (value,)
            return plain_tooltip("\n".join(str(p) for p in paths))
        if role == Qt.ItemDataRole.ForegroundRole and 5 <= col <= 8:
            return QBrush(_FOUND if self._companion(r, col)[1] else _MISSING)
        if role == Qt.ItemDataRole.UserRole:
            return r
        return None


class StudyBrowser(QDialog):
    """A study's runs with their companions; opens the chosen run in the window."""

    def __init__(self, window, study: Study, parent: QWidget | None = None) -> None:
        super().__init__(parent or window)
        self.setObjectName("study_browser")
        self.window_ = window
        self.study = study
        self.setWindowTitle(f"Study — {study.root.name}")
        self.resize(1120, 460)
        lay = QVBoxLayout(self)
        self.summary = QLabel(f"{study.root}\n{study.summary()}")
        self.summary.setTextFormat(Qt.TextFormat.PlainText)
        self.summary.setWordWrap(True)
        lay.addWidget(self.summary)
        self.filter = QLineEdit()
        self.filter.setPlaceholderText("Filter: type part of a subject, task or file name")
        lay.addWidget(self.filter)
        self.model = StudyModel(self)
        self.model.set_study(study)
        self.proxy = QSortFilterProxyModel(self)
        self.proxy.setSourceModel(self.model)
        self.proxy.setFilterKeyColumn(-1)
        self.proxy.setFilterCaseSensitivity(Qt.CaseSensitivity.CaseInsensitive)
        self.filter.textChanged.connect(self.proxy.setFilterFixedString)
        self.table = QTableView()
        self.table.setObjectName("study_table")
        self.table.setModel(self.proxy)
        self.table.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        # several runs of one subject can be opened together (combined by fixed effects)
        self.table.setSelectionMode(QAbstractItemView.SelectionMode.ExtendedSelection)
        self.table.verticalHeader().setVisible(False)
        head = self.table.horizontalHeader()
        head.setSortIndicator(-1, Qt.SortOrder.AscendingOrder)  # the study's own order first
        self.table.setSortingEnabled(True)
        head.setSectionResizeMode(QHeaderView.ResizeMode.ResizeToContents)
        head.setStretchLastSection(True)
        self.table.doubleClicked.connect(lambda idx: self.open_row(self._source_row(idx)))
        lay.addWidget(self.table, 1)
        buttons = QHBoxLayout()
        self.note = QLabel("Double-click a run to open it with its companions.")
        self.note.setTextFormat(Qt.TextFormat.PlainText)
        buttons.addWidget(self.note, 1)
        self.open_button = QPushButton("Open run")
        self.open_button.setDefault(True)
        self.open_button.clicked.connect(lambda: self.open_selected())
        close = QPushButton("Close")
        close.clicked.connect(self.close)
        buttons.addWidget(self.open_button)
        buttons.addWidget(close)
        lay.addLayout(buttons)
        self.table.selectionModel().selectionChanged.connect(self._selection_changed)
        if study.runs:
            self.table.selectRow(0)

    def _source_row(self, index) -> int:
        return self.proxy.mapToSource(index).row() if index.isValid() else -1

    def selected_run(self) -> StudyRun | None:
        rows = self.table.selectionModel().selectedRows()
        return self.model.run_at(self._source_row(rows[0])) if rows else None

    def selected_runs(self) -> list[StudyRun]:
        """Every selected run, in the study's order."""
        rows = sorted(self._source_row(i) for i in self.table.selectionModel().selectedRows())
        return [r for r in (self.model.run_at(n) for n in rows) if r is not None]

    def _selection_changed(self, *_args) -> None:
        n = len(self.selected_runs())
        self.open_button.setText("Open run" if n <= 1 else f"Open {n} runs together")
        if n > 1:
            self.note.setText(
                f"{n} runs selected: they open together, each fitted on its own and combined "
                "by fixed effects."
            )

    def open_selected(self, background: bool = True) -> bool:
        runs = self.selected_runs()
        if not runs:
            self.note.setText("Select a run first.")
            return False
        if len(runs) > 1:
            return self.open_rows([self.study.runs.index(r) for r in runs], background)
        return self.open_row(self.study.runs.index(runs[0]), background)

    def open_rows(self, rows: list[int], background: bool = True) -> bool:
        """Open several runs of one subject together (the first shown, the others added)."""
        from voxelscope.gui.runs import open_runs

        runs = [r for r in (self.model.run_at(n) for n in rows) if r is not None]
        subjects = sorted({r.subject for r in runs})
        if len(subjects) > 1:
            self.note.setText(
                "Runs are combined within one subject; the selection has subjects "
                f"{', '.join(subjects)}. Select the runs of one subject."
            )
            return False
        ok = open_runs(self.window_, [str(r.path) for r in runs], background=background)
        self.note.setText(
            f"Opening {len(runs)} runs of sub-{subjects[0]}…"
            if ok
            else (self.window_.last_error or "")
        )
        return ok

    def open_row(self, row: int, background: bool = True) -> bool:
        """Open the run of ``row`` in the window (its companions are found again there)."""
        r = self.model.run_at(row)
        if r is None:
            return False
        ok = bool(self.window_.open_run(str(r.path), background=background))
        self.note.setText(
            f"Opening {Path(r.path).name}…" if ok else (self.window_.last_error or "")
        )
        return ok
