"""Map: the live model map (background, debounced, cancellable), kernel difference, sources.

References: the core's own whole-volume fit (voxelscope.core.maps.compute_map and
kernel_difference) called directly on the same run and settings; the window must show
exactly those numbers (design rule: the window never re-does the maths).
"""

import dataclasses
import threading
import time

import numpy as np
import pytest

from voxelscope.core.errors import Cancelled, ModelError
from voxelscope.core.maps import compute_map, kernel_difference
from voxelscope.gui import mapjobs
from voxelscope.gui.mapjobs import default_kernel
from voxelscope.gui.state import LiveLayer


def _open(window, files):
    assert window.open_run(files["run"], background=False)
    live = window.map_panel.live
    assert live.flush(20000)
    return window.state, live


def test_default_kernel_rule():
    assert default_kernel(("boxcar", "gamma", "double-gamma")) == "double-gamma"
    assert default_kernel(("boxcar", "gamma")) == "boxcar"
    assert default_kernel(("boxcar", "gamma"), wanted="gamma") == "gamma"
    assert default_kernel(("boxcar",), wanted="fir") == "boxcar"


def test_live_map_equals_compute_map(window, ras_run):
    state, live = _open(window, ras_run)
    layer = state.overlay
    assert isinstance(layer, LiveLayer) and layer.source == "model"
    ref = compute_map(state.run, state.analysis, state.settings, "double-gamma")
    np.testing.assert_array_equal(layer.data, ref.t)
    assert state.model_map.kernel == "double-gamma"
    # another statistic and kernel, chosen in the Map part's combos
    window.map_panel.stat.setCurrentIndex(window.map_panel.stat.findData("z"))
    window.map_panel.kernel.setCurrentIndex(window.map_panel.kernel.findData("gamma"))
    assert live.flush(20000)
    ref = compute_map(state.run, state.analysis, state.settings, "gamma")
    np.testing.assert_array_equal(state.overlay.data, ref.z)
    assert "z · gamma" in window.slices.colour_bar.title.text()
    # the contrast estimate c'b, the statistic's one name from the combo to the core
    window.map_panel.stat.setCurrentIndex(window.map_panel.stat.findData("estimate"))
    assert live.flush(20000) and state.map_settings.stat == "estimate"
    np.testing.assert_array_equal(state.overlay.data, ref.estimate)


def test_quick_changes_give_one_map(window, qtbot, ras_run):
    """The first change after a quiet spell starts its job at once; changes within the
    debounce after it cancel that job and make one more: one map, of the last settings."""
    state, live = _open(window, ras_run)
    started, done = live.jobs_started, live.jobs_done
    state.update_settings(highpass_s=100.0)
    assert live.job is not None and live.jobs_started - started == 1  # no event loop yet
    for hp in (90.0, 80.0):  # two changes within the debounce (no event loop between them)
        state.update_settings(highpass_s=hp)
    assert live.timer.isActive()
    qtbot.waitUntil(lambda: not live.is_busy(), timeout=20000)
    assert (live.jobs_started - started, live.jobs_done - done) == (2, 1)
    ref = compute_map(state.run, state.analysis, state.settings, "double-gamma")
    assert state.settings.highpass_s == 80.0
    np.testing.assert_array_equal(state.overlay.data, ref.t)


def _slow_compute_map(started: threading.Event):
    """A stand-in for compute_map that runs until its progress callback says stop."""

    def fake(run, analysis, settings, kernel=None, progress=None, stats=("t",), **kw):
        started.set()
        t0 = time.perf_counter()
        while time.perf_counter() - t0 < 10:
            if progress(0.1) is False:
                raise Cancelled("the map was cancelled")
            time.sleep(0.005)
        raise AssertionError("never cancelled")

    return fake


def test_cancel_stops_the_job_and_clicks_stay_live(window, qtbot, ras_run, monkeypatch):
    state, live = _open(window, ras_run)
    before = state.overlay
    started = threading.Event()
    monkeypatch.setattr(mapjobs, "compute_map", _slow_compute_map(started))
    done = live.jobs_done
    state.update_settings(highpass_s=64.0)
    qtbot.waitUntil(started.is_set, timeout=5000)
    assert live.job is not None and window.map_panel.cancel_button.isVisibleTo(window)
    # a click while the map job runs: the voxel's fits are recomputed at once
    state.set_voxel(ras_run["hot"])
    assert state.voxel == ras_run["hot"] and state.fits is not None
    assert state.fits.fits[0].design.names  # fitted under the new settings
    window.map_panel.cancel_button.click()
    qtbot.waitUntil(lambda: not live.is_busy(), timeout=5000)
    assert live.jobs_done == done and state.overlay is before
    assert "cancelled" in window.map_panel.job_label.text()


def test_failed_map_is_one_line_in_status_bar(window, qtbot, ras_run, monkeypatch):
    state, live = _open(window, ras_run)

    def broken(*a, **k):
        raise ModelError("design: the columns 'tone' and 'drift_1' are collinear; drop one")

    monkeypatch.setattr(mapjobs, "compute_map", broken)
    state.update_settings(highpass_s=70.0)
    qtbot.waitUntil(lambda: not live.is_busy(), timeout=5000)
    msg = window.statusBar().currentMessage()
    assert "collinear" in msg and "\n" not in msg


def test_kernel_difference_source(window, ras_run):
    state, live = _open(window, ras_run)
    window.map_panel.source.setCurrentIndex(window.map_panel.source.findData("difference"))
    assert live.flush(20000)
    a = compute_map(state.run, state.analysis, state.settings, "double-gamma")
    b = compute_map(state.run, state.analysis, state.settings, "boxcar")
    layer = state.overlay
    assert layer.source == "difference"
    np.testing.assert_array_equal(layer.data, kernel_difference(a, b, "t"))
    assert state.map_settings.threshold == 1.0  # the difference source's own threshold
    window.map_panel.source.setCurrentIndex(window.map_panel.source.findData("model"))
    assert live.flush(20000)
    assert state.map_settings.threshold == 3.0
    np.testing.assert_array_equal(state.overlay.data, a.t)


def test_opened_file_becomes_the_source_and_model_is_one_choice_away(window, ras_run):
    state, live = _open(window, ras_run)
    assert window.open_map(ras_run["map"])
    assert state.map_settings.source == "file"
    assert state.overlay is state.file_layer and state.overlay.path == ras_run["map"]
    window.map_panel.source.setCurrentIndex(window.map_panel.source.findData("model"))
    assert live.flush(20000)
    assert isinstance(state.overlay, LiveLayer)
    window.map_panel.source.setCurrentIndex(window.map_panel.source.findData("file"))
    assert state.overlay is state.file_layer


def test_run_without_events_shows_no_model(window, las_run):
    assert window.open_run(las_run["run"], background=False)  # no events beside it
    live = window.map_panel.live
    assert live.flush(5000)
    assert window.state.overlay is None
    assert "events" in window.map_panel.file_label.toolTip()


@pytest.mark.parametrize("size", [(1600, 1000), (1280, 800)])
def test_demo_window_shows_the_live_map(qapp, demo_files, tmp_path, size):
    from voxelscope.gui.app import launch

    out = tmp_path / "demo.png"
    assert launch(demo=True, screenshot=str(out), size=size) == 0
    assert out.is_file()


@pytest.mark.parametrize("noise", ["ols", "ar1", "arp"])
def test_preview_holds_the_full_maps_values_on_the_planes_on_screen(window, ras_run, noise):
    """The preview holds the full map's values on the three planes through the current
    voxel (the same fit path) and 0 elsewhere: exactly under OLS and AR(1), whose noise
    estimate is the voxel's own; under the default AR(p), whose coefficients are averaged
    over a neighbourhood that the preview sees only within the planes, closely."""
    state, live = _open(window, ras_run)
    req = live.request()
    req = dataclasses.replace(req, settings=req.settings.with_(noise=noise))
    full = compute_map(state.run, state.analysis, req.settings, req.kernel).t
    voxel = state.voxel
    prev = mapjobs.preview_stat(state.run, state.analysis, req, voxel)
    planes = np.zeros(full.shape, dtype=bool)
    i, j, k = voxel
    planes[i, :, :] = planes[:, j, :] = planes[:, :, k] = True
    if noise == "arp":
        np.testing.assert_allclose(prev[planes], full[planes], rtol=0.2, atol=0.5)
        assert np.corrcoef(prev[planes], full[planes])[0, 1] > 0.98
    else:
        np.testing.assert_array_equal(prev[planes], full[planes])
    assert not prev[~planes].any() and full[~planes].any()


def test_preview_grows_plane_by_plane_to_the_three_planes(window, ras_run):
    """Plane of constant k first, then j, then i; under OLS each step holds the full
    map's values on the planes fitted so far and 0 elsewhere, and the last step equals
    the three-plane preview."""
    state, live = _open(window, ras_run)
    req = live.request()
    req = dataclasses.replace(req, settings=req.settings.with_(noise="ols"))
    full = compute_map(state.run, state.analysis, req.settings, req.kernel).t
    voxel = state.voxel
    steps = list(mapjobs.preview_planes(state.run, state.analysis, req, voxel))
    assert len(steps) == 3
    seen = np.zeros(full.shape, dtype=bool)
    for axis, step in zip(mapjobs.PREVIEW_AXES, steps):
        index = [slice(None)] * 3
        index[axis] = voxel[axis]
        seen[tuple(index)] = True
        np.testing.assert_array_equal(step[seen], full[seen])
        assert not step[~seen].any()
    together = mapjobs.preview_stat(state.run, state.analysis, req, voxel)
    np.testing.assert_array_equal(steps[-1], together)


def test_large_run_shows_a_preview_then_the_full_map(window, qtbot, ras_run, monkeypatch):
    """A settings change on a large run shows a coarse preview first, then the full map
    replaces it; the full map equals compute_map exactly."""
    monkeypatch.setattr(mapjobs, "PREVIEW_MIN_VOXELS", 0)  # the test run counts as large
    state, live = _open(window, ras_run)
    titles = []
    live.shown.connect(lambda layer: titles.append(getattr(layer, "title", "")))
    previews, done = live.previews_shown, live.jobs_done
    state.update_settings(highpass_s=77.0)
    qtbot.waitUntil(lambda: live.jobs_done > done, timeout=20000)
    # one preview per plane (plane of constant k first), then the full map
    assert live.previews_shown == previews + len(mapjobs.PREVIEW_AXES)
    assert titles[0].endswith("(preview)") and not titles[-1].endswith("(preview)")
    ref = compute_map(state.run, state.analysis, state.settings, live.kernel())
    np.testing.assert_array_equal(state.overlay.data, ref.t)


def _hold_background_fits(monkeypatch, release: threading.Event, entered: threading.Event):
    """The voxel's background refit waits for ``release`` (a click's own refit, on the GUI
    thread, does not)."""
    from voxelscope.gui import state as state_mod

    real = state_mod.fit_place

    def held(*args, **kwargs):
        if threading.current_thread() is not threading.main_thread():
            entered.set()
            release.wait(20)
        return real(*args, **kwargs)

    monkeypatch.setattr(state_mod, "fit_place", held)


def test_settings_change_shows_the_map_before_the_voxels_refit(window, qtbot, ras_run, monkeypatch):
    """The map job starts at once on a model change and its preview and full map reach
    the screen while the voxel's refit is still running: the refit waits here until the
    full map is shown; then the fits arrive, equal to the core's fit."""
    monkeypatch.setattr(mapjobs, "PREVIEW_MIN_VOXELS", 0)  # the test run counts as large
    state, live = _open(window, ras_run)
    release, entered = threading.Event(), threading.Event()
    _hold_background_fits(monkeypatch, release, entered)
    before = state.fits
    previews, done = live.previews_shown, live.jobs_done
    try:
        assert state.update_settings(highpass_s=77.0)
        qtbot.waitUntil(lambda: live.jobs_done > done, timeout=20000)
        assert state.fits_pending and state.fits is before  # the refit is held back
        assert live.previews_shown == previews + len(mapjobs.PREVIEW_AXES)
    finally:
        release.set()
    ref = compute_map(state.run, state.analysis, state.settings, live.kernel())
    np.testing.assert_array_equal(state.overlay.data, ref.t)
    qtbot.waitUntil(lambda: not state.fits_pending and not state.refitting, timeout=20000)
    noise = state.analysis.noise_at(state.run, state.voxel, state.settings)
    expected = state.analysis.fit_voxel(state.series, state.settings, noise)
    for got, want in zip(state.fits.fits, expected.fits):
        assert got.t == want.t and got.kernel == want.kernel


def test_a_newer_settings_change_supersedes_an_older_map(window, qtbot, ras_run, monkeypatch):
    """A map job of older settings that is still running when the settings change again
    never reaches the screen: the map shown, and the model map, are the newest settings'."""
    state, live = _open(window, ras_run)
    real = mapjobs.compute_map
    started, release = threading.Event(), threading.Event()

    def held(run, analysis, settings, kernel=None, progress=None, **kw):
        if settings.highpass_s == 64.0:  # the older change: finishes late, cancel or not
            started.set()
            release.wait(20)
            return real(run, analysis, settings, kernel, **kw)
        return real(run, analysis, settings, kernel, progress=progress, **kw)

    monkeypatch.setattr(mapjobs, "compute_map", held)
    maps, shown = [], []
    state.model_map_changed.connect(lambda m: maps.append(None if m is None else m.settings))
    live.shown.connect(lambda layer: shown.append(None if layer is None else layer.data.copy()))
    try:
        assert state.update_settings(highpass_s=64.0)
        qtbot.waitUntil(started.is_set, timeout=5000)
        assert state.update_settings(highpass_s=90.0)
    finally:
        release.set()
    qtbot.waitUntil(lambda: not live.is_busy(), timeout=20000)
    assert maps and all(s.highpass_s == 90.0 for s in maps)
    newest = real(state.run, state.analysis, state.settings, live.kernel())
    older = real(state.run, state.analysis, state.settings.with_(highpass_s=64.0), live.kernel())
    np.testing.assert_array_equal(state.overlay.data, newest.t)
    assert not any(s is not None and np.array_equal(s, older.t) for s in shown)


def test_bad_contrast_is_an_inline_error_and_starts_nothing(window, qtbot, qapp, ras_run):
    """A contrast that does not parse keeps the one in use, says why under the box, and
    starts neither a map job nor a refit; given to update_settings directly it is refused
    with one status line."""
    state, live = _open(window, ras_run)
    started, settings = live.jobs_started, state.settings
    panel = window.model_panel
    panel.contrast.setText("tone - nosuch")
    assert not panel.apply_contrast()
    assert "nosuch" in panel.contrast_error.text() and "Still using" in panel.contrast_error.text()
    assert not state.update_settings(contrast="tone - nosuch")
    msg = window.statusBar().currentMessage()
    assert "nosuch" in msg and "\n" not in msg
    assert not live.timer.isActive() and live.job is None
    assert not state.refitting and not state.fits_pending
    for _ in range(5):
        qapp.processEvents()
    assert live.jobs_started == started and state.settings == settings


def test_preview_planes_take_the_whole_runs_smoothness(window, ras_run, monkeypatch):
    """Under AR(p) each preview plane's effective df uses the run's smoothness that the
    full map uses (not an estimate from the plane alone), and runs on one worker."""
    state, live = _open(window, ras_run)
    req = live.request()
    full = compute_map(state.run, state.analysis, req.settings, req.kernel)
    given = []
    real = mapjobs.compute_map

    def spy(*args, **kwargs):
        given.append((kwargs.get("data_fwhm_mm"), kwargs.get("workers")))
        return real(*args, **kwargs)

    monkeypatch.setattr(mapjobs, "compute_map", spy)
    mapjobs.preview_stat(state.run, state.analysis, req, state.voxel)
    assert len(given) == len(mapjobs.PREVIEW_AXES)
    assert all(w == 1 and tuple(f) == tuple(full.data_fwhm_mm) for f, w in given)


def test_an_ar_map_loads_the_compiled_loops_for_the_next_ones(window, qtbot, ras_run, monkeypatch):
    """After the window's first AR(p) map (the default), the compiled loops are loaded in
    the background, once per process (voxelscope.core.noise.load_loops); OLS maps do not
    ask for them."""
    from voxelscope.core import noise

    monkeypatch.setattr(noise, "_LOOPS", [])
    monkeypatch.setattr(mapjobs, "_LOOPS_ASKED", [])
    asked = []
    real = mapjobs._load_loops_once
    monkeypatch.setattr(mapjobs, "_load_loops_once", lambda owner: (asked.append(1), real(owner)))
    state, live = _open(window, ras_run)
    assert state.settings.noise == "arp" and asked == [1]
    qtbot.waitUntil(lambda: bool(noise._LOOPS), timeout=60000)
    assert noise._LOOPS[0] is not None and noise._loops(noise.LOOP_VOXELS) is not None
    state.update_settings(noise="ols")
    assert live.flush(20000)
    assert asked == [1]
