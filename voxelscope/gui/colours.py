"""Colours of the window, from the one palette file (:mod:`voxelscope.core.palette`).

Kernel colours follow the colour-blind-safe palette of Okabe & Ito (2008); a kernel has
the same colour in every part of the window, in exported figures and in reports.

Examples
--------
>>> kernel_colour("double-gamma")
'#D55E00'
>>> condition_colour(0) != condition_colour(1)
True
"""

from __future__ import annotations

from importlib import resources
from pathlib import Path

from voxelscope.core.palette import FIGURE_FONT, colours, condition_colour_map, resource_text

__all__ = [
    "colours",
    "condition_colour",
    "condition_colour_map",
    "kernel_colour",
    "resource_text",
    "stylesheet",
    "use_figure_font",
]


def kernel_colour(kernel: str) -> str:
    """Hex colour of a kernel (black for an unknown name).

    Examples
    --------
    >>> kernel_colour("boxcar")
    '#000000'
    """
    return colours()["kernels"].get(str(kernel).lower(), "#000000")


def condition_colour(index: int) -> str:
    """Hex colour of the condition at ``index`` (cycling through the palette)."""
    cycle = colours()["conditions"]
    return cycle[index % len(cycle)]


def stylesheet() -> str:
    """The window's Qt style sheet, with ``@RESOURCES@`` pointing at the resources folder."""
    folder = Path(str(resources.files("voxelscope").joinpath("resources"))).as_posix()
    return resource_text("style.qss").replace("@RESOURCES@", folder)


def use_figure_font(app) -> str:
    """Give the application the figures' font family (:data:`FIGURE_FONT`), so the window's
    plots and the report figures are set in the same type; returns the family Qt uses.

    Where the system lacks the family, matplotlib's copy of it is registered with Qt (only
    then is matplotlib imported); the point size stays the system's.
    """
    from PySide6.QtGui import QFont, QFontDatabase, QFontInfo

    if FIGURE_FONT not in QFontDatabase.families():
        try:
            import matplotlib

            folder = Path(matplotlib.get_data_path()) / "fonts" / "ttf"
            for name in ("DejaVuSans.ttf", "DejaVuSans-Bold.ttf"):
                QFontDatabase.addApplicationFont(str(folder / name))
        except (ImportError, OSError):
            pass
    font = QFont(app.font())
    font.setFamily(FIGURE_FONT)
    app.setFont(font)
    return QFontInfo(app.font()).family()
