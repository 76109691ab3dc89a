"""Tests of voxelscope/gui/colours.py: the window's colours and the figures' font.

Outside references: Qt's own ``QFontInfo`` (the family the window really draws with) and
matplotlib's font manager (the family the report figures are drawn with).
"""

from __future__ import annotations

from PySide6.QtGui import QFontInfo
from PySide6.QtWidgets import QApplication

from voxelscope.core import figure, palette
from voxelscope.gui import colours as C


def test_window_and_report_figures_share_one_palette():
    assert C.colours() is palette.colours()  # read once, in one place
    for k, v in figure.kernel_colours().items():
        assert C.kernel_colour(k) == v


def test_window_uses_the_figure_font(qtbot):
    from matplotlib.font_manager import FontProperties, findfont, get_font

    app = QApplication.instance()
    saved = app.font()
    try:
        family = C.use_figure_font(app)
        assert family == palette.FIGURE_FONT == QFontInfo(app.font()).family()
        path = findfont(FontProperties(family=palette.FIGURE_FONT), fallback_to_default=False)
        assert get_font(path).family_name == family  # the report figures' font
    finally:
        app.setFont(saved)


def test_condition_colours_follow_the_name_not_the_file_order():
    from voxelscope.gui.colours import condition_colour_map

    a = condition_colour_map(["tone", "tap", "rest"])
    b = condition_colour_map(["rest", "tap", "tone"])
    assert a == b and len(set(a.values())) == 3
