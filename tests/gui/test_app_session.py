"""launch(..., session=..., save_session=...) and ``voxelscope view --session``."""

import json
import shutil
from pathlib import Path

import numpy as np
from PySide6.QtGui import QImage

from voxelscope.cli import main as cli_main
from voxelscope.gui.app import launch


def pixels(path):
    img = QImage(str(path)).convertToFormat(QImage.Format.Format_RGB888)
    arr = np.frombuffer(img.constBits(), np.uint8).reshape(img.height(), img.bytesPerLine())
    return arr[:, : img.width() * 3].reshape(img.height(), img.width(), 3).copy()


def test_saved_session_renders_the_same_screenshot(qapp, ras_run, tmp_path):
    session = tmp_path / "view.voxelscope.json"
    first, second = tmp_path / "first.png", tmp_path / "second.png"
    code = launch(
        run=str(ras_run["run"]),
        map_file=str(ras_run["map"]),
        voxel=(2, 3, 4),
        save_session=str(session),
        screenshot=str(first),
        size=(1400, 900),
    )
    assert code == 0 and session.is_file()
    assert json.loads(session.read_text())["voxel"] == [2, 3, 4]
    assert launch(session=str(session), screenshot=str(second), size=(1400, 900)) == 0
    a, b = pixels(first), pixels(second)
    assert a.shape == b.shape == (900, 1400, 3)
    # the status bar (bottom strip) says "Opened ..." once and "Restored ..." the other time
    a, b = a[:-40], b[:-40]
    differ = np.any(a != b, axis=2).mean()
    assert differ < 0.002, f"{100 * differ:.2f}% of the pixels differ"


def test_save_session_does_not_overwrite(qapp, ras_run, tmp_path, capsys):
    session = tmp_path / "view.voxelscope.json"
    session.write_text("keep")
    code = launch(
        run=str(ras_run["run"]), save_session=str(session), screenshot=str(tmp_path / "s.png")
    )
    assert code == 2
    assert session.read_text() == "keep"
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "already exists" in err[0]


def test_cli_view_session_with_a_moved_events_file(qapp, ras_run, tmp_path, capsys):
    session = tmp_path / "view.voxelscope.json"
    assert (
        launch(
            run=str(ras_run["run"]), save_session=str(session), screenshot=str(tmp_path / "a.png")
        )
        == 0
    )
    run = Path(ras_run["run"])
    events = run.with_name(run.name.replace("_bold.nii", "_events.tsv"))
    shutil.move(events, tmp_path / "elsewhere.tsv")
    out = tmp_path / "b.png"
    assert cli_main(["view", "--session", str(session), "--screenshot", str(out)]) == 0
    assert out.is_file()


def test_cli_view_session_with_the_run_gone(qapp, ras_run, tmp_path, capsys):
    session = tmp_path / "view.voxelscope.json"
    assert (
        launch(
            run=str(ras_run["run"]), save_session=str(session), screenshot=str(tmp_path / "a.png")
        )
        == 0
    )
    Path(ras_run["run"]).unlink()
    code = cli_main(["view", "--session", str(session), "--screenshot", str(tmp_path / "b.png")])
    assert code == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "run" in err[0] and "Traceback" not in err[0]
