"""Show mode: walk a room through the marks with big, readable plots.

**View ▸ Show mode** (F5) keeps only Slices, Signal and Fits, draws text and lines larger and
puts the current mark's title and note in a banner above the slices. The arrow keys, Page
Up/Down, Space, Home and End step through the marks (the voxel goes to each mark's
nearest voxel, ``ViewerState.jump_to_mark``), instead of moving the voxel; Esc (or F5)
leaves and puts every part back where it was (``QMainWindow.saveState`` before,
``restoreState`` after).
"""

from __future__ import annotations

import pyqtgraph as pg
from PySide6.QtCore import QEvent, QObject, Qt, Signal
from PySide6.QtGui import QAction, QFont, QKeySequence, QPen
from PySide6.QtWidgets import (
    QApplication,
    QFrame,
    QHBoxLayout,
    QLabel,
    QSplitter,
    QVBoxLayout,
    QWidget,
)

__all__ = ["SHOW_STYLE", "ShowBanner", "ShowMode", "install"]

#: Added to the window's stylesheet while Show mode is on (sizes for a projector).
SHOW_STYLE = """
QWidget { font-size: 19px; }
QLabel#part_title { font-size: 23px; }
QLabel#readout { font-size: 20px; padding: 7px 12px; }
QLabel#legend { font-size: 19px; }
QLabel#fits_caption, QLabel#fits_notes { font-size: 19px; }
QTableView { font-size: 21px; }
QHeaderView::section { font-size: 19px; padding: 6px 8px; }
QDockWidget { font-size: 19px; }
"""

_BANNER_STYLE = """
QFrame#show_banner { background: #FFFFFF; border-bottom: 5px solid #0072B2; }
QFrame#show_banner QLabel { background: transparent; }
QLabel#show_title { font-size: 38px; font-weight: bold; color: #14202B; }
QLabel#show_note { font-size: 25px; color: #222222; }
QLabel#show_count { font-size: 22px; font-weight: bold; color: #0072B2; }
QLabel#show_hint { font-size: 15px; color: #5A5A5A; }
"""

NEXT_KEYS = {Qt.Key.Key_Right, Qt.Key.Key_Down, Qt.Key.Key_PageDown, Qt.Key.Key_Space}
PREVIOUS_KEYS = {Qt.Key.Key_Left, Qt.Key.Key_Up, Qt.Key.Key_PageUp, Qt.Key.Key_Backspace}
HINT = "→ / Page Down: next mark    ← / Page Up: previous    Esc: leave Show mode"


class ShowBanner(QFrame):
    """The current mark's number, title and note, large."""

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setObjectName("show_banner")
        self.setStyleSheet(_BANNER_STYLE)
        lay = QVBoxLayout(self)
        lay.setContentsMargins(24, 12, 24, 12)
        lay.setSpacing(6)
        head = QHBoxLayout()
        self.count = QLabel("")
        self.count.setObjectName("show_count")
        self.title = QLabel("")
        self.title.setObjectName("show_title")
        self.title.setWordWrap(True)
        head.addWidget(self.count, 0, Qt.AlignmentFlag.AlignVCenter)
        head.addSpacing(16)
        head.addWidget(self.title, 1)
        lay.addLayout(head)
        self.note = QLabel("")
        self.note.setObjectName("show_note")
        self.note.setWordWrap(True)
        self.note.setTextFormat(Qt.TextFormat.PlainText)
        self.title.setTextFormat(Qt.TextFormat.PlainText)
        lay.addWidget(self.note)
        self.hint = QLabel(HINT)
        self.hint.setObjectName("show_hint")
        lay.addWidget(self.hint)

    def set_mark(self, number: int, total: int, title: str, note: str) -> None:
        self.count.setText(f"{number} / {total}")
        self.title.setText(title)
        self.note.setText(note)
        self.note.setVisible(bool(note))
        self.fit_height()

    def set_message(self, text: str) -> None:
        self.count.setText("")
        self.title.setText(text)
        self.note.setText("")
        self.note.setVisible(False)
        self.fit_height()

    def fit_height(self) -> None:
        """Fixed height from the wrapped text at the current width (nothing clipped)."""
        width = max(self.width(), 400)
        lay = self.layout()
        lay.activate()
        h = lay.heightForWidth(width) if lay.hasHeightForWidth() else lay.sizeHint().height()
        h = max(int(h), 60)
        self.setFixedHeight(h)
        splitter = self.parentWidget()
        if isinstance(splitter, QSplitter) and splitter.indexOf(self) == 0:
            sizes = splitter.sizes()
            if sizes and sizes[0] != h and sum(sizes) > h:
                rest = sum(sizes[1:]) or 1
                spare = sum(sizes) - h
                splitter.setSizes([h] + [round(spare * v / rest) for v in sizes[1:]])

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
        self._in_splitter = False
        self._saved_state = None
        self._saved: dict = {}
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
        }
        for title, dock in w.docks.items():
            if title != "Fits":
                dock.hide()
        if "Fits" in w.docks:
            w.docks["Fits"].show()
            w.docks["Fits"].raise_()
        w.menuBar().hide()
        w.statusBar().hide()
        w.setStyleSheet(self._saved["sheet"] + SHOW_STYLE)
        self._enlarge()
        if not self._in_splitter:
            w.workspace.insertWidget(0, self.banner)
            w.workspace.setStretchFactor(0, 0)
            self._in_splitter = True
        self.banner.show()
        self.banner.fit_height()
        w.fits.fit_width = True  # every Fits column on screen, at the larger font
        QApplication.processEvents()  # let the larger style reach the table first
        self._fit_fits()
        self._share_workspace()
        QApplication.processEvents()
        self._fit_fits()
        w.fits.relayout()
        self.active = True
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
        self.entered.emit()

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
        self.banner.hide()
        w.fits.fit_width = False
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
        self._saved_state = None
        self.left.emit()

    def _share_workspace(self, signal_share: float = 0.46) -> None:
        """Give Slices the larger share (the room must see where the voxel is)."""
        ws = self.window.workspace
        sizes = ws.sizes()
        i_sl, i_sg = ws.indexOf(self.window.slices), ws.indexOf(self.window.signal)
        if min(i_sl, i_sg) < 0:
            return
        free = sizes[i_sl] + sizes[i_sg]
        sizes[i_sg] = round(free * signal_share)
        sizes[i_sl] = free - sizes[i_sg]
        ws.setSizes(sizes)

    def _fit_fits(self) -> None:
        """Make the Fits dock tall enough for every kernel's row at the larger size."""
        w = self.window
        dock = w.docks.get("Fits")
        if dock is None:
            return
        fits = w.fits
        rows = max(fits.model.rowCount(), 1)
        table = fits.table
        need = (
            table.horizontalHeader().sizeHint().height()
            + rows * table.verticalHeader().defaultSectionSize()
            + _wrapped_height(fits.caption)
            + (_wrapped_height(fits.notes) if fits.notes.isVisible() else 0)
            + dock.widget().layout().spacing() * 2
            + 2 * table.frameWidth()
            + 48  # the dock's title bar, margins and the caption's spacing
        )
        w.resizeDocks([dock], [int(need)], Qt.Orientation.Vertical)

    # ------------------------------------------------------------------ marks

    def step(self, n: int) -> bool:
        total = len(self.window.state.marks)
        if not total:
            return False
        target = 0 if self.index < 0 else min(max(self.index + int(n), 0), total - 1)
        if target == self.index:
            return False
        return self.go(target)

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
        ok = self.window.state.jump_to_mark(index)
        if not ok:
            self.banner.note.setText("This mark is outside the open run's grid.")
            self.banner.note.setVisible(True)
            self.banner.fit_height()
        self.stepped.emit(index)
        return ok

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
        if not self.active or ev.type() != QEvent.Type.KeyPress:
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
        big.setPixelSize(20)
        for plot in (sig.plot, sig.resid):
            for name in ("left", "bottom"):
                ax = plot.getAxis(name)
                keep["axes"].append((ax, ax.style.get("tickFont"), ax.width()))
                ax.setStyle(tickFont=big)
            plot.getAxis("left").setWidth(96)
        for view in w.slices.views.values():
            for line in (view.vline, view.hline):
                keep["lines"].append((line, QPen(line.pen)))
                pen = QPen(line.pen)
                pen.setWidthF(pen.widthF() * 2.2)
                line.setPen(pen)
            for item in [*view._letters.values(), view.caption]:
                keep["fonts"].append((item, QFont(item.font())))
                f = QFont(item.font())
                f.setPixelSize(int(f.pixelSize() * 1.5) if f.pixelSize() > 0 else 22)
                item.setFont(f)
            view._place_labels()
        lay = sig.canvas.ci.layout
        keep["stretch"] = (lay.rowStretchFactor(0), lay.rowStretchFactor(1))
        lay.setRowStretchFactor(0, 5)  # the signal itself gets most of the height
        lay.setRowStretchFactor(1, 2)
        table = w.fits.table
        keep["row"] = table.verticalHeader().defaultSectionSize()
        table.verticalHeader().setDefaultSectionSize(38)
        self._looks = keep
        self._restyle_labels()

    def _restyle_labels(self, *args) -> None:
        sig = self.window.signal
        for plot in (sig.plot, sig.resid):
            for name in ("left", "bottom"):
                ax = plot.getAxis(name)
                if ax.labelText:
                    ax.setLabel(
                        ax.labelText, ax.labelUnits, color="#202020", **{"font-size": "18px"}
                    )

    def _shrink(self) -> None:
        keep = getattr(self, "_looks", None)
        if not keep:
            return
        w = self.window
        sig = w.signal
        for item, pen in keep["pens"]:
            item.setPen(pen)
        if keep.get("symbol") is not None:
            sig.data_curve.setSymbolSize(keep["symbol"])
        for ax, font, width in keep["axes"]:
            if font is not None:
                ax.setStyle(tickFont=font)
            ax.setWidth(width)
        for line, pen in keep["lines"]:
            line.setPen(pen)
        for item, font in keep["fonts"]:
            item.setFont(font)
        for view in w.slices.views.values():
            view._place_labels()
        w.fits.table.verticalHeader().setDefaultSectionSize(keep["row"])
        if "stretch" in keep:
            lay = sig.canvas.ci.layout
            lay.setRowStretchFactor(0, keep["stretch"][0])
            lay.setRowStretchFactor(1, keep["stretch"][1])
        for plot in (sig.plot, sig.resid):
            for name in ("left", "bottom"):
                ax = plot.getAxis(name)
                if ax.labelText:
                    ax.setLabel(
                        ax.labelText, ax.labelUnits, color="#303030", **{"font-size": "13px"}
                    )
        self._looks = {}


def install(window) -> ShowMode:
    """View ▸ Show mode (F5); the action also lives on the window, so F5 works without menus."""
    from voxelscope.gui.session_io import menu_named

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
