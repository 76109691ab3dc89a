"""The coordinate box under Slices: type a voxel (``i j k``) or a world position
(``x y z mm``), Enter goes there; and the button that resets the slices' zoom and pan.

A bad text or a place outside the grid is one line in the status bar (and the box turns
red until the text changes); the voxel does not move.

Examples
--------
>>> parse_position("12, 20 18", "voxel")
('voxel', (12.0, 20.0, 18.0))
>>> parse_position("(-26, -10, 50) mm", "voxel")
('mm', (-26.0, -10.0, 50.0))
"""

from __future__ import annotations

import math
import re

from PySide6.QtCore import Qt
from PySide6.QtWidgets import (
    QHBoxLayout,
    QLineEdit,
    QPushButton,
    QSizePolicy,
    QWidget,
)

from voxelscope.core.errors import InputError, VoxelscopeError
from voxelscope.core.inputs import excerpt
from voxelscope.gui.state import ViewerState

__all__ = ["GoToBox", "parse_position"]

_NUMBER = re.compile(r"^[+-]?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?$")


def parse_position(text: str, mode: str) -> tuple[str, tuple[float, float, float]]:
    """``(mode, (a, b, c))`` from the typed text; ``mm`` after the numbers chooses mm.

    Raises
    ------
    InputError
        One line saying what is wrong with the text.

    >>> parse_position("1.5 2 3", "voxel")
    Traceback (most recent call last):
    ...
    voxelscope.core.errors.InputError: voxel indices are whole numbers, not 1.5; add mm after \
the numbers to go to a world position
    """
    raw = str(text).strip()
    body = raw
    if body.lower().endswith("mm"):
        mode, body = "mm", body[:-2]
    body = body.strip().strip("()[]").replace(",", " ")
    parts = body.split()
    what = "x y z in mm" if mode == "mm" else "i j k, voxel indices from 0"
    if len(parts) != 3:
        raise InputError(
            f"'{excerpt(raw)}' is not a place: type three numbers ({what}) and press Enter"
        )
    values = []
    for part in parts:
        if not _NUMBER.match(part):
            raise InputError(f"'{excerpt(part)}' is not a number; type three numbers ({what})")
        v = float(part)
        if not math.isfinite(v):
            raise InputError(f"'{excerpt(part)}' is not a finite number")
        values.append(v)
    if mode == "voxel":
        for v in values:
            if v != int(v):
                raise InputError(
                    f"voxel indices are whole numbers, not {v:g}; add mm after the numbers to "
                    "go to a world position"
                )
    return mode, (values[0], values[1], values[2])


class GoToBox(QWidget):
    """ "Go to" [voxel|mm] [text] and "Reset view"; Enter moves the state's voxel."""

    def __init__(self, state: ViewerState, reset_views, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setObjectName("goto_box")
        self.setAttribute(Qt.WidgetAttribute.WA_StyledBackground, True)  # dark like the readout
        self.state = state
        lay = QHBoxLayout(self)
        lay.setContentsMargins(6, 2, 6, 2)
        lay.setSpacing(6)
        self.edit = QLineEdit()
        self.edit.setObjectName("goto_edit")
        self.edit.setPlaceholderText("i j k or x y z mm")
        self.edit.setToolTip(
            "Type a voxel's indices (i j k, from 0) or a world position with mm after it "
            "(x y z mm) and press Enter"
        )
        self.edit.setClearButtonEnabled(True)
        self.edit.setMinimumWidth(90)
        self.edit.setMaximumWidth(170)
        self.edit.setMinimumWidth(
            self.edit.fontMetrics().horizontalAdvance("go to i j k or x y z mm") + 30
        )
        self.edit.returnPressed.connect(self.go)
        self.edit.textChanged.connect(lambda _t: self._mark_invalid(False))
        lay.addWidget(self.edit)
        self.reset = QPushButton("Reset view")
        self.reset.setObjectName("reset_view")
        self.reset.clicked.connect(reset_views)
        lay.addWidget(self.reset)
        self.reset.setToolTip(
            "Undo zoom and pan in the three slices. In a slice: click or drag chooses a voxel, "
            "the wheel steps through slices, Ctrl+wheel zooms, right or middle drag pans, "
            "double click or Home resets"
        )
        self.setSizePolicy(QSizePolicy.Policy.Maximum, QSizePolicy.Policy.Fixed)
        self.last_error = ""

    def _mark_invalid(self, bad: bool) -> None:
        if bool(self.edit.property("invalid")) == bad:
            return
        self.edit.setProperty("invalid", bad)
        self.edit.style().unpolish(self.edit)
        self.edit.style().polish(self.edit)

    def go(self) -> bool:
        """Move to the typed place; one status line and a red box when it cannot."""
        run = self.state.run
        try:
            if run is None:
                raise InputError("open a run first (File > Open run), then type a place")
            mode, values = parse_position(self.edit.text(), "voxel")
            if mode == "mm":
                ijk = run.mm_to_voxel(values)
            else:
                ijk = run.check_voxel(tuple(int(v) for v in values))
        except VoxelscopeError as err:
            self.last_error = str(err)
            self._mark_invalid(True)
            self.state.message.emit(f"Go to: {err}")
            return False
        self.last_error = ""
        self._mark_invalid(False)
        self.state.set_voxel(tuple(int(v) for v in ijk))
        return True

    def keyPressEvent(self, ev) -> None:  # Esc gives the keys back to the slices
        if ev.key() == Qt.Key.Key_Escape:
            self.edit.clearFocus()
            ev.accept()
            return
        super().keyPressEvent(ev)
