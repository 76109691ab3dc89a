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


def test_signal_and_fits_have_room_at_1280x800(demo_window, qapp):
    """At 1280 x 800 the Signal plot was about 65 px high and Fits showed 2-3 of 4 rows."""
    w = demo_window((1280, 800))
    w.arrange()
    for _ in range(3):
        qapp.processEvents()
    sig = w.signal
    assert sig.plot.getViewBox().height() >= 80
    assert sig.resid.getViewBox().height() >= 35
    assert sig.plot.getViewBox().height() > sig.resid.getViewBox().height()
    # the legend is one line (no wrap): as high as one line of its font
    assert sig.legend.height() <= 2 * sig.legend.fontMetrics().height()
    # every kernel's row of Fits without scrolling, and the coefficient line is one line
    assert w.fits.table.verticalScrollBar().maximum() == 0
    assert w.fits.noise_line.height() <= 2 * w.fits.noise_line.fontMetrics().height()


def test_no_stray_tab_bars_over_fits(demo_window, qapp):
    """Qt kept spare "Fits | Findings" tab bars at the top of Fits, drawn over the caption."""
    from PySide6.QtCore import QPoint
    from PySide6.QtWidgets import QTabBar

    w = demo_window((1280, 800))
    qapp.processEvents()
    w.show_mode.enter()
    w.show_mode.leave()
    qapp.processEvents()
    fits_dock = w.docks["Fits"]
    top = fits_dock.mapTo(w, QPoint(0, 0)).y()
    for bar in w.findChildren(QTabBar):
        if bar.isVisible():
            assert bar.count() > 0
            y = bar.mapTo(w, QPoint(0, 0)).y()
            assert not (top <= y < top + fits_dock.height() - 40), [
                bar.tabText(i) for i in range(bar.count())
            ]


def test_kernel_difference_keeps_the_slices_size(demo_window, qapp):
    """Map > Show > kernel difference added a row to Map, the bottom row grew and the
    slices never got their height back."""
    w = demo_window((1280, 800))
    w.arrange()
    qapp.processEvents()
    before = {k: v.height() for k, v in w.slices.views.items()}
    for source in ("difference", "model"):
        w.state.set_map_settings(source=source)
        for _ in range(3):
            qapp.processEvents()
        assert {k: v.height() for k, v in w.slices.views.items()} == before, source


@pytest.mark.parametrize("change", [{"noise": "ar1"}, {"kernels": "with fir"}])
def test_fir_or_ar1_keeps_the_fits_table_on_screen(demo_window, qapp, change):
    """Turning on FIR or AR(1) added columns, a sideways scroll bar, and hid the FIR row."""
    w = demo_window((1280, 800))
    w.arrange()
    qapp.processEvents()
    columns = w.fits.model.columns()
    if change.get("kernels"):
        change = {"kernels": (*w.state.settings.kernels, "fir")}
    assert w.state.update_settings(**change)
    assert w.state.settle_fits()
    for _ in range(3):
        qapp.processEvents()
    table = w.fits.table
    assert w.fits.model.columns() == columns
    assert not table.horizontalScrollBar().isVisible()
    last = w.fits.model.rowCount() - 1
    bottom = table.rowViewportPosition(last) + table.rowHeight(last)
    assert bottom <= table.viewport().height() + 1
