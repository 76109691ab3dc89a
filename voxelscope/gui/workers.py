"""Opening a run off the GUI thread, with progress and cancel.

The thread, progress and cancel plumbing is the window's one background-job class,
:class:`voxelscope.gui.mapjobs.BackgroundJob`; opening a run only adds what to run and how
a cancel reads.
"""

from __future__ import annotations

from PySide6.QtCore import QObject

from voxelscope.gui.loading import load_bundle
from voxelscope.gui.mapjobs import BackgroundJob

__all__ = ["OpenRunJob"]


class OpenRunJob(BackgroundJob):
    """One background open: ``progress(fraction)``, then ``done(bundle)`` or ``failed(text)``.

    ``cancel()`` makes the core's progress callback return False; the open then ends with
    ``failed`` carrying a one-line "cancelled" message (and ``cancelled``).
    """

    def __init__(self, parent: QObject | None = None, **kwargs) -> None:
        path = kwargs.get("run_path")

        def work(progress):
            return load_bundle(progress=progress, **kwargs)

        super().__init__(work, what=str(path), parent=parent)
        self.cancelled.connect(
            lambda: self.failed.emit(f"{path}: opening was cancelled; nothing was kept")
        )
