"""Tests of the model options shared by the commands (voxelscope/cli/common.py), through
``voxelscope fit``: confound tables found beside a run or named, column choice, excluded
volumes.

The confounds table is the pipeline-style table built in ``tests/confound_tables.py``; the
design columns the JSON reports are compared with the table's values (six significant
digits) and numbers with statsmodels OLS (reference library).
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from tests.cli.runs import write_run
from tests.confound_tables import MOTION6, write_pipeline_table
from voxelscope.cli import main

TR = 2.0
T = 200


@pytest.fixture()
def pipeline_run(tmp_path):
    """A small run with a pipeline-sized confounds table beside it (BIDS derivatives name)."""
    rng = np.random.default_rng(31)
    data = 500 + rng.standard_normal((4, 4, 3, T)) * 5
    path, events = write_run(tmp_path, data, TR, name="sub-01_task-x_bold.nii")
    conf = tmp_path / "sub-01_task-x_desc-confounds_timeseries.tsv"
    cols = write_pipeline_table(conf, n=T, tr=TR)
    return path, events, conf, cols, data


def _json(capsys, argv):
    code = main([*argv, "--format", "json"])
    out = capsys.readouterr()
    assert code == 0, out.err
    return json.loads(out.out), out.err


def _error(capsys, argv) -> str:
    code = main(argv)
    err = capsys.readouterr().err.strip()
    assert code == 2, err
    assert len(err.splitlines()) == 1 and err.startswith("voxelscope: error:"), err
    assert "Traceback" not in err
    return err


def _fit(path, events, *extra):
    return ["fit", str(path), "--events", str(events), "--voxel", "1", "2", "1", *extra]


def test_table_beside_the_run_adds_no_column_until_chosen(pipeline_run, capsys):
    path, events, conf, _cols, _ = pipeline_run
    doc, _err = _json(capsys, _fit(path, events, "--kernels", "boxcar"))
    assert doc["confounds"] == str(conf) and doc["confound_columns"] == []
    assert doc["fits"][0]["columns"][-1] == "constant"
    assert not any(c.startswith(("trans", "a_comp")) for c in doc["fits"][0]["columns"])
    assert not any("n/a" in w for w in doc["warnings"])  # none for columns not in the model


def test_sets_and_wildcards_choose_columns(pipeline_run, capsys):
    path, events, _conf, cols, _ = pipeline_run
    argv = _fit(path, events, "--kernels", "boxcar", "--confound-columns")
    doc, _err = _json(capsys, [*argv, "motion24,a_comp_cor_0[0-4],csf"])
    chosen = doc["confound_columns"]
    assert len(chosen) == 30 and chosen[:6] == list(MOTION6) and chosen[-1] == "csf"
    f = doc["fits"][0]
    X = np.asarray(f["design"])
    for name in ("trans_x", "rot_z_derivative1_power2", "a_comp_cor_04", "csf"):
        assert name in f["columns"]
        want = np.nan_to_num(cols[name])  # the n/a first row reads as 0
        np.testing.assert_allclose(X[:, f["columns"].index(name)], want, rtol=5e-6, atol=0)
    # one n/a warning naming the 12 chosen columns that have one (the differences and
    # their squares), none for the others
    (line,) = [ln for ln in doc["warnings"] if "n/a" in ln]
    assert "12 columns" in line and line.count("derivative1") == 12 and "'trans_x'" not in line


def test_named_big_table_without_choice_lists_the_sets(pipeline_run, capsys):
    path, events, conf, cols, _ = pipeline_run
    err = _error(capsys, _fit(path, events, "--confounds", str(conf)))
    assert str(conf) in err and f"{len(cols)} columns" in err
    assert "motion24" in err and "acompcorN" in err and "--confound-columns" in err


def test_small_named_table_enters_whole(pipeline_run, tmp_path, capsys):
    path, events, _conf, cols, _ = pipeline_run
    small = tmp_path / "motion.tsv"
    small.write_text(
        "\t".join(MOTION6)
        + "\n"
        + "".join("\t".join(f"{cols[m][i]:.6g}" for m in MOTION6) + "\n" for i in range(T))
    )
    doc, _ = _json(capsys, _fit(path, events, "--confounds", str(small), "--kernels", "gamma"))
    assert doc["confound_columns"] == list(MOTION6)
    assert set(MOTION6) <= set(doc["fits"][0]["columns"])


@pytest.mark.parametrize(
    ("text", "needles"),
    [
        ("a\tb\n" + "1\t2\n" * 3 + "1\tabc\n" + "1\t2\n" * (T - 4), ["'b'", "row 4", "'abc'"]),
        ("a\tb\n" + "1\tn/a\n" * T, ["'b'", "n/a", f"all {T} rows"]),
        ("a\ta\n" + "1\t2\n" * T, ["'a'", "twice", "columns 1 and 2"]),
    ],
)
def test_bad_tables_are_one_line(pipeline_run, tmp_path, capsys, text, needles):
    """Issue 11 item 4: a text cell, an all-n/a column and a duplicate header each stop with
    one line naming the file, the column, the row and the value (exit 2)."""
    path, events, *_ = pipeline_run
    bad = tmp_path / "bad.tsv"
    bad.write_text(text)
    err = _error(capsys, _fit(path, events, "--confounds", str(bad), "--confound-columns", "b"))
    assert str(bad) in err
    for n in needles:
        assert n in err


def test_choice_errors(pipeline_run, capsys):
    path, events, *_ = pipeline_run
    for choice, needle in (
        ("acompcor80", "has 50"),
        ("trans_q", "'trans_q'"),
        ("zz*", "matches no column"),
    ):
        assert needle in _error(capsys, _fit(path, events, "--confound-columns", choice))


# ----------------------------------------------------------------------------- excluded volumes


@pytest.fixture()
def active_run(tmp_path):
    """A run whose voxel (1, 2, 1) responds to `tone`; the first two volumes carry the large
    transient of a magnetisation not yet steady, marked in the table beside the run."""
    from voxelscope.core.design import build_design
    from voxelscope.core.events import read_events

    rng = np.random.default_rng(41)
    data = 500 + rng.standard_normal((4, 4, 3, T)) * 4
    path, events = write_run(tmp_path, data, TR, name="sub-01_task-x_bold.nii")
    tone = build_design(read_events(events), T, TR, "double-gamma").column("tone")
    data[1, 2, 1] += 6 * tone
    data[..., 0] += 400
    data[..., 1] += 150
    path, events = write_run(tmp_path, data, TR, name="sub-01_task-x_bold.nii")
    conf = tmp_path / "sub-01_task-x_desc-confounds_timeseries.tsv"
    cols = write_pipeline_table(conf, n=T, tr=TR)
    return path, events, conf, cols


def _dg(doc):
    return doc["fits"][0]


def test_non_steady_volumes_leave_the_fit(active_run, capsys):
    """Marked non-steady-state volumes leave the fit by default: the numbers equal statsmodels
    OLS on the kept rows, and y, design, fitted and residuals keep every row."""
    path, events, conf, _cols = active_run
    argv = _fit(path, events, "--kernels", "double-gamma", "--noise", "ols")
    doc, _ = _json(capsys, argv)
    assert doc["excluded_volumes"] == [
        {"volume": 0, "reason": "non-steady-state (non_steady_state_outlier00)"},
        {"volume": 1, "reason": "non-steady-state (non_steady_state_outlier01)"},
    ]
    f = _dg(doc)
    y, X = np.asarray(doc["y"]), np.asarray(f["design"])
    assert y.shape == (T,) and X.shape[0] == T
    assert len(f["fitted"]) == T and len(f["residuals"]) == T
    import statsmodels.api as sm

    m = sm.OLS(y[2:], X[2:]).fit()
    tt = m.t_test(np.asarray(f["weights"]))
    assert f["df"] == int(m.df_resid) == T - 2 - X.shape[1]
    np.testing.assert_allclose(f["t"], float(np.squeeze(tt.tvalue)), rtol=1e-9)
    np.testing.assert_allclose(f["fitted"], X @ m.params, rtol=1e-9)
    assert f["t"] > 5
    # the same two volumes by count, for a run whose table has no such columns
    conf.unlink()
    doc2, _ = _json(capsys, [*argv, "--drop-volumes", "2"])
    assert [e["volume"] for e in doc2["excluded_volumes"]] == [0, 1]
    np.testing.assert_allclose(_dg(doc2)["t"], f["t"], rtol=1e-12)
    # kept in, they wreck the activation (the report)
    doc3, _ = _json(capsys, argv)
    assert doc3["excluded_volumes"] == [] and _dg(doc3)["t"] < f["t"] / 2


def test_censor_fd_and_outlier_columns(active_run, capsys):
    path, events, _conf, cols = active_run
    fd = np.nan_to_num(cols["framewise_displacement"])
    mm = float(np.quantile(fd, 0.95))
    want = set(np.flatnonzero(fd > mm).tolist()) - {0, 1}
    assert 3 <= len(want) <= 12
    argv = _fit(path, events, "--kernels", "gamma", "--censor-fd", f"{mm:.8f}")
    doc, _ = _json(capsys, argv)
    ex = {e["volume"]: e["reason"] for e in doc["excluded_volumes"]}
    assert set(ex) == want | {0, 1}
    assert all("framewise displacement" in ex[v] for v in want)
    # n - rank counts only the kept volumes; the t is read with the effective df below it
    assert _dg(doc)["df_residual"] == T - len(ex) - len(_dg(doc)["columns"])
    assert _dg(doc)["df_kind"].startswith("effective") and _dg(doc)["df"] < T - len(ex)
    # chosen one-hot outlier columns censor their volumes instead of entering the design
    doc, _ = _json(
        capsys, [*_fit(path, events, "--kernels", "gamma"), "--confound-columns", "outliers"]
    )
    ex = {e["volume"]: e["reason"] for e in doc["excluded_volumes"]}
    assert ex[57] == "marked in motion_outlier00" and ex[121] == "marked in motion_outlier02"
    assert not any(c.startswith("motion_outlier") for c in _dg(doc)["columns"])


def test_ar1_with_censoring_equals_gls(active_run, capsys):
    """AR(1) on the kept volumes equals statsmodels GLS with covariance rho^|t_i - t_j| over
    the kept volume times (rho as reported)."""
    import statsmodels.api as sm

    path, events, _conf, cols = active_run
    mm = float(np.quantile(np.nan_to_num(cols["framewise_displacement"]), 0.9))
    doc, _ = _json(
        capsys,
        [*_fit(path, events, "--kernels", "gamma", "--noise", "ar1"), "--censor-fd", f"{mm:.8f}"],
    )
    f = _dg(doc)
    keep = np.ones(T, bool)
    keep[[e["volume"] for e in doc["excluded_volumes"]]] = False
    times = np.flatnonzero(keep)
    V = f["rho"] ** np.abs(times[:, None] - times[None, :])
    X, y = np.asarray(f["design"]), np.asarray(doc["y"])
    m = sm.GLS(y[keep], X[keep], sigma=V).fit()
    np.testing.assert_allclose(f["t"], float(np.squeeze(m.t_test(f["weights"]).tvalue)), rtol=1e-8)
    assert f["df"] == int(m.df_resid)


def test_file_cosines_replace_our_drift(pipeline_run, capsys):
    path, events, *_ = pipeline_run
    doc, _ = _json(
        capsys,
        [*_fit(path, events, "--kernels", "boxcar"), "--confound-columns", "motion6,cosine*"],
    )
    cols = _dg(doc)["columns"]
    assert [c for c in cols if c.startswith("cosine")] == [f"cosine{k:02d}" for k in range(6)]
    assert not any(c.startswith("drift_") for c in cols)
    said = [w for w in doc["warnings"] if "replace" in w]
    assert len(said) == 1 and "cosine00 .. cosine05" in said[0]
    assert _dg(doc)["df_residual"] == T - 2 - (2 + 6 + 6 + 1)  # n - rank


def test_volume_and_rank_errors_are_one_line(pipeline_run, capsys):
    path, events, *_ = pipeline_run
    argv = _fit(path, events, "--kernels", "boxcar")
    assert "fewer CompCor" in _error(
        capsys, [*argv, "--confound-columns", "a_comp_cor_00,c_comp_cor_00"]
    )
    assert "cannot drop the first 200" in _error(capsys, [*argv, "--drop-volumes", "200"])
    with pytest.raises(SystemExit) as stop:  # argparse's own check of the value
        main([*argv, "--censor-fd", "-1"])
    assert stop.value.code == 2 and "positive number of mm" in capsys.readouterr().err
    small = path.parent / "small.tsv"
    small.write_text("a\n" + "".join(f"{i % 7}\n" for i in range(T)))
    err = _error(capsys, [*argv, "--confounds", str(small), "--censor-fd", "0.5"])
    assert "framewise_displacement" in err and str(small) in err


def test_map_leaves_out_the_same_volumes(active_run, tmp_path, capsys):
    """`map` says how many volumes it left out, and its t at a voxel equals `fit`'s there."""
    import nibabel as nib

    path, events, _conf, _cols = active_run
    out = tmp_path / "t.nii.gz"
    argv = ["map", str(path), "--events", str(events), "--kernel", "double-gamma"]
    assert main([*argv, "--contrast", "tone", "-o", str(out)]) == 0
    said = capsys.readouterr().out
    assert "2 of 200 volumes left out" in said
    doc, _ = _json(capsys, _fit(path, events, "--kernels", "double-gamma"))
    t_map = float(np.asarray(nib.load(out).dataobj)[1, 2, 1])
    assert t_map == pytest.approx(_dg(doc)["t"], rel=1e-5)
