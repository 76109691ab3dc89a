"""Show mode: walk a room through the marks with big, readable plots.

**View ▸ Show mode** (F5) hides the docks, menus and status bar and lays the middle of the
window out for a projector: the current mark's title, note and model in a banner at the
top; Slices and the Fits table side by side below it; Signal across the whole width at the
bottom with most of the height. All text is at least :data:`MIN_TEXT_PX` pixels, lines are
thicker. The arrow keys, Page Up/Down, Space, Home and End step through the marks: each
slide goes to the mark's nearest voxel and restores the model the mark was made under
(``ViewerState.jump_to_mark``, said on the slide); a mark without a saved model is shown
under the current model, and the slide says that too. Esc (or F5) leaves and puts every
part back where it was (``QMainWindow.saveState`` before, ``restoreState`` after).
"""

from __future__ import annotations

import pyqtgraph as pg
from PySide6.QtCore import QEvent, QObject, Qt, Signal
from PySide6.QtGui import QAction, QFont, QKeySequence, QPen, QTextDocumentFragment
from PySide6.QtWidgets import (
    QApplication,
    QFrame,
    QHBoxLayout,
    QLabel,
    QSplitter,
    QVBoxLayout,
    QWidget,
)

__all__ = ["MIN_TEXT_PX", "SHOW_STYLE", "ShowBanner", "ShowMode", "install", "model_words"]

#: The smallest text in Show mode, in pixels (readable from the back of a room).
MIN_TEXT_PX = 20

#: Added to the window's stylesheet while Show mode is on (sizes for a projector).
SHOW_STYLE = """
QWidget { font-size: 20px; }
QLabel#part_title { font-size: 24px; }
QLabel#readout { font-size: 20px; padding: 5px 12px; }
QLabel#legend { font-size: 20px; }
QLabel#fits_caption, QLabel#fits_notes { font-size: 20px; }
QLabel#colour_bar_title, QLabel#colour_bar_note { font-size: 20px; }
QTableView { font-size: 22px; }
QHeaderView::section { font-size: 20px; padding: 4px 6px; }
QDockWidget { font-size: 20px; }
"""

_BANNER_STYLE = """
QFrame#show_banner { background: #FFFFFF; border-bottom: 5px solid #0072B2; }
QFrame#show_banner QLabel { background: transparent; }
QLabel#show_title { font-size: 34px; font-weight: bold; color: #14202B; }
QLabel#show_note { font-size: 24px; color: #222222; }
QLabel#show_model { font-size: 20px; color: #0B4F7A; }
QLabel#show_count { font-size: 24px; font-weight: bold; color: #0072B2; }
QLabel#show_hint { font-size: 20px; color: #5A5A5A; }
"""

NEXT_KEYS = {Qt.Key.Key_Right, Qt.Key.Key_Down, Qt.Key.Key_PageDown, Qt.Key.Key_Space}
PREVIOUS_KEYS = {Qt.Key.Key_Left, Qt.Key.Key_Up, Qt.Key.Key_PageUp, Qt.Key.Key_Backspace}
HINT = "→ next   ← back   Esc leave"

#: Fits columns left out in Show mode (the room reads the estimate, t and p; df is in the caption).
SHOW_HIDDEN_COLUMNS = ("variance", "df")

#: Share of the height below the banner that Signal gets in Show mode.
SIGNAL_SHARE = 0.56


def model_words(settings, default_contrast: str | None = None, kernels: bool = True) -> str:
    """A model in a few words for a slide (the kernels left out with ``kernels=False``).

    Examples
    --------
    >>> from voxelscope.core.model import ModelSettings
    >>> model_words(ModelSettings(contrast="tap", kernels=("gamma", "fir")))
    'contrast tap · gamma, fir · AR(2), smoothed · high-pass 128 s'
    """
    from voxelscope.core.noise import NOISE_LABELS

    contrast = settings.contrast or default_contrast or "the first condition"
    parts = [f"contrast {contrast}"]
    if kernels:
        parts.append(", ".join(settings.kernels) or "no kernel")
    parts.append(NOISE_LABELS.get(settings.noise, settings.noise))
    hp = settings.highpass_s
    parts.append("no high-pass" if hp is None else f"high-pass {hp:g} s")
    if settings.onset_shift_s:
        parts.append(f"onsets {settings.onset_shift_s:+g} s")
    if settings.derivatives:
        parts.append("+ derivative" if settings.derivatives == 1 else "+ 2 derivatives")
    n_conf = len(settings.confound_columns or ())
    if n_conf:
        parts.append(f"{n_conf} confound{'s' if n_conf != 1 else ''}")
    if settings.drop_volumes:
        parts.append(f"first {settings.drop_volumes} volumes left out")
    if settings.censor_fd_mm is not None:
        parts.append(f"volumes above {settings.censor_fd_mm:g} mm FD left out")
    if settings.modulators:
        parts.append("modulators " + ", ".join(settings.modulators))
    return " · ".join(parts)


class ShowBanner(QFrame):
    """The current mark's number, title, note and model, large."""

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setObjectName("show_banner")
        self.setStyleSheet(_BANNER_STYLE)
        lay = QVBoxLayout(self)
        lay.setContentsMargins(20, 8, 20, 8)
        lay.setSpacing(2)
        head = QHBoxLayout()
        self.count = QLabel("")
        self.count.setObjectName("show_count")
        self.title = QLabel("")
        self.title.setObjectName("show_title")
        self.title.setWordWrap(True)
        self.hint = QLabel(HINT)
        self.hint.setObjectName("show_hint")
        head.addWidget(self.count, 0, Qt.AlignmentFlag.AlignVCenter)
        head.addSpacing(14)
        head.addWidget(self.title, 1)
        head.addWidget(self.hint, 0, Qt.AlignmentFlag.AlignVCenter)
        lay.addLayout(head)
        self.note = QLabel("")
        self.note.setObjectName("show_note")
        self.note.setWordWrap(True)
        self.note.setTextFormat(Qt.TextFormat.PlainText)
        self.title.setTextFormat(Qt.TextFormat.PlainText)
        lay.addWidget(self.note)
        self.model = QLabel("")
        self.model.setObjectName("show_model")
        self.model.setWordWrap(True)
        self.model.setTextFormat(Qt.TextFormat.PlainText)
        self.model.setVisible(False)
        lay.addWidget(self.model)

    def set_mark(self, number: int, total: int, title: str, note: str) -> None:
        self.count.setText(f"{number} / {total}")
        self.title.setText(title)
        self.note.setText(note)
        self.note.setVisible(bool(note))
        self.fit_height()

    def set_model(self, text: str) -> None:
        """The line that says which model the slide is shown under."""
        self.model.setText(text)
        self.model.setVisible(bool(text))
        self.fit_height()

    def set_message(self, text: str) -> None:
        self.count.setText("")
        self.title.setText(text)
        self.note.setText("")
        self.note.setVisible(False)
        self.model.setText("")
        self.model.setVisible(False)
        self.fit_height()

    def fit_height(self) -> None:
        """Fixed height from the wrapped text at the current width (nothing clipped)."""
        width = max(self.width(), 400)
        lay = self.layout()
        lay.activate()
        h = lay.heightForWidth(width) if lay.hasHeightForWidth() else lay.sizeHint().height()
        h = max(int(h), 60)
        if h != self.height() or self.minimumHeight() != h:
            self.setFixedHeight(h)

    def resizeEvent(self, ev) -> None:
        super().resizeEvent(ev)
        if ev.oldSize().width() != ev.size().width():
            self.fit_height()


def _wrapped_height(label) -> int:
    """Height of a (possibly word-wrapped) label at its current width."""
    width = label.width() or label.sizeHint().width()
    if label.hasHeightForWidth():
        return int(label.heightForWidth(width))
    return int(label.sizeHint().height())


class ShowMode(QObject):
    """Show mode of one window (see the module notes)."""

    entered = Signal()
    left = Signal()
    stepped = Signal(int)

    def __init__(self, window) -> None:
        super().__init__(window)
        self.window = window
        self.active = False
        self.index = -1
        self.banner = ShowBanner()
        self.banner.hide()
        # Slices and Fits side by side (only while Show mode is on)
        self.top = QSplitter(Qt.Orientation.Horizontal)
        self.top.setObjectName("show_top")
        self.top.setChildrenCollapsible(False)
        self.top.hide()
        self._saved_state = None
        self._saved: dict = {}
        self._looks: dict = {}
        self.restore_models = True  # each slide restores the mark's own model
        window.state.marks_changed.connect(self._on_marks)

    # ------------------------------------------------------------------ state

    def saved_window_state(self):
        """The layout from before Show mode (for sessions saved while it is on)."""
        return self._saved_state

    def toggle(self) -> None:
        if self.active:
            self.leave()
        else:
            self.enter()

    def enter(self) -> None:
        if self.active:
            return
        w = self.window
        self._saved_state = w.saveState()
        self._saved = {
            "menu": w.menuBar().isVisible(),
            "status": w.statusBar().isVisible(),
            "sheet": w.styleSheet(),
            "workspace": w.workspace.sizes(),
            "settings": w.state.settings,
        }
        for dock in w.docks.values():
            dock.hide()
        w.menuBar().hide()
        w.statusBar().hide()
        w.setStyleSheet(self._saved["sheet"] + SHOW_STYLE)
        self._arrange_parts()
        self._enlarge()
        self.banner.show()
        self.banner.fit_height()
        w.fits.fit_width = True  # every Fits column on screen, at the larger font
        w.fits.show_mode = True
        w.slices.fit_readout = True  # the larger text must not run off the right edge
        w.fits.set_hidden_columns(SHOW_HIDDEN_COLUMNS)
        w.fits.refresh()
        self.active = True
        QApplication.processEvents()  # let the larger style reach the table first
        self.share()
        w.fits.relayout()
        w.slices.show_readout()
        QApplication.instance().installEventFilter(self)
        w.state.units_changed.connect(self._restyle_labels)
        panel = getattr(w, "marks_panel", None)
        row = panel.current_row() if panel is not None else -1
        n = len(w.state.marks)
        if n:
            self.go(row if 0 <= row < n else 0)
        else:
            self.index = -1
            self.banner.set_message("No marks yet: leave with Esc and add some (Ctrl+M)")
        self.share()
        self.entered.emit()

    def _arrange_parts(self) -> None:
        """Banner on top, then Slices | Fits, then Signal (the whole width)."""
        w = self.window
        ws = w.workspace
        at = max(0, ws.indexOf(w.slices))
        dock = w.docks.get("Fits")
        self.top.addWidget(w.slices)
        if dock is not None:
            self.top.addWidget(w.fits)  # out of its dock for the time of the show
        self.top.setStretchFactor(0, 3)
        self.top.setStretchFactor(1, 2)
        ws.insertWidget(at, self.top)
        ws.insertWidget(0, self.banner)
        ws.setStretchFactor(0, 0)
        self.top.show()
        w.fits.show()

    def _restore_parts(self) -> None:
        w = self.window
        ws = w.workspace
        at = max(0, ws.indexOf(self.top))
        ws.insertWidget(at, w.slices)
        dock = w.docks.get("Fits")
        if dock is not None:
            dock.setWidget(w.fits)
        self.top.hide()
        self.top.setParent(None)
        self.banner.hide()
        self.banner.setParent(None)

    def leave(self) -> None:
        if not self.active:
            return
        w = self.window
        QApplication.instance().removeEventFilter(self)
        try:
            w.state.units_changed.disconnect(self._restyle_labels)
        except (RuntimeError, TypeError):
            pass
        self.active = False
        w.fits.fit_width = False
        w.fits.show_mode = False
        w.slices.fit_readout = False
        w.slices.show_readout()
        w.fits.set_hidden_columns(())
        w.fits.refresh()
        self._restore_parts()
        self._shrink()
        w.setStyleSheet(self._saved.get("sheet", w.styleSheet()))
        w.menuBar().setVisible(self._saved.get("menu", True))
        w.statusBar().setVisible(self._saved.get("status", True))
        if self._saved_state is not None:
            w.restoreState(self._saved_state)
        sizes = self._saved.get("workspace")
        if sizes and len(sizes) == w.workspace.count():
            w.workspace.setSizes(sizes)
        w.fits.relayout()
        tuck = getattr(w, "tuck_tab_bars", None)
        if tuck is not None:
            QApplication.processEvents()  # the restored layout places its tab bars first
            tuck()
        settings = self._saved.get("settings")
        if self.restore_models and settings is not None and settings != w.state.settings:
            self._apply_model(settings)  # the model from before the show
        self._saved_state = None
        self.left.emit()

    def share(self) -> None:
        """Heights and widths for the show: Signal gets most of the height, Slices as
        much width as their pictures use, Fits the rest of the top row."""
        w = self.window
        ws = w.workspace
        if not self.active or ws.indexOf(self.top) < 0:
            return
        self.banner.fit_height()
        sizes = ws.sizes()
        i_b, i_t, i_s = ws.indexOf(self.banner), ws.indexOf(self.top), ws.indexOf(w.signal)
        free = sum(sizes) - (sizes[i_b] if i_b >= 0 else 0)
        sizes[i_s] = round(free * SIGNAL_SHARE)
        sizes[i_t] = free - sizes[i_s]
        if i_b >= 0:
            sizes[i_b] = self.banner.height()
        ws.setSizes(sizes)
        # the top row: the table's width, the slices the rest
        cap = w.fits.caption
        plain = QTextDocumentFragment.fromHtml(cap.text()).toPlainText()
        # bold words are a little wider than the metrics of the plain font say
        cap_w = round(cap.fontMetrics().horizontalAdvance(plain) * 1.08) + 24
        need = max(w.fits.table_width(), cap_w)
        total = sum(self.top.sizes()) or self.top.width()
        fits_w = min(need, round(0.45 * total))
        self.top.setSizes([total - fits_w, fits_w])

    # ------------------------------------------------------------------ marks

    def step(self, n: int) -> bool:
        total = len(self.window.state.marks)
        if not total:
            return False
        target = 0 if self.index < 0 else min(max(self.index + int(n), 0), total - 1)
        if target == self.index:
            return False
        return self.go(target)

    def _apply_model(self, settings) -> bool:
        """Put the window under ``settings`` (a mark's model); the contrast box follows."""
        w = self.window
        with w.state.without_history():  # a slide is not an edit of the model
            ok = w.state.update_settings(**{
                f: getattr(settings, f) for f in settings.__dataclass_fields__
            })  # fmt: skip
        if ok:
            w.state.contrast_text = settings.contrast or ""
            w.state.contrast_problem = ""
            w.state.contrast_error.emit("")
        return ok

    def go(self, index: int) -> bool:
        marks = self.window.state.marks
        if not 0 <= index < len(marks):
            return False
        self.index = index
        m = marks[index]
        self.banner.set_mark(index + 1, len(marks), m.title or f"Mark {index + 1}", m.note)
        panel = getattr(self.window, "marks_panel", None)
        if panel is not None:
            panel.select(index)
        self._show_model(m)
        ok = self.window.state.jump_to_mark(index)
        if not ok:
            self.banner.note.setText("This mark is outside the open run's grid.")
            self.banner.note.setVisible(True)
            self.banner.fit_height()
        self.share()
        self.stepped.emit(index)
        return ok

    def _show_model(self, mark) -> None:
        """Restore the mark's own model (if it has one) and say which model is shown."""
        st = self.window.state
        analysis = st.analysis
        default = analysis.default_contrast() if analysis is not None else None
        model = getattr(mark, "model", None)
        if model is None:
            self.banner.set_model(
                "No model saved with this mark; shown under the current one: "
                + model_words(st.settings, default, kernels=False)
            )
            return
        said: list[str] = []
        st.message.connect(said.append)
        try:
            ok = not self.restore_models or model == st.settings or self._apply_model(model)
        finally:
            st.message.disconnect(said.append)
        if not ok:
            why = f" ({said[-1]})" if said else ""
            self.banner.set_model(
                f"The mark's own model does not fit this run{why}; shown under "
                + model_words(st.settings, default, kernels=False)
            )
            return
        self.banner.set_model(
            "Shown under the mark's own model: " + model_words(model, default, kernels=False)
        )

    def _on_marks(self) -> None:
        if not self.active:
            return
        n = len(self.window.state.marks)
        if n == 0:
            self.index = -1
            self.banner.set_message("No marks")
        else:
            self.index = min(self.index, n - 1)
            m = self.window.state.marks[max(self.index, 0)]
            self.banner.set_mark(max(self.index, 0) + 1, n, m.title, m.note)

    # ------------------------------------------------------------------ keys

    def eventFilter(self, obj, ev) -> bool:
        if not self.active:
            return False
        if obj is self.window and ev.type() == QEvent.Type.Resize:
            self.share()
            return False
        if ev.type() != QEvent.Type.KeyPress:
            return False
        if not isinstance(obj, QWidget) or obj.window() is not self.window:
            return False
        key = ev.key()
        if key == Qt.Key.Key_Escape:
            self.leave()
        elif key in NEXT_KEYS:
            self.step(1)
        elif key in PREVIOUS_KEYS:
            self.step(-1)
        elif key == Qt.Key.Key_Home:
            self.go(0)
        elif key == Qt.Key.Key_End:
            self.go(len(self.window.state.marks) - 1)
        else:
            return False
        return True

    # ------------------------------------------------------------------ looks

    def _enlarge(self) -> None:
        w = self.window
        sig = w.signal
        keep: dict = {"pens": [], "axes": [], "lines": [], "fonts": []}
        for item in [*sig.curves.values(), *sig.resid_curves.values(), sig.data_curve]:
            pen = item.opts.get("pen")
            keep["pens"].append((item, pen))
            qpen = QPen(pg.mkPen(pen))
            qpen.setWidthF(max(qpen.widthF(), 1.0) * 2.0)
            item.setPen(qpen)
        keep["symbol"] = sig.data_curve.opts.get("symbolSize")
        sig.data_curve.setSymbolSize(8)
        big = QFont()
        big.setPixelSize(MIN_TEXT_PX)
        for plot in (sig.plot, sig.resid):
            for name in ("left", "bottom"):
                ax = plot.getAxis(name)
                # only the left axes have a fixed width (a bottom axis given one would keep
                # it after Show mode and cut the time axis short)
                keep["axes"].append((ax, ax.style.get("tickFont"), ax.fixedWidth))
                ax.setStyle(tickFont=big)
            plot.getAxis("left").setWidth(100)
        keep["units"] = [(b, b.isVisible()) for b in (sig.unit_data, sig.unit_pct)]
        for b, _ in keep["units"]:
            b.setVisible(False)  # a slide shows the units on the axis, not the choice
        goto = getattr(w.slices, "goto", None)
        if goto is not None:  # typing a place is not for a slide; the readout gets the row
            keep["goto"] = (goto, goto.isVisible())
            goto.setVisible(False)
        keep["resid_share"] = sig.resid_share
        sig.set_resid_share(0.4)
        bar = w.slices.colour_bar
        keep["bar"] = bar.set_large(True)
        for view in w.slices.views.values():
            for line in (view.vline, view.hline):
                keep["lines"].append((line, QPen(line.pen)))
                pen = QPen(line.pen)
                pen.setWidthF(pen.widthF() * 2.2)
                line.setPen(pen)
            for item in [*view._letters.values(), view.caption]:
                keep["fonts"].append((item, QFont(item.font())))
                f = QFont(item.font())
                f.setPixelSize(max(MIN_TEXT_PX, int(f.pixelSize() * 1.5)))
                item.setFont(f)
            view._place_labels()
        table = w.fits.table
        keep["row"] = table.verticalHeader().defaultSectionSize()
        table.verticalHeader().setDefaultSectionSize(34)
        self._looks = keep
        self._restyle_labels()

    def _restyle_labels(self, *args) -> None:
        self.window.signal.set_label_size(MIN_TEXT_PX)

    def _shrink(self) -> None:
        keep = self._looks
        if not keep:
            return
        w = self.window
        sig = w.signal
        for item, pen in keep["pens"]:
            item.setPen(pen)
        if keep.get("symbol") is not None:
            sig.data_curve.setSymbolSize(keep["symbol"])
        for ax, font, fixed in keep["axes"]:
            if font is not None:
                ax.setStyle(tickFont=font)
            if ax.orientation in ("left", "right"):
                ax.setWidth(fixed)
        for b, visible in keep.get("units", []):
            b.setVisible(visible)
        sig.set_resid_share(keep.get("resid_share", sig.resid_share))
        if "goto" in keep:
            keep["goto"][0].setVisible(keep["goto"][1])
        w.slices.colour_bar.set_large(False)
        for line, pen in keep["lines"]:
            line.setPen(pen)
        for item, font in keep["fonts"]:
            item.setFont(font)
        for view in w.slices.views.values():
            view._place_labels()
        w.fits.table.verticalHeader().setDefaultSectionSize(keep["row"])
        sig.set_label_size(None)
        self._looks = {}


def install(window) -> ShowMode:
    """View ▸ Show mode (F5); the action also lives on the window, so F5 works without menus."""
    from voxelscope.gui.menus import menu_named

    mode = ShowMode(window)
    window.show_mode = mode
    act = QAction("Show mode", window)
    act.setShortcut(QKeySequence(Qt.Key.Key_F5))
    act.setCheckable(True)
    act.setToolTip("Big plots for a room: step through the marks with the arrow keys")
    act.triggered.connect(lambda _on: mode.toggle())
    mode.entered.connect(lambda: act.setChecked(True))
    mode.left.connect(lambda: act.setChecked(False))
    window.addAction(act)
    view = menu_named(window, "View")
    if view is not None:
        view.addSeparator()
        view.addAction(act)
    window.show_action = act
    return mode
