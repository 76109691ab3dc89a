"""Tests of ``voxelscope report`` (voxelscope/cli/report.py) through ``voxelscope.cli.main``.

The report's numbers are compared with ``voxelscope fit --format json`` on the same voxel
(both come from ``Analysis.fit_voxel``) and, as an outside reference, with statsmodels OLS.
Error cases check the one-line message and exit code 2.
"""

from __future__ import annotations

import csv
import io
import json
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from tests.cli.runs import write_run
from voxelscope.cli import main

TR = 1.5
T = 80
SAMPLE = Path(__file__).resolve().parents[2] / "sample_data"


def _write_run(tmp_path, seed=3, shape=(5, 6, 4), name="sub-01_task-x_bold.nii"):
    rng = np.random.default_rng(seed)
    data = 400 + rng.standard_normal((*shape, T)) * 4
    return write_run(tmp_path, data, TR, name=name)


def _t_values(html: str) -> dict[str, tuple[str, float]]:
    rows = re.findall(r"<tr data-kernel='([^']+)'>(.*?)</tr>", html, flags=re.S)
    out = {}
    for kernel, body in rows:
        m = re.search(r"<td class='num t' data-value=\"([^\"]+)\">([^<]+)</td>", body)
        out[kernel] = (m.group(2), float(m.group(1)))
    return out


@pytest.mark.parametrize("noise", ["arp", "ols"])
def test_report_voxel_matches_fit_command(tmp_path, capsys, noise):
    """The report and ``voxelscope fit`` give the same numbers under the default AR(p)
    model (the same neighbourhood whitening) and under OLS, where statsmodels OLS is the
    outside reference."""
    path, events = _write_run(tmp_path)
    common = [str(path), "--events", str(events), "--voxel", "2", "3", "1", "--contrast", "tap"]
    common += ["--noise", noise]
    assert main(["fit", *common, "--format", "json"]) == 0
    fit_doc = json.loads(capsys.readouterr().out)
    out = tmp_path / "rep"
    assert main(["report", *common, "-o", str(out), "--scale", "1"]) == 0
    assert "report.html" in capsys.readouterr().out
    html = (out / "report.html").read_text(encoding="utf-8")
    shown = _t_values(html)
    assert list(shown) == [f["kernel"] for f in fit_doc["fits"]]
    for f in fit_doc["fits"]:
        assert shown[f["kernel"]] == (f"{f['t']:.2f}", f["t"])
    rows = list(csv.DictReader(io.StringIO((out / "timeseries.csv").read_text())))
    assert len(rows) == T
    np.testing.assert_array_equal([float(r["signal"]) for r in rows], fit_doc["y"])
    for f in fit_doc["fits"]:
        np.testing.assert_array_equal(
            [float(r[f"fitted_{f['kernel']}"]) for r in rows], f["fitted"]
        )
    # outside reference: statsmodels OLS t for the contrast on the fit's design
    sm = pytest.importorskip("statsmodels.api")
    for f in fit_doc["fits"] if noise == "ols" else []:
        tt = sm.OLS(np.asarray(fit_doc["y"]), np.asarray(f["design"])).fit().t_test(f["weights"])
        np.testing.assert_allclose(shown[f["kernel"]][1], float(np.squeeze(tt.tvalue)), rtol=1e-9)
    png = (out / "figure.png").read_bytes()
    assert png[:8] == b"\x89PNG\r\n\x1a\n" and png[16:24] == (900).to_bytes(4, "big") + (
        560
    ).to_bytes(4, "big")


def test_report_mm_and_marks(tmp_path, capsys):
    path, events = _write_run(tmp_path)
    assert (
        main(
            [
                "report",
                str(path),
                "--events",
                str(events),
                "--mm",
                "6",
                "9",
                "3.5",
                "-o",
                str(tmp_path / "a"),
            ]
        )
        == 0
    )
    assert "voxel (2, 3, 1)" in (tmp_path / "a" / "report.html").read_text(encoding="utf-8")
    marks = tmp_path / "marks.tsv"
    marks.write_text(
        "x_mm\ty_mm\tz_mm\ttitle\tnote\n6\t9\t3.5\tFirst one\tline 1\\nline 2\n0\t0\t0\tCorner\t\n"
    )
    capsys.readouterr()
    assert (
        main(
            [
                "report",
                str(path),
                "--events",
                str(events),
                "--marks",
                str(marks),
                "-o",
                str(tmp_path / "b"),
                "--no-checks",
            ]
        )
        == 0
    )
    names = sorted(p.name for p in (tmp_path / "b").iterdir())
    assert "01-first-one.csv" in names and "02-corner.csv" in names and "report.html" in names
    html = (tmp_path / "b" / "report.html").read_text(encoding="utf-8")
    assert "line 1\nline 2" in html  # the note, unescaped
    assert "href='#sec-2'" in html


def test_existing_output_needs_force(tmp_path, capsys):
    path, events = _write_run(tmp_path)
    argv = [
        "report",
        str(path),
        "--events",
        str(events),
        "--voxel",
        "1",
        "1",
        "1",
        "-o",
        str(tmp_path / "r"),
    ]
    assert main(argv) == 0
    before = (tmp_path / "r" / "report.html").read_bytes()
    capsys.readouterr()
    assert main(argv) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("voxelscope: error: ") and "--force" in err and len(err.splitlines()) == 1
    assert (tmp_path / "r" / "report.html").read_bytes() == before
    assert main([*argv, "--force"]) == 0
    assert sorted(p.name for p in (tmp_path / "r").iterdir()) == [
        "figure.png", "figure.svg", "report.html", "timeseries.csv",
    ]  # fmt: skip


def test_bad_marks_file_is_one_line(tmp_path, capsys):
    path, events = _write_run(tmp_path)
    marks = tmp_path / "bad.tsv"
    marks.write_text("x_mm\ty_mm\tz_mm\ttitle\n1\t2\tthree\tx\n")
    code = main(
        [
            "report",
            str(path),
            "--events",
            str(events),
            "--marks",
            str(marks),
            "-o",
            str(tmp_path / "o"),
        ]
    )
    err = capsys.readouterr().err.strip()
    assert code == 2 and len(err.splitlines()) == 1
    assert "bad.tsv: line 2, column 'z_mm'" in err
    assert not (tmp_path / "o").exists()


def test_outside_voxel_is_one_line(tmp_path, capsys):
    path, events = _write_run(tmp_path)
    code = main(
        [
            "report",
            str(path),
            "--events",
            str(events),
            "--voxel",
            "9",
            "0",
            "0",
            "-o",
            str(tmp_path / "o"),
        ]
    )
    err = capsys.readouterr().err.strip()
    assert code == 2 and len(err.splitlines()) == 1 and "outside" in err


def test_report_command_never_imports_qt(tmp_path):
    path, events = _write_run(tmp_path)
    code = (
        "import sys\n"
        "from voxelscope.cli import main\n"
        f"rc = main(['report', {str(path)!r}, '--events', {str(events)!r},"
        f" '--voxel', '1', '1', '1', '-o', {str(tmp_path / 'q')!r}, '--scale', '0.5'])\n"
        "bad = [m for m in sys.modules if m.startswith(('PySide6', 'pyqtgraph'))]\n"
        "assert rc == 0 and not bad, (rc, bad)\n"
    )
    subprocess.run([sys.executable, "-c", code], check=True, capture_output=True)


@pytest.mark.slow
@pytest.mark.skipif(not (SAMPLE / "demo_marks.tsv").exists(), reason="sample data not generated")
def test_sample_data_marks_report(tmp_path, capsys):
    prep = SAMPLE / "study/derivatives/prep/sub-demo/func/sub-demo_task-tonetap_run-1"
    run = Path(f"{prep}_space-phantom_desc-preproc_bold.nii.gz")
    argv = ["report", str(run), "--confound-columns", "motion6",
            "--marks", str(SAMPLE / "demo_marks.tsv"), "-o", str(tmp_path / "demo"), "--no-cache",
            "--scale", "1"]  # fmt: skip
    assert main(argv) == 0, capsys.readouterr().err
    n_marks = len((SAMPLE / "demo_marks.tsv").read_text().strip().splitlines()) - 1
    csvs = sorted((tmp_path / "demo").glob("*.csv"))
    assert len(csvs) == n_marks
    html = (tmp_path / "demo" / "report.html").read_text(encoding="utf-8")
    assert html.count("<section id='sec-") == n_marks


def test_report_names_the_atlas_region(tmp_path, capsys):
    """Issue 17 item 6: each section says the region at its voxel (the same lookup as fit)."""
    import nibabel as nib

    path, _events = _write_run(tmp_path)[:2]
    labels = np.full((6, 7, 5), 4, np.int16)
    atlas = tmp_path / "atlas-x_dseg.nii"
    nib.save(nib.Nifti1Image(labels, np.diag([3.0, 3.0, 3.5, 1.0])), atlas)
    (tmp_path / "atlas-x_dseg.tsv").write_text("index\tname\n4\thand area\n")
    out = tmp_path / "rep"
    argv = ["report", str(path), "--voxel", "1", "2", "1", "-o", str(out), "--no-checks"]
    assert main([*argv, "--atlas", str(atlas)]) == 0, capsys.readouterr().err
    html = (out / "report.html").read_text()
    assert "region: hand area (atlas-x_dseg.nii)" in html
    assert "atlas-x_dseg.nii" in html  # listed among the input files
