"""Model: kernels on/off, contrast entry (refit, inline errors), other settings refit."""

import numpy as np
import pytest
from PySide6.QtCore import QPoint, Qt

from voxelscope.core.model import ModelSettings


def _open(window, spec):
    assert window.open_run(spec["run"], background=False), window.last_error
    window.state.set_voxel(spec["hot"])
    return window.state


def test_kernel_toggle_removes_row_and_curve(window, ras_run, qtbot):
    st = _open(window, ras_run)
    box = window.model_panel.kernel_boxes["gamma"]
    assert box.isChecked()
    model = window.fits.model
    rows = [model.raw(r, "kernel") for r in range(model.rowCount())]
    assert "gamma" in rows
    assert window.signal.curves["gamma"].xData is not None
    qtbot.mouseClick(box, Qt.MouseButton.LeftButton, pos=QPoint(8, box.height() // 2))
    assert st.settle_fits()  # a model change refits in the background; here at once
    rows = [model.raw(r, "kernel") for r in range(model.rowCount())]
    assert "gamma" not in rows and len(rows) == len(ModelSettings().kernels) - 1
    curve = window.signal.curves["gamma"]
    assert curve.xData is None or len(curve.xData) == 0
    assert "gamma" not in st.settings.kernels
    qtbot.mouseClick(box, Qt.MouseButton.LeftButton, pos=QPoint(8, box.height() // 2))
    qtbot.waitUntil(lambda: not st.fits_pending, timeout=10000)  # the background refit
    assert "gamma" in [model.raw(r, "kernel") for r in range(model.rowCount())]
    assert len(window.signal.curves["gamma"].xData) == st.run.n_volumes


def test_contrast_edit_refits(window, ras_run, qtbot):
    st = _open(window, ras_run)
    before = st.fits.by_kernel("boxcar").estimate
    edit = window.model_panel.contrast
    edit.setFocus()
    edit.clear()
    qtbot.keyClicks(edit, "tap - tone")
    qtbot.keyClick(edit, Qt.Key.Key_Return)
    assert st.settings.contrast == "tap - tone"
    assert st.settle_fits()
    # a run starts with the default model exactly: no confound columns until picked
    s = ModelSettings(contrast="tap - tone", confound_columns=())
    expected = st.analysis.fit_voxel(st.series, s, st.analysis.noise_at(st.run, st.voxel, s))
    after = st.fits.by_kernel("boxcar").estimate
    assert after != before
    assert after == pytest.approx(expected.by_kernel("boxcar").estimate, rel=1e-12)
    model = window.fits.model
    assert model.raw(0, "estimate") == pytest.approx(after, rel=1e-12)
    assert not window.model_panel.contrast_error.isVisible()


def test_bad_contrast_shows_inline_error_and_keeps_last_good_fit(window, ras_run, qtbot):
    st = _open(window, ras_run)
    edit = window.model_panel.contrast
    edit.setFocus()
    edit.clear()
    qtbot.keyClicks(edit, "tap")
    qtbot.keyClick(edit, Qt.Key.Key_Return)
    good = [window.fits.model.raw(r, "t") for r in range(window.fits.model.rowCount())]
    qtbot.keyClicks(edit, " - nosuch")
    qtbot.keyClick(edit, Qt.Key.Key_Return)
    err = window.model_panel.contrast_error
    assert err.isVisible() and "nosuch" in err.text() and "at character 7" in err.text()
    assert err.text().endswith("Still using: tap")
    assert "\n" not in err.text()
    assert st.settings.contrast == "tap"
    assert [window.fits.model.raw(r, "t") for r in range(window.fits.model.rowCount())] == good
    # fixing the text clears the error and refits
    for _ in range(len(" - nosuch")):
        qtbot.keyClick(edit, Qt.Key.Key_Backspace)
    qtbot.keyClicks(edit, " - tone")
    qtbot.keyClick(edit, Qt.Key.Key_Return)
    assert not err.isVisible()
    assert st.settings.contrast == "tap - tone"


def test_contrast_is_used_after_a_pause_and_never_a_prefix(window, ras_run, qtbot):
    """Typing 'tap - tone' key by key: no prefix ('tap', 'tap - t'...) reaches the fits;
    after the pause the whole contrast is used once."""
    from voxelscope.gui.model_panel import CONTRAST_PAUSE_MS

    st = _open(window, ras_run)
    used = []
    st.settings_changed.connect(lambda s: used.append(s.contrast))
    edit = window.model_panel.contrast
    edit.setFocus()
    edit.clear()
    qtbot.keyClicks(edit, "tap - tone")
    assert used == [] and st.settings.contrast is None
    qtbot.waitUntil(lambda: st.settings.contrast == "tap - tone", timeout=10 * CONTRAST_PAUSE_MS)
    assert used == ["tap - tone"]
    assert not window.model_panel.contrast_error.isVisible()


def test_contrast_error_names_the_character_and_keeps_the_contrast(window, ras_run, qtbot):
    st = _open(window, ras_run)
    assert window.set_contrast_text("tap")
    edit = window.model_panel.contrast
    edit.setFocus()
    qtbot.keyClicks(edit, "+")
    qtbot.keyClick(edit, Qt.Key.Key_Return)
    err = window.model_panel.contrast_error
    assert err.isVisible()
    assert "expected a condition name after '+' at character 4" in err.text()
    assert "Still using: tap" in err.text()
    assert st.settings.contrast == "tap"
    # Esc puts back the contrast in use
    qtbot.keyClick(edit, Qt.Key.Key_Escape)
    assert edit.text() == "tap" and not err.isVisible()


def test_contrast_error_with_the_default_contrast_names_it(window, ras_run, qtbot):
    st = _open(window, ras_run)
    edit = window.model_panel.contrast
    edit.setFocus()
    qtbot.keyClicks(edit, "2*")
    qtbot.keyClick(edit, Qt.Key.Key_Return)
    default = st.analysis.default_contrast()
    assert f"Still using: {default} (default)" in window.model_panel.contrast_error.text()


def test_completer_offers_condition_names(window, ras_run, qtbot):
    _open(window, ras_run)
    edit = window.model_panel.contrast
    assert sorted(edit.names()) == ["tap", "tone"]
    edit.setFocus()
    edit.clear()
    qtbot.keyClicks(edit, "tap - to")
    c = edit.completer_
    assert c.completionPrefix() == "to" and c.currentCompletion() == "tone"


def test_other_settings_refit(window, ras_run, qtbot):
    st = _open(window, ras_run)
    p = window.model_panel
    t0 = st.fits.by_kernel("double-gamma").t
    p.noise.setCurrentIndex(p.noise.findData("ar1"))
    assert st.settle_fits()
    assert st.settings.noise == "ar1" and st.fits.fits[0].rho is not None
    assert window.fits.model.raw(0, "rho") is not None  # said in the notes line
    p.highpass_none.setChecked(True)
    assert st.settings.highpass_s is None
    p.highpass_none.setChecked(False)
    p.highpass.setValue(64.0)
    assert st.settings.highpass_s == 64.0
    p.shift.stepBy(2)
    assert st.settings.onset_shift_s == pytest.approx(0.5)
    p.derivatives.setCurrentIndex(p.derivatives.findData(1))
    assert st.settle_fits()
    assert st.settings.derivatives == 1 and window.fits.model.raw(0, "F") is not None
    assert st.settings.confound_columns == ()  # found beside the run, switched off
    assert all(
        p.confounds.item(r).checkState() == Qt.CheckState.Unchecked
        for r in range(p.confounds.count())
    )
    item = p.confounds.item(1)
    item.setCheckState(Qt.CheckState.Checked)
    assert st.settings.confound_columns == ("move_b",)
    assert st.settle_fits()
    expected = st.analysis.fit_voxel(st.series, st.settings)
    assert st.fits.by_kernel("double-gamma").t == pytest.approx(
        expected.by_kernel("double-gamma").t, rel=1e-12
    )
    assert st.fits.by_kernel("double-gamma").t != t0


def test_units_toggle_percent(window, ras_run):
    st = _open(window, ras_run)
    window.signal.unit_pct.setChecked(True)
    assert st.units == "percent"
    y = st.series
    shown = window.signal.data_curve.yData
    # percent signal change relative to the voxel mean (common practice)
    np.testing.assert_allclose(shown, 100 * (y - y.mean()) / y.mean(), rtol=1e-12)
    t = window.signal.data_curve.xData
    np.testing.assert_allclose(np.diff(t), st.run.tr)


def _gamble_events(spec):
    """Rewrite the run's events with a gain column (with an n/a) and a second text column."""
    events = spec["run"].parent / "sub-ras_task-tt_events.tsv"
    rng = np.random.default_rng(5)
    lines = ["onset\tduration\ttrial_type\tgain\tside"]
    for i, on in enumerate(range(4, 150, 9)):
        gain = "n/a" if i == 3 else f"{rng.uniform(1, 40):.2f}"
        lines.append(f"{on}\t3\tgamble\t{gain}\t{'LR'[i % 2]}")
    events.write_text("\n".join(lines) + "\n")


def test_modulators_and_condition_column_in_model(window, ras_run, qtbot):
    """Issue 13 in the window: the Events group lists the numeric columns; checking one
    refits with CONDITION:MODULATOR (the same numbers as the core with those settings),
    the completer and the contrast know the name, the n/a count is said; choosing another
    condition column reads the file again."""
    _gamble_events(ras_run)
    messages = []
    window.state.message.connect(messages.append)
    st = _open(window, ras_run)
    box = window.model_panel.events_box
    assert box.isVisibleTo(window) and box.modulators.count() == 1
    assert box.column.isVisibleTo(window)  # trial_type and side
    item = box.modulators.item(0)
    assert item.text() == "gain"
    item.setCheckState(Qt.CheckState.Checked)
    assert st.settings.modulators == ("gain",)
    assert "gamble:gain" in window.model_panel.contrast.names()
    assert any("is n/a for 1 of 17 events" in m for m in messages)
    assert window.state.set_contrast("gamble:gain")
    assert st.settle_fits()
    noise = st.analysis.noise_at(st.run, st.voxel, st.settings)  # the default model's
    expected = st.analysis.fit_voxel(st.series, st.settings, noise).by_kernel("gamma")
    assert st.fits.by_kernel("gamma").t == pytest.approx(expected.t, rel=1e-12)
    assert "gamble:gain" in st.fits.by_kernel("gamma").design.names
    box.column.setCurrentIndex(box.column.findData("side"))
    box.column.activated.emit(box.column.currentIndex())
    assert st.analysis.condition_names == ("L", "R")
    assert st.settings.modulators == ()


def test_onsets_in_volumes_from_the_window(window, ras_run, qtbot):
    """The window converts onsets given in volumes, like --onset-unit volumes: the same
    conditions as the loader with onset_unit='volumes' (onsets and durations times the TR)."""
    events = ras_run["run"].parent / "sub-ras_task-tt_events.tsv"
    events.write_text("onset\tduration\ttrial_type\n2\t4\ttone\n22\t4\ttone\n42\t4\ttone\n")
    st = _open(window, ras_run)
    box = window.model_panel.events_box
    assert box.isVisibleTo(window) and not box.volumes.isChecked()
    np.testing.assert_allclose(st.analysis.conditions[0].onsets, [2, 22, 42])
    box.volumes.setChecked(True)
    assert st.analysis.onset_unit == "volumes"
    np.testing.assert_allclose(st.analysis.conditions[0].onsets, [4.0, 44.0, 84.0])  # TR 2 s
    np.testing.assert_allclose(st.analysis.conditions[0].durations, [8.0, 8.0, 8.0])
    box.volumes.setChecked(False)
    np.testing.assert_allclose(st.analysis.conditions[0].onsets, [2, 22, 42])


def test_highpass_below_the_task_cycle_is_said_in_model(window, ras_run, qtbot):
    """Issue 17 item 10: a cut-off shorter than the 40 s on/off cycle is one line in Model
    (the core's own line, with the numbers), and it goes away above the cycle."""
    st = _open(window, ras_run)
    note = window.model_panel.highpass_note
    assert note.isHidden()
    window.model_panel.highpass.setValue(10.0)
    assert st.settings.highpass_s == 10.0
    text = note.text()
    assert not note.isHidden()
    assert "cut-off 10 s is shorter than the task's on/off cycle (about 40 s" in text
    assert text[1:] == st.analysis.highpass_warning(st.settings)[1:] + "."
    assert st.settle_fits()
    assert any("on/off cycle" in w for w in st.fits.warnings)  # Fits' notes too
    window.model_panel.highpass.setValue(128.0)
    assert note.isHidden() and note.text() == ""


def test_ctrl_z_in_the_contrast_box_edits_text_then_undoes_the_contrast(window, ras_run, qtbot):
    st = _open(window, ras_run)
    edit = window.model_panel.contrast
    edit.setFocus()
    qtbot.keyClicks(edit, "tap")
    qtbot.keyClick(edit, Qt.Key.Key_Return)
    assert st.settings.contrast == "tap"
    qtbot.keyClicks(edit, " - tone")
    qtbot.keyClick(edit, Qt.Key.Key_Z, Qt.KeyboardModifier.ControlModifier)
    assert st.settings.contrast == "tap" and edit.text() != "tap - tone"  # the text's own undo
    edit.setText("tap - tone")
    qtbot.keyClick(edit, Qt.Key.Key_Return)
    assert st.settings.contrast == "tap - tone"
    qtbot.keyClick(edit, Qt.Key.Key_Z, Qt.KeyboardModifier.ControlModifier)
    assert st.settings.contrast == "tap" and edit.text() == "tap"  # the window's undo
    qtbot.keyClick(edit, Qt.Key.Key_Y, Qt.KeyboardModifier.ControlModifier)
    assert st.settings.contrast == "tap - tone" and edit.text() == "tap - tone"
