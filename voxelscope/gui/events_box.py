"""The Events group of Model: which column names the conditions, whether onsets count
volumes, and parametric modulators.

Everything here is a model setting or a reread of the events file through the core
loader (:func:`voxelscope.core.loader.open_events`); the numbers come from the core.
"""

from __future__ import annotations

from PySide6.QtCore import Qt
from PySide6.QtWidgets import (
    QCheckBox,
    QComboBox,
    QFormLayout,
    QGroupBox,
    QLabel,
    QListWidget,
    QListWidgetItem,
    QWidget,
)

from voxelscope.core.errors import VoxelscopeError
from voxelscope.gui.state import ViewerState

__all__ = ["ONE_CONDITION", "EventsBox"]

#: The choice that puts every event in one condition named after the task.
ONE_CONDITION = "one condition for the whole task"


class EventsBox(QGroupBox):
    """Condition column (shown when the file has several candidates) and modulators."""

    def __init__(self, state: ViewerState, parent: QWidget | None = None) -> None:
        super().__init__("Events", parent)
        self.setObjectName("events_box")
        self.state = state
        form = QFormLayout(self)
        form.setLabelAlignment(Qt.AlignmentFlag.AlignLeft)
        self.column = QComboBox()
        self.column.setObjectName("condition_column")
        self.column.setToolTip("The events column whose values name the conditions")
        self.column.activated.connect(self._column_chosen)
        self.column_label = QLabel("Conditions from")
        form.addRow(self.column_label, self.column)
        self.volumes = QCheckBox("onsets in volumes")
        self.volumes.setObjectName("onsets_in_volumes")
        self.volumes.setToolTip(
            "The events file gives volume numbers instead of seconds: multiply them by the TR"
        )
        self.volumes.toggled.connect(self._unit_chosen)
        form.addRow("", self.volumes)
        self.modulators = QListWidget()
        self.modulators.setObjectName("modulator_list")
        self.modulators.setToolTip(
            "Numeric events columns: each checked one adds CONDITION:COLUMN, the condition's "
            "events scaled by the column's values centred over that condition"
        )
        self.modulators.setMaximumHeight(90)
        self.modulators.itemChanged.connect(self._modulators_changed)
        self.modulators_label = QLabel("Modulators")
        form.addRow(self.modulators_label, self.modulators)
        self.orthogonalize = QCheckBox("orthogonalise, in list order")
        self.orthogonalize.setObjectName("orthogonalize")
        self.orthogonalize.setToolTip(
            "Make each modulator orthogonal to the ones above it (off by default: each beta "
            "is then its own effect, adjusted for the others)"
        )
        self.orthogonalize.toggled.connect(
            lambda on: self.state.update_settings(orthogonalize=bool(on))
        )
        form.addRow("", self.orthogonalize)
        self.note = QLabel("")
        self.note.setObjectName("hint")
        self.note.setWordWrap(True)
        form.addRow(self.note)
        state.run_changed.connect(self._on_run)
        state.settings_changed.connect(self._on_settings)
        self._on_run()

    # ------------------------------------------------------------------ user input

    def _column_chosen(self, _index: int) -> None:
        column = self.column.currentData()
        current = self._current_column()
        if column != current:
            self.state.set_condition_column(column)

    def _unit_chosen(self, on: bool) -> None:
        unit = "volumes" if on else "seconds"
        a = self.state.analysis
        if a is not None and unit != a.onset_unit and not self.state.reload_events(onset_unit=unit):
            self._on_run()

    def _modulators_changed(self, _item) -> None:
        chosen = tuple(
            self.modulators.item(r).text()
            for r in range(self.modulators.count())
            if self.modulators.item(r).checkState() == Qt.CheckState.Checked
        )
        if not self.state.update_settings(modulators=chosen):
            self._on_settings(self.state.settings)

    # ------------------------------------------------------------------ state events

    def _current_column(self) -> str | None:
        a = self.state.analysis
        ev = None if a is None else a.events_file
        return None if ev is None else ev.condition_column

    def _on_run(self) -> None:
        a = self.state.analysis
        ev = None if a is None else a.events_file
        candidates = () if ev is None else ev.condition_candidates
        self.column.blockSignals(True)
        self.column.clear()
        for c in candidates:
            self.column.addItem(c, c)
        self.column.addItem(ONE_CONDITION, None)
        idx = self.column.findData(self._current_column())
        self.column.setCurrentIndex(max(0, idx))
        self.column.blockSignals(False)
        self.volumes.blockSignals(True)
        self.volumes.setChecked(a is not None and a.onset_unit == "volumes")
        self.volumes.blockSignals(False)
        several = len(candidates) >= 2 or (len(candidates) == 1 and self._current_column() is None)
        self.column.setVisible(several)
        self.column_label.setVisible(several)
        names = () if a is None else a.modulator_candidates
        self.modulators.blockSignals(True)
        self.modulators.clear()
        for n in names:
            item = QListWidgetItem(n)
            item.setFlags(item.flags() | Qt.ItemFlag.ItemIsUserCheckable)
            item.setCheckState(Qt.CheckState.Unchecked)
            self.modulators.addItem(item)
        self.modulators.blockSignals(False)
        for w in (self.modulators, self.modulators_label, self.orthogonalize):
            w.setVisible(bool(names))
        self.setVisible(a is not None and a.events_file is not None)
        self._on_settings(self.state.settings)

    def _on_settings(self, s) -> None:
        self.modulators.blockSignals(True)
        self.orthogonalize.blockSignals(True)
        try:
            for r in range(self.modulators.count()):
                item = self.modulators.item(r)
                on = item.text() in s.modulators
                item.setCheckState(Qt.CheckState.Checked if on else Qt.CheckState.Unchecked)
            self.orthogonalize.setChecked(bool(s.orthogonalize))
            self.orthogonalize.setEnabled(len(s.modulators) >= 2)
        finally:
            self.modulators.blockSignals(False)
            self.orthogonalize.blockSignals(False)
        a = self.state.analysis
        text = ""
        if a is not None and s.modulators:
            try:
                cols = a.modulator_columns(s)
                text = "In the model: " + (", ".join(cols) if cols else "none (see the notes)")
            except VoxelscopeError as err:
                text = str(err)
        self.note.setText(text)
        self.note.setVisible(bool(text))
