"""Tests of voxelscope/core/atomic.py: atomic writes that refuse to overwrite without force.

Reference: the POSIX guarantee that ``rename``/``os.replace`` within one file system is
atomic (common practice for safe writes); checked here through its visible effects.
"""

from __future__ import annotations

import os

import pytest

from voxelscope.core.atomic import check_outputs, write_bytes, write_text
from voxelscope.core.errors import InputError


def test_write_leaves_only_the_final_file(tmp_path):
    p = write_bytes(tmp_path / "a.bin", b"\x00\x01\x02")
    assert p.read_bytes() == b"\x00\x01\x02"
    assert sorted(os.listdir(tmp_path)) == ["a.bin"]


def test_refuses_overwrite_without_force_and_keeps_old_content(tmp_path):
    p = write_text(tmp_path / "out.csv", "old\n")
    with pytest.raises(InputError) as err:
        write_text(p, "new\n")
    msg = str(err.value)
    assert "out.csv" in msg and err.value.remedy == "force" and "\n" not in msg
    assert p.read_text() == "old\n"
    assert sorted(os.listdir(tmp_path)) == ["out.csv"]


def test_force_overwrites_atomically_and_keeps_mode(tmp_path):
    p = write_text(tmp_path / "out.csv", "old\n")
    os.chmod(p, 0o640)
    write_text(p, "new\n", force=True)
    assert p.read_text() == "new\n"
    assert (p.stat().st_mode & 0o777) == 0o640
    assert sorted(os.listdir(tmp_path)) == ["out.csv"]


def test_new_file_mode_follows_umask(tmp_path):
    """A new output gets 0o666 minus the umask, like a file opened with open() (POSIX)."""
    old = os.umask(0o027)
    try:
        p = write_text(tmp_path / "m.txt", "x")
    finally:
        os.umask(old)
    assert (p.stat().st_mode & 0o777) == 0o640


def test_check_outputs_names_the_first_existing_file(tmp_path):
    (tmp_path / "b.png").write_bytes(b"")
    with pytest.raises(InputError, match=r"b\.png already exists") as err:
        check_outputs([tmp_path / "a.png", tmp_path / "b.png"])
    assert err.value.remedy == "force"
    check_outputs([tmp_path / "b.png"], force=True)


def test_missing_folder_and_folder_target_are_clear_errors(tmp_path):
    with pytest.raises(InputError, match="does not exist"):
        write_text(tmp_path / "nope" / "x.txt", "x")
    with pytest.raises(InputError, match="is a folder"):
        write_text(tmp_path, "x")


def test_failed_write_leaves_no_temp_file(tmp_path, monkeypatch):
    def boom(src, dst):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "replace", boom)
    with pytest.raises(InputError, match="cannot write"):
        write_text(tmp_path / "x.txt", "data")
    assert os.listdir(tmp_path) == []


def test_publish_folder_is_all_or_nothing(tmp_path):
    """A folder of outputs (reports of one or several runs) appears whole or not at all."""
    import errno

    from voxelscope.core.atomic import publish_folder

    def half_then_full_disk(staging):
        write_text(staging / "a.csv", "1\n")
        raise OSError(errno.ENOSPC, "No space left on device")

    with pytest.raises(InputError, match="No space left on device"):
        publish_folder(tmp_path / "rep", half_then_full_disk)
    assert list(tmp_path.iterdir()) == []
    out = publish_folder(tmp_path / "rep", lambda s: [write_text(s / "a.csv", "2\n")])
    assert [p.read_text() for p in out] == ["2\n"]
    with pytest.raises(InputError, match="already exists"):
        publish_folder(tmp_path / "rep", lambda s: [write_text(s / "a.csv", "3\n")])
    publish_folder(tmp_path / "rep", lambda s: [write_text(s / "a.csv", "3\n")], force=True)
    assert (tmp_path / "rep" / "a.csv").read_text() == "3\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["rep"]
