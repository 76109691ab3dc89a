"""Model: kernels, contrast, noise model, high-pass, confounds, onset shift, derivatives.

Every change goes to the state at once, which refits the current voxel. Widgets are set
back from the state with their signals blocked, so a setting never loops.
"""

from __future__ import annotations

import re

from PySide6.QtCore import QStringListModel, Qt
from PySide6.QtGui import QColor, QIcon, QPainter, QPixmap
from PySide6.QtWidgets import (
    QCheckBox,
    QComboBox,
    QCompleter,
    QDoubleSpinBox,
    QFormLayout,
    QGroupBox,
    QHBoxLayout,
    QLabel,
    QLineEdit,
    QListWidget,
    QListWidgetItem,
    QSpinBox,
    QVBoxLayout,
    QWidget,
)

from voxelscope.core.hrf import KERNEL_NAMES
from voxelscope.gui.colours import kernel_colour
from voxelscope.gui.sizing import compact_combo, compact_spin
from voxelscope.gui.state import ViewerState

__all__ = ["ContrastEdit", "ModelPanel", "swatch_icon"]

_WORD = re.compile(r"[A-Za-z_][A-Za-z0-9_.\-]*$")


def swatch_icon(colour: str, size: int = 14) -> QIcon:
    """A small filled square in a colour (kernel markers)."""
    pix = QPixmap(size, size)
    pix.fill(Qt.GlobalColor.transparent)
    p = QPainter(pix)
    p.setRenderHint(QPainter.RenderHint.Antialiasing)
    p.setBrush(QColor(colour))
    p.setPen(QColor("#ffffff") if colour.lower() == "#000000" else QColor(colour).darker(130))
    p.drawRoundedRect(1, 1, size - 2, size - 2, 3, 3)
    p.end()
    return QIcon(pix)


class ContrastEdit(QLineEdit):
    """Contrast entry that offers condition names for the word being typed."""

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self._names = QStringListModel([])
        self.completer_ = QCompleter(self._names, self)
        self.completer_.setCaseSensitivity(Qt.CaseSensitivity.CaseInsensitive)
        self.completer_.setCompletionMode(QCompleter.CompletionMode.PopupCompletion)
        self.completer_.setWidget(self)
        self.completer_.activated.connect(self._insert)
        self.textEdited.connect(self._offer)

    def set_names(self, names) -> None:
        self._names.setStringList(list(names))

    def names(self) -> list[str]:
        return self._names.stringList()

    def _word(self) -> str:
        m = _WORD.search(self.text()[: self.cursorPosition()])
        return m.group(0) if m else ""

    def _offer(self, _text: str) -> None:
        word = self._word()
        if not word or word in self.names():
            self.completer_.popup().hide()
            return
        self.completer_.setCompletionPrefix(word)
        if self.completer_.completionCount() > 0:
            self.completer_.complete()
        else:
            self.completer_.popup().hide()

    def _insert(self, name: str) -> None:
        pos = self.cursorPosition()
        word = self._word()
        text = self.text()
        new = text[: pos - len(word)] + name + text[pos:]
        self.setText(new)
        self.setCursorPosition(pos - len(word) + len(name))
        self.textEdited.emit(new)


class ModelPanel(QWidget):
    """Model settings of the current analysis."""

    def __init__(self, state: ViewerState, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setObjectName("model_panel")
        self.state = state
        lay = QVBoxLayout(self)
        lay.setContentsMargins(8, 6, 8, 6)
        lay.setSpacing(8)

        kernels = QGroupBox("Kernels")
        kl = QVBoxLayout(kernels)
        kl.setSpacing(2)
        self.kernel_boxes: dict[str, QCheckBox] = {}
        for name in KERNEL_NAMES:
            box = QCheckBox(name)
            box.setObjectName(f"kernel_{name}")
            box.setIcon(swatch_icon(kernel_colour(name)))
            box.toggled.connect(self._kernels_changed)
            kl.addWidget(box)
            self.kernel_boxes[name] = box
        fir_row = QHBoxLayout()
        fir_row.addSpacing(22)
        fir_row.addWidget(QLabel("FIR bins"))
        self.fir_bins = QSpinBox()
        self.fir_bins.setRange(2, 40)
        self.fir_bins.setToolTip("Number of FIR bins (each one TR long)")
        self.fir_bins.valueChanged.connect(lambda v: self.state.update_settings(fir_bins=int(v)))
        fir_row.addWidget(self.fir_bins)
        fir_row.addStretch(1)
        kl.addLayout(fir_row)
        lay.addWidget(kernels)

        contrast = QGroupBox("Contrast")
        cl = QVBoxLayout(contrast)
        self.contrast = ContrastEdit()
        self.contrast.setObjectName("contrast_edit")
        self.contrast.textEdited.connect(self.state.set_contrast)
        cl.addWidget(self.contrast)
        self.contrast_hint = QLabel("")
        self.contrast_hint.setObjectName("hint")
        self.contrast_hint.setWordWrap(True)
        cl.addWidget(self.contrast_hint)
        self.contrast_error = QLabel("")
        self.contrast_error.setObjectName("error_text")
        self.contrast_error.setWordWrap(True)
        self.contrast_error.setVisible(False)
        cl.addWidget(self.contrast_error)
        lay.addWidget(contrast)

        noise = QGroupBox("Noise and drift")
        form = QFormLayout(noise)
        form.setLabelAlignment(Qt.AlignmentFlag.AlignLeft)
        self.noise = QComboBox()
        self.noise.addItem("OLS", "ols")
        self.noise.addItem("AR(1)", "ar1")
        self.noise.setItemData(
            0, "Ordinary least squares: white noise", Qt.ItemDataRole.ToolTipRole
        )
        self.noise.setItemData(
            1, "AR(1) prewhitened: autocorrelated noise", Qt.ItemDataRole.ToolTipRole
        )
        self.noise.setToolTip("OLS assumes white noise; AR(1) prewhitens autocorrelated noise")
        self.noise.currentIndexChanged.connect(
            lambda _i: self.state.update_settings(noise=self.noise.currentData())
        )
        form.addRow("Noise model", self.noise)
        hp_row = QHBoxLayout()
        self.highpass = QDoubleSpinBox()
        self.highpass.setRange(8.0, 2000.0)
        self.highpass.setDecimals(0)
        self.highpass.setSingleStep(8.0)
        self.highpass.setSuffix(" s")
        self.highpass.setToolTip("Cosine drift cutoff; 128 s is a common default")
        self.highpass_none = QCheckBox("none")
        self.highpass.valueChanged.connect(self._highpass_changed)
        self.highpass_none.toggled.connect(self._highpass_changed)
        hp_row.addWidget(self.highpass, 1)
        hp_row.addWidget(self.highpass_none)
        form.addRow("High-pass", hp_row)
        self.shift = QDoubleSpinBox()
        self.shift.setRange(-20.0, 20.0)
        self.shift.setSingleStep(0.25)
        self.shift.setDecimals(2)
        self.shift.setSuffix(" s")
        self.shift.setToolTip("Added to every onset, to test the timing of the events")
        self.shift.valueChanged.connect(
            lambda v: self.state.update_settings(onset_shift_s=float(v))
        )
        form.addRow("Onset shift", self.shift)
        self.derivatives = QComboBox()
        self.derivatives.addItem("none", 0)
        self.derivatives.addItem("time", 1)
        self.derivatives.addItem("time + dispersion", 2)
        self.derivatives.currentIndexChanged.connect(
            lambda _i: self.state.update_settings(derivatives=int(self.derivatives.currentData()))
        )
        form.addRow("Derivatives", self.derivatives)
        lay.addWidget(noise)
        for combo in (self.noise, self.derivatives):
            compact_combo(combo, 8)
        compact_spin(self.highpass, 60, sample="2000 s")
        compact_spin(self.shift, 60, sample="-20.00 s")

        conf = QGroupBox("Confounds")
        fl = QVBoxLayout(conf)
        self.confounds = QListWidget()
        self.confounds.setObjectName("confound_list")
        self.confounds.itemChanged.connect(self._confounds_changed)
        fl.addWidget(self.confounds)
        self.confounds_note = QLabel("")
        self.confounds_note.setObjectName("hint")
        self.confounds_note.setWordWrap(True)
        fl.addWidget(self.confounds_note)
        lay.addWidget(conf, 1)

        state.run_changed.connect(self._on_run)
        state.settings_changed.connect(self._on_settings)
        state.contrast_error.connect(self._on_contrast_error)
        self._on_run()

    # ------------------------------------------------------------------ user input

    def _kernels_changed(self, _on: bool) -> None:
        chosen = tuple(n for n, b in self.kernel_boxes.items() if b.isChecked())
        self.state.update_settings(kernels=chosen)

    def _highpass_changed(self, *_args) -> None:
        none = self.highpass_none.isChecked()
        self.highpass.setEnabled(not none)
        self.state.update_settings(highpass_s=None if none else float(self.highpass.value()))

    def _confounds_changed(self, _item) -> None:
        names = []
        for row in range(self.confounds.count()):
            item = self.confounds.item(row)
            if item.checkState() == Qt.CheckState.Checked:
                names.append(item.text())
        analysis = self.state.analysis
        all_names = () if analysis is None else analysis.confound_names
        self.state.update_settings(
            confound_columns=None if tuple(names) == tuple(all_names) else tuple(names)
        )

    # ------------------------------------------------------------------ state events

    def _on_run(self) -> None:
        analysis = self.state.analysis
        self.setEnabled(analysis is not None)
        names = () if analysis is None else analysis.condition_names
        self.contrast.set_names(names)
        if names:
            example = f"{names[0]} - {names[1]}" if len(names) > 1 else names[0]
            self.contrast.setPlaceholderText(f"{names[0]} (default)")
            self.contrast_hint.setText(f"Conditions: {', '.join(names)}. Example: {example}")
        else:
            self.contrast.setPlaceholderText("open an events file first")
            self.contrast_hint.setText("")
        self.confounds.blockSignals(True)
        self.confounds.clear()
        for n in () if analysis is None else analysis.confound_names:
            item = QListWidgetItem(n)
            item.setFlags(item.flags() | Qt.ItemFlag.ItemIsUserCheckable)
            item.setCheckState(Qt.CheckState.Checked)
            self.confounds.addItem(item)
        self.confounds.blockSignals(False)
        has_conf = analysis is not None and bool(analysis.confound_names)
        self.confounds_note.setText("" if has_conf else "No confounds file for this run.")
        self.confounds.setVisible(has_conf)
        self._on_settings(self.state.settings)

    def _on_settings(self, s) -> None:
        widgets = [
            *self.kernel_boxes.values(),
            self.fir_bins,
            self.noise,
            self.highpass,
            self.highpass_none,
            self.shift,
            self.derivatives,
            self.confounds,
        ]
        for w in widgets:
            w.blockSignals(True)
        try:
            for name, box in self.kernel_boxes.items():
                box.setChecked(name in s.kernels)
            self.fir_bins.setValue(int(s.fir_bins))
            self.noise.setCurrentIndex(max(0, self.noise.findData(s.noise)))
            self.highpass_none.setChecked(s.highpass_s is None)
            self.highpass.setEnabled(s.highpass_s is not None)
            if s.highpass_s is not None:
                self.highpass.setValue(float(s.highpass_s))
            self.shift.setValue(float(s.onset_shift_s))
            self.derivatives.setCurrentIndex(max(0, self.derivatives.findData(int(s.derivatives))))
            chosen = s.confound_columns
            for row in range(self.confounds.count()):
                item = self.confounds.item(row)
                on = chosen is None or item.text() in chosen
                item.setCheckState(Qt.CheckState.Checked if on else Qt.CheckState.Unchecked)
            if (
                self.contrast.text().strip() != (s.contrast or "")
                and not self.state.contrast_problem
            ):
                if not self.contrast.hasFocus():
                    self.contrast.setText(s.contrast or "")
        finally:
            for w in widgets:
                w.blockSignals(False)

    def _on_contrast_error(self, message: str) -> None:
        self.contrast_error.setText(message)
        self.contrast_error.setVisible(bool(message))
        self.contrast.setProperty("invalid", bool(message))
        self.contrast.style().unpolish(self.contrast)
        self.contrast.style().polish(self.contrast)
