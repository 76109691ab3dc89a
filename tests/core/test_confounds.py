"""Tests of voxelscope.core.confounds: nuisance tables (TSV or CSV with a header row).

Expected values are written from the file text in each test. Leading empty cells (as from
frame-to-frame differences) becoming 0 is the module's documented rule.
"""

from __future__ import annotations

import pytest
from numpy.testing import assert_allclose

from voxelscope.core.confounds import read_confounds
from voxelscope.core.errors import InputError


def _write(tmp_path, text, name="sub-01_confounds.tsv"):
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


def test_all_numeric_columns_text_skipped(tmp_path):
    p = _write(tmp_path, "trans_x\tlabel\tcsf\n0.1\ta\t5\n0.2\tb\t6\n0.3\tc\t7\n")
    c = read_confounds(p)
    assert c.names == ("trans_x", "csf")
    assert_allclose(c.values, [[0.1, 5], [0.2, 6], [0.3, 7]])
    assert c.n_rows == 3 and c.warnings == ()
    c.check_rows(3)
    with pytest.raises(InputError, match="3 rows"):
        c.check_rows(4)


def test_leading_na_rows_become_zero_with_warning(tmp_path):
    p = _write(tmp_path, "fd\trot_z\nn/a\t0.5\nn/a\t0.6\n0.25\t0.7\n0.5\t0.8\n")
    c = read_confounds(p)
    assert_allclose(c.values[:, 0], [0.0, 0.0, 0.25, 0.5])
    assert len(c.warnings) == 1
    assert "fd" in c.warnings[0] and "2" in c.warnings[0]


def test_na_after_values_is_an_error(tmp_path):
    p = _write(tmp_path, "fd\n0.1\nn/a\n0.2\n", "late_na.tsv")
    with pytest.raises(InputError) as err:
        read_confounds(p)
    assert "late_na.tsv" in str(err.value) and "'fd'" in str(err.value)


def test_column_selection_and_csv(tmp_path):
    p = _write(tmp_path, "a,b,c\n1,2,3\n4,5,6\n", "conf.csv")
    c = read_confounds(p, columns=["c", "a"])
    assert c.names == ("c", "a")
    assert_allclose(c.values, [[3, 1], [6, 4]])
    s = read_confounds(p).select(["b"])
    assert s.names == ("b",)
    assert_allclose(s.values[:, 0], [2, 5])


def test_unknown_column_names_file_and_column(tmp_path):
    p = _write(tmp_path, "a\tb\n1\t2\n", "motion.tsv")
    with pytest.raises(InputError) as err:
        read_confounds(p, columns=["a", "framewise"])
    msg = str(err.value)
    assert "motion.tsv" in msg and "'framewise'" in msg and "available: a, b" in msg
    with pytest.raises(InputError, match="'zzz'"):
        read_confounds(p).select(["zzz"])
    with pytest.raises(InputError, match="not numeric"):
        read_confounds(_write(tmp_path, "a\tb\n1\tx\n", "t.tsv"), columns=["b"])


def test_bad_files(tmp_path):
    with pytest.raises(InputError, match="empty"):
        read_confounds(_write(tmp_path, ""))
    with pytest.raises(InputError, match="header"):
        read_confounds(_write(tmp_path, "1\t2\n3\t4\n"))
    with pytest.raises(InputError, match="not found"):
        read_confounds(tmp_path / "missing.tsv")
    with pytest.raises(InputError, match="no numeric"):
        read_confounds(_write(tmp_path, "a\nx\ny\n"))
