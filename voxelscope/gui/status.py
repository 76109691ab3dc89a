"""The status bar: messages on the left, the open run on the right, never on top of each other.

Qt's own status bar draws a message up to the first permanent widget and cuts it there;
:class:`StatusBar` draws it cut in the middle instead (``/home/me/stu…/marks.tsv``), so
the start of a message and the end of a path both stay readable, and shows the whole
message as the bar's tooltip. :class:`ElidedLabel` is the run's line on the right: at most
as wide as its text where there is room, cut in the middle where there is not.
"""

from __future__ import annotations

from PySide6.QtCore import QSize, Qt
from PySide6.QtGui import QPainter
from PySide6.QtWidgets import QLabel, QStatusBar, QStyle, QStyleOption, QWidget

__all__ = ["ElidedLabel", "StatusBar"]


class ElidedLabel(QLabel):
    """A one-line label that cuts its text in the middle to fit its width.

    ``text()`` stays the full text; only the drawing is cut. It asks for its whole text's
    width and accepts much less when the window is narrow.
    """

    def __init__(self, text: str = "", parent: QWidget | None = None) -> None:
        super().__init__(text, parent)
        self.setTextFormat(Qt.TextFormat.PlainText)

    def minimumSizeHint(self) -> QSize:
        hint = super().minimumSizeHint()
        return QSize(min(hint.width(), 8 * self.fontMetrics().averageCharWidth()), hint.height())

    def shown_text(self) -> str:
        """The text as drawn (cut in the middle when it does not fit)."""
        width = self.contentsRect().width()
        return self.fontMetrics().elidedText(self.text(), Qt.TextElideMode.ElideMiddle, width)

    def paintEvent(self, _ev) -> None:
        p = QPainter(self)
        p.setPen(self.palette().windowText().color())
        align = Qt.AlignmentFlag.AlignLeft | Qt.AlignmentFlag.AlignVCenter
        p.drawText(self.contentsRect(), int(align), self.shown_text())
        p.end()


class StatusBar(QStatusBar):
    """A status bar whose messages are cut in the middle where the permanent widgets begin.

    ``currentMessage()`` is the whole message; it is also the bar's tooltip.
    """

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.messageChanged.connect(self._tooltip)

    def _tooltip(self, text: str) -> None:
        self.setToolTip(text if text else "")

    def message_width(self) -> int:
        """Pixels the message may use: up to the first visible permanent widget."""
        right = self.width() - 12
        for w in self.findChildren(QWidget, options=Qt.FindChildOption.FindDirectChildrenOnly):
            if w.isVisible() and w.property("_permanent"):
                right = min(right, w.x() - 8)
        return max(0, right - 6)

    def addPermanentWidget(self, widget: QWidget, stretch: int = 0) -> None:
        widget.setProperty("_permanent", True)
        super().addPermanentWidget(widget, stretch)

    def shown_message(self) -> str:
        """The message as drawn."""
        text = " ".join(self.currentMessage().split())
        return self.fontMetrics().elidedText(
            text, Qt.TextElideMode.ElideMiddle, self.message_width()
        )

    def paintEvent(self, ev) -> None:
        if not self.currentMessage():
            super().paintEvent(ev)
            return
        p = QPainter(self)
        opt = QStyleOption()
        opt.initFrom(self)
        self.style().drawPrimitive(QStyle.PrimitiveElement.PE_PanelStatusBar, opt, p, self)
        p.setPen(self.palette().windowText().color())
        rect = self.rect().adjusted(6, 0, 0, 0)
        rect.setWidth(self.message_width())
        p.drawText(
            rect,
            int(Qt.AlignmentFlag.AlignLeft | Qt.AlignmentFlag.AlignVCenter),
            self.shown_message(),
        )
        p.end()
