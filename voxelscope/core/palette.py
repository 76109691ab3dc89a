"""The project's colours and figure font, read in one place (no Qt).

``voxelscope/resources/colours.json`` (package data) holds every colour: kernels and
conditions from the colour-blind-safe palette of Okabe & Ito (2008), the data trace, the
window's backgrounds. The window (:mod:`voxelscope.gui.colours`) and the report figures
(:mod:`voxelscope.core.figure`) both read it through :func:`colours`, so a kernel has the
same colour in the window, in exported figures and in reports.

:data:`FIGURE_FONT` is the font family of every figure: the report figures (drawn with
matplotlib, which ships this family) and the window (which asks Qt for the same family at
start-up; see :func:`voxelscope.gui.colours.use_figure_font`).

Examples
--------
>>> colours()["kernels"]["double-gamma"]
'#D55E00'
>>> kernel_colours()["fir"], condition_colours()[0]
('#0072B2', '#56B4E9')
>>> condition_colour_map(["tap", "rest"]) == condition_colour_map(["rest", "tap"])
True
"""

from __future__ import annotations

import json
from functools import lru_cache
from importlib import resources
from typing import Any

__all__ = [
    "FIGURE_FONT",
    "colours",
    "condition_colour_map",
    "condition_colours",
    "kernel_colours",
    "resource_text",
]

#: Font family of the figures, in the window and in reports (matplotlib ships it).
FIGURE_FONT = "DejaVu Sans"


def resource_text(name: str) -> str:
    """Text of a file in the package's ``resources`` folder."""
    return resources.files("voxelscope").joinpath("resources", name).read_text(encoding="utf-8")


@lru_cache(maxsize=1)
def colours() -> dict[str, Any]:
    """The colour definitions of ``resources/colours.json`` (read once, cached)."""
    return json.loads(resource_text("colours.json"))


def kernel_colours() -> dict[str, str]:
    """Kernel name -> ``#RRGGBB`` (a copy the caller may change)."""
    return dict(colours()["kernels"])


def condition_colours() -> list[str]:
    """The cycle of condition colours."""
    return list(colours()["conditions"])


def condition_colour_map(names) -> dict[str, str]:
    """Condition name -> ``#RRGGBB``, the same whatever order the names come in.

    Colours follow the names' sorted order, not the order of the events file, so two runs
    whose files list their conditions in another order still draw ``tap`` in one colour, in
    the window, in figures and in reports.

    Examples
    --------
    >>> m = condition_colour_map(["tap", "rest", "tap"])
    >>> m["rest"] == condition_colours()[0], m["tap"] == condition_colours()[1]
    (True, True)
    """
    cycle = condition_colours()
    return {name: cycle[i % len(cycle)] for i, name in enumerate(sorted(set(map(str, names))))}
