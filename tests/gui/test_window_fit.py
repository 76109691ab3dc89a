"""The window fits common screens, renders screenshots 1:1, and closes without stray threads."""

import pytest
from PySide6.QtCore import qInstallMessageHandler


@pytest.mark.parametrize("size", [(1280, 800), (1600, 1000), (1920, 1080)])
def test_demo_window_fits_the_screen_and_renders_at_its_size(
    demo_window, qtbot, qapp, demo_files, tmp_path, size
):
    """1280 x 800 is a common small laptop screen (common practice): nothing may force the
    window wider, and the screenshot must be the window itself, not a scaled-down copy."""
    w = demo_window(size)
    qapp.processEvents()
    hint = w.minimumSizeHint()
    assert hint.width() <= 1280 and hint.height() <= 800, hint
    assert (w.width(), w.height()) == size
    assert (w.grab().width(), w.grab().height()) == size
    # every Fits column on screen, no sideways scrolling
    table = w.fits.table
    total = sum(table.columnWidth(c) for c in range(w.fits.model.columnCount()))
    assert total <= table.viewport().width()


def test_show_mode_fits_every_column(demo_window, qtbot, qapp, demo_files, tmp_path):
    w = demo_window((1600, 1000))
    w.show_mode.enter()
    qapp.processEvents()
    table = w.fits.table
    total = sum(table.columnWidth(c) for c in range(w.fits.model.columnCount()))
    assert total <= table.viewport().width()
    assert not table.horizontalScrollBar().isVisible()
    ws = w.workspace
    # Signal gets most of the height below the banner; Slices and Fits share the row above
    assert ws.sizes()[ws.indexOf(w.signal)] > ws.sizes()[ws.indexOf(w.show_mode.top)]
    w.show_mode.leave()
    assert not w.fits.fit_width


def test_closing_during_a_map_job_leaves_no_thread(demo_window, qtbot, qapp, demo_files, tmp_path):
    """Close the window right after a map job started: the job is stopped and waited for,
    no late result reaches a deleted part (pytest-qt fails the test on any exception in a
    Qt callback) and Qt never warns that a running thread was destroyed."""
    messages = []

    def handler(kind, context, message):
        messages.append(message)

    previous = qInstallMessageHandler(handler)
    try:
        w = demo_window((1280, 800))
        live = w.live_map
        live.flush()
        live.debounce_ms = 0
        w.state.update_settings(noise="ar1")  # a long job
        qtbot.waitUntil(lambda: live.job is not None, timeout=5000)
        job = live.job
        assert job.thread.isRunning() or job.is_running()
        w.close()
        assert not job.thread.isRunning()
        w.deleteLater()
        for _ in range(20):
            qapp.processEvents()
        w2 = demo_window((1280, 800))  # a second window still works
        w2.live_map.flush()
        assert w2.state.model_map is not None
        w2.close()
        for _ in range(5):
            qapp.processEvents()
    finally:
        qInstallMessageHandler(previous)
    assert not [m for m in messages if "Destroyed while thread" in m]
    assert not [m for m in messages if "already deleted" in m]


def test_offscreen_size_hint_notice_is_filtered(monkeypatch):
    """The offscreen platform's propagateSizeHints() notice is dropped; other messages are
    passed on to the handler that was there before."""
    from PySide6.QtCore import qWarning

    from voxelscope.gui import app

    seen = []
    before = qInstallMessageHandler(lambda kind, context, message: seen.append(message))
    monkeypatch.setattr(app, "_FILTER", {})
    try:
        app.install_message_filter()
        qWarning("This plugin does not support propagateSizeHints()")
        qWarning("a message that must stay")
    finally:
        qInstallMessageHandler(before)
    assert seen == ["a message that must stay"]
