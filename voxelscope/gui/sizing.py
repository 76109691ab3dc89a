"""Small size helpers, so no part of the window forces the window wider than the screen.

A combo box asks for the width of its longest item and a label without word wrap for the
width of its text; a few of those side by side add up to more than a 1280-pixel screen.
These helpers cap such requests; the full text stays in the item list and the tooltip.
"""

from __future__ import annotations

from PySide6.QtWidgets import QComboBox, QLabel, QSizePolicy, QWidget

__all__ = ["compact_combo", "compact_spin", "shrinkable"]


def compact_combo(combo: QComboBox, chars: int = 10) -> QComboBox:
    """Let ``combo`` shrink to about ``chars`` characters (its list still shows full items)."""
    combo.setSizeAdjustPolicy(QComboBox.SizeAdjustPolicy.AdjustToMinimumContentsLengthWithIcon)
    combo.setMinimumContentsLength(int(chars))
    combo.setMinimumWidth(int(chars) * 9 + 40)
    policy = combo.sizePolicy()
    policy.setHorizontalPolicy(QSizePolicy.Policy.Preferred)
    combo.setSizePolicy(policy)
    return combo


def compact_spin(spin: QWidget, min_width: int = 96) -> QWidget:
    """Let a spin box shrink below the width of its largest possible value."""
    spin.setMinimumWidth(int(min_width))
    return spin


def shrinkable(widget: QWidget, min_width: int = 60) -> QWidget:
    """Let a label (or any widget) be narrower than its text; it gets what is left over."""
    widget.setMinimumWidth(int(min_width))
    policy = widget.sizePolicy()
    policy.setHorizontalPolicy(QSizePolicy.Policy.Ignored)
    widget.setSizePolicy(policy)
    if isinstance(widget, QLabel):
        widget.setToolTip(widget.toolTip() or widget.text())
    return widget
