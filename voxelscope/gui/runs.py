"""Several runs of one subject in the window: File ▸ Add runs…, and the runs in sessions.

The first run stays the one drawn in Slices; every added run is opened exactly as a first
run is (:func:`voxelscope.gui.loading.load_bundle`, the core's one way in, with its own
companions found beside it) and handed to :meth:`voxelscope.gui.state.ViewerState.add_run`.
From then on a click fits every run at the same place in mm, Fits has a row per run and
the combined row per kernel, Signal has a run selector, Checks says whether the runs
agree, and the live model map is the fixed-effects map across the runs.
"""

from __future__ import annotations

from pathlib import Path

from PySide6.QtGui import QAction
from PySide6.QtWidgets import QFileDialog

from voxelscope.core.errors import VoxelscopeError
from voxelscope.gui.loading import load_bundle
from voxelscope.gui.workers import OpenRunJob

__all__ = ["add_run", "add_runs_in_order", "install", "open_runs", "run_roles"]

NIFTI_FILTER = "NIfTI runs (*.nii *.nii.gz);;All files (*)"


def run_roles(n: int) -> tuple[str, str, str]:
    """Session roles of the ``n``-th run (n >= 2): run, events and confounds.

    >>> run_roles(2)
    ('run 2', 'events 2', 'confounds 2')
    """
    return f"run {n}", f"events {n}", f"confounds {n}"


def add_run(
    window,
    path,
    events=None,
    confounds=None,
    background: bool = True,
    no_events: bool = False,
    no_confounds: bool = False,
) -> bool:
    """Open another run of the subject and add it to the open runs.

    ``no_events`` / ``no_confounds``: find none beside the run (a refused session entry).

    Returns True when the run was added (foreground) or its opening started (background);
    problems are one line in the status bar or a dialog.
    """
    state = window.state
    if state.run is None or state.analysis is None:
        window.show_error("Open a run with its events first (File > Open run), then add runs.")
        return False
    kwargs = dict(
        run_path=str(path),
        events=events,
        confounds=confounds,
        no_events=no_events,
        no_confounds=no_confounds,
    )

    def opened(bundle) -> None:
        if not state.add_run(bundle):
            window.show_error(state.refusal)
            return
        window.statusBar().showMessage(
            f"Added {Path(bundle.run.path).name}: {len(state.bundles)} runs, combined by "
            "fixed effects",
            10000,
        )

    if not background:
        try:
            bundle = load_bundle(**kwargs)
        except VoxelscopeError as err:
            window.show_error(str(err))
            return False
        before = len(state.extra)
        opened(bundle)
        return len(state.extra) > before
    job = OpenRunJob(window, **kwargs)
    window.runs_jobs = [*getattr(window, "runs_jobs", []), job]
    job.done.connect(opened)
    job.failed.connect(window.show_error)

    def cleanup() -> None:
        job.wait()
        job.deleteLater()
        window.runs_jobs = [j for j in getattr(window, "runs_jobs", []) if j is not job]

    job.finished.connect(cleanup)
    window.statusBar().showMessage(f"Opening {Path(path).name}…")
    job.start()
    return True


def open_runs(window, paths, background: bool = True, **first) -> bool:
    """Open several runs of one subject at once (a study browser's multi-select, a list
    given on the command line): the first as File ▸ Open run does, then the others added.

    ``first`` holds further :meth:`MainWindow.open_run` arguments for the first run
    (voxel, mm, anatomy, ...). Returns False when the first run could not be opened.
    """
    paths = [str(p) for p in paths]
    if not paths:
        return False
    if not background:
        if not window.open_run(paths[0], background=False, **first):
            return False
        for p in paths[1:]:
            add_run(window, p, background=False)
        return True
    previous = window.after_open

    def then() -> None:
        if previous is not None:
            previous()
        add_runs_in_order(window, paths[1:])

    window.after_open = then
    ok = window.open_run(paths[0], **first)
    if not ok:
        window.after_open = previous
    return ok


def add_runs_in_order(window, paths) -> None:
    """Add runs in the background one after the other, so they keep the order given."""
    paths = list(paths)
    if not paths:
        return
    started = add_run(window, paths[0])
    jobs = getattr(window, "runs_jobs", [])
    if started and jobs:
        jobs[-1].finished.connect(lambda: add_runs_in_order(window, paths[1:]))
    else:
        add_runs_in_order(window, paths[1:])


def ask_add_runs(window) -> None:
    """File ▸ Add runs…: pick one or more runs of the same subject."""
    if window.state.run is None:
        window.show_error("Open a run with its events first (File > Open run), then add runs.")
        return
    paths, _ = QFileDialog.getOpenFileNames(
        window, "Add runs of the same subject", window._last_dir(), NIFTI_FILTER
    )
    add_runs_in_order(window, paths)


def install(window) -> None:
    """Add File ▸ Add runs… and File ▸ Close added runs after File ▸ Open run…."""
    from voxelscope.gui.menus import menu_named

    menu = menu_named(window, "File")
    window.add_runs_action = QAction("&Add runs…", window)
    window.add_runs_action.setToolTip(
        "Open other runs of the same subject: each is fitted on its own and the runs are "
        "combined by fixed effects"
    )
    window.add_runs_action.triggered.connect(lambda: ask_add_runs(window))
    window.close_runs_action = QAction("Close added runs", window)
    window.close_runs_action.triggered.connect(window.state.remove_runs)
    window.close_runs_action.setEnabled(False)
    window.state.runs_changed.connect(
        lambda: window.close_runs_action.setEnabled(bool(window.state.extra))
    )
    if menu is None:
        return
    acts = menu.actions()
    after = next((a for a in acts if a.text().replace("&", "").startswith("Open run")), None)
    before = acts[acts.index(after) + 1] if after is not None and after is not acts[-1] else None
    for act in (window.add_runs_action, window.close_runs_action):
        if before is None:
            menu.addAction(act)
        else:
            menu.insertAction(before, act)
