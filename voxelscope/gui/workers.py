"""The window's one way to run work off the GUI thread.

:class:`BackgroundJob` runs a function ``fn(progress)`` on its own QThread and reports
back on the GUI thread with signals: ``progress(fraction)``, then ``done(result)``,
``failed(JobFailure)`` or ``cancelled()``, then ``finished()``. Every background task of
the window goes through it: the live map and its preview (:mod:`voxelscope.gui.mapjobs`),
the Agreement part's comparison and search for causes, the Checks of a voxel, a run being
opened (:class:`OpenRunJob`) and a report being written.

A failure is not flattened into text: :class:`JobFailure` carries the exception object
itself (so a caller can ask ``isinstance(failure.error, OutputExistsError)``) and the one
line the window shows. An exception that is not one of ours
(:class:`~voxelscope.core.errors.VoxelscopeError`) is a bug: its traceback goes to the
``voxelscope.gui.workers`` logger at ERROR level, and the window still shows one line
instead of going down.

:func:`stop_jobs` and :func:`wait_for_jobs` let the window stop or finish the running jobs
when it closes or before a screenshot.

A job can be marked ``first=True``: its first result is what the user waits for (the live
map's preview after a model change). Jobs started while such a job has delivered nothing
yet are held until it has (its first ``partial``, or its end), at most
:data:`FIRST_WAIT_MS`: on two cores the voxel's refit and the Checks, started by the same
change, otherwise take the interpreter and a core from the preview.
"""

from __future__ import annotations

import atexit
import logging
import threading
import warnings
from collections.abc import Callable
from dataclasses import dataclass

from PySide6.QtCore import (
    QCoreApplication,
    QElapsedTimer,
    QObject,
    Qt,
    QThread,
    QTimer,
    Signal,
    Slot,
)

from voxelscope.core.errors import Cancelled, VoxelscopeError
from voxelscope.gui.loading import load_bundle

__all__ = [
    "WINDOW_REMEDIES",
    "BackgroundJob",
    "JobFailure",
    "OpenRunJob",
    "describe",
    "disconnect_all",
    "stop_jobs",
    "wait_for_jobs",
]

log = logging.getLogger(__name__)

_JOBS: set[BackgroundJob] = set()

#: The longest a job waits for a ``first=True`` job's first result (ms).
FIRST_WAIT_MS = 400
_FIRSTS: set[BackgroundJob] = set()  # first-result jobs that have delivered nothing yet
_HELD: list[BackgroundJob] = []  # jobs waiting for them, in the order they were started


#: The window's words for the remedies the core's errors name (menu items, not flags);
#: keys missing here keep the core's plain words (:data:`voxelscope.core.errors.REMEDIES`).
WINDOW_REMEDIES: dict[str, str] = {
    "events": "open one with File > Open events…",
    "choose_events": "choose one with File > Open events…",
    "confounds_for_columns": "open a table with File > Open confounds…",
    "choose_confounds": "choose one with File > Open confounds…",
    "atlas": "open the atlas image with File > Open atlas…",
    "force": "choose to replace it or pick another folder",
}


def describe(error: BaseException, what: str = "the job") -> str:
    """The one line the window shows for ``error`` raised by the work called ``what``.

    Our own errors (bad input, a model that cannot be fitted) already say what to do and
    are shown as they are; anything else names the job and the exception's type.

    Examples
    --------
    >>> from voxelscope.core.errors import InputError
    >>> describe(InputError("a.tsv: no onset column; add one"), "the map")
    'a.tsv: no onset column; add one'
    >>> describe(InputError("run.nii: no events file given", remedy="events"), "opening")
    'run.nii: no events file given; open one with File > Open events…'
    >>> describe(MemoryError(), "the map")
    'the map: not enough memory'
    >>> describe(ZeroDivisionError("division by zero"), "the map")
    'the map failed (ZeroDivisionError: division by zero)'
    """
    if isinstance(error, VoxelscopeError):
        return error.phrase(WINDOW_REMEDIES)
    if isinstance(error, MemoryError):
        return f"{what}: not enough memory"
    text = " ".join(str(error).split())[:160]
    return f"{what} failed ({type(error).__name__}: {text})"


@dataclass(frozen=True)
class JobFailure:
    """How a job failed: the exception object and the line for the user.

    ``str(failure)`` is the line, so a failure can go straight to a status bar.

    Examples
    --------
    >>> f = JobFailure(KeyError("x"), "the map failed (KeyError: 'x')")
    >>> isinstance(f.error, KeyError), str(f)
    (True, "the map failed (KeyError: 'x')")
    """

    error: BaseException
    line: str

    def __str__(self) -> str:
        return self.line


class _Worker(QObject):
    progress = Signal(float)
    partial = Signal(object)
    done = Signal(object)
    failed = Signal(object)
    cancelled = Signal()

    def __init__(
        self, fn: Callable, cancel: threading.Event, what: str, partial: bool = False
    ) -> None:
        super().__init__()
        self.fn = fn
        self.cancel = cancel
        self.what = what
        self.with_partial = partial

    def _partial(self, value: object) -> None:
        if not self.cancel.is_set():
            self.partial.emit(value)

    def _progress(self, fraction: float) -> bool:
        self.progress.emit(float(fraction))
        return not self.cancel.is_set()

    @Slot()
    def run(self) -> None:
        if self.cancel.is_set():  # cancelled before it began (held, then superseded)
            self.cancelled.emit()
            return
        try:
            if self.with_partial:
                out = self.fn(self._progress, self._partial)
            else:
                out = self.fn(self._progress)
        except Cancelled:
            self.cancelled.emit()
        except (VoxelscopeError, MemoryError) as err:
            log.debug("%s: %s", self.what, err, exc_info=err)
            self.failed.emit(JobFailure(err, describe(err, self.what)))
        except Exception as err:
            # a bug: the developer gets the traceback, the window one line (and stays up)
            log.error("%s failed", self.what, exc_info=err)
            self.failed.emit(JobFailure(err, describe(err, self.what)))
        else:
            if self.cancel.is_set():
                self.cancelled.emit()
            else:
                self.done.emit(out)


class BackgroundJob(QObject):
    """Run ``fn(progress)`` on a worker thread; ``done(result)``,
    ``failed(JobFailure)`` or ``cancelled()`` follows, then ``finished()``.

    ``progress(fraction)`` returns False after :meth:`cancel`, which makes the core
    functions stop at their next step. With ``partial=True`` the function is called as
    ``fn(progress, partial)``; ``partial(value)`` sends an intermediate result (a preview)
    to the GUI thread as the ``partial`` signal. ``owner`` (default: ``parent``) is the
    object the results are for: when it is destroyed the job is cancelled and its signals
    are cut, and :func:`stop_jobs` stops the jobs owned by a window and its parts.
    With ``first=True`` the jobs started until its first result wait for it (see the
    module's notes).
    """

    progress = Signal(float)
    partial = Signal(object)
    done = Signal(object)
    failed = Signal(object)
    cancelled = Signal()
    finished = Signal()

    def __init__(
        self,
        fn: Callable,
        what: str = "the job",
        parent: QObject | None = None,
        owner: QObject | None = None,
        partial: bool = False,
        first: bool = False,
    ):
        super().__init__(parent)
        self.owner = owner if owner is not None else parent
        self.what = what
        self.first = bool(first)
        self._cancel = threading.Event()
        self.thread = QThread()
        self.worker = _Worker(fn, self._cancel, what, partial)
        self.worker.moveToThread(self.thread)
        self.thread.started.connect(self.worker.run)
        self.worker.progress.connect(self.progress)
        self.worker.partial.connect(self.partial)
        self.worker.done.connect(self.done)
        self.worker.failed.connect(self.failed)
        self.worker.cancelled.connect(self.cancelled)
        for sig in (self.worker.done, self.worker.failed, self.worker.cancelled):
            # direct: the thread ends as soon as the work does, even while the GUI thread
            # is blocked waiting for it (a queued quit would wait for the GUI's event loop)
            sig.connect(self.thread.quit, Qt.ConnectionType.DirectConnection)
        self.thread.finished.connect(self._finished)
        if self.first:
            for sig in (self.partial, self.done, self.failed, self.cancelled, self.finished):
                sig.connect(self._first_result)
        self._running = False
        self._owner_link = None
        if self.owner is not None:
            # the owner going away must not receive late results (its C++ side is gone);
            # a lambda, not the bound method: the dying owner is never passed to Python
            self._owner_link = self.owner.destroyed.connect(lambda: self.detach())

    def start(self) -> None:
        _JOBS.add(self)
        self._running = True
        if self.first:
            _FIRSTS.add(self)
        elif _FIRSTS:
            _HELD.append(self)
            QTimer.singleShot(FIRST_WAIT_MS, _release_held)
            return
        self.thread.start()

    def is_held(self) -> bool:
        """Started, and waiting for a first-result job (see the module's notes)."""
        return self in _HELD

    def _first_result(self, *_args) -> None:
        if self in _FIRSTS:
            _FIRSTS.discard(self)
            if not _FIRSTS:
                QTimer.singleShot(0, _release_held)  # after this result is handled

    def cancel(self) -> None:
        self._cancel.set()

    @property
    def is_cancelled(self) -> bool:
        return self._cancel.is_set()

    def is_running(self) -> bool:
        return self._running

    def wait(self, ms: int = 60000) -> bool:
        return self.thread.wait(ms)

    def detach(self, *_args) -> None:
        """Cancel and drop every connection to the outside (the job runs out on its own)."""
        self._cancel.set()
        disconnect_all(
            self.progress, self.partial, self.done, self.failed, self.cancelled, self.finished
        )
        self._first_result()  # nothing of it will be shown: held jobs need not wait

    def stop(self, timeout_ms: int = 10000) -> bool:
        """Detach, then wait for the worker thread to end; True when it has."""
        self.detach()
        if self in _HELD:
            _HELD.remove(self)
        self._first_result()
        self.thread.quit()  # ends the thread's event loop once the work returns
        ok = self.thread.wait(int(timeout_ms))
        if ok:
            self._running = False
            _JOBS.discard(self)
            self._forget_owner()
        return ok

    def _forget_owner(self) -> None:
        link, self._owner_link = self._owner_link, None
        if link is not None:
            QObject.disconnect(link)

    def _finished(self) -> None:
        self._running = False
        self._first_result()
        _JOBS.discard(self)
        self._forget_owner()
        self.finished.emit()


class OpenRunJob(BackgroundJob):
    """One background open of a run and its companions (:func:`load_bundle`).

    ``done(bundle)`` or ``failed(JobFailure)``; ``cancel()`` makes the core's progress
    callback return False and the open then ends with ``failed`` carrying
    :class:`~voxelscope.core.errors.Cancelled` and a one-line "cancelled" message (and
    ``cancelled``).
    """

    def __init__(self, parent: QObject | None = None, **kwargs) -> None:
        path = kwargs.get("run_path")

        def work(progress):
            return load_bundle(progress=progress, **kwargs)

        super().__init__(work, what=str(path), parent=parent)
        line = f"{path}: opening was cancelled; nothing was kept"
        self.cancelled.connect(lambda: self.failed.emit(JobFailure(Cancelled(line), line)))


def _release_held() -> None:
    """Start the jobs held for a first result (it came, or they waited long enough)."""
    held = list(_HELD)
    _HELD.clear()
    for job in held:
        job.thread.start()


def disconnect_all(*signals) -> None:
    """Disconnect every slot of each signal (quietly when none is connected)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        for sig in signals:
            try:
                sig.disconnect()
            except (RuntimeError, TypeError):
                pass


def _owned_by(obj: QObject | None, root: QObject) -> bool:
    """Whether ``obj`` is ``root`` or one of its descendants."""
    while obj is not None:
        if obj is root:
            return True
        try:
            obj = obj.parent()
        except RuntimeError:  # C++ side already deleted
            return False
    return False


def stop_jobs(root: QObject | None = None, timeout_ms: int = 10000) -> bool:
    """Stop the background jobs owned by ``root`` (all jobs when None) and wait for them.

    Their results are dropped (nothing is delivered to their owners). Returns True when
    every stopped job's thread has ended.
    """
    ok = True
    for job in list(_JOBS):
        if root is None or _owned_by(job.owner, root):
            ok &= job.stop(timeout_ms)
    return ok


def stop_all_at_exit() -> None:
    """Stop every job: a QThread destroyed while running aborts the process."""
    stop_jobs(None, 5000)


atexit.register(stop_all_at_exit)


def wait_for_jobs(timeout_ms: int = 20000, cancel: bool = False) -> bool:
    """Let running background jobs finish (or cancel them), delivering their results.

    Returns True when none is left running.
    """
    clock = QElapsedTimer()
    clock.start()
    app = QCoreApplication.instance()
    _release_held()
    while _JOBS and clock.elapsed() < timeout_ms:
        _release_held()
        for job in list(_JOBS):
            if cancel:
                job.cancel()
            job.wait(20)
        if app is not None:
            app.processEvents()
    if app is not None:
        app.processEvents()
    return not _JOBS
