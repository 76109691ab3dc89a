"""Sessions from the window: save and reopen, moved files, autosave and recovery."""

import base64
import hashlib
import json
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from PySide6.QtCore import QSettings
from PySide6.QtGui import QImage

from voxelscope.core.marks import Mark, MarkList
from voxelscope.gui.session_io import (
    collect_session,
    find_recoveries,
    offer_recovery,
    open_session,
    save_window_session,
)


def new_window(qtbot, tmp_path, name, size=(1280, 800)):
    from voxelscope.gui.main_window import MainWindow

    settings = QSettings(str(tmp_path / f"{name}.ini"), QSettings.Format.IniFormat)
    w = MainWindow(settings=settings)
    qtbot.addWidget(w)
    w.autosave.directory = tmp_path / f"autosave-{name}"
    w.resize(*size)
    w.show()
    qtbot.waitExposed(w)
    return w


def grab_array(window, qapp):
    for hook in window.settle_hooks:  # e.g. the live map being computed
        hook()
    window.statusBar().clearMessage()
    for _ in range(5):
        qapp.processEvents()
    img = window.grab().toImage().convertToFormat(QImage.Format.Format_RGB888)
    arr = np.frombuffer(img.constBits(), np.uint8).reshape(img.height(), img.bytesPerLine())
    return arr[:, : img.width() * 3].reshape(img.height(), img.width(), 3).copy()


def prepare_view(w, ras_run):
    """A view that differs from every default: model, contrast, voxel, map, marks, layout."""
    assert w.open_run(ras_run["run"], map_file=ras_run["map"], voxel=(2, 3, 4), background=False)
    assert w.state.update_settings(noise="ar1", highpass_s=90.0, onset_shift_s=1.0)
    assert w.set_contrast_text("tone - tap")
    w.state.set_map_settings(threshold=2.5, opacity=0.6)
    w.state.set_units("percent")
    w.state.set_marks(
        MarkList([Mark(-6.0, -6.0, 5.0, "first", "a note"), Mark(0, 0, 0, "second", "")])
    )
    w.docks["Map"].hide()


def test_session_file_contents(window, ras_run, tmp_path):
    prepare_view(window, ras_run)
    path = save_window_session(window, tmp_path / "view.voxelscope.json")
    data = json.loads(path.read_text(encoding="utf-8"))
    assert data["schema"] == "voxelscope-session" and data["version"] == 1
    run = data["files"]["run"]
    assert run["path"] == Path(ras_run["run"]).name  # relative to the session's folder
    # digest checked against hashlib (FIPS 180-4 SHA-256), computed here
    assert run["sha256"] == hashlib.sha256(Path(ras_run["run"]).read_bytes()).hexdigest()
    assert {"events", "confounds", "overlay"} <= set(data["files"])
    assert data["voxel"] == [2, 3, 4]
    assert data["model"]["noise"] == "ar1" and data["model"]["contrast"] == "tone - tap"
    assert data["map"]["threshold"] == 2.5
    assert [m["title"] for m in data["marks"]] == ["first", "second"]
    layout = data["layout"]
    assert base64.b64decode(layout["state"]) and base64.b64decode(layout["geometry"])
    assert layout["units"] == "percent"


def test_saved_session_reopens_to_the_same_window(qtbot, qapp, ras_run, tmp_path):
    a = new_window(qtbot, tmp_path, "a")
    prepare_view(a, ras_run)
    path = save_window_session(a, tmp_path / "view.voxelscope.json")
    b = new_window(qtbot, tmp_path, "b")
    assert open_session(b, path)
    assert b.state.settings == a.state.settings
    assert b.state.voxel == (2, 3, 4)
    assert b.state.map_settings == a.state.map_settings
    assert b.state.marks == a.state.marks
    assert b.state.units == "percent"
    assert not b.docks["Map"].isVisible() and b.docks["Model"].isVisible()
    assert b.model_panel.contrast.text() == "tone - tap"
    b.resize(a.size())
    pa, pb = grab_array(a, qapp), grab_array(b, qapp)
    assert pa.shape == pb.shape
    differ = np.any(pa != pb, axis=2).mean()
    assert differ < 0.002, f"{100 * differ:.2f}% of the pixels differ"


def test_moved_run_is_one_status_line_and_no_crash(qtbot, ras_run, tmp_path):
    a = new_window(qtbot, tmp_path, "a")
    prepare_view(a, ras_run)
    (tmp_path / "s").mkdir()
    path = save_window_session(a, tmp_path / "s" / "view.voxelscope.json")
    moved = tmp_path / "moved"
    moved.mkdir()
    run = Path(ras_run["run"])
    shutil.move(run, moved / run.name)
    b = new_window(qtbot, tmp_path, "b")
    assert not open_session(b, path)  # offscreen: skipped, told, no crash
    msg = b.statusBar().currentMessage()
    assert "run" in msg and "\n" not in msg
    assert b.state.run is None
    assert b.state.marks == a.state.marks  # what is available is kept


def test_moved_files_can_be_located(qtbot, ras_run, tmp_path):
    a = new_window(qtbot, tmp_path, "a")
    prepare_view(a, ras_run)
    path = save_window_session(a, tmp_path / "view.voxelscope.json")
    moved = tmp_path / "moved"
    moved.mkdir()
    run = Path(ras_run["run"])
    events = run.with_name(run.name.replace("_bold.nii", "_events.tsv"))
    for p in (run, events):
        shutil.move(p, moved / p.name)
    asked = []

    def locate(problem):
        asked.append(problem.role)
        return moved / problem.path.name

    b = new_window(qtbot, tmp_path, "b")
    assert open_session(b, path, locate=locate)
    assert asked == ["run"]  # the events file was found beside the located run
    assert Path(b.state.run.path) == moved / run.name
    assert Path(b.state.bundle.events_path) == moved / events.name
    assert b.state.voxel == (2, 3, 4)
    assert b.state.settings.contrast == "tone - tap"


def test_changed_input_is_not_read_until_located(qtbot, ras_run, tmp_path):
    """A changed input (digest differs) is asked for; offscreen it is skipped, one line."""
    a = new_window(qtbot, tmp_path, "a")
    prepare_view(a, ras_run)
    path = save_window_session(a, tmp_path / "view.voxelscope.json")
    conf = Path(ras_run["run"]).with_name(
        Path(ras_run["run"]).name.replace("_bold.nii", "_confounds.tsv")
    )
    conf.write_text(conf.read_text() + "\n")
    b = new_window(qtbot, tmp_path, "b")
    assert open_session(b, path)
    msg = b.statusBar().currentMessage()
    assert "confounds" in msg and "changed" in msg
    assert b.state.run is not None


def test_not_a_session_is_one_line(window, tmp_path):
    bad = tmp_path / "x.voxelscope.json"
    bad.write_text('{"schema": "something else"}')
    assert not open_session(window, bad)
    msg = window.statusBar().currentMessage()
    assert "x.voxelscope.json" in msg and "schema" in msg and "\n" not in msg


def test_autosave_writes_recovery_and_clean_close_clears_it(qtbot, ras_run, tmp_path):
    w = new_window(qtbot, tmp_path, "w")
    keeper = w.autosave
    keeper.debounce.setInterval(50)
    assert not keeper.path.exists()
    assert w.open_run(ras_run["run"], background=False)
    qtbot.waitUntil(keeper.path.exists, timeout=3000)
    w.marks_panel.add_current("saved by autosave")
    qtbot.waitUntil(
        lambda: "saved by autosave" in keeper.path.read_text(encoding="utf-8"), timeout=3000
    )
    data = json.loads(keeper.path.read_text(encoding="utf-8"))
    assert data["files"]["run"]["absolute"] == str(Path(ras_run["run"]).resolve())
    w.close()
    assert not keeper.path.exists()


def test_autosave_timer_catches_voxel_moves(qtbot, ras_run, tmp_path):
    w = new_window(qtbot, tmp_path, "w")
    keeper = w.autosave
    assert w.open_run(ras_run["run"], background=False)
    keeper.write_now()
    keeper.timer.setInterval(100)
    w.state.set_voxel((1, 2, 3))  # not a significant change: waits for the timer
    qtbot.waitUntil(
        lambda: json.loads(keeper.path.read_text(encoding="utf-8"))["voxel"] == [1, 2, 3],
        timeout=3000,
    )


def _dead_pid() -> int:
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    return proc.pid


def test_recovery_after_a_crash_is_offered_and_restores(qtbot, ras_run, tmp_path):
    a = new_window(qtbot, tmp_path, "a")
    prepare_view(a, ras_run)
    folder = tmp_path / "state"
    folder.mkdir()
    from voxelscope.core.session import write_recovery

    crashed = write_recovery(collect_session(a), f"window-{_dead_pid()}", folder)
    alive = write_recovery(collect_session(a), "window-1", folder)  # pid 1 is always running
    assert find_recoveries(folder) == [crashed]
    b = new_window(qtbot, tmp_path, "b")
    assert not offer_recovery(b, folder)  # offscreen: one status line, nothing restored
    assert "did not close cleanly" in b.statusBar().currentMessage()
    assert crashed.exists()
    asked = []
    assert offer_recovery(b, folder, ask=lambda p: asked.append(p) or True)
    assert asked == [crashed]
    assert b.state.voxel == (2, 3, 4) and b.state.marks == a.state.marks
    assert not crashed.exists() and alive.exists()
    assert b.session_path is None  # the recovery file is not taken as the user's session


def test_declined_recovery_is_removed(window, tmp_path):
    from voxelscope.core.session import Session, write_recovery

    folder = tmp_path / "state"
    folder.mkdir()
    p = write_recovery(Session(), f"window-{_dead_pid()}", folder)
    assert not offer_recovery(window, folder, ask=lambda p: False)
    assert not p.exists()
    assert window.state.run is None


def test_save_refuses_to_overwrite_without_force(window, ras_run, tmp_path):
    assert window.open_run(ras_run["run"], background=False)
    target = tmp_path / "s.voxelscope.json"
    target.write_text("keep")
    from voxelscope.core.errors import InputError

    with pytest.raises(InputError):
        save_window_session(window, target)
    assert target.read_text() == "keep"
    save_window_session(window, target, force=True)
    assert json.loads(target.read_text())["files"]["events"]


def test_refused_entries_are_not_replaced_by_companions(qtbot, ras_run, tmp_path):
    """Issue 11: an events or confounds entry refused for its digest is not silently
    replaced by the BIDS-named companion beside the run (the same file, changed)."""
    a = new_window(qtbot, tmp_path, "a")
    assert a.open_run(ras_run["run"], voxel=(2, 3, 4), background=False)
    assert a.state.analysis is not None
    path = save_window_session(a, tmp_path / "view.voxelscope.json")
    run = Path(ras_run["run"])
    for suffix in ("_events.tsv", "_confounds.tsv"):
        other = run.with_name(run.name.replace("_bold.nii", suffix))
        other.write_text(other.read_text() + "\n")
    b = new_window(qtbot, tmp_path, "b")
    assert open_session(b, path)
    assert b.state.run is not None
    assert b.state.analysis is None  # no events: the changed companion was not read
    bundle = b.state.bundle
    assert bundle.events_path is None and bundle.confounds_path is None
    used = bundle.inputs.used_files()
    assert used["events"] is None and used["confounds"] is None


def test_session_keeps_the_atlas(qtbot, ras_run, tmp_path):
    """The atlas and its label table are session inputs (digests checked like the others)."""
    import nibabel as nib

    atlas = tmp_path / "atlas-x_dseg.nii.gz"
    nib.save(nib.Nifti1Image(np.full((4, 4, 4), 3, np.int16), np.diag([9, 9, 9, 1.0])), atlas)
    table = tmp_path / "labels.tsv"
    table.write_text("index\tname\n3\tsomewhere\n")
    a = new_window(qtbot, tmp_path, "a")
    assert a.open_run(ras_run["run"], background=False, atlas=str(atlas), atlas_labels=str(table))
    path = save_window_session(a, tmp_path / "view.voxelscope.json")
    files = json.loads(Path(path).read_text())["files"]
    assert "atlas" in files and "atlas labels" in files
    b = new_window(qtbot, tmp_path, "b")
    assert open_session(b, path)
    assert b.state.atlas is not None and b.state.atlas.names == {3: "somewhere"}
    assert "<b>Region</b>" in b.slices.readout.text()


def test_a_session_written_before_the_renames_still_opens(qtbot, ras_run, tmp_path):
    """Sessions name their files by role: 'anatomy' and 'overlay' were the roles before the
    window's words changed (underlay -> backdrop, stat_map -> overlay) and still are, and the
    map statistic 'beta' (the earlier name of the contrast estimate) is still read, as
    'estimate'. A file written by hand the way earlier versions wrote it opens the anatomy
    as the backdrop and the map file."""
    import nibabel as nib

    anatomy = tmp_path / "sub-ras_T1w.nii.gz"
    data = np.arange(8 * 9 * 10, dtype=np.float32).reshape(8, 9, 10)
    nib.save(nib.Nifti1Image(data, np.diag([2.0, 2.0, 2.0, 1.0])), anatomy)
    doc = {
        "schema": "voxelscope-session",
        "version": 1,
        "files": {  # content digests with hashlib (FIPS 180-4 SHA-256)
            role: {"path": str(p), "sha256": hashlib.sha256(Path(p).read_bytes()).hexdigest()}
            for role, p in (
                ("run", ras_run["run"]),
                ("anatomy", anatomy),
                ("overlay", ras_run["map"]),
            )
        },
        "model": {"noise": "ols"},
        "voxel": [2, 3, 4],
        "map": {"source": "file", "stat": "beta"},
    }
    path = tmp_path / "old.voxelscope.json"
    path.write_text(json.dumps(doc), encoding="utf-8")
    w = new_window(qtbot, tmp_path, "old")
    assert open_session(w, path), w.last_error
    assert w.state.backdrop is not None and w.state.backdrop.path == anatomy
    assert w.state.file_layer is not None and w.state.file_layer.path == Path(ras_run["map"])
    assert w.state.map_settings.stat == "estimate"
