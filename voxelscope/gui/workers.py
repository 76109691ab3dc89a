"""Opening a run off the GUI thread, with progress and cancel."""

from __future__ import annotations

import threading

from PySide6.QtCore import QObject, QThread, Signal, Slot

from voxelscope.core.errors import VoxelscopeError
from voxelscope.gui.loading import load_bundle

__all__ = ["OpenRunJob"]


class _Worker(QObject):
    progress = Signal(float)
    done = Signal(object)
    failed = Signal(str)

    def __init__(self, kwargs: dict, cancel: threading.Event) -> None:
        super().__init__()
        self.kwargs = kwargs
        self.cancel = cancel

    def _progress(self, fraction: float) -> bool:
        self.progress.emit(float(fraction))
        return not self.cancel.is_set()

    @Slot()
    def run(self) -> None:
        try:
            bundle = load_bundle(progress=self._progress, **self.kwargs)
        except VoxelscopeError as err:
            self.failed.emit(str(err))
        except MemoryError:
            self.failed.emit(f"{self.kwargs.get('run_path')}: not enough memory to open the run")
        except Exception as err:  # never let a worker take the window down
            self.failed.emit(
                f"{self.kwargs.get('run_path')}: could not be opened "
                f"({type(err).__name__}: {' '.join(str(err).split())[:160]})"
            )
        else:
            self.done.emit(bundle)


class OpenRunJob(QObject):
    """One background open: ``progress(fraction)``, then ``done(bundle)`` or ``failed(text)``.

    ``cancel()`` makes the core's progress callback return False; the open then fails
    with the core's one-line "cancelled" message.
    """

    progress = Signal(float)
    done = Signal(object)
    failed = Signal(str)
    finished = Signal()

    def __init__(self, parent: QObject | None = None, **kwargs) -> None:
        super().__init__(parent)
        self._cancel = threading.Event()
        self.thread = QThread()
        self.worker = _Worker(kwargs, self._cancel)
        self.worker.moveToThread(self.thread)
        self.thread.started.connect(self.worker.run)
        self.worker.progress.connect(self.progress)
        self.worker.done.connect(self.done)
        self.worker.failed.connect(self.failed)
        self.worker.done.connect(self.thread.quit)
        self.worker.failed.connect(self.thread.quit)
        self.thread.finished.connect(self.finished)

    def start(self) -> None:
        self.thread.start()

    def cancel(self) -> None:
        self._cancel.set()

    def wait(self, ms: int = 60000) -> bool:
        return self.thread.wait(ms)
