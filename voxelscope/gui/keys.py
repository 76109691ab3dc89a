"""Every key and mouse action of the window, in one table (Help ▸ Keys and mouse…).

:data:`BINDINGS` is the one list the Help page is made from. It is kept true by
``tests/gui/test_keys.py``: every shortcut of every action in the window must be listed
here, every window-wide key listed must be bound, Show mode's key sets must be listed
and every key listed for Slices must move something. A new shortcut therefore fails
that test until it is written down here.
"""

from __future__ import annotations

import html
from dataclasses import dataclass

__all__ = ["BINDINGS", "Binding", "keys_html", "listed_keys"]


@dataclass(frozen=True)
class Binding:
    """One key or mouse action.

    Attributes
    ----------
    keys : tuple of str
        Qt's portable key text (``"Ctrl+M"``, ``"PgUp"``) or a mouse action in words.
    where : str
        The part of the window it works in (``"Anywhere"`` for window-wide shortcuts).
    what : str
        What it does, in a few words.
    mouse : bool
        A mouse action rather than keys.
    """

    keys: tuple[str, ...]
    where: str
    what: str
    mouse: bool = False


BINDINGS: tuple[Binding, ...] = (
    # window-wide shortcuts (actions of the window and its menus)
    Binding(("Ctrl+O",), "Anywhere", "Open a run"),
    Binding(("Ctrl+Shift+O",), "Anywhere", "Open a saved session"),
    Binding(("Ctrl+Shift+S",), "Anywhere", "Save the session (run, model, voxel, marks, layout)"),
    Binding(("Ctrl+E",), "Anywhere", "Save a part of the view or a figure as PNG or SVG"),
    Binding(("Ctrl+R",), "Anywhere", "Write a report"),
    Binding(("Ctrl+Z",), "Anywhere", "Undo the last model change or marks change"),
    Binding(("Ctrl+Shift+Z", "Ctrl+Y"), "Anywhere", "Redo what was undone"),
    Binding(("Ctrl+M", "M"), "Anywhere", "Add a mark at the current voxel"),
    Binding(("F5",), "Anywhere", "Show mode on or off"),
    Binding(("F1",), "Anywhere", "This list of keys and mouse actions"),
    Binding(("Ctrl+Q",), "Anywhere", "Quit (asks first when marks are not saved)"),
    # Slices
    Binding(("Left click",), "Slices", "Move the crosshair there and refit", mouse=True),
    Binding(("Left drag",), "Slices", "Drag the crosshair; the fits follow", mouse=True),
    Binding(("Wheel",), "Slices", "Step through the slices of that view", mouse=True),
    Binding(("Ctrl+Wheel",), "Slices", "Zoom about the pointer", mouse=True),
    Binding(("Right drag", "Middle drag"), "Slices", "Pan the view", mouse=True),
    Binding(("Double click",), "Slices", "Fit the whole slice in the view again", mouse=True),
    Binding(("Left", "Right", "Up", "Down"), "Slices", "Move the crosshair one voxel"),
    Binding(("PgUp", "PgDown"), "Slices", "Next or previous slice of that view"),
    Binding(("Home",), "Slices", "Fit the whole slice in the view again"),
    # Model
    Binding(
        ("Return",), "Model: contrast", "Use the contrast typed (it is also used after a pause)"
    ),
    Binding(("Esc",), "Model: contrast", "Put back the contrast in use"),
    # Fits, Findings, Marks
    Binding(("Ctrl+C",), "Fits", "Copy the table as tab-separated text"),
    Binding(
        ("Up", "Down", "PgUp", "PgDown"),
        "Findings",
        "Another cluster: the crosshair goes to its peak",
    ),
    Binding(("Ctrl+C",), "Findings", "Copy the table as tab-separated text"),
    Binding(("Click",), "Findings", "Go to the cluster's peak", mouse=True),
    Binding(("Click",), "Marks", "Go to the mark", mouse=True),
    Binding(("Drag a row",), "Marks", "Put the mark elsewhere in the list", mouse=True),
    Binding(("Double click",), "Marks", "Edit the title or the note in the list", mouse=True),
    Binding(("F2",), "Marks", "Edit the title or the note of the selected mark"),
    Binding(("Del",), "Marks", "Delete the selected mark (Ctrl+Z brings it back)"),
    # Show mode
    Binding(("Right", "Down", "PgDown", "Space"), "Show mode", "Next mark"),
    Binding(("Left", "Up", "PgUp", "Backspace"), "Show mode", "Previous mark"),
    Binding(("Home", "End"), "Show mode", "First or last mark"),
    Binding(("Esc",), "Show mode", "Leave Show mode"),
)


def listed_keys(where: str | None = None) -> set[str]:
    """Key texts listed (for one part, or all); mouse actions are left out.

    >>> "Ctrl+Z" in listed_keys("Anywhere")
    True
    """
    return {
        k for b in BINDINGS if not b.mouse and (where is None or b.where == where) for k in b.keys
    }


def _native(key: str) -> str:
    """How the platform writes a key (``Ctrl+Z`` as ``⌘Z`` on some systems)."""
    from PySide6.QtGui import QKeySequence

    text = QKeySequence(key).toString(QKeySequence.SequenceFormat.NativeText)
    return text or key


def keys_html() -> str:
    """The Help page: one table per part of the window, made from :data:`BINDINGS`."""
    parts: dict[str, list[Binding]] = {}
    for b in BINDINGS:
        parts.setdefault(b.where, []).append(b)
    out = ["<style>td{padding:2px 10px 2px 0; vertical-align:top} h3{margin:10px 0 2px 0}</style>"]
    for where, items in parts.items():
        out.append(f"<h3>{html.escape(where)}</h3><table>")
        for b in items:
            keys = [k if b.mouse else _native(k) for k in b.keys]
            shown = " or ".join(f"<b>{html.escape(k)}</b>" for k in keys)
            out.append(f"<tr><td>{shown}</td><td>{html.escape(b.what)}</td></tr>")
        out.append("</table>")
    return "".join(out)
