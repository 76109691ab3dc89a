"""The window's one background-job class: results, cancel, and failures that keep the error.

No outside reference applies: these are the job's own promises (the exception object
reaches the caller, a bug's traceback reaches the log, a cancel ends the work).
"""

import logging
import threading
import time

from voxelscope.core.errors import Cancelled, InputError, OutputExistsError
from voxelscope.gui import workers
from voxelscope.gui.workers import WINDOW_REMEDIES, BackgroundJob, JobFailure, describe


def _run(qtbot, job, signal):
    with qtbot.waitSignal(signal, timeout=5000) as blocker:
        job.start()
    assert job.wait(5000)
    return blocker.args


def test_done_carries_the_result_and_progress_arrives(qtbot):
    seen = []

    def fn(progress):
        progress(0.5)
        return 42

    job = BackgroundJob(fn)
    job.progress.connect(seen.append)
    assert _run(qtbot, job, job.done) == [42]
    qtbot.waitUntil(lambda: not job.is_running(), timeout=5000)
    assert seen == [0.5]


def test_failure_carries_the_exception_object(qtbot):
    error = OutputExistsError("/tmp/report/index.html")

    def fn(_progress):
        raise error

    job = BackgroundJob(fn, "the report")
    (failure,) = _run(qtbot, job, job.failed)
    assert isinstance(failure, JobFailure)
    assert failure.error is error
    # the window's words for the remedy, never the command line's flag
    assert failure.line == "/tmp/report/index.html already exists; " + WINDOW_REMEDIES["force"]
    assert "--force" not in failure.line and str(failure) == failure.line


def test_a_bug_is_one_line_for_the_user_and_a_traceback_in_the_log(qtbot, caplog):
    def fn(_progress):
        return {}["missing"]

    job = BackgroundJob(fn, "the checks of this voxel")
    with caplog.at_level(logging.ERROR, logger="voxelscope.gui.workers"):
        (failure,) = _run(qtbot, job, job.failed)
    assert isinstance(failure.error, KeyError)
    assert failure.line == "the checks of this voxel failed (KeyError: 'missing')"
    assert "\n" not in failure.line
    records = [r for r in caplog.records if r.name == "voxelscope.gui.workers"]
    assert len(records) == 1 and records[0].levelno == logging.ERROR
    assert records[0].exc_info is not None and records[0].exc_info[0] is KeyError
    assert "Traceback" in caplog.text and "fn" in caplog.text


def test_our_own_errors_are_not_logged_as_bugs(qtbot, caplog):
    def fn(_progress):
        raise InputError("a.tsv: no onset column; add one")

    job = BackgroundJob(fn, "the map")
    with caplog.at_level(logging.ERROR, logger="voxelscope.gui.workers"):
        (failure,) = _run(qtbot, job, job.failed)
    assert failure.line == "a.tsv: no onset column; add one"
    assert not [r for r in caplog.records if r.levelno >= logging.ERROR]


def test_cancel_ends_the_work_with_cancelled():
    ran = threading.Event()

    def fn(progress):
        ran.set()
        while progress(0.5) is not False:
            time.sleep(0.002)
        raise Cancelled("stopped")

    job = BackgroundJob(fn)
    got = []
    job.cancelled.connect(lambda: got.append("cancelled"))
    job.done.connect(lambda r: got.append("done"))
    job.failed.connect(lambda f: got.append("failed"))
    job.start()
    assert ran.wait(5)
    job.cancel()
    assert workers.wait_for_jobs(5000)
    assert got == ["cancelled"]


def test_stop_jobs_stops_the_jobs_of_one_owner_only(qtbot):
    from PySide6.QtCore import QObject

    mine, other = QObject(), QObject()
    release = threading.Event()

    def fn(progress):
        while progress(0.1) is not False and not release.is_set():
            time.sleep(0.002)
        return "ran out"

    a = BackgroundJob(fn, owner=mine)
    b = BackgroundJob(fn, owner=other)
    got = []
    a.done.connect(got.append)
    b.done.connect(got.append)
    a.start()
    b.start()
    assert workers.stop_jobs(mine, 5000)
    assert not a.is_running() and b.is_running()
    release.set()
    qtbot.waitUntil(lambda: got == ["ran out"], timeout=5000)
    assert workers.wait_for_jobs(5000)
    assert b.wait(5000)


def test_describe_names_the_job_for_foreign_errors():
    assert describe(MemoryError(), "the map") == "the map: not enough memory"
    long = describe(ValueError("x " * 200), "the map")
    assert long.startswith("the map failed (ValueError: x x") and len(long) < 200


def test_owner_gone_while_running_cuts_the_results_off():
    import shiboken6
    from PySide6.QtCore import QObject

    owner = QObject()
    release = threading.Event()

    def fn(progress):
        release.wait(5)
        return "late"

    job = BackgroundJob(fn, owner=owner)
    got = []
    job.done.connect(got.append)
    job.start()
    shiboken6.delete(owner)  # the part's C++ side is destroyed while its job runs
    assert job.is_cancelled
    release.set()
    assert workers.wait_for_jobs(5000)
    assert got == []


def test_jobs_started_before_a_first_result_wait_for_it(qtbot):
    """A job started while a ``first=True`` job has delivered nothing waits (held) until
    that job's first partial result; a job cancelled while held ends without running."""
    go = threading.Event()
    ran = []

    def leading(_progress, partial):
        go.wait(5)
        partial("plane")
        time.sleep(0.2)
        return "map"

    lead = BackgroundJob(leading, "the map", partial=True, first=True)
    later = BackgroundJob(lambda _p: ran.append("fit") or "fit", "the fit")
    gone = BackgroundJob(lambda _p: ran.append("gone"), "a superseded fit")
    order = []
    lead.partial.connect(lambda v: order.append(v))
    later.done.connect(lambda v: order.append(v))
    lead.start()
    later.start()
    gone.start()
    assert later.is_held() and gone.is_held() and not lead.is_held()
    gone.cancel()
    qtbot.wait(100)
    assert ran == [] and later.is_held()  # nothing from the map yet: the fit waits
    go.set()
    qtbot.waitUntil(lambda: "fit" in order, timeout=5000)
    assert order[0] == "plane"  # the map's first result came first
    qtbot.waitUntil(lambda: not (lead.is_running() or later.is_running() or gone.is_running()))
    assert ran == ["fit"]


def test_a_held_job_starts_after_the_longest_wait(qtbot, monkeypatch):
    """A first-result job that shows nothing for long does not keep the others waiting
    beyond FIRST_WAIT_MS; a job of its own end releases them too."""
    monkeypatch.setattr(workers, "FIRST_WAIT_MS", 50)
    go = threading.Event()
    lead = BackgroundJob(lambda _p, _partial: go.wait(5), "the map", partial=True, first=True)
    later = BackgroundJob(lambda _p: "fit", "the fit")
    lead.start()
    with qtbot.waitSignal(later.done, timeout=5000):
        later.start()
        assert later.is_held()
    go.set()
    qtbot.waitUntil(lambda: not lead.is_running(), timeout=5000)
    assert not workers._FIRSTS and not workers._HELD
