"""Tests of ``voxelscope fit`` (voxelscope/cli/fit.py) through ``voxelscope.cli.main``.

Numbers are checked against statsmodels OLS (reference library) on a small synthetic run
written with nibabel; error cases check the one-line message and exit code 2.
"""

from __future__ import annotations

import json
import subprocess
import sys

import nibabel as nib
import numpy as np
import pytest

from tests.cli.runs import write_run
from voxelscope.cli import main

TR = 1.5
T = 90


def _write_run(tmp_path, rng, shape=(5, 6, 4), name="sub-01_task-x_bold.nii"):
    data = 500 + rng.standard_normal((*shape, T)) * 5
    data[0, 0, 0, :] = 123.0  # a constant voxel
    path, events = write_run(tmp_path, data, TR, name=name)
    return path, events, data


def _run_json(capsys, argv):
    code = main([*argv, "--format", "json"])
    out = capsys.readouterr()
    assert code == 0, out.err
    return json.loads(out.out)


def test_fit_json_matches_statsmodels(tmp_path, capsys):
    """beta, variance, t, df, p, r2 and residuals equal statsmodels OLS on the same design
    (reference library: statsmodels.api.OLS and OLSResults.t_test)."""
    sm = pytest.importorskip("statsmodels.api")
    rng = np.random.default_rng(11)
    path, events, data = _write_run(tmp_path, rng)
    doc = _run_json(
        capsys,
        [
            "fit",
            str(path),
            "--events",
            str(events),
            "--voxel",
            "2",
            "3",
            "1",
            "--contrast",
            "tone - tap",
            "--noise",
            "ols",
        ],
    )
    assert doc["voxel"] == [2, 3, 1] and doc["n_volumes"] == T and doc["tr"] == TR
    assert [f["kernel"] for f in doc["fits"]] == ["boxcar", "gaussian", "gamma", "double-gamma"]
    y = np.asarray(doc["y"])
    np.testing.assert_allclose(y, data[2, 3, 1].astype(np.float32), rtol=0, atol=0)
    for f in doc["fits"]:
        X = np.asarray(f["design"])
        assert X.shape == (T, len(f["columns"]))
        assert f["columns"][:2] == ["tone", "tap"] and f["columns"][-1] == "constant"
        m = sm.OLS(y, X).fit()
        tt = m.t_test(np.asarray(f["weights"]))
        assert f["weights"][:2] == [1.0, -1.0]
        np.testing.assert_allclose(f["estimate"], float(np.squeeze(tt.effect)), rtol=1e-9)
        assert f["beta"] == f["estimate"]  # the earlier key stays for older scripts
        np.testing.assert_allclose(f["variance"], float(np.squeeze(tt.sd)) ** 2, rtol=1e-9)
        np.testing.assert_allclose(f["t"], float(np.squeeze(tt.tvalue)), rtol=1e-9)
        np.testing.assert_allclose(f["p"], float(np.squeeze(tt.pvalue)), rtol=1e-7)
        assert f["df"] == int(m.df_resid)
        np.testing.assert_allclose(f["r2"], m.rsquared, rtol=1e-9)
        np.testing.assert_allclose(f["residuals"], m.resid, atol=1e-8)
        np.testing.assert_allclose(f["fitted"], m.fittedvalues, rtol=1e-10)
        assert f["noise"] == "ols" and f["rho"] is None
        assert set(f["betas"]) == set(f["columns"])


def test_fit_ar1_json_in_data_units(tmp_path, capsys):
    """Under AR(1), y, fitted and residuals stay in data units: fitted + residuals == y."""
    rng = np.random.default_rng(3)
    path, events, _ = _write_run(tmp_path, rng)
    doc = _run_json(
        capsys,
        ["fit", str(path), "--events", str(events), "--voxel", "1", "1", "1", "--noise", "ar1"],
    )
    y = np.asarray(doc["y"])
    for f in doc["fits"]:
        assert f["noise"] == "ar1" and isinstance(f["rho"], float)
        np.testing.assert_allclose(
            np.asarray(f["fitted"]) + np.asarray(f["residuals"]), y, atol=1e-9
        )


def test_constant_voxel_gives_null_t_and_warning(tmp_path, capsys):
    rng = np.random.default_rng(4)
    path, events, _ = _write_run(tmp_path, rng)
    code = main(
        ["fit", str(path), "--events", str(events), "--voxel", "0", "0", "0", "--format", "json"]
    )
    out = capsys.readouterr()
    assert code == 0
    assert "NaN" not in out.out and "Infinity" not in out.out
    doc = json.loads(out.out)
    assert all(f["t"] is None and f["p"] is None for f in doc["fits"])
    assert any("constant" in w for w in doc["warnings"])


def test_table_and_csv_formats(tmp_path, capsys):
    rng = np.random.default_rng(5)
    path, events, _ = _write_run(tmp_path, rng)
    assert main(["fit", str(path), "--events", str(events), "--voxel", "1", "2", "3"]) == 0
    table = capsys.readouterr().out.splitlines()
    assert table[1].split()[0] == "kernel"
    # after the header, the rule and 4 kernels: the files used and the sampling reference
    used = [line for line in table[3 + 4 :] if not line.startswith("[")]
    # the default model says how each kernel's AR coefficients were obtained
    assert sum(line.startswith("[gamma] noise: AR(2) coefficients") for line in table) == 1
    assert used[0] == f"events     {events}" and used[-2] == "mask       intensity rule (auto)"
    assert used[-1].startswith("reference  0 s into each TR")
    assert (
        main(
            [
                "fit",
                str(path),
                "--events",
                str(events),
                "--voxel",
                "1",
                "2",
                "3",
                "--format",
                "csv",
                "--kernels",
                "gamma,fir",
            ]
        )
        == 0
    )
    rows = capsys.readouterr().out.strip().splitlines()
    assert rows[0].startswith("kernel,contrast,beta") and [r.split(",")[0] for r in rows[1:]] == [
        "gamma",
        "fir",
    ]


def test_mm_selects_nearest_voxel(tmp_path, capsys):
    rng = np.random.default_rng(6)
    path, events, _ = _write_run(tmp_path, rng)
    doc = _run_json(
        capsys, ["fit", str(path), "--events", str(events), "--mm", "6.2", "8.9", "7.1"]
    )
    assert doc["voxel"] == [2, 3, 2]
    assert doc["mm"] == [6.0, 9.0, 7.0]


@pytest.mark.parametrize(
    "events_text, extra, needle",
    [
        ("onset\tduration\n", [], "no events"),
        ("start\tduration\n1\t2\n", [], "onset"),
        ("onset\tduration\nabc\t2\n", [], "onset"),
        ("onset\tduration\n1\t-2\n", [], "negative duration"),
        ("onset\tduration\ttrial_type\n1\t2\ttone\n", ["--contrast", "tone - beep"], "beep"),
        ("onset\tduration\ttrial_type\n1\t2\ttone\n", ["--voxel", "9", "0", "0"], "outside"),
    ],
)
def test_bad_input_one_line_exit_2(tmp_path, capsys, events_text, extra, needle):
    rng = np.random.default_rng(7)
    path, events, _ = _write_run(tmp_path, rng)
    events.write_text(events_text)
    voxel = [] if "--voxel" in extra else ["--voxel", "1", "1", "1"]
    code = main(["fit", str(path), "--events", str(events), *voxel, *extra])
    err = capsys.readouterr().err.strip()
    assert code == 2
    assert len(err.splitlines()) == 1 and err.startswith("voxelscope: error:")
    assert needle in err
    assert "Traceback" not in err


def test_bad_confounds_rows_and_rank_deficiency(tmp_path, capsys):
    rng = np.random.default_rng(8)
    path, events, _ = _write_run(tmp_path, rng)
    conf = tmp_path / "conf.tsv"
    argv = ["fit", str(path), "--events", str(events), "--voxel", "1", "1", "1"]
    conf.write_text("a\tb\n" + "".join(f"{i}\t{2 * i}\n" for i in range(T - 1)))
    assert main([*argv, "--confounds", str(conf)]) == 2
    assert "rows" in capsys.readouterr().err
    conf.write_text("a\tb\n" + "".join(f"{i}\t{2 * i}\n" for i in range(T)))
    assert main([*argv, "--confounds", str(conf)]) == 2
    err = capsys.readouterr().err
    assert "rank-deficient" in err and "'a'" in err and "'b'" in err


def test_not_nifti_and_3d(tmp_path, capsys):
    rng = np.random.default_rng(9)
    _, events, _ = _write_run(tmp_path, rng)
    bad = tmp_path / "notes.nii"
    bad.write_text("hello")
    assert main(["fit", str(bad), "--events", str(events), "--voxel", "0", "0", "0"]) == 2
    assert str(bad) in capsys.readouterr().err
    img3 = tmp_path / "vol.nii"
    nib.save(nib.Nifti1Image(np.zeros((3, 3, 3), np.float32), np.eye(4)), img3)
    assert main(["fit", str(img3), "--events", str(events), "--voxel", "0", "0", "0"]) == 2
    assert "3D" in capsys.readouterr().err or "4D" in capsys.readouterr().err


def test_fit_does_not_import_qt(tmp_path):
    """The command-line path never loads Qt (design rule)."""
    rng = np.random.default_rng(10)
    path, events, _ = _write_run(tmp_path, rng)
    code = (
        "import sys, voxelscope.cli as c;"
        f"r = c.main(['fit', {str(path)!r}, '--events', {str(events)!r}, "
        "'--voxel', '1', '1', '1']);"
        "bad = [m for m in sys.modules if m.startswith(('PySide6', 'pyqtgraph'))];"
        "assert r == 0 and not bad, bad"
    )
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr


CHECK_KEYS = {
    "durbin_watson",
    "ar1",
    "ljung_box_p",
    "outlier_volumes",
    "cooks_distance_max",
    "cooks_volume",
    "t_without_influential",
    "vif",
    "confound_correlation",
    "tsnr",
    "edge_distance_mm",
    "best_shift_s",
    "peak_latency_s",
    "fir",
    "flags",
}


def test_checks_in_json(tmp_path, capsys):
    """--checks adds the documented keys; Durbin-Watson equals statsmodels' on the residuals
    (reference library: statsmodels.stats.stattools.durbin_watson)."""
    from statsmodels.stats.stattools import durbin_watson

    rng = np.random.default_rng(12)
    path, events, _ = _write_run(tmp_path, rng)
    doc = _run_json(
        capsys,
        [
            "fit",
            str(path),
            "--events",
            str(events),
            "--voxel",
            "2",
            "2",
            "2",
            "--checks",
            "--kernels",
            "double-gamma",
            "--noise",
            "ols",
        ],
    )
    f = doc["fits"][0]
    assert CHECK_KEYS <= set(f["checks"])
    assert set(f["checks"]["fir"]) >= {"times", "estimate", "se"}
    resp = f["checks"]["response"]  # issue 13: the peri-event response in the JSON
    assert set(resp) >= {"times", "mean", "ci_low", "ci_high", "n_events", "predictions"}
    assert set(resp["predictions"]) == {"double-gamma"} and max(resp["n_events"]) >= 2
    assert set(f["checks"]["vif"]) == set(f["columns"])
    np.testing.assert_allclose(
        f["checks"]["durbin_watson"], durbin_watson(f["residuals"]), rtol=1e-10
    )
    assert isinstance(f["checks"]["flags"], list)


def test_confound_columns_pick_some(tmp_path, capsys):
    """--confound-columns keeps only the named columns in the design; an unknown name is one
    clear line."""
    rng = np.random.default_rng(13)
    path, events, _ = _write_run(tmp_path, rng)
    conf = tmp_path / "conf.tsv"
    rows = rng.standard_normal((T, 2))
    conf.write_text("a\tb\n" + "".join(f"{r[0]:.6f}\t{r[1]:.6f}\n" for r in rows))
    argv = ["fit", str(path), "--events", str(events), "--voxel", "1", "1", "1"]
    doc = _run_json(capsys, [*argv, "--confounds", str(conf), "--confound-columns", "b"])
    cols = doc["fits"][0]["columns"]
    assert "b" in cols and "a" not in cols
    X = np.asarray(doc["fits"][0]["design"])
    np.testing.assert_allclose(X[:, cols.index("b")], np.round(rows[:, 1], 6), atol=1e-12)
    assert main([*argv, "--confounds", str(conf), "--confound-columns", "c"]) == 2
    assert "'c'" in capsys.readouterr().err
    doc = _run_json(capsys, [*argv, "--confounds", str(conf), "--confound-columns", "none"])
    assert not {"a", "b"} & set(doc["fits"][0]["columns"])


@pytest.mark.parametrize(
    "option, values",
    [
        ("--events", ["a_events.tsv", "b_events.tsv"]),
        ("--tr", ["2", "2"]),
        ("--contrast", ["tone", "tap"]),
        ("--format", ["json", "csv"]),
        ("--voxel", ["1 1 1", "2 2 2"]),
    ],
)
def test_single_valued_option_twice_is_an_error(tmp_path, capsys, option, values):
    """Every single-valued option given twice: exit 2 naming the option (issue 10), instead
    of silently taking the last value."""
    rng = np.random.default_rng(2)
    path, _events, _ = _write_run(tmp_path, rng)
    argv = ["fit", str(path)]
    for v in values:
        argv += [option, *v.split()]
    if option != "--voxel":
        argv += ["--voxel", "1", "1", "1"]
    try:
        code = main(argv)
    except SystemExit as exc:  # argparse: "argument --tr: given more than once"
        code = exc.code
    err = capsys.readouterr().err
    assert code == 2
    # --events may name one file per run: twice for one run is an error of its own
    assert option in err and ("given more than once" in err or "given 2 times" in err)


def test_json_reports_companions_and_reference_time(tmp_path, capsys):
    """``companions`` (events, sidecars nearest last, confounds, mask) and
    ``reference_time_s`` (BIDS StartTime of a slice-time corrected run)."""
    rng = np.random.default_rng(4)
    path, events, _ = _write_run(tmp_path, rng)
    sidecar = tmp_path / "sub-01_task-x_bold.json"
    sidecar.write_text(
        json.dumps({"RepetitionTime": TR, "SliceTimingCorrected": True, "StartTime": 0.6})
    )
    doc = _run_json(capsys, ["fit", str(path), "--voxel", "1", "2", "3"])
    assert doc["reference_time_s"] == 0.6
    assert doc["companions"] == {
        "events": str(events),
        "sidecars": [str(sidecar)],
        "confounds": None,
        "mask": None,
        "atlas": None,
    }


def test_fit_json_states_tail_z_and_neglog10p(tmp_path, capsys):
    """JSON names the tail; p, -log10 p and z follow scipy.stats.t / norm (references)."""
    from scipy import stats

    rng = np.random.default_rng(12)
    path, events, _ = _write_run(tmp_path, rng)
    base = ["fit", str(path), "--events", str(events), "--voxel", "2", "1", "1", "--noise", "ols"]
    for tail, ref in (
        ("two", lambda t, df: 2 * stats.t.sf(abs(t), df)),
        ("positive", stats.t.sf),
        ("negative", stats.t.cdf),
    ):
        doc = _run_json(capsys, [*base, "--tail", tail])
        for f in doc["fits"]:
            assert f["tail"] == tail
            np.testing.assert_allclose(f["p"], ref(f["t"], f["df"]), rtol=1e-9)
            np.testing.assert_allclose(f["neglog10p"], -np.log10(ref(f["t"], f["df"])), rtol=1e-9)
            np.testing.assert_allclose(
                f["z"], stats.norm.isf(stats.t.sf(f["t"], f["df"])), rtol=1e-8
            )


def _derivative_tree(tmp_path, rng):
    """raw/ with events; raw/derivatives/prep/ with a preprocessed run (BIDS layout)."""
    raw = tmp_path / "raw"
    (raw / "sub-01" / "func").mkdir(parents=True)
    (raw / "dataset_description.json").write_text('{"Name": "r", "BIDSVersion": "1.8"}')
    dfunc = raw / "derivatives" / "prep" / "sub-01" / "func"
    dfunc.mkdir(parents=True)
    (raw / "derivatives" / "prep" / "dataset_description.json").write_text(
        '{"Name": "p", "DatasetType": "derivative"}'
    )
    data = 500 + rng.standard_normal((5, 6, 4, T)) * 5
    path, events = write_run(dfunc, data, TR, name="sub-01_task-x_desc-preproc_bold.nii")
    moved = raw / "sub-01" / "func" / "sub-01_task-x_events.tsv"
    events.rename(moved)
    return raw, path, moved


@pytest.mark.parametrize(
    "case, needle",
    [
        ("description", "dataset_description.json: the dataset description is not valid JSON"),
        ("two-events", "2 events files match this run"),
        ("start-time", "StartTime 9 must be a number of seconds from 0 up to but not including"),
    ],
)
def test_study_bad_input_one_line_exit_2(tmp_path, capsys, case, needle):
    """Bad input from a BIDS study (issue 10): one line naming the file, exit code 2."""
    raw, path, events = _derivative_tree(tmp_path, np.random.default_rng(8))
    assert main(["fit", str(path), "--voxel", "1", "1", "1", "--format", "json"]) == 0
    assert json.loads(capsys.readouterr().out)["companions"]["events"] == str(events)
    if case == "description":
        (raw / "derivatives" / "prep" / "dataset_description.json").write_text("{oops")
    elif case == "two-events":
        (events.parent / "sub-01_task-x_desc-old_events.tsv").write_text(events.read_text())
    else:
        path.with_name("sub-01_task-x_desc-preproc_bold.json").write_text(
            '{"SliceTimingCorrected": true, "StartTime": 9}'
        )
    code = main(["fit", str(path), "--voxel", "1", "1", "1"])
    err = capsys.readouterr().err.strip()
    assert code == 2 and len(err.splitlines()) == 1 and needle in err, err


# ----------------------------------------------------------------------------- issue 13

GAMBLE = (
    "onset\tduration\ttrial_type\tgain\tloss\n"
    "4\t3\tgamble\t10\t5\n16\t3\tgamble\t30\tn/a\n28\t3\tgamble\tn/a\t7\n40\t3\tgamble\t20\t2\n"
    "52\t3\tgamble\t40\t9\n64\t3\tgamble\t15\t4\n76\t3\tgamble\t35\t6\n88\t3\tgamble\t25\t1\n"
    "100\t3\tgamble\t5\t8\n112\t3\tgamble\t45\t3\n"
)


def test_modulators_from_the_command_line(tmp_path, capsys):
    """--modulators adds CONDITION:MODULATOR columns, centred over the condition's events,
    that a contrast can name; n/a counts go to stderr, one line per modulator. The
    centred column is checked against one built here by hand (boxcar, TR 1.5: each 3 s
    event covers two whole volume windows)."""
    rng = np.random.default_rng(13)
    path, events, _data = _write_run(tmp_path, rng)
    events.write_text(GAMBLE)
    argv = ["fit", str(path), "--voxel", "2", "2", "2", "--kernels", "boxcar"]
    code = main(
        [*argv, "--modulators", "gain,loss", "--contrast", "gamble:gain", "--format", "json"]
    )
    out = capsys.readouterr()
    assert code == 0, out.err
    doc = json.loads(out.out)
    f = doc["fits"][0]
    assert f["columns"][:3] == ["gamble", "gamble:gain", "gamble:loss"]
    assert f["weights"][:3] == [0.0, 1.0, 0.0]
    gain = np.array([10, 30, np.nan, 20, 40, 15, 35, 25, 5, 45])
    centred = np.where(np.isfinite(gain), gain - np.nanmean(gain), 0.0)
    expect = np.zeros(T)
    for on, c in zip(np.arange(4, 113, 12), centred):
        v = int(on // TR)  # onsets 4, 16, ... sit 1 s into a 1.5 s window
        expect[v] += c * 0.5 / TR  # 0.5 s of the first window
        expect[v + 1] += c
        expect[v + 2] += c * 1.0 / TR  # 1 s of the third window
    np.testing.assert_allclose(np.asarray(f["design"])[:, 1], expect, atol=1e-9)
    notes = doc["warnings"]  # JSON carries them; the table format prints them to stderr
    assert sum("modulator 'gain' is n/a for 1 of 10 events" in e for e in notes) == 1
    assert sum("modulator 'loss' is n/a for 1 of 10 events" in e for e in notes) == 1
    assert main([*argv, "--modulators", "gain"]) == 0
    err = capsys.readouterr().err.splitlines()
    assert sum("modulator 'gain' is n/a for 1 of 10 events" in e for e in err) == 1


@pytest.mark.parametrize(
    ("extra", "needle"),
    [
        (["--amplitude-column", "gain"], "--modulators gain"),
        (["--fir-bins", "12"], "--fir-window"),
        (["--modulators", "gian"], "numeric columns: gain, loss"),
        (["--condition-column", "hand"], "--condition-column"),
        (["--modulators", "gain", "--contrast", "gamble:loss"], "'gamble:loss'"),
    ],
)
def test_replaced_and_bad_event_options_one_line_exit_2(tmp_path, capsys, extra, needle):
    rng = np.random.default_rng(14)
    path, events, _data = _write_run(tmp_path, rng)
    events.write_text(GAMBLE)
    code = main(["fit", str(path), "--voxel", "1", "1", "1", *extra])
    err = capsys.readouterr().err.strip()
    assert code == 2 and len(err.splitlines()) == 1 and needle in err, err
    assert "Traceback" not in err


def test_onset_unit_volumes_and_condition_column(tmp_path, capsys):
    """Onsets given as volume numbers: a warning names the TR factor; --onset-unit volumes
    multiplies onsets and durations by the TR and gives the same design as seconds."""
    rng = np.random.default_rng(15)
    path, events, _data = _write_run(tmp_path, rng)
    vols = "onset\tduration\ttrial_type\thand\n"
    vols += "".join(f"{v}\t4\tpress\t{'LR'[i % 2]}\n" for i, v in enumerate(range(4, 86, 9)))
    events.write_text(vols)
    base = ["fit", str(path), "--voxel", "2", "2", "2", "--kernels", "gamma", "--format", "json"]
    assert main(base) == 0
    notes = " ".join(json.loads(capsys.readouterr().out)["warnings"])
    assert "look like volume numbers" in notes and "TR (1.5 s)" in notes
    assert main([*base, "--onset-unit", "volumes"]) == 0
    out = capsys.readouterr()
    assert "volume numbers" not in out.out
    secs = "onset\tduration\ttrial_type\n" + "".join(
        f"{v * TR:g}\t{4 * TR:g}\tpress\n" for v in range(4, 86, 9)
    )
    events2 = tmp_path / "seconds_events.tsv"
    events2.write_text(secs)
    assert main([*base, "--events", str(events2)]) == 0
    ref = json.loads(capsys.readouterr().out)
    np.testing.assert_allclose(
        json.loads(out.out)["fits"][0]["design"], ref["fits"][0]["design"], atol=1e-12
    )
    assert main([*base, "--onset-unit", "volumes", "--condition-column", "hand"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["fits"][0]["columns"][:2] == ["L", "R"]


def test_highpass_shorter_than_the_task_cycle_warns(tmp_path, capsys):
    """Issue 17 item 10: --highpass below the design's on/off cycle (tone every 48 s in
    tests/cli/runs.py; the 135 s run's nearest periodogram bin is 45 s) is one warning
    line with the numbers; the default 128 s is quiet."""
    rng = np.random.default_rng(2)
    path, _events, _ = _write_run(tmp_path, rng)
    assert main(["fit", str(path), "--voxel", "1", "1", "1", "--highpass", "10"]) == 0
    err = capsys.readouterr().err
    lines = [ln for ln in err.splitlines() if "on/off cycle" in ln]
    assert len(lines) == 1
    assert "cut-off 10 s is shorter than the task's on/off cycle (about 45 s, tone)" in lines[0]
    assert main(["fit", str(path), "--voxel", "1", "1", "1"]) == 0
    assert "on/off cycle" not in capsys.readouterr().err
    out = tmp_path / "t.nii"
    assert main(["map", str(path), "--highpass", "10", "--out", str(out)]) == 0
    assert "on/off cycle" in capsys.readouterr().err


def test_checks_without_warning_signs_say_so(tmp_path, capsys):
    """Issue 17 item 10: --checks on a white-noise voxel prints one line saying there are no
    warning signs, instead of nothing."""
    rng = np.random.default_rng(5)
    path, _events, _ = _write_run(tmp_path, rng)
    assert main(["fit", str(path), "--voxel", "2", "3", "1", "--checks"]) == 0
    out = capsys.readouterr().out
    assert "checks: no warning signs at this voxel (4 kernels checked)" in out
    assert main(["fit", str(path), "--voxel", "2", "3", "1"]) == 0
    assert "warning signs" not in capsys.readouterr().out  # not asked: not said


def test_atlas_region_in_fit_json_and_table(tmp_path, capsys):
    """Issue 17 item 6: --atlas names the region at the voxel, looked up through the
    affines on the atlas's own grid (nibabel.affines.apply_affine as the reference)."""
    from nibabel.affines import apply_affine

    rng = np.random.default_rng(9)
    path, _events, _ = _write_run(tmp_path, rng)
    aff = np.diag([-1.5, 1.5, 1.5, 1.0])  # another grid, flipped left-right
    aff[:3, 3] = (12.0, -2.0, -2.0)
    labels = np.zeros((12, 14, 12), np.int16)
    labels[:, 7:, :] = 3
    atlas = tmp_path / "sub-01_atlas-test_dseg.nii.gz"
    nib.save(nib.Nifti1Image(labels, aff), atlas)
    (tmp_path / "sub-01_atlas-test_dseg.tsv").write_text("index\tname\n3\tupper half\n")
    doc = _run_json(capsys, ["fit", str(path), "--voxel", "2", "3", "1", "--atlas", str(atlas)])
    ijk = np.floor(apply_affine(np.linalg.inv(aff), doc["mm"]) + 0.5).astype(int)
    want = int(labels[tuple(ijk)])
    assert doc["region"]["index"] == want
    assert doc["region"]["text"] == ("upper half" if want == 3 else "background")
    assert doc["region"]["atlas"] == str(atlas)
    assert doc["companions"]["atlas"] == str(atlas)
    assert main(["fit", str(path), "--voxel", "4", "5", "3", "--atlas", str(atlas)]) == 0
    out = capsys.readouterr().out
    assert out.splitlines()[1].startswith("region ")
    doc = _run_json(capsys, ["fit", str(path), "--voxel", "2", "3", "1"])
    assert doc["region"] is None
    (tmp_path / "sub-01_atlas-test_dseg.tsv").write_text("index\tname\nthree\tupper half\n")
    code = main(["fit", str(path), "--voxel", "2", "3", "1", "--atlas", str(atlas)])
    err = capsys.readouterr().err
    assert code == 2 and len(err.strip().splitlines()) == 1
    assert "dseg.tsv: row 2, column index: 'three' is not a whole number" in err
