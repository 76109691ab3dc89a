"""Colours of the window, read once from ``voxelscope/resources/colours.json``.

Kernel colours follow the colour-blind-safe palette of Okabe & Ito (2008); a kernel has
the same colour in every part of the window.

Examples
--------
>>> kernel_colour("double-gamma")
'#D55E00'
>>> condition_colour(0) != condition_colour(1)
True
"""

from __future__ import annotations

import json
from functools import lru_cache
from importlib import resources
from pathlib import Path
from typing import Any

__all__ = [
    "colours",
    "condition_colour",
    "kernel_colour",
    "resource_text",
    "stylesheet",
]


def resource_text(name: str) -> str:
    """Text of a file in the package's ``resources`` folder."""
    return resources.files("voxelscope").joinpath("resources", name).read_text(encoding="utf-8")


@lru_cache(maxsize=1)
def colours() -> dict[str, Any]:
    """The colour definitions (a dict, cached)."""
    return json.loads(resource_text("colours.json"))


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
