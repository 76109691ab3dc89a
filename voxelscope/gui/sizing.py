"""Small size helpers, so no part of the window forces the window wider than the screen.

A combo box asks for the width of its longest item and a label without word wrap for the
width of its text; a few of those side by side add up to more than a 1280-pixel screen.
These helpers cap such requests; the full text stays in the item list and the tooltip.
"""

from __future__ import annotations

from PySide6.QtCore import QEvent, QSize, Qt
from PySide6.QtWidgets import QComboBox, QLabel, QSizePolicy, QWidget

from voxelscope.gui.plaintext import plain_tooltip

__all__ = [
    "ElidedLabel",
    "FlowButtons",
    "LabelHolder",
    "breakable",
    "compact_combo",
    "compact_spin",
    "fit_combo",
    "scroll_body",
    "shrinkable",
]


def compact_combo(combo: QComboBox, chars: int = 10) -> QComboBox:
    """Let ``combo`` shrink to about ``chars`` characters (its list still shows full items)."""
    combo.setSizeAdjustPolicy(QComboBox.SizeAdjustPolicy.AdjustToMinimumContentsLengthWithIcon)
    combo.setMinimumContentsLength(int(chars))
    combo.setMinimumWidth(int(chars) * 9 + 40)
    policy = combo.sizePolicy()
    policy.setHorizontalPolicy(QSizePolicy.Policy.Preferred)
    combo.setSizePolicy(policy)
    return combo


def fit_combo(combo: QComboBox, grow: bool = False) -> QComboBox:
    """Size ``combo`` to its longest item: never narrower (so no item is cut), and wider only
    when ``grow``. The size follows the items when they change."""
    combo.setSizeAdjustPolicy(QComboBox.SizeAdjustPolicy.AdjustToContents)
    combo.setMinimumContentsLength(0)
    combo.setMinimumWidth(0)
    policy = combo.sizePolicy()
    grow_policy = QSizePolicy.Policy.Minimum if grow else QSizePolicy.Policy.Fixed
    policy.setHorizontalPolicy(grow_policy)
    combo.setSizePolicy(policy)
    return combo


def compact_spin(spin: QWidget, min_width: int = 96, sample: str | None = None) -> QWidget:
    """Let a spin box shrink below the width of its largest possible value.

    With ``sample`` (a typical longest text, prefix and suffix included, e.g. ``"± 99.99"``)
    the spin box keeps at least the width that shows that text whole, whatever ``min_width``.
    """
    width = int(min_width)
    if sample is not None and hasattr(spin, "textFromValue"):
        fm = spin.fontMetrics()
        texts = [
            spin.prefix() + spin.textFromValue(v) + spin.suffix()
            for v in (spin.minimum(), spin.maximum())
        ]
        if spin.specialValueText():
            texts.append(spin.specialValueText())
        longest = max(fm.horizontalAdvance(t) for t in texts)
        extra = spin.sizeHint().width() - longest  # frame, buttons and padding
        width = max(width, fm.horizontalAdvance(sample) + extra)
    spin.setMinimumWidth(width)
    return spin


def shrinkable(widget: QWidget, min_width: int = 60) -> QWidget:
    """Let a label (or any widget) be narrower than its text; it gets what is left over."""
    widget.setMinimumWidth(int(min_width))
    policy = widget.sizePolicy()
    policy.setHorizontalPolicy(QSizePolicy.Policy.Ignored)
    widget.setSizePolicy(policy)
    if isinstance(widget, QLabel):
        widget.setToolTip(widget.toolTip() or plain_tooltip(widget.text()))
    return widget


def breakable(text: str) -> str:
    """``text`` with invisible break points after ``_``, ``-`` and ``/``.

    A word-wrapped label breaks lines only between words; a long file name has none, so
    it would stick out of a narrow part. A zero-width space after these characters lets it
    wrap there (nothing is drawn for it).

    Examples
    --------
    >>> breakable("a_b-c.nii") == "a_\\u200bb-\\u200bc.nii"
    True
    """
    out = []
    for ch in str(text):
        out.append(ch)
        if ch in "_-/":
            out.append("\u200b")
    return "".join(out)


class ElidedLabel(QLabel):
    """A one-line label that shortens its text with "…" to the width it gets.

    ``text()`` is what is shown; ``full_text()`` the whole text (also the tooltip unless
    one is set). It never asks for more than ``min_width`` pixels, so it cannot push its
    part wider than the dock.
    """

    def __init__(self, text: str = "", parent: QWidget | None = None, min_width: int = 40):
        super().__init__(parent)
        self._full = ""
        self._own_tip = False
        self._min = int(min_width)
        policy = self.sizePolicy()
        policy.setHorizontalPolicy(QSizePolicy.Policy.Ignored)
        self.setSizePolicy(policy)
        self.setMinimumWidth(self._min)
        self.setText(text)

    def full_text(self) -> str:
        return self._full

    def setText(self, text: str) -> None:
        self._full = str(text)
        if not self._own_tip:
            full = plain_tooltip(self._full)  # the full text, never read as markup
            super().setToolTip(full if self._elide() != self._full else "")
        super().setText(self._elide())

    def setToolTip(self, tip: str) -> None:
        self._own_tip = bool(tip)
        full = plain_tooltip(self._full) if self._elide() != self._full else ""
        super().setToolTip(tip or full)

    def _elide(self) -> str:
        width = max(1, self.contentsRect().width())
        return self.fontMetrics().elidedText(self._full, Qt.TextElideMode.ElideRight, width)

    def minimumSizeHint(self) -> QSize:
        return QSize(self._min, super().minimumSizeHint().height())

    def sizeHint(self) -> QSize:
        m = self.contentsMargins()
        w = self.fontMetrics().horizontalAdvance(self._full) + m.left() + m.right() + 2
        return QSize(max(self._min, w), super().sizeHint().height())

    def resizeEvent(self, ev) -> None:
        super().resizeEvent(ev)
        shown = self._elide()
        if shown != super().text():
            super().setText(shown)
        if not self._own_tip:
            super().setToolTip(self._full if shown != self._full else "")


class LabelHolder(QWidget):
    """Holds one label without a layout, so that new text in the label repaints the label
    alone: a label's new text asks its parent's layout to run again, which went up to the
    main window on every click (and every frame of a drag); this holder's size does not
    depend on the text, only on the label's font (one line high, at least ``min_width``).
    """

    def __init__(
        self, label: QLabel, parent: QWidget | None = None, min_width: int = 100, on_resize=None
    ) -> None:
        super().__init__(parent)
        self.label = label
        self._min = int(min_width)
        self._on_resize = on_resize
        label.setParent(self)
        label.installEventFilter(self)
        self.setSizePolicy(QSizePolicy.Policy.Ignored, QSizePolicy.Policy.Fixed)

    def sizeHint(self) -> QSize:
        return QSize(self._min, self.label.sizeHint().height())

    def minimumSizeHint(self) -> QSize:
        return self.sizeHint()

    def resizeEvent(self, ev) -> None:
        self.label.setGeometry(self.rect())
        if self._on_resize is not None:
            self._on_resize()

    def eventFilter(self, obj, ev) -> bool:
        if obj is self.label and ev.type() in (QEvent.Type.FontChange, QEvent.Type.StyleChange):
            self.updateGeometry()  # a new font: a new line height
        return super().eventFilter(obj, ev)


class FlowButtons(QWidget):
    """Buttons in rows of equal cells that re-flow with the width (at most ``max_columns``).

    Every button keeps at least the width of its text; a narrow part gets more rows
    instead of cut-off buttons. Hidden buttons take no cell.
    """

    def __init__(self, max_columns: int = 3, spacing: int = 3, parent: QWidget | None = None):
        super().__init__(parent)
        self.max_columns = max(1, int(max_columns))
        self.spacing = int(spacing)
        self.buttons: list[QWidget] = []
        policy = QSizePolicy(QSizePolicy.Policy.Preferred, QSizePolicy.Policy.Preferred)
        policy.setHeightForWidth(True)
        self.setSizePolicy(policy)

    def add(self, button: QWidget) -> QWidget:
        button.setParent(self)
        self.buttons.append(button)
        self.updateGeometry()
        return button

    def _shown(self) -> list[QWidget]:
        return [b for b in self.buttons if not b.isHidden()]

    def _cell(self) -> QSize:
        shown = self._shown() or self.buttons
        if not shown:
            return QSize(0, 0)
        return QSize(
            max(b.sizeHint().width() for b in shown), max(b.sizeHint().height() for b in shown)
        )

    def columns(self, width: int | None = None) -> int:
        """How many buttons share a row at ``width`` (default: the current width)."""
        width = self.width() if width is None else int(width)
        n = max(1, len(self._shown()))
        cell = max(1, self._cell().width())
        fit = (width + self.spacing) // (cell + self.spacing)
        return int(max(1, min(self.max_columns, n, fit)))

    def hasHeightForWidth(self) -> bool:
        return True

    def heightForWidth(self, width: int) -> int:
        n = len(self._shown())
        if n == 0:
            return 0
        rows = -(-n // self.columns(width))
        return rows * self._cell().height() + (rows - 1) * self.spacing

    def sizeHint(self) -> QSize:
        cell = self._cell()
        cols = max(1, min(self.max_columns, len(self._shown())))
        w = cols * cell.width() + (cols - 1) * self.spacing
        return QSize(w, self.heightForWidth(w))

    def minimumSizeHint(self) -> QSize:
        w = self._cell().width()
        return QSize(w, self.heightForWidth(w))

    def event(self, ev) -> bool:
        if ev.type() == QEvent.Type.LayoutRequest:
            self._place()
        return super().event(ev)

    def resizeEvent(self, ev) -> None:
        super().resizeEvent(ev)
        self._place()

    def _place(self) -> None:
        shown = self._shown()
        if not shown:
            return
        cols = self.columns()
        h = self._cell().height()
        sp = self.spacing
        cw = (self.width() - (cols - 1) * sp) / cols
        for n, b in enumerate(shown):
            r, c = divmod(n, cols)
            x0 = round(c * (cw + sp))
            x1 = round(c * (cw + sp) + cw)
            b.setGeometry(x0, r * (h + sp), max(1, x1 - x0), h)


def scroll_body(part: QWidget, name: str) -> QWidget:
    """Put a vertical scroll area (never a horizontal one) into ``part`` and return the
    widget to lay the part's content on: taller content scrolls, wider content cannot be
    (the content is made to fit the width)."""
    from PySide6.QtWidgets import QScrollArea, QVBoxLayout

    outer = QVBoxLayout(part)
    outer.setContentsMargins(0, 0, 0, 0)
    scroll = QScrollArea(part)
    scroll.setObjectName(f"{name}_scroll")
    scroll.setWidgetResizable(True)
    scroll.setFrameShape(QScrollArea.Shape.NoFrame)
    scroll.setHorizontalScrollBarPolicy(Qt.ScrollBarPolicy.ScrollBarAlwaysOff)
    outer.addWidget(scroll)
    body = QWidget()
    body.setObjectName(f"{name}_body")
    scroll.setWidget(body)
    return body
