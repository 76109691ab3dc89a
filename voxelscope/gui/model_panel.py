"""Model: kernels, contrast, noise model, high-pass, onset shift, derivatives, volumes left
out (first N, motion above a framewise displacement) and the confound picker.

Every change goes to the state at once, which refits the current voxel, except the
contrast: typed text is used on Enter, when the box loses the focus, or after a pause of
:data:`CONTRAST_PAUSE_MS`, and only when it parses; until then (and while it does not
parse) the last good contrast stays in use and the box says so ("still using: tap"), so
no prefix of what is being typed ever reaches the fits or the map. Widgets are set back
from the state with their signals blocked, so a setting never loops.
"""

from __future__ import annotations

import re

from PySide6.QtCore import QEvent, QKeyCombination, QStringListModel, Qt, QTimer, Signal
from PySide6.QtGui import QColor, QIcon, QKeySequence, QPainter, QPixmap
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
    QSpinBox,
    QVBoxLayout,
    QWidget,
)

from voxelscope.core.errors import VoxelscopeError
from voxelscope.core.hrf import KERNEL_NAMES
from voxelscope.core.noise import AR_ORDER, NOISE_LABELS
from voxelscope.gui.colours import kernel_colour
from voxelscope.gui.confound_picker import ConfoundPicker
from voxelscope.gui.events_box import EventsBox
from voxelscope.gui.sizing import compact_combo, compact_spin
from voxelscope.gui.state import ViewerState

__all__ = ["CONTRAST_PAUSE_MS", "ContrastEdit", "ModelPanel", "swatch_icon"]

#: A typed contrast is used after this long without a keystroke (or at once on Enter).
CONTRAST_PAUSE_MS = 600

#: How the Volumes part sums up the reasons of Analysis.excluded_volumes.
_REASONS = (
    ("non-steady", "non-steady-state"),
    ("one of the first", "dropped"),
    ("marked in", "outlier columns"),
    ("framewise", "motion"),
)
_WORD = re.compile(r"[A-Za-z_][A-Za-z0-9_.:\-]*$")


#: What each kernel is, in a few words (its peak is added from the kernel itself).
KERNEL_TIPS = {
    "boxcar": "No convolution: the regressor is the stimulus itself",
    "gaussian": "A bell-shaped response",
    "gamma": "A single gamma-shaped response after a short delay",
    "double-gamma": "A peak and a later, smaller undershoot",
    "fir": "A free response shape: one regressor per time bin after each onset (span and "
    "bins below)",
}


def _kernel_tip(name: str) -> str:
    """A kernel's tooltip: what it is and, for a shaped kernel, when it peaks.

    >>> _kernel_tip("boxcar")
    'No convolution: the regressor is the stimulus itself'
    >>> _kernel_tip("gamma")
    'A single gamma-shaped response after a short delay; peaks 4.9 s after onset'
    """
    from voxelscope.core.hrf import get_kernel

    text = KERNEL_TIPS.get(name, name)
    if name in ("boxcar", "fir"):
        return text
    return f"{text}; peaks {get_kernel(name).peak_s():.3g} s after onset"


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
    """Contrast entry that offers condition names for the word being typed.

    Esc (with no list of names open) emits ``reverted``: put back the contrast in use.
    Ctrl+Z / redo keys edit the text while it is being typed; once the text in the box is
    the contrast in use (not modified since), they go to the window's Edit menu instead, so
    Enter then Ctrl+Z undoes the contrast change."""

    reverted = Signal()

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

    def event(self, ev) -> bool:
        if (
            ev.type() == QEvent.Type.ShortcutOverride
            and not self.isModified()
            and (
                ev.matches(QKeySequence.StandardKey.Undo)
                or ev.matches(QKeySequence.StandardKey.Redo)
                or ev.keyCombination()
                == QKeyCombination(Qt.KeyboardModifier.ControlModifier, Qt.Key.Key_Y)
            )
        ):
            ev.ignore()  # not the box's own text undo: let the window's action have it
            return False
        return super().event(ev)

    def keyPressEvent(self, ev) -> None:
        if ev.key() == Qt.Key.Key_Escape and not self.completer_.popup().isVisible():
            self.reverted.emit()
            ev.accept()
            return
        super().keyPressEvent(ev)

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
            box.setToolTip(_kernel_tip(name))
            box.toggled.connect(self._kernels_changed)
            kl.addWidget(box)
            self.kernel_boxes[name] = box
        fir_row = QHBoxLayout()
        fir_row.addSpacing(22)
        fir_row.addWidget(QLabel("FIR over"))
        self.fir_window = QDoubleSpinBox()
        self.fir_window.setObjectName("fir_window")
        self.fir_window.setRange(2.0, 120.0)
        self.fir_window.setSingleStep(2.0)
        self.fir_window.setDecimals(1)
        self.fir_window.setSuffix(" s")
        self.fir_window.setToolTip(
            "Span of the FIR kernel after each onset, in seconds (also used by Checks)"
        )
        self.fir_window.valueChanged.connect(
            lambda v: self.state.update_settings(fir_window_s=float(v))
        )
        fir_row.addWidget(self.fir_window)
        fir_row.addStretch(1)
        kl.addLayout(fir_row)
        fir_row = QHBoxLayout()
        fir_row.addSpacing(22)
        fir_row.addWidget(QLabel("in bins of"))
        self.fir_bin = QDoubleSpinBox()
        self.fir_bin.setObjectName("fir_bin")
        self.fir_bin.setRange(0.0, 30.0)
        self.fir_bin.setSingleStep(0.5)
        self.fir_bin.setDecimals(2)
        self.fir_bin.setSuffix(" s")
        self.fir_bin.setSpecialValueText("one TR")
        self.fir_bin.setToolTip("Width of each FIR bin in seconds; the lowest value means one TR")
        self.fir_bin.valueChanged.connect(
            lambda v: self.state.update_settings(fir_bin_s=float(v) if v > 0 else None)
        )
        fir_row.addWidget(self.fir_bin)
        fir_row.addStretch(1)
        kl.addLayout(fir_row)
        compact_spin(self.fir_window, 60, sample="120.0 s")
        compact_spin(self.fir_bin, 60, sample="one TR")
        lay.addWidget(kernels)

        contrast = QGroupBox("Contrast")
        cl = QVBoxLayout(contrast)
        self.contrast = ContrastEdit()
        self.contrast.setObjectName("contrast_edit")
        self.contrast.setToolTip(
            "A condition, or a sum of weighted conditions such as 'tap - tone' or "
            "'0.5*tap + 0.5*tone'; used on Enter or after a short pause, Esc puts back "
            "the one in use"
        )
        self.contrast_timer = QTimer(self)
        self.contrast_timer.setSingleShot(True)
        self.contrast_timer.setInterval(CONTRAST_PAUSE_MS)
        self.contrast_timer.timeout.connect(self.apply_contrast)
        self.contrast.textEdited.connect(lambda _t: self.contrast_timer.start())
        self.contrast.editingFinished.connect(self.apply_contrast)
        self.contrast.reverted.connect(self.revert_contrast)
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
        self.events_box = EventsBox(state)
        lay.addWidget(self.events_box)

        noise = QGroupBox("Noise and drift")
        form = QFormLayout(noise)
        form.setLabelAlignment(Qt.AlignmentFlag.AlignLeft)
        self.noise = QComboBox()
        self.noise.addItem(f"AR({AR_ORDER})", "arp")
        self.noise.addItem("OLS", "ols")
        self.noise.addItem("AR(1)", "ar1")
        self.noise.setItemData(
            0,
            f"Default: AR({AR_ORDER}) prewhitening with bias-corrected coefficients averaged "
            "over the voxel's neighbourhood (Worsley et al. 2002)",
            Qt.ItemDataRole.ToolTipRole,
        )
        self.noise.setItemData(
            1, "Ordinary least squares: white noise", Qt.ItemDataRole.ToolTipRole
        )
        self.noise.setItemData(
            2, "AR(1) prewhitened, rho from this voxel's residuals", Qt.ItemDataRole.ToolTipRole
        )
        self.noise.setToolTip(
            f"{NOISE_LABELS['arp']} (default) and AR(1) prewhiten autocorrelated noise; "
            "OLS assumes white noise"
        )
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
        self.highpass_none.setToolTip("No drift regressors at all (only the constant)")
        self.highpass.valueChanged.connect(self._highpass_changed)
        self.highpass_none.toggled.connect(self._highpass_changed)
        hp_row.addWidget(self.highpass, 1)
        hp_row.addWidget(self.highpass_none)
        form.addRow("High-pass", hp_row)
        # the cut-off below the task's on/off cycle removes the effect: said right here
        self.highpass_note = QLabel("")
        self.highpass_note.setObjectName("highpass_note")
        self.highpass_note.setWordWrap(True)
        self.highpass_note.setTextFormat(Qt.TextFormat.PlainText)
        self.highpass_note.setVisible(False)
        form.addRow(self.highpass_note)
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
        self.derivatives.setToolTip(
            "Add each kernel's time derivative (and its width derivative) as regressors, so "
            "a response a little early or late, or wider, still fits; Fits then also shows an "
            "F test over them"
        )
        self.derivatives.currentIndexChanged.connect(
            lambda _i: self.state.update_settings(derivatives=int(self.derivatives.currentData()))
        )
        form.addRow("Derivatives", self.derivatives)
        lay.addWidget(noise)
        for combo in (self.noise, self.derivatives):
            compact_combo(combo, 8)
        compact_spin(self.highpass, 60, sample="2000 s")
        compact_spin(self.shift, 60, sample="-20.00 s")

        volumes = QGroupBox("Volumes left out")
        vf = QFormLayout(volumes)
        vf.setLabelAlignment(Qt.AlignmentFlag.AlignLeft)
        self.drop = QSpinBox()
        self.drop.setObjectName("drop_volumes")
        self.drop.setRange(0, 100)
        self.drop.setSuffix(" vol")
        self.drop.setToolTip(
            "Leave the first volumes out of the fit (volumes the confounds table marks as "
            "non-steady-state are left out anyway)"
        )
        self.drop.valueChanged.connect(lambda v: self.state.update_settings(drop_volumes=int(v)))
        vf.addRow("Drop first", self.drop)
        fd_row = QHBoxLayout()
        self.censor = QDoubleSpinBox()
        self.censor.setObjectName("censor_fd")
        self.censor.setRange(0.05, 10.0)
        self.censor.setDecimals(2)
        self.censor.setSingleStep(0.05)
        self.censor.setValue(0.5)
        self.censor.setSuffix(" mm")
        self.censor.setToolTip(
            "Leave out volumes whose framewise displacement (FD, from the confounds table) "
            "exceeds this"
        )
        self.censor_on = QCheckBox("on")
        self.censor_on.setObjectName("censor_fd_on")
        self.censor.valueChanged.connect(self._censor_changed)
        self.censor_on.toggled.connect(self._censor_changed)
        fd_row.addWidget(self.censor, 1)
        fd_row.addWidget(self.censor_on)
        vf.addRow("FD above", fd_row)
        self.left_out = QLabel("")
        self.left_out.setObjectName("left_out_note")
        self.left_out.setWordWrap(True)
        vf.addRow(self.left_out)
        lay.addWidget(volumes)
        compact_spin(self.drop, 60, sample="100 vol")
        compact_spin(self.censor, 60, sample="10.00 mm")

        conf = QGroupBox("Confounds")
        fl = QVBoxLayout(conf)
        self.picker = ConfoundPicker()
        self.picker.chosen_changed.connect(self._confounds_changed)
        self.confounds = self.picker.list
        fl.addWidget(self.picker, 1)
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

    def apply_contrast(self) -> bool:
        """Use the typed contrast if it parses (Enter, focus leaving, a pause)."""
        self.contrast_timer.stop()
        text = self.contrast.text()
        st = self.state
        if text.strip() == (st.settings.contrast or "") and not st.contrast_problem:
            return True  # nothing new: no refit, no undo step
        ok = st.set_contrast(text)
        if ok:
            self.contrast.setModified(False)
        return ok

    def revert_contrast(self) -> None:
        """Esc: the box shows the contrast in use again and the problem line goes."""
        self.contrast_timer.stop()
        self.contrast.setText(self.state.settings.contrast or "")
        self.state.set_contrast(self.contrast.text())

    def contrast_in_use(self) -> str:
        """The contrast the fits use now, as the status line names it."""
        s = self.state.settings
        if s.contrast:
            return s.contrast
        analysis = self.state.analysis
        return f"{analysis.default_contrast()} (default)" if analysis is not None else ""

    def _kernels_changed(self, _on: bool) -> None:
        chosen = tuple(n for n, b in self.kernel_boxes.items() if b.isChecked())
        self.state.update_settings(kernels=chosen)

    def _highpass_changed(self, *_args) -> None:
        none = self.highpass_none.isChecked()
        self.highpass.setEnabled(not none)
        self.state.update_settings(highpass_s=None if none else float(self.highpass.value()))

    def _confounds_changed(self, names) -> None:
        self.state.update_settings(confound_columns=tuple(names))

    def _censor_changed(self, *_args) -> None:
        on = self.censor_on.isChecked()
        self.censor.setEnabled(on)
        self.state.update_settings(censor_fd_mm=float(self.censor.value()) if on else None)

    def _left_out_text(self, s) -> str:
        analysis = self.state.analysis
        if analysis is None:
            return ""
        try:
            ex = analysis.excluded_volumes(s)
        except VoxelscopeError as err:
            return str(err)
        if not ex:
            return "Every volume enters the fit."
        kinds: dict[str, int] = {}
        for why in ex.values():
            key = next((k for p, k in _REASONS if why.startswith(p)), "other")
            kinds[key] = kinds.get(key, 0) + 1
        what = ", ".join(f"{k} {v}" for k, v in kinds.items())
        return f"{len(ex)} of {analysis.n_volumes} volumes left out ({what})."

    # ------------------------------------------------------------------ state events

    def _on_run(self) -> None:
        analysis = self.state.analysis
        self.setEnabled(analysis is not None)
        names = () if analysis is None else analysis.condition_names
        self.contrast.set_names(names)
        if names:
            example = f"{names[0]} - {names[1]}" if len(names) > 1 else names[0]
            # the core's one rule (events sidecar order, else the file's first condition)
            self.contrast.setPlaceholderText(f"{analysis.default_contrast()} (default)")
            self.contrast_hint.setText(f"Conditions: {', '.join(names)}. Example: {example}")
        else:
            self.contrast.setPlaceholderText("open an events file first")
            self.contrast_hint.setText("")
        self.picker.set_table(None if analysis is None else analysis.confounds)
        has_conf = analysis is not None and bool(analysis.confound_names)
        self.confounds_note.setText(
            "" if has_conf else "No confounds table for this run (File > Open confounds)."
        )
        self.picker.setVisible(has_conf)
        has_fd = has_conf and "framewise_displacement" in analysis.confound_names
        self.censor_on.setEnabled(has_fd)
        self.censor_on.setToolTip(
            "Leave out the volumes with more motion than this"
            if has_fd
            else "The confounds table has no framewise_displacement column"
        )
        self._on_settings(self.state.settings)

    def _on_settings(self, s) -> None:
        widgets = [
            *self.kernel_boxes.values(),
            self.fir_window,
            self.fir_bin,
            self.noise,
            self.highpass,
            self.highpass_none,
            self.shift,
            self.derivatives,
            self.drop,
            self.censor,
            self.censor_on,
        ]
        self.contrast.set_names(self._contrast_names(s))
        for w in widgets:
            w.blockSignals(True)
        try:
            for name, box in self.kernel_boxes.items():
                box.setChecked(name in s.kernels)
            self.fir_window.setValue(float(s.fir_window_s))
            self.fir_bin.setValue(float(s.fir_bin_s or 0.0))
            self.noise.setCurrentIndex(max(0, self.noise.findData(s.noise)))
            self.highpass_none.setChecked(s.highpass_s is None)
            self.highpass.setEnabled(s.highpass_s is not None)
            if s.highpass_s is not None:
                self.highpass.setValue(float(s.highpass_s))
            self.shift.setValue(float(s.onset_shift_s))
            self.derivatives.setCurrentIndex(max(0, self.derivatives.findData(int(s.derivatives))))
            chosen = s.confound_columns
            analysis = self.state.analysis
            if chosen is None:
                chosen = () if analysis is None else analysis.confound_names
            self.picker.set_chosen(chosen)
            self.drop.setValue(int(s.drop_volumes))
            self.censor_on.setChecked(s.censor_fd_mm is not None)
            self.censor.setEnabled(s.censor_fd_mm is not None)
            if s.censor_fd_mm is not None:
                self.censor.setValue(float(s.censor_fd_mm))
            self.left_out.setText(self._left_out_text(s))
            self._show_highpass_note(s)
            if (
                self.contrast.text().strip() != (s.contrast or "")
                and not self.state.contrast_problem
                and not self.contrast_timer.isActive()
                and not (self.contrast.hasFocus() and self.contrast.isModified())
            ):
                self.contrast.setText(s.contrast or "")  # undo, a session, a new run
        finally:
            for w in widgets:
                w.blockSignals(False)

    def _show_highpass_note(self, s) -> None:
        """The core's line when the high-pass cut-off is below the task's on/off cycle."""
        analysis = self.state.analysis
        line = None
        if analysis is not None:
            try:
                line = analysis.highpass_warning(s)
            except VoxelscopeError:
                line = None
        text = "" if line is None else line[:1].upper() + line[1:] + "."
        self.highpass_note.setText(text)
        self.highpass_note.setToolTip(text)
        self.highpass_note.setVisible(bool(text))

    def _contrast_names(self, s) -> list[str]:
        """Names a contrast can use: the conditions and the model's modulator columns."""
        analysis = self.state.analysis
        if analysis is None:
            return []
        names = list(analysis.condition_names)
        if s.modulators:
            try:
                names += list(analysis.modulator_columns(s))
            except VoxelscopeError:
                pass
        return names

    def _on_contrast_error(self, message: str) -> None:
        if message:
            message = f"{message}. Still using: {self.contrast_in_use()}"
        self.contrast_error.setText(message)
        self.contrast_error.setVisible(bool(message))
        self.contrast.setProperty("invalid", bool(message))
        self.contrast.style().unpolish(self.contrast)
        self.contrast.style().polish(self.contrast)
