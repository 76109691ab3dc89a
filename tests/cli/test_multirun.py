"""Tests of several runs on the command line (voxelscope/cli/multirun.py, and the
several-run paths of ``fit`` and ``map``) through ``voxelscope.cli.main``.

References: statsmodels OLS (``t_test`` of the contrast on each run's design, taken from the
one-run JSON) for each run's estimate and variance; the fixed-effects formulas (common
practice) and Cochran (1954) with ``scipy.stats.chi2`` / ``scipy.stats.t`` for the combined
numbers; nibabel to read the written maps.
"""

from __future__ import annotations

import json
import subprocess
import sys

import nibabel as nib
import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats

from tests.cli.runs import EVENTS, write_run
from voxelscope.cli import main
from voxelscope.core.events import read_events
from voxelscope.core.model import Analysis, ModelSettings

TR = 1.5
T = 90
COMBINED_KEYS = {"kernel", "estimate", "beta", "variance", "t", "df", "p", "q", "q_p", "flags"}


def _three_runs(tmp_path, shape=(5, 6, 4), affines=None, active_run=None):
    """Three runs; with ``active_run``, voxel (2, 3, 1) responds to 'tone' in that run."""
    rng = np.random.default_rng(42)
    paths = []
    for i in range(3):
        data = 500 + rng.standard_normal((*shape, T)) * 5
        if active_run == i:
            ev = tmp_path / "ev.tsv"
            ev.write_text(EVENTS)
            a = Analysis(read_events(ev), n_volumes=T, tr=TR)
            data[2, 3, 1] += 12 * a.design("double-gamma", ModelSettings()).column("tone")
        aff = None if affines is None else affines[i]
        p, _ = write_run(tmp_path, data, TR, affine=aff, name=f"sub-01_task-x_run-{i + 1}_bold.nii")
        paths.append(str(p))
    return paths


def _json(capsys, argv):
    code = main([*argv, "--format", "json"])
    out = capsys.readouterr()
    assert code == 0, out.err
    return json.loads(out.out)


def test_fit_json_shape_and_numbers_against_statsmodels(tmp_path, capsys):
    paths = _three_runs(tmp_path)
    ols = ["--noise", "ols"]  # statsmodels OLS is the reference below
    doc = _json(capsys, ["fit", *paths, "--voxel", "2", "3", "1", "--contrast", "tone - tap", *ols])
    assert set(doc) == {"runs", "combined", "warnings"}
    assert [r["run"] for r in doc["runs"]] == ["run-1", "run-2", "run-3"]
    # each run's object is the one-run JSON (plus its name and path)
    one = _json(
        capsys, ["fit", paths[1], "--voxel", "2", "3", "1", "--contrast", "tone - tap", *ols]
    )
    assert {k: v for k, v in doc["runs"][1].items() if k not in ("run", "path")} == one
    assert [c["kernel"] for c in doc["combined"]] == [
        "boxcar",
        "gaussian",
        "gamma",
        "double-gamma",
    ]
    for k, c in enumerate(doc["combined"]):
        assert COMBINED_KEYS <= set(c)
        b, v, d = [], [], []
        for r in doc["runs"]:
            f = r["fits"][k]
            ref = sm.OLS(np.asarray(r["y"]), np.asarray(f["design"])).fit()
            tt = ref.t_test(f["weights"])
            b.append(float(np.squeeze(tt.effect)))
            v.append(float(np.squeeze(tt.sd)) ** 2)
            d.append(ref.df_resid)
        w = 1 / np.asarray(v)
        beta = np.sum(w * b) / w.sum()
        t = beta * np.sqrt(w.sum())
        q = np.sum(w * (np.asarray(b) - beta) ** 2)
        assert c["beta"] == pytest.approx(beta, rel=1e-9, abs=1e-12)
        assert c["variance"] == pytest.approx(1 / w.sum(), rel=1e-9)
        assert c["t"] == pytest.approx(t, rel=1e-9)
        assert c["df"] == sum(d) == 3 * (T - len(doc["runs"][0]["fits"][k]["columns"]))
        assert c["p"] == pytest.approx(2 * stats.t.sf(abs(t), sum(d)), rel=1e-7)
        assert c["q"] == pytest.approx(q, rel=1e-8)
        assert c["q_p"] == pytest.approx(stats.chi2.sf(q, 2), rel=1e-7)


def test_fit_flags_the_one_active_run_in_json_and_table(tmp_path, capsys):
    paths = _three_runs(tmp_path, active_run=1)
    doc = _json(capsys, ["fit", *paths, "--voxel", "2", "3", "1", "--kernels", "double-gamma"])
    flags = doc["combined"][0]["flags"]
    assert {"id": "runs-disagree", "run": None} == {
        k: v for k, v in flags[0].items() if k != "text"
    }
    assert any(f["id"] == "one-run" and f["run"] == "run-2" for f in flags)
    assert main(["fit", *paths, "--voxel", "2", "3", "1", "--kernels", "double-gamma"]) == 0
    out = capsys.readouterr().out
    assert "combined: fixed effects over 3 runs" in out and "rests on run-2" in out
    assert main(["fit", *paths, "--voxel", "2", "3", "1", "--format", "csv"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0].startswith("run,kernel,") and len(lines) == 1 + 3 * 4 + 4
    assert sum(line.startswith("combined,") for line in lines) == 4


def test_runs_on_different_grids_by_mm_only(tmp_path, capsys):
    aff = [
        np.diag([3.0, 3.0, 3.5, 1.0]),
        np.array([[-3.0, 0, 0, 13.0], [0, 3.0, 0, -1.0], [0, 0, 3.5, 0.0], [0, 0, 0, 1]]),
        np.diag([3.0, 3.0, 3.5, 1.0]),
    ]
    paths = _three_runs(tmp_path, affines=aff)
    assert main(["fit", *paths, "--voxel", "2", "3", "1"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "--mm" in err and "different grids" in err
    doc = _json(capsys, ["fit", *paths, "--mm", "6", "9", "3.5"])
    assert doc["runs"][0]["voxel"] == doc["runs"][2]["voxel"] == [2, 3, 1]
    # run 2: x = -3 i + 13 -> i = (13 - 6) / 3 = 2.33 -> 2; y = 3 j - 1 -> j = 3.33 -> 3
    assert doc["runs"][1]["voxel"] == [2, 3, 1]
    assert all(r["mm"][2] == pytest.approx(3.5) for r in doc["runs"])
    assert doc["runs"][1]["mm"][:2] == pytest.approx([7.0, 8.0])


@pytest.mark.parametrize(
    "extra, needle",
    [
        (["--confounds", "c.tsv"], "once per run"),
        (["--events", "a.tsv", "--events", "b.tsv"], "given 2 times for 3 run"),
    ],
)
def test_per_run_option_counts_are_checked(tmp_path, capsys, extra, needle):
    paths = _three_runs(tmp_path)
    assert main(["fit", *paths, "--voxel", "1", "1", "1", *extra]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and needle in err and "Traceback" not in err


def test_same_run_twice_and_one_events_file_for_all(tmp_path, capsys):
    paths = _three_runs(tmp_path)
    assert main(["fit", paths[0], paths[0], "--voxel", "1", "1", "1"]) == 2
    assert "twice" in capsys.readouterr().err
    ev = tmp_path / "sub-01_task-x_run-1_events.tsv"
    doc = _json(capsys, ["fit", *paths, "--voxel", "1", "1", "1", "--events", str(ev)])
    assert any("one events file" in w for w in doc["warnings"])


def test_map_of_several_runs_equals_fit_at_a_voxel(tmp_path, capsys):
    paths = _three_runs(tmp_path, active_run=0)
    out = tmp_path / "fe_t.nii.gz"
    assert main(["map", *paths, "-o", str(out)]) == 0
    text = capsys.readouterr().out
    assert "fixed effects over 3 runs" in text
    t_map = np.asarray(nib.load(out).dataobj)
    qp = tmp_path / "fe_qp.nii"
    assert main(["map", *paths, "-o", str(qp), "--stat", "q_p"]) == 0
    capsys.readouterr()
    qp_map = np.asarray(nib.load(qp).dataobj)
    doc = _json(capsys, ["fit", *paths, "--voxel", "2", "3", "1", "--kernels", "double-gamma"])
    c = doc["combined"][0]
    assert t_map[2, 3, 1] == pytest.approx(c["t"], rel=1e-5)
    assert qp_map[2, 3, 1] == pytest.approx(c["q_p"], rel=1e-4, abs=1e-7)
    assert qp_map[2, 3, 1] < 0.05
    # inputs untouched, one run refuses q
    assert main(["map", paths[0], "-o", str(tmp_path / "x.nii"), "--stat", "q"]) == 2
    assert "several runs" in capsys.readouterr().err


def test_multi_run_fit_and_map_do_not_import_qt(tmp_path):
    paths = _three_runs(tmp_path)
    out = str(tmp_path / "m.nii")
    code = (
        "import sys, voxelscope.cli as c;"
        f"r = c.main(['fit', *{paths!r}, '--voxel', '1', '1', '1']);"
        f"r2 = c.main(['map', *{paths!r}, '-o', {out!r}]);"
        "bad = [m for m in sys.modules if m.startswith(('PySide6', 'pyqtgraph'))];"
        "assert r == 0 and r2 == 0 and not bad, bad"
    )
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr


def test_report_of_several_runs_matches_fit(tmp_path, capsys):
    paths = _three_runs(tmp_path, active_run=2)
    doc = _json(capsys, ["fit", *paths, "--mm", "6", "9", "3.5", "--kernels", "gamma"])
    out = tmp_path / "rep"
    argv = ["report", *paths, "--mm", "6", "9", "3.5", "--kernels", "gamma", "-o", str(out)]
    assert main([*argv, "--scale", "1", "--no-checks"]) == 0
    assert "report.html" in capsys.readouterr().out
    page = (out / "report.html").read_text(encoding="utf-8")
    combined = page.split("class='combined'")[1]
    shown = float(combined.split("class='num t' data-value=\"")[1].split('"')[0])
    assert shown == doc["combined"][0]["t"]
    assert "rests on run-3" in page and "not for clinical diagnosis" in page.lower()
    # a second time without --force keeps the files and says so
    assert main(argv) == 2
    assert "--force" in capsys.readouterr().err


def test_a_run_without_the_contrast_condition_is_named(tmp_path, capsys):
    paths = _three_runs(tmp_path)
    ev = tmp_path / "sub-01_task-x_run-2_events.tsv"
    ev.write_text("onset\tduration\ttrial_type\n6\t12\ttone\n54\t12\ttone\n")
    assert main(["fit", *paths, "--voxel", "1", "1", "1", "--contrast", "tap"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "run-2" in err and "tap" in err


def test_ar1_runs_combine_their_own_whitened_estimates(tmp_path, capsys):
    """Under AR(1) each run's beta and variance come from its own prewhitened fit; the
    combination is the same formulas (common practice) on those numbers."""
    paths = _three_runs(tmp_path)
    doc = _json(capsys, ["fit", *paths, "--voxel", "2", "3", "1", "--noise", "ar1"])
    for k, c in enumerate(doc["combined"]):
        b = np.array([r["fits"][k]["estimate"] for r in doc["runs"]])
        v = np.array([r["fits"][k]["variance"] for r in doc["runs"]])
        assert all(r["fits"][k]["rho"] is not None for r in doc["runs"])
        w = 1 / v
        assert c["t"] == pytest.approx(np.sum(w * b) / np.sqrt(w.sum()), rel=1e-12)


def test_view_adds_runs_and_refuses_a_bad_one(tmp_path):
    """``view RUN --add-run RUN2`` renders the window with both runs; a missing added run
    is one line and exit 2 (offscreen, in a subprocess so Qt stays out of this process)."""
    import os

    paths = _three_runs(tmp_path)
    env = {**os.environ, "QT_QPA_PLATFORM": "offscreen"}
    shot = tmp_path / "v.png"
    base = [sys.executable, "-m", "voxelscope.cli", "view", paths[0], "--size", "900x700"]
    ok = subprocess.run(
        [*base, "--add-run", paths[1], "--add-run", paths[2], "--screenshot", str(shot)],
        capture_output=True,
        text=True,
        timeout=300,
        env=env,
    )
    assert ok.returncode == 0, ok.stderr
    assert shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    bad = subprocess.run(
        [
            *base,
            "--add-run",
            str(tmp_path / "nope_bold.nii"),
            "--screenshot",
            str(tmp_path / "v2.png"),
        ],
        capture_output=True,
        text=True,
        timeout=300,
        env=env,
    )
    errors = [line for line in bad.stderr.splitlines() if line.startswith("voxelscope: error")]
    assert bad.returncode == 2 and len(errors) == 1 and "nope_bold.nii" in errors[0]
    assert "Traceback" not in bad.stderr


def test_report_of_several_runs_names_the_atlas_region(tmp_path, capsys):
    """The several-run report names the region at each place, as the one-run report does."""
    paths = _three_runs(tmp_path)
    labels = np.full((20, 20, 20), 4, np.int16)
    aff = np.diag([3.0, 3.0, 3.0, 1.0])
    aff[:3, 3] = -30.0
    atlas = tmp_path / "atlas-x_dseg.nii"
    nib.save(nib.Nifti1Image(labels, aff), atlas)
    (tmp_path / "atlas-x_dseg.tsv").write_text("index\tname\n4\thand area\n")
    out = tmp_path / "rep"
    argv = ["report", *paths, "--mm", "6", "9", "3.5", "--kernels", "gamma", "-o", str(out)]
    assert main([*argv, "--scale", "1", "--no-checks", "--atlas", str(atlas)]) == 0
    capsys.readouterr()
    page = (out / "report.html").read_text(encoding="utf-8")
    assert "region: hand area (atlas-x_dseg.nii)" in page
    assert "atlas-x_dseg.nii" in page.split("region:")[-1]  # and among the input files
