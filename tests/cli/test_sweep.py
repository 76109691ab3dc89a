"""``voxelscope sweep``: bad input, local workers against a scheduler, resuming, Ctrl-C.

The study is the generated one of tests/sweep_study.py (invented data). Worker processes
are few (one) because the machine running the tests may have two cores.
"""

from __future__ import annotations

import signal
import subprocess
import sys
import time

import pytest

from tests.sweep_study import make_study
from voxelscope.cli import main


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    return make_study(tmp_path_factory.mktemp("cli-study") / "ds", subjects=2, runs=2)


@pytest.fixture(scope="module")
def scheduler():
    distributed = pytest.importorskip("distributed")
    cluster = distributed.LocalCluster(
        n_workers=1,
        threads_per_worker=2,
        processes=False,
        protocol="tcp://",
        host="127.0.0.1",
        dashboard_address=":0",
    )
    yield cluster.scheduler_address
    cluster.close()


def _one_error_line(capsys) -> str:
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err
    assert err[0].startswith("voxelscope: error: ") and "Traceback" not in err[0]
    return err[0]


def test_not_a_dataset(tmp_path, capsys):
    (tmp_path / "empty").mkdir()
    assert main(["sweep", str(tmp_path / "empty"), "-o", str(tmp_path / "out")]) == 2
    assert "not a BIDS dataset" in _one_error_line(capsys)
    assert not (tmp_path / "out").exists()


def test_no_runs_with_events(study, tmp_path, capsys):
    code = main(["sweep", str(study), "-o", str(tmp_path / "out"), "--task", "nothing"])
    assert code == 2
    assert "no runs with events of task 'nothing'" in _one_error_line(capsys)


def test_unreachable_scheduler(study, tmp_path, capsys):
    out = tmp_path / "out"
    assert main(["sweep", str(study), "-o", str(out), "--scheduler", "tcp://127.0.0.1:9"]) == 2
    assert "cannot reach the Dask scheduler at tcp://127.0.0.1:9" in _one_error_line(capsys)


@pytest.mark.parametrize(
    "extra, words",
    [
        (["--workers", "1", "--scheduler", "tcp://127.0.0.1:9"], "not allowed with"),
        (["--scheduler", "localhost"], "tcp://HOST:8786"),
        (["--workers", "0"], "--workers must be between 1"),
        (["--threshold", "-1"], "--threshold must be a number >= 0"),
    ],
)
def test_bad_options(study, tmp_path, capsys, extra, words):
    with pytest.raises(SystemExit) as exc:
        main(["sweep", str(study), "-o", str(tmp_path / "o"), *extra])
    assert exc.value.code == 2
    assert words in _one_error_line(capsys)


def test_output_that_is_a_file_or_a_foreign_folder(study, tmp_path, capsys):
    f = tmp_path / "file"
    f.write_text("keep")
    assert main(["sweep", str(study), "-o", str(f)]) == 2
    assert "is a file" in _one_error_line(capsys)
    other = tmp_path / "other"
    other.mkdir()
    (other / "notes.txt").write_text("keep")
    assert main(["sweep", str(study), "-o", str(other)]) == 2
    assert "holds other files" in _one_error_line(capsys)
    assert f.read_text() == "keep" and (other / "notes.txt").read_text() == "keep"


def test_local_workers_and_a_scheduler_give_the_same_table(study, scheduler, tmp_path, capsys):
    local, remote = tmp_path / "local", tmp_path / "remote"
    assert main(["sweep", str(study), "-o", str(local), "--workers", "1"]) == 0
    assert main(["sweep", str(study), "-o", str(remote), "--scheduler", scheduler]) == 0
    a = (local / "findings.tsv").read_text()
    assert a == (remote / "findings.tsv").read_text()
    assert len(a.splitlines()) >= 1 + 2 * 3  # a header, each run's and subject's findings
    out = capsys.readouterr().out
    assert "6 tasks computed, 0 reused" in out
    # again into the same folder: nothing is computed, the same table
    assert main(["sweep", str(study), "-o", str(remote), "--scheduler", scheduler]) == 0
    assert "0 tasks computed, 6 reused" in capsys.readouterr().out
    assert (remote / "findings.tsv").read_text() == a


def test_ctrl_c_stops_cleanly_and_keeps_finished_runs(study, tmp_path):
    out = tmp_path / "out"
    argv = [sys.executable, "-m", "voxelscope", "sweep", str(study), "-o", str(out)]
    proc = subprocess.Popen(
        [*argv, "--workers", "1"], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True
    )
    try:
        start = time.monotonic()
        while time.monotonic() - start < 180 and proc.poll() is None:
            if list((out / "runs").glob("*.json")):
                break
            time.sleep(0.1)
        if proc.poll() is not None:
            pytest.skip("the sweep finished before it could be interrupted")
        proc.send_signal(signal.SIGINT)
        _out, err = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 130
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("voxelscope: interrupted;"), err
    kept = list((out / "runs").glob("*.json"))
    assert kept and not (out / "findings.tsv").exists()


def test_doctests():
    import doctest

    from voxelscope.cli import sweep

    assert doctest.testmod(sweep).failed == 0
