"""ViewerState: undo and redo of model changes and of the marks (Edit menu), and the
dragged voxel's refit off the GUI thread (newest voxel wins)."""

import threading
import time

import numpy as np
from PySide6.QtCore import Qt

from voxelscope.core.marks import Mark, MarkList
from voxelscope.core.model import ModelSettings
from voxelscope.gui.fits import PENDING_LINE
from voxelscope.gui.state import settings_change_words


def _open(window, spec):
    assert window.open_run(spec["run"], background=False), window.last_error
    window.state.set_voxel(spec["hot"])
    return window.state


def test_undo_redo_model_changes_refit(window, ras_run, qtbot):
    st = _open(window, ras_run)
    start = st.settings
    t0 = st.fits.by_kernel("double-gamma").t
    assert st.update_settings(noise="ols")
    assert window.set_contrast_text("tap - tone")
    assert st.fits_pending  # a model change refits in the background
    assert st.settle_fits()
    t2 = st.fits.by_kernel("double-gamma").t
    assert window.undo_action.text() == "&Undo contrast 'tap - tone'"
    qtbot.keyClick(window, Qt.Key.Key_Z, Qt.KeyboardModifier.ControlModifier)
    assert st.settings == start.with_(noise="ols")
    assert window.model_panel.contrast.text() == ""
    assert "Undone: contrast 'tap - tone'" in window.statusBar().currentMessage()
    window.undo_action.trigger()
    assert st.settings == start
    qtbot.waitUntil(lambda: not st.fits_pending, timeout=10000)  # the background refit
    assert st.fits.by_kernel("double-gamma").t == t0  # the same voxel refitted
    # Ctrl+Y and Ctrl+Shift+Z redo
    qtbot.keyClick(window, Qt.Key.Key_Y, Qt.KeyboardModifier.ControlModifier)
    assert st.settings.noise == "ols"
    mods = Qt.KeyboardModifier.ControlModifier | Qt.KeyboardModifier.ShiftModifier
    qtbot.keyClick(window, Qt.Key.Key_Z, mods)
    assert st.settings.contrast == "tap - tone"
    assert window.model_panel.contrast.text() == "tap - tone"
    assert st.settle_fits()
    assert st.fits.by_kernel("double-gamma").t == t2
    assert not window.redo_action.isEnabled()


def test_kernels_undo_through_the_model_part(window, ras_run):
    st = _open(window, ras_run)
    box = window.model_panel.kernel_boxes["gamma"]
    box.setChecked(False)
    assert "gamma" not in st.settings.kernels
    window.undo_action.trigger()
    assert "gamma" in st.settings.kernels and box.isChecked()


def test_refused_change_is_no_step_and_a_new_run_starts_a_new_history(window, ras_run):
    st = _open(window, ras_run)
    assert not st.set_contrast("nosuch")
    assert st.history.count() == 0
    assert st.update_settings(noise="ols")
    assert st.history.count() == 1
    assert window.open_run(ras_run["run"], background=False)
    assert st.history.count() == 0


def test_without_history_makes_no_step(window, ras_run):
    st = _open(window, ras_run)
    with st.without_history():
        assert st.update_settings(noise="ols")
        st.set_marks(MarkList([Mark(0, 0, 0, "a")]))
    assert st.history.count() == 0 and st.settings.noise == "ols"


def test_marks_undo_redo_and_unsaved(window, ras_run):
    st = _open(window, ras_run)
    panel = window.marks_panel
    assert not st.unsaved_marks()
    panel.add_current("first")
    panel.add_current("second")
    panel.model.set_note(1, "n")
    panel.model.set_note(1, "no")
    panel.model.set_note(1, "note")  # typing in one note: one step
    assert st.unsaved_marks()
    assert [m.note for m in st.marks] == ["", "note"]
    assert panel.delete(0)
    assert [m.title for m in st.marks] == ["second"]
    assert "Edit > Undo (Ctrl+Z) brings it back" in window.statusBar().currentMessage()
    window.undo_action.trigger()
    assert [m.title for m in st.marks] == ["first", "second"]
    assert panel.model.rowCount() == 2
    window.undo_action.trigger()  # the note, all three keystrokes at once
    assert [m.note for m in st.marks] == ["", ""]
    window.undo_action.trigger()
    window.undo_action.trigger()
    assert len(st.marks) == 0 and not st.unsaved_marks()
    window.redo_action.trigger()
    assert [m.title for m in st.marks] == ["first"] and st.unsaved_marks()


def test_saving_marks_clears_unsaved(window, ras_run, tmp_path):
    st = _open(window, ras_run)
    window.marks_panel.add_current("first")
    assert st.unsaved_marks()
    assert window.marks_panel.export_tsv(tmp_path / "m.tsv") is not None
    assert not st.unsaved_marks()
    window.marks_panel.model.rename(0, "renamed")
    assert st.unsaved_marks()
    window.undo_action.trigger()  # back to what the file holds
    assert not st.unsaved_marks()


def test_settings_change_words():
    """The Edit menu's words for a change (our own wording, checked by hand)."""
    s = ModelSettings()
    assert settings_change_words(s, s.with_(kernels=("boxcar",))) == "kernels"
    assert settings_change_words(s, s.with_(highpass_s=None)) == "high-pass"
    assert settings_change_words(s, s.with_(contrast="x" * 40)) == f"contrast '{'x' * 29}…'"


def test_undo_selects_the_mark_it_brought_back(window, ras_run):
    st = _open(window, ras_run)
    panel = window.marks_panel
    for t in ("a", "b", "c"):
        panel.add_current(t)
    panel.model.set_note(2, "about c")
    panel.delete(1)
    panel.select(0)
    window.undo_action.trigger()
    assert [m.title for m in st.marks] == ["a", "b", "c"]
    assert panel.current_row() == 1 and panel.note.isEnabled()
    window.undo_action.trigger()  # the note of c
    assert panel.current_row() == 2 and st.marks[2].note == ""


def _hold_background_fits(monkeypatch, release, entered, calls=None):
    """The voxel's background refit waits for ``release``; ``calls`` collects the
    settings of every background refit."""
    import threading

    from voxelscope.gui import state as state_mod

    real = state_mod.fit_place

    def held(bundles, labels, voxel, settings, **kw):
        if threading.current_thread() is not threading.main_thread():
            if calls is not None:
                calls.append(settings)
            entered.set()
            release.wait(20)
        return real(bundles, labels, voxel, settings, **kw)

    monkeypatch.setattr(state_mod, "fit_place", held)


def _core_fits(st):
    noise = st.analysis.noise_at(st.run, st.voxel, st.settings)
    return st.analysis.fit_voxel(st.run.timeseries(st.voxel), st.settings, noise)


def test_model_changes_refit_in_the_background_newest_wins(window, ras_run, qtbot, monkeypatch):
    """Changes made in one pass of the event loop are one background refit, of the newest
    settings; its fits equal the core's."""
    import threading

    st = _open(window, ras_run)
    release, entered, calls = threading.Event(), threading.Event(), []
    _hold_background_fits(monkeypatch, release, entered, calls)
    release.set()
    fitted = []
    st.fits_changed.connect(fitted.append)
    assert st.update_settings(noise="ols")
    assert st.update_settings(highpass_s=90.0)
    assert st.fits_pending and st.refitting and not fitted  # nothing fitted on the spot
    qtbot.waitUntil(lambda: not st.refitting, timeout=20000)
    assert calls == [st.settings] and len(fitted) == 1 and not st.fits_pending
    want = _core_fits(st)
    assert [f.t for f in st.fits.fits] == [f.t for f in want.fits]


def test_a_click_during_a_background_refit_wins(window, ras_run, qtbot, monkeypatch):
    """A click while a model change's refit runs is fitted at once; the older refit's
    result (another voxel) is dropped, never shown over the click's."""
    import threading

    import numpy as np

    st = _open(window, ras_run)
    release, entered = threading.Event(), threading.Event()
    _hold_background_fits(monkeypatch, release, entered)
    try:
        assert st.update_settings(noise="ols")
        qtbot.waitUntil(entered.is_set, timeout=10000)
        st.set_voxel((3, 5, 2))
        clicked = st.fits
        assert not st.fits_pending and st.voxel == (3, 5, 2)
    finally:
        release.set()
    qtbot.waitUntil(lambda: not st.refitting, timeout=20000)
    assert st.fits is clicked and not st.fits_pending
    np.testing.assert_array_equal(st.fits.y, st.run.timeseries((3, 5, 2)))
    assert [f.t for f in st.fits.fits] == [f.t for f in _core_fits(st).fits]


# ---------------------------------------------------------------- the dragged voxel's refit


def _fit_here(st):
    """The current voxel's fits as a click computes them (on this thread)."""
    y = st.run.timeseries(st.voxel)
    noise = st.analysis.noise_at(st.run, st.voxel, st.settings)
    return st.analysis.fit_voxel(y, st.settings, noise)


def _shown_matches_voxel(window, st):
    """What Signal and Fits show belongs to the state's voxel: its data, and either its
    own fits or none at all (while they are on their way)."""
    y = st.run.timeseries(st.voxel)
    assert np.array_equal(st.series, y)
    assert np.array_equal(window.signal.data_curve.getData()[1], y)
    model = window.fits.model
    if st.fits is None:
        assert st.fitting
        for name, curve in window.signal.curves.items():
            assert curve.getData()[1] is None or len(curve.getData()[1]) == 0, name
        for r in range(model.rowCount()):
            assert model.raw(r, "t") is None and model.raw(r, "estimate") is None
        assert window.fits.noise_line.full_text() in ("", PENDING_LINE)
        return
    assert np.array_equal(st.fits.y, y)
    want = _fit_here(st)
    for r, f in enumerate(want.fits):
        assert model.raw(r, "kernel") == f.kernel
        t = model.raw(r, "t")  # the same numbers, from the same function
        assert (t is None and f.t is None) or np.isclose(t, f.t, rtol=1e-12, atol=0)
        curve = window.signal.curves[f.kernel].getData()[1]
        assert np.allclose(curve, f.fitted, rtol=0, atol=1e-9 * np.abs(f.fitted).max())


def test_drag_refits_in_the_background_and_never_shows_another_voxels_fit(
    window, ras_run, qtbot, monkeypatch
):
    """While dragging, every frame shows the new voxel's data at once; its fits come from
    a background job, newest voxel wins: a fit for a voxel the pointer has left is never
    shown (each fit is slowed down here, so most are overtaken). Views are checked at
    every change the state announces."""
    from voxelscope.core.model import Analysis

    st = _open(window, ras_run)
    gui_thread = threading.get_ident()
    slow = Analysis.fit_voxel
    fitted_off_gui = []

    def fit_slowly(self, y, settings, noise=None):
        if threading.get_ident() != gui_thread:
            fitted_off_gui.append(True)
            time.sleep(0.03)
        return slow(self, y, settings, noise)

    monkeypatch.setattr(Analysis, "fit_voxel", fit_slowly)
    seen = []

    def check(fits):
        seen.append(fits is not None)
        _shown_matches_voxel(window, st)

    st.fits_changed.connect(check)
    st.set_dragging(True)
    path = [(i, 5, 3) for i in range(1, 8)] + [(7, j, 3) for j in range(6, 10)]
    for n, v in enumerate(path):
        st.set_voxel(v)
        assert st.voxel == v and np.array_equal(st.series, st.run.timeseries(v))
        # now and then the pointer rests long enough for a fit to land
        qtbot.wait(80 if n % 4 == 3 else 1)
    st.set_dragging(False)
    qtbot.waitUntil(lambda: not st.refitting and st.fits is not None, timeout=10000)
    st.fits_changed.disconnect(check)
    assert st.voxel == path[-1] and not st.fitting
    _shown_matches_voxel(window, st)  # Signal and Fits end on the drag's last voxel
    assert fitted_off_gui  # the drag's fits ran on a worker thread
    assert any(seen) and not all(seen)  # some fits landed during the drag, not all
    assert len(fitted_off_gui) < len(path)  # overtaken fits were cut off at a step


def test_a_click_or_a_model_change_during_a_drag(window, ras_run, qtbot):
    """A click while a dragged voxel's fit is on its way is fitted at once and the late
    fit is dropped; a model change during a drag refits the voxel where the pointer is,
    under the new model."""
    st = _open(window, ras_run)
    st.set_dragging(True)
    st.set_voxel((2, 2, 2))
    assert st.fits is None and st.fitting
    st.set_dragging(False)
    st.set_voxel((5, 6, 3))  # a click: fitted at once
    assert not st.fitting and np.array_equal(st.fits.y, st.run.timeseries((5, 6, 3)))
    shown = st.fits
    qtbot.waitUntil(lambda: not st.refitting, timeout=10000)
    qtbot.wait(20)
    assert st.fits is shown  # the late fit of (2, 2, 2) was not shown
    st.set_dragging(True)
    st.set_voxel((4, 4, 4))
    assert st.update_settings(noise="ols")
    qtbot.waitUntil(lambda: not st.refitting and st.fits is not None, timeout=10000)
    st.set_dragging(False)
    assert np.array_equal(st.fits.y, st.run.timeseries((4, 4, 4)))
    assert [f.t for f in st.fits.fits] == [f.t for f in _core_fits(st).fits]
    _shown_matches_voxel(window, st)
