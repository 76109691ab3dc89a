"""The confound picker in Model: choose among a table's columns, even 100 and more.

A filter box narrows the list (plain text matches anywhere in a name; ``*``, ``?`` and
``[..]`` work as shell-style wildcards); the named sets (``motion6`` ... ``outliers``, see
:mod:`voxelscope.core.confounds`) add their columns in one click; *All shown* and *None*
choose every listed column or clear the choice; a count says how many are chosen. The
picker only reports the chosen names (:attr:`ConfoundPicker.chosen_changed`); Model passes
them to the state.
"""

from __future__ import annotations

import fnmatch
import re

from PySide6.QtCore import Qt, Signal
from PySide6.QtWidgets import (
    QHBoxLayout,
    QLabel,
    QLineEdit,
    QListWidget,
    QListWidgetItem,
    QPushButton,
    QVBoxLayout,
    QWidget,
)

from voxelscope.core.confounds import Confounds
from voxelscope.core.errors import VoxelscopeError

__all__ = ["SET_BUTTONS", "ConfoundPicker"]

#: The one-click sets, in button order.
SET_BUTTONS = ("motion6", "motion12", "motion24", "acompcor5", "csf", "wm", "global", "outliers")
_SET_ROWS = (SET_BUTTONS[:3], SET_BUTTONS[3:7], SET_BUTTONS[7:])
_WILD = re.compile(r"[*?\[]")


class ConfoundPicker(QWidget):
    """Filter box, one-click sets, all/none, a checkable list and a count."""

    chosen_changed = Signal(tuple)

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setObjectName("confound_picker")
        self.table: Confounds | None = None
        lay = QVBoxLayout(self)
        lay.setContentsMargins(0, 0, 0, 0)
        lay.setSpacing(4)
        self.filter = QLineEdit()
        self.filter.setObjectName("confound_filter")
        self.filter.setPlaceholderText("filter columns, e.g. trans or a_comp_cor_0[0-4]")
        self.filter.setClearButtonEnabled(True)
        self.filter.setToolTip(
            "Show only the columns whose names contain this text, or match a pattern with * ? [ ]"
        )
        self.filter.textChanged.connect(self._apply_filter)
        lay.addWidget(self.filter)
        # rows of buttons (not a grid), so the part stays narrow in a small window
        self.set_buttons: dict[str, QPushButton] = {}
        for names in _SET_ROWS:
            line = QHBoxLayout()
            line.setSpacing(3)
            for name in names:
                b = QPushButton(name)
                b.setObjectName(f"confound_set_{name}")
                b.setToolTip(f"Add the {name} columns")
                b.setProperty("compact", True)
                b.clicked.connect(lambda _c=False, n=name: self.add_set(n))
                line.addWidget(b)
                self.set_buttons[name] = b
            line.addStretch(1)
            lay.addLayout(line)
        row = QHBoxLayout()
        self.all_button = QPushButton("All shown")
        self.all_button.setObjectName("confound_all")
        self.all_button.setToolTip("Choose every column the filter shows")
        self.all_button.clicked.connect(self.choose_shown)
        self.none_button = QPushButton("None")
        self.none_button.setObjectName("confound_none")
        self.none_button.setToolTip("Choose no column")
        for b in (self.all_button, self.none_button):
            b.setProperty("compact", True)
        self.none_button.clicked.connect(lambda: self.set_chosen((), emit=True))
        self.count = QLabel("")
        self.count.setObjectName("confound_count")
        self.count.setWordWrap(True)
        row.addWidget(self.all_button)
        row.addWidget(self.none_button)
        row.addStretch(1)
        row.addWidget(self.count)
        lay.addLayout(row)
        self.list = QListWidget()
        self.list.setObjectName("confound_list")
        self.list.setUniformItemSizes(True)  # 100+ rows stay quick
        self.list.itemChanged.connect(self._item_changed)
        lay.addWidget(self.list, 1)
        self.note = QLabel("")
        self.note.setObjectName("hint")
        self.note.setWordWrap(True)
        lay.addWidget(self.note)
        self.set_table(None)

    # ------------------------------------------------------------------ content

    def set_table(self, table: Confounds | None) -> None:
        """Show a table's columns (all unchosen), or nothing."""
        self.table = table
        self.list.blockSignals(True)
        self.list.clear()
        names = () if table is None else table.file_columns
        for n in names:
            item = QListWidgetItem(n)
            item.setFlags(item.flags() | Qt.ItemFlag.ItemIsUserCheckable)
            item.setCheckState(Qt.CheckState.Unchecked)
            self.list.addItem(item)
        self.list.blockSignals(False)
        for name, b in self.set_buttons.items():
            b.setEnabled(self._resolves(name))
        self._apply_filter(self.filter.text())
        self._update_count()

    def _resolves(self, name: str) -> bool:
        if self.table is None:
            return False
        try:
            return bool(self.table.resolve(name))
        except VoxelscopeError:
            return False

    def chosen(self) -> tuple[str, ...]:
        """Chosen columns in table order."""
        out = []
        for row in range(self.list.count()):
            item = self.list.item(row)
            if item.checkState() == Qt.CheckState.Checked:
                out.append(item.text())
        return tuple(out)

    def set_chosen(self, names, emit: bool = False) -> None:
        """Check exactly ``names`` (unknown ones are ignored)."""
        wanted = set(names)
        self.list.blockSignals(True)
        for row in range(self.list.count()):
            item = self.list.item(row)
            on = item.text() in wanted
            item.setCheckState(Qt.CheckState.Checked if on else Qt.CheckState.Unchecked)
        self.list.blockSignals(False)
        self._update_count()
        if emit:
            self.chosen_changed.emit(self.chosen())

    # ------------------------------------------------------------------ user input

    def add_set(self, name: str) -> None:
        """Add a named set's columns to the choice."""
        if self.table is None:
            return
        try:
            cols = self.table.resolve(name)
        except VoxelscopeError as err:
            self.note.setText(str(err))
            return
        cols = [c for c in cols if c in self.table.file_columns]
        self.note.setText("")
        self.set_chosen(set(self.chosen()) | set(cols), emit=True)

    def choose_shown(self) -> None:
        shown = [
            self.list.item(r).text()
            for r in range(self.list.count())
            if not self.list.item(r).isHidden()
        ]
        self.set_chosen(set(self.chosen()) | set(shown), emit=True)

    def _item_changed(self, _item) -> None:
        self._update_count()
        self.chosen_changed.emit(self.chosen())

    def _apply_filter(self, text: str) -> None:
        text = text.strip()
        for row in range(self.list.count()):
            item = self.list.item(row)
            name = item.text()
            if not text:
                show = True
            elif _WILD.search(text):
                show = fnmatch.fnmatchcase(name, text)
            else:
                show = text.lower() in name.lower()
            item.setHidden(not show)
        self._update_count()

    def _update_count(self) -> None:
        total = self.list.count()
        if total == 0:
            self.count.setText("")
            return
        shown = sum(not self.list.item(r).isHidden() for r in range(total))
        text = f"{len(self.chosen())} of {total} chosen"
        if shown != total:
            text += f", {shown} shown"
        self.count.setText(text)
