"""Sessions in the window: save, open, autosave and recovery after a crash.

The core (:mod:`voxelscope.core.session`) owns the file format (versioned JSON with input
digests, written atomically). This module turns the window into a
:class:`~voxelscope.core.session.Session` and back:

- :func:`collect_session` — input files, model settings, voxel, map settings, marks and the
  window layout (``QMainWindow.saveState()`` / ``saveGeometry()`` as base64 in ``layout``).
- :func:`open_session` — restores all that. A moved or missing input, and an input whose
  content digest differs from the one recorded, is asked for before it is read (locate it
  with a file dialog, or skip it); offscreen it is skipped with one status line and the
  window goes on with what is available.
- :class:`Autosave` — writes a recovery file (core ``write_recovery``) every
  ``interval_s`` seconds when something changed and shortly after each significant change;
  a clean close deletes it. Recovery files are named after the process id, so a file whose
  process is gone is one left by a crash: :func:`offer_recovery` asks to restore it.
"""

from __future__ import annotations

import base64
import dataclasses
import os
from collections.abc import Callable
from pathlib import Path

from PySide6.QtCore import QByteArray, QObject, Qt, QTimer
from PySide6.QtGui import QAction, QKeySequence
from PySide6.QtWidgets import QApplication, QFileDialog, QMessageBox

from voxelscope.core.errors import VoxelscopeError
from voxelscope.core.marks import MarkList
from voxelscope.core.model import ModelSettings
from voxelscope.core.session import (
    SESSION_SUFFIX,
    FileProblem,
    LoadedSession,
    Session,
    autosave_dir,
    autosave_path,
    clear_recovery,
    load_session,
    save_session,
    write_recovery,
)
from voxelscope.gui.menus import insert_before_quit, menu_named
from voxelscope.gui.state import MapSettings

__all__ = [
    "SESSION_FILTER",
    "Autosave",
    "collect_session",
    "find_recoveries",
    "install",
    "offer_recovery",
    "open_session",
    "restore_layout",
    "save_window_session",
]

SESSION_FILTER = f"voxelscope sessions (*{SESSION_SUFFIX});;JSON (*.json);;All files (*)"
#: Roles of input files in a session (core names) and the ``open_run`` argument for each.
ROLES = {"run": "run", "events": "events", "confounds": "confounds", "anatomy": "anatomy",
         "overlay": "map_file", "atlas": "atlas", "atlas labels": "atlas_labels"}  # fmt: skip
LAYOUT_KIND = "qt-main-window"

Locate = Callable[[FileProblem], "Path | None"]


# ---------------------------------------------------------------------------- collect


def _b64(data: QByteArray) -> str:
    return base64.b64encode(bytes(data)).decode("ascii")


def _unb64(text) -> QByteArray | None:
    if not isinstance(text, str):
        return None
    try:
        return QByteArray(base64.b64decode(text.encode("ascii"), validate=True))
    except (ValueError, UnicodeEncodeError):
        return None


def window_layout(window) -> dict:
    """The window layout as plain data (base64 of saveState/saveGeometry, display choices).

    ``tr`` is kept here when the TR was given by hand (``--tr``), so the restored view
    fits with the same TR; the core session has no field for it yet.
    """
    show = getattr(window, "show_mode", None)
    saved = show.saved_window_state() if show is not None and show.active else None
    out = {
        "kind": LAYOUT_KIND,
        "state": _b64(saved if saved is not None else window.saveState()),
        "geometry": _b64(window.saveGeometry()),
        "units": window.state.units,
    }
    run = window.state.run
    if run is not None and getattr(run, "tr_source", "") == "argument":
        out["tr"] = float(run.tr)
    return out


def _overlay_path(window) -> Path | None:
    """The map file opened over the run (kept aside while the live model map is shown)."""
    for layer in (window.state.file_layer, window.state.overlay):
        if layer is not None and getattr(layer, "path", None) is not None:
            return Path(layer.path)
    return None


def collect_session(window) -> Session:
    """What the window shows, as a core Session (no file is read or written)."""
    state = window.state
    bundle = state.bundle
    files: dict[str, Path] = {}
    if bundle is not None:
        run_path = Path(bundle.run.path)
        files["run"] = run_path
        if bundle.events_path is not None:
            files["events"] = Path(bundle.events_path)
        if bundle.confounds_path is not None:
            files["confounds"] = Path(bundle.confounds_path)
        sidecar = getattr(bundle.run, "sidecar", None)
        if sidecar is not None and sidecar.is_file():
            files["sidecar"] = sidecar
        if bundle.backdrop is not None and bundle.backdrop.path is not None:
            files["anatomy"] = Path(bundle.backdrop.path)
        atlas = getattr(bundle, "atlas", None)
        if atlas is not None and atlas.path is not None:
            files["atlas"] = Path(atlas.path)
            if atlas.table_path is not None:
                files["atlas labels"] = Path(atlas.table_path)
        overlay = _overlay_path(window)
        if overlay is not None:
            files["overlay"] = overlay
        # several runs: the added runs and their companions, as "run 2", "events 2", ...
        from voxelscope.gui.runs import run_roles

        for n, b in enumerate(state.extra, start=2):
            role_run, role_events, role_conf = run_roles(n)
            files[role_run] = Path(b.run.path)
            if b.events_path is not None:
                files[role_events] = Path(b.events_path)
            if b.confounds_path is not None:
                files[role_conf] = Path(b.confounds_path)
    map_settings = dataclasses.asdict(state.map_settings)
    return Session(
        files=files,
        model=state.settings,
        kernels={},
        voxel=tuple(state.voxel) if bundle is not None else None,
        map=map_settings,
        marks=MarkList(state.marks),
        layout=window_layout(window),
    )


def save_window_session(window, path, force: bool = False) -> Path:
    """Write the window's session to ``path`` (atomic; existing file only with ``force``)."""
    out = save_session(collect_session(window), path, force=force)
    window.session_path = out
    window.state.marks_saved()
    return out


# ---------------------------------------------------------------------------- restore


def restore_layout(window, layout, geometry: bool = True) -> None:
    """Apply a saved layout (docks and, unless told not to, the window geometry)."""
    if not isinstance(layout, dict) or layout.get("kind") != LAYOUT_KIND:
        return
    state = _unb64(layout.get("state"))
    if state is not None:
        window.auto_arrange = False
        window.restoreState(state)
    geom = _unb64(layout.get("geometry")) if geometry else None
    if geom is not None:
        window.restoreGeometry(geom)
    units = layout.get("units")
    if units in ("data", "percent"):
        window.state.set_units(units)


def _offscreen() -> bool:
    from PySide6.QtGui import QGuiApplication

    return QGuiApplication.platformName() in ("offscreen", "minimal")


def ask_for_file(window, problem: FileProblem) -> Path | None:
    """On screen: tell the user which file moved and let them locate it or skip it."""
    box = QMessageBox(window)
    box.setIcon(QMessageBox.Icon.Warning)
    box.setWindowTitle(
        "Session file changed" if problem.kind == "digest" else "Session file missing"
    )
    box.setTextFormat(Qt.TextFormat.PlainText)  # paths and names are never markup
    box.setText(problem.message)
    locate = box.addButton("Locate…", QMessageBox.ButtonRole.AcceptRole)
    box.addButton("Skip", QMessageBox.ButtonRole.RejectRole)
    box.exec()
    if box.clickedButton() is not locate:
        return None
    start = str(problem.path.parent) if problem.path.parent.is_dir() else ""
    path, _ = QFileDialog.getOpenFileName(
        window, f"Locate the {problem.role} file ({problem.path.name})", start, "All files (*)"
    )
    return Path(path) if path else None


def _resolve_files(window, loaded: LoadedSession, locate: Locate | None) -> tuple[dict, list]:
    """Paths to open per role, after asking for moved files; and the notes to show."""
    files = dict(loaded.session.files)
    notes: list[str] = []
    # a changed file is not read until the user locates the right one (digest check first)
    asked = ("missing", "digest", "unverified")
    missing = [p for p in loaded.problems if p.kind in asked]
    for p in loaded.problems:
        if p.kind not in asked:
            notes.append(p.message)
    # the run first: once it is located, look beside it for the other moved files
    missing.sort(key=lambda p: p.role != "run")
    new_folder: Path | None = None
    for p in missing:
        if new_folder is not None and p.kind == "missing":
            beside = new_folder / p.path.name
            if beside.is_file():
                files[p.role] = beside
                continue
        found = locate(p) if locate is not None else None
        if found is not None and Path(found).is_file():
            files[p.role] = Path(found)
            if p.role == "run":
                new_folder = Path(found).parent
        else:
            files.pop(p.role, None)
            notes.append(p.message + " (skipped)")
    return files, notes


def open_session(
    window,
    path,
    locate: Locate | str | None = "ask",
    background: bool = False,
    geometry: bool = True,
) -> bool:
    """Restore a session file in the window; returns whether the run opened (or started).

    Parameters
    ----------
    window : MainWindow
    path : path-like
        A session file (core format).
    locate : "ask", callable or None
        What to do about a moved file: ``"ask"`` shows a dialog on screen and skips offscreen;
        a callable gets the :class:`FileProblem` and returns a path or None (skip).
    background : bool
        Open the run on a worker thread (the interactive window) or right away.
    geometry : bool
        Also restore the window's size and position.
    """
    try:
        loaded = load_session(path)
    except VoxelscopeError as err:
        window.show_error(str(err))
        return False
    return apply_session(window, loaded, locate, background, geometry)


def apply_session(
    window,
    loaded: LoadedSession,
    locate: Locate | str | None = "ask",
    background: bool = False,
    geometry: bool = True,
) -> bool:
    """Restore a loaded session (see :func:`open_session`)."""
    show = getattr(window, "show_mode", None)
    if show is not None and show.active:
        show.leave()  # the session's layout replaces the one Show mode would restore
    if locate == "ask":
        locate = None if _offscreen() else (lambda p: ask_for_file(window, p))
    s = loaded.session
    files, notes = _resolve_files(window, loaded, locate)  # type: ignore[arg-type]
    notes = list(loaded.warnings) + notes
    layout = s.layout if isinstance(s.layout, dict) else {}
    tr = layout.get("tr") if isinstance(layout.get("tr"), (int, float)) else None
    name = Path(loaded.path).name if loaded.path is not None else "session"

    def finish() -> None:
        with window.state.without_history():  # the session is where a new history starts
            _add_session_runs(window, files, notes, refused)
            _apply_settings(window, s, notes)
            # recovered marks (no session file) were never saved by the user
            window.state.set_marks(MarkList(s.marks), saved=loaded.path is not None)
        window.state.history.clear()
        restore_layout(window, s.layout, geometry=geometry)
        if loaded.path is not None:
            window.session_path = Path(loaded.path)
        if notes:
            more = f" (and {len(notes) - 1} more)" if len(notes) > 1 else ""
            window.show_error(notes[0] + more)
        else:
            window.statusBar().showMessage(f"Restored the session {name}", 8000)

    if "run" not in files:
        # no run to open: keep the marks and the layout, say what is missing
        notes.insert(0, f"{name}: the run could not be found; open it with File > Open run")
        window.state.set_marks(MarkList(s.marks))
        restore_layout(window, s.layout, geometry=geometry)
        window.show_error(notes[0])
        return False
    kwargs = {ROLES[r]: str(p) for r, p in files.items() if r in ROLES and r != "run"}
    # an entry that was refused (changed or unverified, not located) must not be replaced
    # by a BIDS companion found beside the run: open without it, explicitly
    refused = set(s.files) - set(files)
    if background:
        window.after_open = finish
    ok = window.open_run(
        str(files["run"]),
        events=kwargs.get("events"),
        confounds=kwargs.get("confounds"),
        anatomy=kwargs.get("anatomy"),
        map_file=kwargs.get("map_file"),
        tr=tr,
        voxel=s.voxel,
        background=background,
        atlas=kwargs.get("atlas"),
        atlas_labels=kwargs.get("atlas_labels") if kwargs.get("atlas") else None,
        no_events="events" in refused,
        no_confounds="confounds" in refused,
    )
    if not ok:
        window.after_open = None
        window.state.set_marks(MarkList(s.marks))
        return False
    if not background:
        finish()
    return True


def _add_session_runs(window, files: dict, notes: list[str], refused=frozenset()) -> None:
    """Open the session's added runs ("run 2", "run 3", ...) with their companions."""
    from voxelscope.gui.runs import add_run, run_roles

    numbers = sorted(
        int(r.split()[1]) for r in files if r.startswith("run ") and r.split()[1].isdigit()
    )
    for n in numbers:
        role_run, role_events, role_conf = run_roles(n)
        ok = add_run(
            window,
            files[role_run],
            events=files.get(role_events),
            confounds=files.get(role_conf),
            background=False,
            no_events=role_events in refused,
            no_confounds=role_conf in refused,
        )
        if not ok:
            notes.append(f"the session's {role_run} could not be added: {window.last_error}")


def _apply_settings(window, s: Session, notes: list[str]) -> None:
    state = window.state
    if state.analysis is not None:
        model = s.model
        rest = {
            f.name: getattr(model, f.name)
            for f in dataclasses.fields(ModelSettings)
            if f.name != "contrast"
        }
        if not state.update_settings(**rest):
            notes.append(
                "the saved model settings do not fit this run's model; the defaults are used"
            )
        contrast = model.contrast or ""
        if contrast and not window.set_contrast_text(contrast):
            notes.append(f"the saved contrast '{contrast}' does not fit this run's conditions")
    known = {f.name for f in dataclasses.fields(MapSettings)}
    changes = {k: v for k, v in (s.map or {}).items() if k in known}
    try:
        state.set_map_settings(**changes)
    except (TypeError, ValueError):
        notes.append("the saved map settings could not be used")


# ---------------------------------------------------------------------------- autosave


def _pid_alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OSError):
        return True
    return True


def recovery_name(pid: int | None = None) -> str:
    return f"window-{os.getpid() if pid is None else int(pid)}"


def find_recoveries(directory=None) -> list[Path]:
    """Recovery files left by windows whose process has ended (newest first)."""
    folder = Path(directory) if directory is not None else autosave_dir()
    out = []
    for p in folder.glob(f"window-*{SESSION_SUFFIX}"):
        stem = p.name[len("window-") : -len(SESSION_SUFFIX)]
        try:
            pid = int(stem)
        except ValueError:
            continue
        if not _pid_alive(pid):
            out.append(p)
    return sorted(out, key=lambda p: p.stat().st_mtime, reverse=True)


class Autosave(QObject):
    """Recovery file for one window: written when something changed, cleared on close.

    Significant changes (run, model, map, marks) are written ``debounce_s`` after the last
    one; any change (a voxel step too) at the latest every ``interval_s`` seconds.
    """

    def __init__(self, window, directory=None, interval_s: float = 30.0, debounce_s: float = 3.0):
        super().__init__(window)
        self.window = window
        self.directory = directory
        self.name = recovery_name()
        self.enabled = True
        self.dirty = False
        self.last_error = ""
        self.writes = 0
        self.timer = QTimer(self)
        self.timer.setInterval(int(interval_s * 1000))
        self.timer.timeout.connect(self._tick)
        self.timer.start()
        self.debounce = QTimer(self)
        self.debounce.setSingleShot(True)
        self.debounce.setInterval(int(debounce_s * 1000))
        self.debounce.timeout.connect(self.write_now)
        st = window.state
        for sig in (st.run_changed, st.settings_changed, st.overlay_changed, st.marks_changed):
            sig.connect(self.significant)
        st.voxel_changed.connect(self.changed)
        st.units_changed.connect(self.changed)
        # a clean close clears the file: MainWindow.closeEvent, once the close is certain
        # (the user may still cancel it to save marks)
        app = QApplication.instance()
        if app is not None:
            app.aboutToQuit.connect(self.clear)

    @property
    def path(self) -> Path:
        return autosave_path(self.name, self.directory)

    def changed(self, *args) -> None:
        self.dirty = True

    def significant(self, *args) -> None:
        self.dirty = True
        if self.enabled:
            self.debounce.start()

    def _tick(self) -> None:
        if self.dirty:
            self.write_now()

    def write_now(self) -> Path | None:
        """Write the recovery file now (nothing is written before a run is open)."""
        self.debounce.stop()
        if not self.enabled or self.window.state.run is None:
            return None
        try:
            p = write_recovery(collect_session(self.window), self.name, self.directory)
        except VoxelscopeError as err:
            if str(err) != self.last_error:  # say it once, not every 30 s
                self.window.statusBar().showMessage(f"Autosave failed: {err}", 20000)
            self.last_error = str(err)
            return None
        self.dirty = False
        self.writes += 1
        return p

    def clear(self) -> bool:
        """A clean close: delete the recovery file."""
        self.timer.stop()
        self.debounce.stop()
        try:
            return clear_recovery(self.name, self.directory)
        except OSError:
            return False


def offer_recovery(window, directory=None, ask: Callable[[Path], bool] | str = "ask") -> bool:
    """After a crash: offer to restore the newest recovery file; returns whether it did.

    ``ask`` is ``"ask"`` (a question on screen; offscreen one status line and nothing is
    restored), or a callable returning True to restore. The file is removed either way once
    answered, so the question is not asked again.
    """
    found = find_recoveries(directory)
    if not found:
        return False
    newest = found[0]
    if ask == "ask":
        if _offscreen():
            window.statusBar().showMessage(
                f"A view from a window that did not close cleanly is in {newest}; "
                "open it with File > Open session",
                20000,
            )
            return False
        ask = lambda p: (  # noqa: E731
            QMessageBox.question(
                window,
                "Restore the last view?",
                "voxelscope did not close cleanly last time. Restore the view it showed "
                "(run, model, voxel, marks and layout)?",
            )
            == QMessageBox.StandardButton.Yes
        )
    restore = bool(ask(newest))
    ok = False
    if restore:
        try:
            loaded = load_session(newest, verify=False)
        except VoxelscopeError as err:
            window.show_error(str(err))
        else:
            loaded.path = None
            ok = apply_session(window, loaded, background=not _offscreen())
    for p in found:
        p.unlink(missing_ok=True)
    return ok


# ---------------------------------------------------------------------------- menus


def ask_save(window) -> Path | None:
    start = str(getattr(window, "session_path", "") or "")
    if not start and window.state.run is not None:
        run = Path(window.state.run.path)
        stem = run.name.split(".nii")[0]
        start = str(run.parent / f"{stem}{SESSION_SUFFIX}")
    path, _ = QFileDialog.getSaveFileName(window, "Save session", start, SESSION_FILTER)
    if not path:
        return None
    try:
        # the file dialog has asked before overwriting
        out = save_window_session(window, path, force=True)
    except VoxelscopeError as err:
        window.show_error(str(err))
        return None
    window.statusBar().showMessage(f"Saved the session to {out}", 8000)
    return out


def ask_open(window) -> bool:
    start = str(Path(window.state.run.path).parent) if window.state.run is not None else ""
    path, _ = QFileDialog.getOpenFileName(window, "Open session", start, SESSION_FILTER)
    if not path:
        return False
    return open_session(window, path, background=True)


def install(window, directory=None) -> Autosave:
    """File ▸ Open session… / Save session… and the autosave of this window."""
    window.session_path = None
    file_menu = menu_named(window, "File")
    open_act = QAction("Open &session…", window)
    open_act.setShortcut(QKeySequence("Ctrl+Shift+O"))
    open_act.triggered.connect(lambda: ask_open(window))
    save_act = QAction("Save s&ession…", window)
    save_act.setShortcut(QKeySequence("Ctrl+Shift+S"))
    save_act.triggered.connect(lambda: ask_save(window))
    if file_menu is not None:
        insert_before_quit(file_menu, [None, open_act, save_act])
    window.autosave = Autosave(window, directory)
    return window.autosave
