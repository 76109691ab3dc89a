"""Fault injection on reports (voxelscope/core/report.py).

Named for what each case protects: a report stopped by a full disk, an error or a cancel
leaves no partial folder (and so never demands --force afterwards); a report over many
marks streams (progress per section, memory that does not grow with the number of marks);
outputs never replace inputs.
"""

from __future__ import annotations

import errno
import tracemalloc

import pytest

from tests.core.test_report import demo  # noqa: F401 - the shared fixture
from voxelscope.core import report as R
from voxelscope.core.errors import Cancelled, InputError
from voxelscope.core.marks import Mark, MarkList
from voxelscope.core.model import ModelSettings

SETTINGS = ModelSettings(kernels=("gamma",))


def _marks(n):
    return MarkList([Mark(3.0 * (k % 5), 3.0 * (k % 4), 4.0 * (k % 3), f"m{k}") for k in range(n)])


def _leftovers(folder):
    return sorted(p.name for p in folder.iterdir())


def test_full_disk_leaves_no_partial_folder(demo, tmp_path, monkeypatch):  # noqa: F811
    run, analysis, _, _ = demo
    calls = {"n": 0}
    real = R.write_bytes

    def full_disk(path, data, **kw):
        calls["n"] += 1
        if calls["n"] == 3:
            raise InputError(f"{path}: cannot write the file ({errno.errorcode[28]}: No space)")
        return real(path, data, **kw)

    monkeypatch.setattr(R, "write_bytes", full_disk)
    before = _leftovers(tmp_path)
    with pytest.raises(InputError, match="the report was not written") as info:
        R.write_report(tmp_path / "out", run, analysis, SETTINGS, marks=_marks(5), scale=0.5)
    assert ".partial" not in str(info.value)
    assert _leftovers(tmp_path) == before  # no 'out', no staging folder
    # and the next try needs no --force
    monkeypatch.setattr(R, "write_bytes", real)
    R.write_report(tmp_path / "out", run, analysis, SETTINGS, marks=_marks(2), scale=0.5)


def test_os_error_while_streaming_the_page_leaves_nothing(demo, tmp_path, monkeypatch):  # noqa: F811
    run, analysis, _, _ = demo

    def boom(*a, **k):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(R, "_page_tail", boom)
    before = _leftovers(tmp_path)
    with pytest.raises(InputError, match=r"\(No space left on device\); nothing was written"):
        R.write_report(tmp_path / "out", run, analysis, SETTINGS, voxel=(1, 1, 1), scale=0.5)
    assert _leftovers(tmp_path) == before


def test_cancel_leaves_nothing_and_progress_is_reported(demo, tmp_path):  # noqa: F811
    run, analysis, _, _ = demo
    seen = []

    def progress(f):
        seen.append(f)
        return len(seen) < 3

    before = _leftovers(tmp_path)
    with pytest.raises(Cancelled):
        R.write_report(
            tmp_path / "out", run, analysis, SETTINGS, marks=_marks(6), progress=progress
        )
    assert _leftovers(tmp_path) == before
    assert seen == sorted(seen) and seen[0] == 0.0


def test_existing_report_folder_is_updated_in_place(demo, tmp_path):  # noqa: F811
    run, analysis, _, _ = demo
    out = tmp_path / "out"
    out.mkdir()
    (out / "keep.txt").write_text("mine")
    R.write_report(out, run, analysis, SETTINGS, voxel=(1, 1, 1), scale=0.5)
    assert (out / "keep.txt").read_text() == "mine" and (out / "report.html").is_file()
    with pytest.raises(InputError, match="already exists"):
        R.write_report(out, run, analysis, SETTINGS, voxel=(1, 1, 1), scale=0.5)
    assert not [p for p in tmp_path.iterdir() if p.name.endswith(".partial")]


def test_many_marks_stream_with_bounded_memory(demo, tmp_path, monkeypatch):  # noqa: F811
    """Peak Python memory for 48 marks stays near that for 12 (streamed, not held): each
    section's figures and fits are dropped once written, and the figures' cyclic garbage
    is collected every few figures. Measured with tracemalloc, after a report of one mark
    (the first report's imports and font cache would otherwise count as the small one's)."""
    run, analysis, _, _ = demo
    monkeypatch.setattr(R, "_KEEP_SECTIONS", 0)

    def peak(n, name):
        tracemalloc.start()
        res = R.write_report(tmp_path / name, run, analysis, SETTINGS, marks=_marks(n), scale=0.5)
        _, top = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        assert all(s.fits is None and not s.png_bytes for s in res.sections)
        return top

    peak(1, "warm")
    small, large = peak(12, "a"), peak(48, "b")
    assert large < 1.5 * small, (small, large)
    assert len(list((tmp_path / "b").glob("*.png"))) == 48


def test_staging_left_by_a_killed_report_is_cleared_next_time(demo, tmp_path):  # noqa: F811
    """A killed process cannot clean up: the next report into the same folder removes the
    staging folder whose process is gone (pid 2**22 + 1 is above Linux's pid_max)."""
    run, analysis, _, _ = demo
    stale = tmp_path / f".out.{2**22 + 1}.abc.partial"
    stale.mkdir()
    (stale / "01-m0.png").write_bytes(b"half")
    R.write_report(tmp_path / "out", run, analysis, SETTINGS, voxel=(1, 1, 1), scale=0.5)
    assert not stale.exists()
