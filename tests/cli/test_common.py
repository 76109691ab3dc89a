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
    # one n/a warning per chosen column that has one (the 12 differences), none for others
    lines = [ln for ln in doc["warnings"] if "n/a" in ln]
    assert len(lines) == 12 and all("derivative1" in ln for ln in lines)


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
