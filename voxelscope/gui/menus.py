"""The window's menus: File, View and Help, and the helpers parts use to add their items.

The main window calls :func:`build_menus` once its parts are docked (each part gets a
toggle under View); parts that bring menu items of their own (sessions, export and
report, marks, Show mode, added runs) insert them with :func:`menu_named` and
:func:`insert_before_quit`. This module imports no other part of the window, so any part
may use it without an import cycle.
"""

from __future__ import annotations

from PySide6.QtGui import QAction, QKeySequence
from PySide6.QtWidgets import QMenu

__all__ = ["build_menus", "insert_before_quit", "menu_named"]


def build_menus(window) -> None:
    """File (opening inputs, recent runs and studies, window image, Quit), Edit (undo and
    redo), View (a toggle per part, reset of the slice views) and Help (keys, About) of a
    :class:`~voxelscope.gui.main_window.MainWindow`."""
    m = window.menuBar().addMenu("&File")
    act = QAction("Open &run…", window)
    act.setShortcut(QKeySequence.StandardKey.Open)
    act.triggered.connect(window.ask_run)
    m.addAction(act)
    act = QAction("Open &study…", window)
    act.setToolTip("Pick a BIDS dataset folder (raw or derivatives) and browse its runs")
    act.triggered.connect(window.ask_study)
    m.addAction(act)
    window.events_action = QAction("Open &events…", window)
    window.events_action.triggered.connect(window.ask_events)
    m.addAction(window.events_action)
    window.confounds_action = QAction("Open &confounds…", window)
    window.confounds_action.triggered.connect(window.ask_confounds)
    m.addAction(window.confounds_action)
    window.anatomy_action = QAction("Open &anatomy…", window)
    window.anatomy_action.triggered.connect(window.ask_anatomy)
    m.addAction(window.anatomy_action)
    window.atlas_action = QAction("Open a&tlas…", window)
    window.atlas_action.setToolTip(
        "A segmentation image (BIDS dseg) with its dseg.tsv: region names at the cursor"
    )
    window.atlas_action.triggered.connect(window.ask_atlas)
    m.addAction(window.atlas_action)
    window.map_action = QAction("Open &map…", window)
    window.map_action.triggered.connect(window.ask_map)
    m.addAction(window.map_action)
    window.recent_menu = m.addMenu("Recent runs")
    window.recent_studies_menu = m.addMenu("Recent studies")
    window.fill_recent()
    m.addSeparator()
    act = QAction("Save window image…", window)
    act.triggered.connect(window.ask_window_image)
    m.addAction(act)
    m.addSeparator()
    act = QAction("&Quit", window)
    act.setShortcut(QKeySequence("Ctrl+Q"))
    act.triggered.connect(window.close)
    m.addAction(act)
    _build_edit_menu(window)
    v = window.menuBar().addMenu("&View")
    for dock in window.docks.values():
        v.addAction(dock.toggleViewAction())
    v.addSeparator()
    act = QAction("Reset slice views", window)
    act.triggered.connect(window.reset_views)
    v.addAction(act)
    h = window.menuBar().addMenu("&Help")
    act = QAction("&Keys and mouse…", window)
    act.setShortcut(QKeySequence("F1"))
    act.setToolTip("Every key and mouse action of the window")
    act.triggered.connect(window.show_keys)
    h.addAction(act)
    window.keys_action = act
    act = QAction("About voxelscope", window)
    act.triggered.connect(window.about)
    h.addAction(act)


def _build_edit_menu(window) -> None:
    """Edit ▸ Undo / Redo: model changes and marks (the state's history)."""
    e = window.menuBar().addMenu("&Edit")
    history = window.state.history
    window.undo_action = history.createUndoAction(window, "&Undo")
    window.undo_action.setShortcut(QKeySequence("Ctrl+Z"))
    window.redo_action = history.createRedoAction(window, "&Redo")
    window.redo_action.setShortcuts([QKeySequence("Ctrl+Shift+Z"), QKeySequence("Ctrl+Y")])
    for act in (window.undo_action, window.redo_action):
        act.setToolTip("Model changes (contrast, kernels, noise, drift, confounds) and marks")
        e.addAction(act)
        window.addAction(act)  # the keys work with the menu bar hidden (Show mode)
    window.edit_menu = e


def menu_named(window, name: str) -> QMenu | None:
    """The window's top-level menu called ``name`` (ignoring ``&`` accelerators)."""
    for act in window.menuBar().actions():
        menu = act.menu()
        if menu is not None and act.text().replace("&", "") == name:
            return menu
    return None


def insert_before_quit(menu: QMenu, items: list) -> None:
    """Insert actions (None for a separator) before the separator above File ▸ Quit."""
    acts = menu.actions()
    before = None
    for n, act in enumerate(acts):
        if act.text().replace("&", "") == "Quit":
            before = acts[n - 1] if n > 0 and acts[n - 1].isSeparator() else act
            break
    for item in items:
        if item is None:
            sep = QAction(menu)
            sep.setSeparator(True)
            item = sep
        if before is None:
            menu.addAction(item)
        else:
            menu.insertAction(before, item)
