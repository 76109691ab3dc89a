"""Entry point of the window: :func:`launch` (the command line's ``view`` calls it)."""

from __future__ import annotations

import json
import os
import sys
from pathlib import Path

from voxelscope.cli.remedies import CLI_REMEDIES

__all__ = ["DEMO_CONTRAST", "QUIET_MESSAGES", "demo_paths", "install_message_filter", "launch"]

#: Qt messages that say nothing to the user (the offscreen platform has no window manager).
QUIET_MESSAGES = ("This plugin does not support propagateSizeHints()",)

_FILTER: dict = {}


def install_message_filter() -> None:
    """Drop exactly the Qt messages in :data:`QUIET_MESSAGES`; pass all others on.

    Other messages go to the handler that was installed before, or to stderr as Qt
    prints them. Installed once per process.
    """
    if _FILTER:
        return
    from PySide6.QtCore import qInstallMessageHandler

    def handler(kind, context, message) -> None:
        if message in QUIET_MESSAGES:
            return
        previous = _FILTER.get("previous")
        if previous is not None:
            previous(kind, context, message)
        else:
            print(message, file=sys.stderr)

    _FILTER["handler"] = handler
    _FILTER["previous"] = qInstallMessageHandler(handler)


#: The contrast the demo opens with. Not set by the window: it is what the core's one rule
#: (:func:`voxelscope.core.events.default_condition`) gives for the demo's files, whose
#: events sidecar lists tone first, so ``voxelscope fit`` on the same files says the same.
DEMO_CONTRAST = "tone"


def demo_paths() -> dict:
    """Files of the demo scenario and its tone cluster's voxel.

    Raises
    ------
    InputError
        When the sample data are missing.
    """
    import voxelscope
    from voxelscope.core.errors import InputError

    folder = Path(voxelscope.__file__).resolve().parents[1] / "sample_data"
    prep = folder / "study" / "derivatives" / "prep" / "sub-demo" / "func"
    raw = folder / "study" / "sub-demo"
    stem = "sub-demo_task-tonetap_run-1"
    run = prep / f"{stem}_space-phantom_desc-preproc_bold.nii.gz"
    if not run.is_file():
        raise InputError(
            f"{run}: the demo run is missing; make it with python sample_data/make_demo.py"
        )
    out = {
        "run": run,
        "run2": prep / "sub-demo_task-tonetap_run-2_space-phantom_desc-preproc_bold.nii.gz",
        "study": folder / "study",
        "events": raw / "func" / f"{stem}_events.tsv",
        "confounds": prep / f"{stem}_desc-confounds_timeseries.tsv",
        "anatomy": raw / "anat" / "sub-demo_T1w.nii.gz",
        "map": folder / f"{stem}_pipeline-t.nii.gz",
        "voxel": None,
        "marks": folder / "demo_marks.tsv",
    }
    for key in ("run2", "events", "confounds", "anatomy", "map", "marks"):
        if not out[key].is_file():
            out[key] = None
    truth = folder / "demo_truth.json"
    if truth.is_file():
        try:
            data = json.loads(truth.read_text(encoding="utf-8"))
            for f in data.get("features", []):
                if f.get("name") == "tone_cluster":
                    v = f.get("voxel") or f.get("ijk") or f.get("centre_voxel")
                    if v is not None:
                        out["voxel"] = tuple(int(a) for a in v)
        except (OSError, ValueError, TypeError):
            pass
    return out


def _print_errors(message: str) -> None:
    """The window's last error on stderr, one ``voxelscope: error:`` line per problem."""
    for line in str(message).splitlines() or [""]:
        print(f"voxelscope: error: {line}", file=sys.stderr)


def _ensure_platform(screenshot: str | None) -> None:
    if screenshot is not None and not os.environ.get("QT_QPA_PLATFORM"):
        if not os.environ.get("DISPLAY") and not os.environ.get("WAYLAND_DISPLAY"):
            os.environ["QT_QPA_PLATFORM"] = "offscreen"


def _demo_extras(window, marks_path) -> None:
    """The demo's prepared marks (its contrast is the core's default for its files)."""
    from voxelscope.core.errors import VoxelscopeError
    from voxelscope.core.marks import read_marks_tsv

    with window.state.without_history():  # where the demo starts, not a step to undo
        if marks_path is not None:
            try:
                window.state.set_marks(read_marks_tsv(marks_path))
            except VoxelscopeError as err:
                window.show_error(str(err))


def _save_session(window, path, ask: bool, force: bool = False) -> bool:
    """``--save-session``: write the session; an existing file is replaced only when asked
    (or with ``force``, the command line's ``--force``)."""
    from voxelscope.core.errors import VoxelscopeError
    from voxelscope.gui.session_io import save_window_session

    if Path(path).exists() and not force:
        if not ask or window.offscreen():
            window.show_error(
                f"{path} already exists; choose another session file name or delete it"
            )
            return False
        from PySide6.QtWidgets import QMessageBox

        answer = QMessageBox.question(window, "Save session", f"Replace {path}?")
        if answer != QMessageBox.StandardButton.Yes:
            return False
        force = True
    try:
        out = save_window_session(window, path, force=force)
    except VoxelscopeError as err:
        window.show_error(str(err))
        return False
    window.statusBar().showMessage(f"Saved the session to {out}", 8000)
    return True


def launch(
    run: str | None = None,
    events: str | None = None,
    confounds: str | None = None,
    anatomy: str | None = None,
    map_file: str | None = None,
    voxel: tuple[int, int, int] | None = None,
    mm: tuple[float, float, float] | None = None,
    tr: float | None = None,
    screenshot: str | None = None,
    size: tuple[int, int] = (1600, 1000),
    demo: bool = False,
    session: str | None = None,
    save_session: str | None = None,
    show: bool = False,
    recovery: bool = True,
    force: bool = False,
    add_runs: tuple = (),
    mask: str | None = None,
    bids_root: str | None = None,
    atlas: str | None = None,
    atlas_labels: str | None = None,
) -> int:
    """Open the inspection window; with ``screenshot``, render it to a PNG and return.

    Parameters
    ----------
    run : path, optional
        4D run; its events, sidecar and confounds are found by BIDS names beside it when
        ``events`` / ``confounds`` are not given. Without a run the window says how to open one.
    events, confounds, anatomy, map_file : path, optional
        Events TSV, confounds TSV, anatomy, map shown over the slices.
    voxel : (i, j, k), optional
        Starting voxel; or ``mm``, a world position.
    tr : float, optional
        Overrides the sidecar and header TR.
    screenshot : path, optional
        Render the window offscreen at ``size`` once the fits are shown, save the PNG
        atomically and return without entering the event loop.
    size : (width, height)
    demo : bool
        Open the demo run (sample_data) with its events, confounds, anatomy,
        earlier t map and prepared marks, at the tone cluster's voxel.
    session : path, optional
        Restore a saved session (``voxelscope view --session FILE``); the run and the other
        inputs come from it, so ``run`` and its companions are not used. A moved input is
        asked for on screen; offscreen it is skipped with one status line.
    save_session : path, optional
        Save the session to this file once the view is open (``--save-session``); an
        existing file is only replaced after asking (never offscreen).
    show : bool
        Start in Show mode.
    recovery : bool
        On screen, offer to restore the view of a window that did not close cleanly.
    force : bool
        Let ``screenshot`` replace an existing file (never an input).
    add_runs : sequence of path
        Other runs of the same subject, added after ``run`` (File ▸ Add runs…): each is
        fitted at the same place and the runs are combined by fixed effects.
    mask, bids_root, atlas, atlas_labels : optional
        As on the command line (``--mask FILE|auto``, ``--bids-root DIR``, ``--atlas FILE``,
        ``--atlas-labels TSV``).

    Returns
    -------
    int
        0 on success; 2 when the screenshot could not be made (the run did not open) or the
        session could not be saved.
    """
    _ensure_platform(screenshot)
    from PySide6.QtWidgets import QApplication

    from voxelscope.core.errors import VoxelscopeError

    install_message_filter()
    app = QApplication.instance() or QApplication(sys.argv[:1])
    app.setApplicationName("voxelscope")
    app.setOrganizationName("voxelscope-project")
    from voxelscope.gui.colours import use_figure_font

    use_figure_font(app)  # the window's plots in the report figures' type
    import pyqtgraph as pg

    pg.setConfigOptions(antialias=True, imageAxisOrder="col-major")
    from voxelscope.gui.main_window import MainWindow
    from voxelscope.gui.session_io import offer_recovery, open_session

    window = MainWindow()
    window.resize(*size)
    if screenshot is not None:
        window.record_recent = False  # a one-off rendering is not the user's history
    marks_path = None
    if demo:
        try:
            d = demo_paths()
        except VoxelscopeError as err:
            if screenshot is not None:
                print(f"voxelscope: error: {err.phrase(CLI_REMEDIES)}", file=sys.stderr)
                return 2
            window.show_error(str(err))
            d = None
        if d is not None:
            run = str(d["run"])
            events = events or (str(d["events"]) if d["events"] else None)
            confounds = confounds or (str(d["confounds"]) if d["confounds"] else None)
            anatomy = anatomy or (str(d["anatomy"]) if d["anatomy"] else None)
            map_file = map_file or (str(d["map"]) if d["map"] else None)
            marks_path = d["marks"]
            if voxel is None and mm is None:
                voxel = d["voxel"]
    if screenshot is not None:
        from voxelscope.core.outputs import guard_output

        window.autosave.enabled = False
        inputs = [run, events, confounds, anatomy, map_file, session, marks_path, *add_runs]
        inputs += [atlas, atlas_labels]
        try:  # refuse a bad screenshot path before the run is opened
            guard_output(screenshot, inputs, force=force)
        except VoxelscopeError as err:
            print(f"voxelscope: error: {err.phrase(CLI_REMEDIES)}", file=sys.stderr)
            window.close()
            return 2
        window.show()
        if session is not None:
            if not open_session(window, session, locate=None, geometry=False):
                _print_errors(window.last_error)
                window.close()
                return 2
        elif run is not None:
            ok = window.open_run(
                run, events, confounds, anatomy, map_file, tr, voxel, mm, background=False,
                mask=mask, bids_root=bids_root, atlas=atlas, atlas_labels=atlas_labels,
            )  # fmt: skip
            if not ok:
                _print_errors(window.last_error)
                window.close()
                return 2
            from voxelscope.gui.runs import add_run

            for extra in add_runs:
                if not add_run(window, extra, background=False):
                    _print_errors(window.last_error)
                    window.close()
                    return 2
            if add_runs:
                window.live_map.flush()
            if demo:
                _demo_extras(window, marks_path)
        if show:
            window.show_mode.enter()
        window.resize(*size)
        for _ in range(5):
            app.processEvents()
        code = 0
        if save_session is not None and not _save_session(
            window, save_session, ask=False, force=force
        ):
            _print_errors(window.last_error)
            code = 2
        try:
            window.save_image(screenshot, size, force=force)
        except VoxelscopeError as err:
            print(f"voxelscope: error: {err.phrase(CLI_REMEDIES)}", file=sys.stderr)
            code = 2
        window.close()
        return code
    window.show()

    def after() -> None:
        from voxelscope.gui.runs import add_runs_in_order

        add_runs_in_order(window, add_runs)
        if demo:
            _demo_extras(window, marks_path)
        if save_session is not None:
            _save_session(window, save_session, ask=True, force=force)
        if show:
            window.show_mode.enter()

    if recovery and offer_recovery(window):
        pass  # the recovered view replaces what was asked for
    elif session is not None:
        if open_session(window, session, background=True):
            hook = window.after_open

            def chained() -> None:
                if hook is not None:
                    hook()
                after()

            window.after_open = chained
    elif run is not None:
        window.after_open = after
        window.open_run(
            run, events, confounds, anatomy, map_file, tr, voxel, mm, background=True,
            mask=mask, bids_root=bids_root, atlas=atlas, atlas_labels=atlas_labels,
        )  # fmt: skip
    elif show:
        window.show_mode.enter()
    return int(app.exec())
