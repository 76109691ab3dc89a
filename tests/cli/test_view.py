"""Start-up checks of ``voxelscope view``/``demo`` (voxelscope/cli/view.py), before Qt loads."""

from __future__ import annotations

import sys

import pytest

from voxelscope.cli import main
from voxelscope.cli.view import display_problem

linux = pytest.mark.skipif(not sys.platform.startswith("linux"), reason="X11/Wayland checks")


@linux
def test_no_display_is_one_clear_line():
    msg = display_problem({}, find_library=lambda name: "lib.so")
    assert "no display" in msg and "--screenshot" in msg


@linux
def test_missing_xcb_cursor_names_the_package():
    msg = display_problem({"DISPLAY": ":0"}, find_library=lambda name: None)
    assert "libxcb-cursor0" in msg and "libxcb-icccm4" in msg and "apt-get install" in msg


def test_good_setups_pass():
    assert display_problem({"QT_QPA_PLATFORM": "offscreen"}) is None
    assert display_problem({"WAYLAND_DISPLAY": "wayland-0"}) is None
    assert (
        display_problem({"DISPLAY": ":0"}, find_library=lambda name: "libxcb-cursor.so.0") is None
    )


@linux
def test_demo_without_display_exits_2(monkeypatch, capsys):
    for var in ("DISPLAY", "WAYLAND_DISPLAY", "QT_QPA_PLATFORM"):
        monkeypatch.delenv(var, raising=False)
    assert main(["demo"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("voxelscope: error: no display") and len(err.splitlines()) == 1


def test_anatomy_flag_and_its_earlier_spelling(capsys):
    """``--anatomy`` is the flag; ``--anat`` (the earlier spelling) still works, unlisted."""
    from voxelscope.cli import build_parser

    parser = build_parser()
    for flag in ("--anatomy", "--anat"):
        args = parser.parse_args(["view", "run.nii.gz", flag, "t1.nii.gz"])
        assert args.anatomy == "t1.nii.gz"
    with pytest.raises(SystemExit):
        parser.parse_args(["view", "--help"])
    out = capsys.readouterr().out
    assert "--anatomy FILE" in out and "--anat " not in out
