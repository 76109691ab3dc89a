"""Tests of the one output guard (voxelscope/core/outputs.py) and the atomic writer using it.

Each test is named for the promise it protects: an output never replaces an input (same
path, symbolic link, hard link, explicit or noted input), an existing file needs ``force``,
a session or marks document may be saved back over itself.
"""

from __future__ import annotations

import os
import threading

import pytest

from voxelscope.core.atomic import check_outputs, write_bytes, write_text
from voxelscope.core.errors import InputError, OutputExistsError
from voxelscope.core.inputs import read_input_text
from voxelscope.core.outputs import (
    forget_inputs,
    guard_output,
    input_scope,
    is_input,
    note_input,
    noted_inputs,
)


def _file(path, text="input"):
    path.write_text(text)
    return path


def test_noted_input_is_never_overwritten_even_with_force(tmp_path):
    run = _file(tmp_path / "run.nii")
    note_input(run)
    with pytest.raises(InputError, match="is an input of this command"):
        write_bytes(run, b"png", force=True)
    assert run.read_text() == "input"


def test_symlink_and_hardlink_to_an_input_are_refused(tmp_path):
    run = _file(tmp_path / "run.nii")
    note_input(run)
    sym = tmp_path / "sym.png"
    os.symlink(run, sym)
    hard = tmp_path / "hard.png"
    os.link(run, hard)
    for out in (sym, hard):
        with pytest.raises(InputError, match="is an input"):
            guard_output(out, force=True)
    assert run.read_text() == "input"


def test_input_named_through_a_linked_folder_is_refused(tmp_path):
    (tmp_path / "data").mkdir()
    run = _file(tmp_path / "data" / "run.nii")
    os.symlink(tmp_path / "data", tmp_path / "alias")
    note_input(tmp_path / "alias" / "run.nii")
    with pytest.raises(InputError, match="is an input"):
        guard_output(run, force=True)


def test_explicit_inputs_are_refused(tmp_path):
    ev = _file(tmp_path / "events.tsv")
    with pytest.raises(InputError, match="is an input"):
        check_outputs([tmp_path / "ok.tsv", ev], force=True, inputs=[ev])


def test_existing_output_needs_force(tmp_path):
    out = _file(tmp_path / "old.csv", "old")
    with pytest.raises(OutputExistsError, match="already exists") as err:
        write_text(out, "new")
    assert err.value.remedy == "force" and err.value.path == out
    assert out.read_text() == "old"
    write_text(out, "new", force=True)
    assert out.read_text() == "new"


def test_dangling_symlink_counts_as_existing(tmp_path):
    out = tmp_path / "dangling.png"
    os.symlink(tmp_path / "nowhere", out)
    with pytest.raises(OutputExistsError):
        guard_output(out)


def test_folder_is_not_an_output_file(tmp_path):
    with pytest.raises(InputError, match="is a folder"):
        guard_output(tmp_path, force=True)


def test_session_may_be_saved_back_over_itself_but_nothing_else_may(tmp_path):
    s = _file(tmp_path / "view.voxelscope.json", "{}")
    read_input_text(s, "session")
    write_text(s, "{}\n", force=True, kind="session")  # Save over the opened session
    with pytest.raises(InputError, match="is an input"):
        write_bytes(s, b"png", force=True)  # a screenshot may not
    with pytest.raises(InputError, match="is an input"):
        write_text(s, "marks", force=True, kind="marks")


def test_data_read_as_document_later_stays_protected(tmp_path):
    ev = _file(tmp_path / "events.tsv")
    note_input(ev)
    note_input(ev, "session")
    assert is_input(ev, kind="session")


def test_scope_limits_inputs_to_one_command(tmp_path):
    run = _file(tmp_path / "run.nii")
    with input_scope():
        note_input(run)
        assert noted_inputs() == [run.resolve()]
    assert run.resolve() not in noted_inputs()
    guard_output(run, force=True)
    note_input(run)
    forget_inputs()
    assert noted_inputs() == []


def test_output_appearing_during_the_write_is_not_replaced(tmp_path, monkeypatch):
    """A file created by someone else while we write is kept (checked again before rename)."""
    import voxelscope.core.atomic as atomic

    out = tmp_path / "race.txt"
    real_fsync = os.fsync

    def fsync_and_create(fd):
        real_fsync(fd)
        out.write_text("theirs")

    monkeypatch.setattr(atomic.os, "fsync", fsync_and_create)
    with pytest.raises(OutputExistsError):
        write_bytes(out, b"ours")
    assert out.read_text() == "theirs"
    assert [p.name for p in tmp_path.iterdir()] == ["race.txt"]  # no temporary left


def test_guard_is_thread_safe(tmp_path):
    files = [_file(tmp_path / f"in{n}.tsv") for n in range(50)]
    threads = [threading.Thread(target=note_input, args=(f,)) for f in files]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert len(noted_inputs()) == 50
