"""Window: empty start, opening (foreground, background, cancel), errors, recent, drop."""

from pathlib import Path

import numpy as np
from PySide6.QtCore import Qt
from PySide6.QtGui import QImage
from PySide6.QtWidgets import QTextBrowser

import voxelscope
from voxelscope.core.errors import Cancelled
from voxelscope.gui.app import launch
from voxelscope.gui.workers import OpenRunJob


def test_empty_window_says_how_to_open(window):
    assert window.stack.currentWidget() is window.welcome
    assert "Open run" in window.welcome.text()


def test_missing_file_is_one_line_in_status_not_a_crash(window, tmp_path):
    assert not window.open_run(tmp_path / "nope_bold.nii.gz", background=False)
    msg = window.statusBar().currentMessage()
    assert "nope_bold.nii.gz" in msg and "\n" not in msg
    assert window.state.run is None


def test_background_open_of_compressed_run(window, qtbot, gz_run):
    assert window.open_run(gz_run["run"])
    seen = []
    window.job.progress.connect(seen.append)
    qtbot.waitUntil(lambda: window.state.run is not None, timeout=10000)
    qtbot.waitUntil(lambda: window.job is None, timeout=5000)
    assert window.state.fits is not None
    assert not window.progress.isVisible()
    assert window.recent_runs()[0] == str(gz_run["run"])


def test_cancel_stops_the_open(qtbot, gz_run):
    job = OpenRunJob(run_path=str(gz_run["run"]))
    job.cancel()
    with qtbot.waitSignal(job.failed, timeout=10000) as blocker:
        job.start()
    failure = blocker.args[0]
    assert isinstance(failure.error, Cancelled)
    assert "cancel" in failure.line
    job.wait()


def test_drop_opens_a_3d_image_as_map(window, ras_run):
    assert window.open_run(ras_run["run"], background=False)
    assert window.open_dropped(str(ras_run["map"]))
    assert window.state.overlay is not None


def test_about_has_the_research_caution(window):
    window.about()
    assert window.statusBar().currentMessage() == voxelscope.RESEARCH_CAUTION


def test_start_voxel_by_mm(window, ras_run):
    run_aff = np.diag([3.0, 3.0, 3.5, 1.0])
    run_aff[:3, 3] = (-12.0, -15.0, -9.0)
    mm = tuple(run_aff[:3, :3] @ np.array([5, 6, 2]) + run_aff[:3, 3])
    assert window.open_run(ras_run["run"], mm=mm, background=False)
    assert window.state.voxel == (5, 6, 2)


def _image_stats(path: Path):
    img = QImage(str(path)).convertToFormat(QImage.Format.Format_RGB888)
    arr = np.frombuffer(img.constBits(), np.uint8).reshape(img.height(), img.bytesPerLine())[
        :, : img.width() * 3
    ]
    return img.width(), img.height(), float(arr.astype(float).var())


def test_screenshot_has_size_and_is_not_blank(qapp, ras_run, tmp_path):
    out = tmp_path / "shot.png"
    assert launch(run=str(ras_run["run"]), screenshot=str(out), size=(1000, 700)) == 0
    w, h, var = _image_stats(out)
    assert (w, h) == (1000, 700)
    assert var > 100.0
    assert not list(tmp_path.glob(".shot.png*"))  # atomic: no temporary left behind


def test_screenshot_of_bad_run_returns_2(qapp, tmp_path):
    out = tmp_path / "bad.png"
    assert launch(run=str(tmp_path / "missing.nii"), screenshot=str(out)) == 2
    assert not out.exists()


def test_demo_screenshot(qapp, demo_files, tmp_path):
    out = tmp_path / "demo.png"
    assert launch(demo=True, screenshot=str(out), size=(1280, 800)) == 0
    w, h, var = _image_stats(out)
    assert (w, h) == (1280, 800) and var > 100.0


def _answer(monkeypatch, button):
    """Answer the unsaved-marks question with ``button`` (no dialog is shown)."""
    from PySide6.QtWidgets import QMessageBox

    asked = []

    def exec_(box):
        asked.append(box.text())
        return button

    monkeypatch.setattr(QMessageBox, "exec", exec_)
    return asked


def test_closing_with_unsaved_marks_asks_and_cancel_keeps_the_window(
    window, ras_run, monkeypatch, qtbot
):
    from PySide6.QtWidgets import QMessageBox

    assert window.open_run(ras_run["run"], background=False)
    window.ask_before_closing = True
    window.marks_panel.add_current("keep me")
    asked = _answer(monkeypatch, QMessageBox.StandardButton.Cancel)
    qtbot.keyClick(window, Qt.Key.Key_Q, Qt.KeyboardModifier.ControlModifier)  # File > Quit
    assert asked and "marks (1)" in asked[0]
    assert window.isVisible()
    asked = _answer(monkeypatch, QMessageBox.StandardButton.Discard)
    assert window.close()
    assert asked and not window.isVisible()


def test_closing_with_unsaved_marks_can_save_them(window, ras_run, monkeypatch, tmp_path):
    from PySide6.QtWidgets import QFileDialog, QMessageBox

    from voxelscope.core.marks import read_marks_tsv

    assert window.open_run(ras_run["run"], background=False)
    window.ask_before_closing = True
    window.marks_panel.add_current("keep me")
    _answer(monkeypatch, QMessageBox.StandardButton.Save)
    out = tmp_path / "kept.tsv"
    monkeypatch.setattr(QFileDialog, "getSaveFileName", lambda *a, **k: (str(out), ""))
    assert window.close()
    assert [m.title for m in read_marks_tsv(out)] == ["keep me"]


def test_closing_with_saved_or_no_marks_asks_nothing(window, ras_run, monkeypatch, tmp_path):
    from PySide6.QtWidgets import QMessageBox

    assert window.open_run(ras_run["run"], background=False)
    window.ask_before_closing = True
    asked = _answer(monkeypatch, QMessageBox.StandardButton.Cancel)
    window.marks_panel.add_current("saved")
    window.marks_panel.export_tsv(tmp_path / "m.tsv")
    assert window.close()
    assert asked == []


def test_long_status_message_is_cut_in_the_middle_before_the_run_line(window, ras_run):
    assert window.open_run(ras_run["run"], background=False)
    bar = window.statusBar()
    path = "/a/very/long/folder/name/that/goes/on/" * 8 + "marks.tsv"
    bar.showMessage(f"Wrote 3 marks to {path}")
    shown = bar.shown_message()
    assert shown.startswith("Wrote 3 marks to") and shown.endswith("marks.tsv") and "…" in shown
    assert bar.fontMetrics().horizontalAdvance(shown) <= bar.message_width()
    assert 6 + bar.message_width() <= window.run_label.x()
    assert bar.currentMessage().endswith("marks.tsv") and bar.toolTip() == bar.currentMessage()
    assert window.run_label.text().startswith("sub-ras_task-tt_bold.nii")


def test_help_lists_keys_and_mouse(window, qtbot):
    qtbot.keyClick(window, Qt.Key.Key_F1)
    dialog = window.keys_dialog
    assert dialog is not None and dialog.isVisible()
    text = dialog.findChild(QTextBrowser, "keys_text").toPlainText()
    for words in ("PgUp", "Wheel", "Ctrl+Z", "Add a mark", "Show mode", "Esc"):
        assert words in text


def test_every_control_has_a_tooltip(window, ras_run):
    """Buttons, check boxes, choices, number boxes, text boxes and sliders all say what they
    do when the pointer rests on them (Qt's own dock, tab-bar and table buttons aside)."""
    from PySide6.QtWidgets import QAbstractButton, QAbstractSpinBox, QComboBox, QLineEdit, QSlider

    assert window.open_run(ras_run["run"], background=False)
    missing = []
    for cls in (QAbstractButton, QComboBox, QAbstractSpinBox, QLineEdit, QSlider):
        for c in window.findChildren(cls):
            name = c.objectName()
            inside_qt = c.metaObject().className() == "QLineEditIconButton"  # clear button
            if name.startswith(("qt_", "Scroll")) or inside_qt or c.toolTip():
                continue
            text = c.currentText() if isinstance(c, QComboBox) else getattr(c, "text", str)()
            missing.append(f"{type(c).__name__} {name!r} {text!r}")
    assert not missing, missing


def test_demo_contrast_is_the_core_default_like_the_command_line(demo_files, qtbot, tmp_path):
    """Issue 17 item 10: one rule for the default contrast (core.events.default_condition):
    the demo window opens with the contrast `voxelscope fit` uses on the same files, without
    setting it itself (the events sidecar lists tone first, though tap comes first in run 1)."""
    import json
    import subprocess
    import sys

    from PySide6.QtCore import QSettings

    from voxelscope.gui.app import DEMO_CONTRAST, _demo_extras, demo_paths
    from voxelscope.gui.main_window import MainWindow

    d = demo_paths()
    w = MainWindow(settings=QSettings(str(tmp_path / "s.ini"), QSettings.Format.IniFormat))
    qtbot.addWidget(w)
    assert w.open_run(d["run"], d["events"], d["confounds"], voxel=d["voxel"], background=False)
    _demo_extras(w, None)
    assert w.state.settings.contrast is None  # nothing set: the core's rule decides
    assert w.state.analysis.default_contrast() == DEMO_CONTRAST
    assert w.state.fits.fits[0].contrast == DEMO_CONTRAST
    assert w.model_panel.contrast.placeholderText() == f"{DEMO_CONTRAST} (default)"
    code = (
        "import sys, voxelscope.cli; sys.exit(voxelscope.cli.main(['fit', "
        f"{str(d['run'])!r}, '--voxel', '1', '1', '1', '--format', 'json', '--kernels', 'boxcar']))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    assert json.loads(out.stdout)["fits"][0]["contrast"] == DEMO_CONTRAST
