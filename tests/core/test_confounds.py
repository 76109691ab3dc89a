"""Tests of voxelscope.core.confounds: reading nuisance tables and choosing columns.

Expected values are written from the file text in each test or computed here from the
published definitions: the 24-parameter motion model of Friston et al. (1996, Magn Reson Med
35:346-355; six parameters, their values one volume earlier -- commonly replaced by first
differences -- and the squares of both; from memory), the anatomical CompCor components of
Behzadi et al. (2007) named ``a_comp_cor_NN`` (common practice for pipeline tables).
"""

from __future__ import annotations

import io

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from numpy.testing import assert_allclose, assert_array_equal

from tests.confound_tables import MOTION6, pipeline_columns, table_text, write_pipeline_table
from voxelscope.core.confounds import (
    NAMED_SETS,
    SMALL_TABLE,
    Confounds,
    motion_sets,
    parse_confounds,
    read_confounds,
)
from voxelscope.core.errors import InputError


def _write(tmp_path, text, name="sub-01_confounds.tsv"):
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


# ----------------------------------------------------------------------------- reading


def test_numeric_columns_read_text_only_column_kept_aside(tmp_path):
    p = _write(tmp_path, "trans_x\tlabel\tcsf\n0.1\ta\t5\n0.2\tb\t6\n0.3\tc\t7\n")
    c = read_confounds(p)
    assert c.file_columns == ("trans_x", "csf")
    assert_allclose(c.values[:, :2], [[0.1, 5], [0.2, 6], [0.3, 7]])
    assert c.n_rows == 3 and c.missing_warnings() == []
    c.check_rows(3)
    with pytest.raises(InputError, match="3 rows"):
        c.check_rows(4)
    with pytest.raises(InputError) as err:  # naming the text column says why
        c.select(["label"])
    msg = str(err.value)
    assert str(p) in msg and "'label'" in msg and "text" in msg and "'a'" in msg


def test_leading_na_become_zero_warning_only_for_chosen_columns(tmp_path):
    p = _write(tmp_path, "fd\trot_z\nn/a\t0.5\nn/a\t0.6\n0.25\t0.7\n0.5\t0.8\n")
    c = read_confounds(p)
    assert_allclose(c.column("fd"), [0.0, 0.0, 0.25, 0.5])
    assert c.missing_warnings(["rot_z"]) == []
    (w,) = c.missing_warnings(["fd", "rot_z"])
    assert "'fd'" in w and "2 leading" in w and str(p) in w


def test_na_after_values_is_an_error_naming_row(tmp_path):
    p = _write(tmp_path, "fd\n0.1\nn/a\n0.2\n", "late_na.tsv")
    with pytest.raises(InputError) as err:
        read_confounds(p)
    msg = str(err.value)
    assert "late_na.tsv" in msg and "'fd'" in msg and "row 2 (line 3)" in msg


def test_one_text_cell_is_an_error_naming_file_column_row_value(tmp_path):
    """Issue 11 item 4: a column with one text cell is not silently dropped."""
    p = _write(tmp_path, "a\tb\n1\t2\n3\toops\n5\t6\n", "t.tsv")
    with pytest.raises(InputError) as err:
        read_confounds(p)
    msg = str(err.value)
    assert "t.tsv" in msg and "'b'" in msg and "row 2 (line 3)" in msg and "'oops'" in msg
    assert "\n" not in msg


def test_all_na_column_is_named_when_chosen(tmp_path):
    p = _write(tmp_path, "a\tempty\n1\tn/a\n2\tn/a\n3\tn/a\n", "e.tsv")
    c = read_confounds(p)
    assert c.file_columns == ("a",)
    for choose in (lambda: c.select(["empty"]), lambda: c.resolve("empty")):
        with pytest.raises(InputError) as err:
            choose()
        msg = str(err.value)
        assert "e.tsv" in msg and "'empty'" in msg and "all 3 rows" in msg and "n/a" in msg


def test_duplicate_header_is_an_error(tmp_path):
    p = _write(tmp_path, "a\tb\ta\n1\t2\t3\n4\t5\t6\n", "dup.tsv")
    with pytest.raises(InputError) as err:
        read_confounds(p)
    msg = str(err.value)
    assert "dup.tsv" in msg and "'a'" in msg and "columns 1 and 3" in msg


def test_ragged_rows_and_bad_files(tmp_path):
    with pytest.raises(InputError, match=r"row 2 \(line 3\) has 1 cells"):
        read_confounds(_write(tmp_path, "a\tb\n1\t2\n3\n"))
    with pytest.raises(InputError, match="empty"):
        read_confounds(_write(tmp_path, ""))
    with pytest.raises(InputError, match="header"):
        read_confounds(_write(tmp_path, "1\t2\n3\t4\n"))
    with pytest.raises(InputError, match="not found"):
        read_confounds(tmp_path / "missing.tsv")
    with pytest.raises(InputError, match="no numeric"):
        read_confounds(_write(tmp_path, "a\nx\ny\n"))
    with pytest.raises(InputError, match="finite"):
        read_confounds(_write(tmp_path, "a\n1\ninf\n"))
    with pytest.raises(InputError, match="UTF-8"):
        p = tmp_path / "latin.tsv"
        p.write_bytes("caf\xe9\n1\n".encode("latin-1"))
        read_confounds(p)
    with pytest.raises(InputError, match="folder"):
        read_confounds(tmp_path)


@given(
    st.lists(
        st.lists(
            st.sampled_from(["1", "-2.5", "n/a", "", "x", "1e3", "nan", "inf", "\x00"]),
            min_size=1,
            max_size=4,
        ),
        min_size=1,
        max_size=6,
    ),
    st.sampled_from(["\t", ","]),
)
def test_parser_gives_a_table_or_one_clear_line(rows, delim):
    """Hostile tables (hypothesis): either a usable table or one InputError line."""
    header = delim.join(f"c{j}" for j in range(len(rows[0])))
    text = header + "\n" + "\n".join(delim.join(r) for r in rows) + "\n"
    try:
        c = parse_confounds(io.StringIO(text), source="h.tsv")
    except InputError as err:
        msg = str(err)
        assert msg.startswith("h.tsv: ") and "\n" not in msg and "\x00" not in msg
        return
    assert c.values.shape == (c.n_rows, len(c.names)) and np.isfinite(c.values).all()


# ----------------------------------------------------------------------------- pipeline table


@pytest.fixture(scope="module")
def table(tmp_path_factory):
    p = tmp_path_factory.mktemp("conf") / "sub-01_task-x_desc-confounds_timeseries.tsv"
    cols = write_pipeline_table(p)
    return p, cols, read_confounds(p)


def test_pipeline_table_is_read_whole(table):
    _p, cols, c = table
    assert len(cols) >= 118
    assert c.file_columns == tuple(cols)
    assert c.n_rows == 200
    # rounding to six significant digits is all that separates the file from the truth
    for name in ("trans_x", "a_comp_cor_07", "global_signal"):
        assert_allclose(c.column(name), cols[name], rtol=5e-6, atol=0)
    assert c.column("framewise_displacement")[0] == 0.0  # n/a in the first row


def test_named_sets(table):
    _p, cols, c = table
    assert c.resolve("motion6") == MOTION6
    m24 = c.resolve("motion24")
    assert len(m24) == 24 and len(set(m24)) == 24 and set(m24) <= set(cols)
    assert c.resolve("motion12") == m24[:12]
    assert c.resolve("acompcor5") == tuple(f"a_comp_cor_{k:02d}" for k in range(5))
    assert c.resolve("csf,wm,global") == ("csf", "white_matter", "global_signal")
    assert c.resolve("outliers") == ("motion_outlier00", "motion_outlier01", "motion_outlier02")
    assert c.resolve("none") == ()
    assert c.resolve("all") == c.file_columns
    # combined with commas, each column once, in the order given
    both = c.resolve("csf, motion6, trans_x, a_comp_cor_0[0-1]")
    assert both == ("csf", *MOTION6, "a_comp_cor_00", "a_comp_cor_01")


def test_wildcards(table):
    _p, _cols, c = table
    assert c.resolve("trans_?,rot_?") == MOTION6[:3] + MOTION6[3:]
    assert c.resolve("a_comp_cor_0[0-4]") == tuple(f"a_comp_cor_{k:02d}" for k in range(5))
    assert len(c.resolve("a_comp_cor_*")) == 50
    assert c.resolve("cosine*") == tuple(f"cosine{k:02d}" for k in range(6))
    with pytest.raises(InputError, match="'zz_\\*' matches no column"):
        c.resolve("zz_*")


def test_choice_errors_are_one_line(table):
    _p, _cols, c = table
    with pytest.raises(InputError) as err:
        c.resolve("acompcor60")
    assert "60" in str(err.value) and "has 50" in str(err.value)
    with pytest.raises(InputError, match="acompcor5"):
        c.resolve("acompcor")
    with pytest.raises(InputError) as err:
        c.resolve("trans_xx")
    msg = str(err.value)
    assert "'trans_xx'" in msg and "trans_x" in msg and "motion24" in msg and "\n" not in msg


def test_big_table_needs_a_choice_small_table_is_all(table, tmp_path):
    _p, cols, c = table
    with pytest.raises(InputError) as err:
        c.default_choice()
    msg = str(err.value)
    assert f"{len(cols)} columns" in msg and err.value.remedy == "confound_columns"
    for name in NAMED_SETS:
        assert name in msg
    small = parse_confounds(io.StringIO(table_text({k: cols[k] for k in MOTION6})), "m.tsv")
    assert small.default_choice() == MOTION6
    assert SMALL_TABLE == 30


def test_friston24_from_the_table_follows_the_definition(table):
    """Friston et al. (1996) 24-parameter model as pipelines write it (from memory): for each
    of the six parameters x, the first difference d_t = x_t - x_{t-1} (n/a, read as 0, in the
    first row), x^2 and d^2."""
    _p, _cols, c = table
    for m in MOTION6:
        x = c.column(m)
        d = c.column(f"{m}_derivative1")
        # each cell carries at most half a unit in its sixth significant digit (5e-6 relative)
        assert d[0] == 0.0
        assert_allclose(d[1:], np.diff(x), rtol=0, atol=1.1e-5 * np.abs(x).max())
        assert_allclose(c.column(f"{m}_power2"), x * x, rtol=1.6e-5, atol=0)
        assert_allclose(c.column(f"{m}_derivative1_power2"), d * d, rtol=1.6e-5, atol=0)


def test_friston24_computed_from_six_columns(table):
    """A table with only the six parameters: the sets compute the other 18 exactly by the
    definition, and they agree with the pipeline's own columns to the file's rounding."""
    _p, cols, full = table
    six = parse_confounds(io.StringIO(table_text({k: cols[k] for k in MOTION6})), "six.tsv")
    names = six.resolve("motion24")
    assert names == motion_sets()["motion24"]
    assert six.file_columns == MOTION6  # computed columns are not file columns
    sel = six.select(names)
    assert sel.values.shape == (200, 24)
    for j, m in enumerate(MOTION6):
        x = six.column(m)
        d = np.diff(x, prepend=x[0])
        assert_array_equal(sel.values[:, 6 + j], d)
        assert_array_equal(sel.values[:, 12 + j], x * x)
        assert_array_equal(sel.values[:, 18 + j], d * d)
        assert_allclose(sel.values[:, 12 + j], full.column(f"{m}_power2"), rtol=2e-5)
    assert six.missing_warnings(names) == []
    with pytest.raises(InputError, match="needs the motion columns"):
        parse_confounds(io.StringIO("trans_x\n1\n2\n"), "one.tsv").resolve("motion6")


def test_na_warnings_only_for_chosen_columns(table):
    _p, _cols, c = table
    assert c.missing_warnings(c.resolve("motion6,acompcor5")) == []
    (w,) = c.missing_warnings(c.resolve("motion12"))  # one line for the six alike
    assert "6 columns ('trans_x_derivative1'" in w and "'rot_z_derivative1')" in w
    assert "1 leading" in w


def test_outlier_and_non_steady_volumes(table):
    _p, _cols, c = table
    assert c.non_steady_columns() == ("non_steady_state_outlier00", "non_steady_state_outlier01")
    assert c.outlier_volumes(c.non_steady_columns()) == {
        0: "non_steady_state_outlier00",
        1: "non_steady_state_outlier01",
    }
    assert c.outlier_volumes(c.resolve("outliers")) == {
        57: "motion_outlier00",
        120: "motion_outlier01",
        121: "motion_outlier02",
    }
    assert not c.is_outlier_column("csf")
    assert c.cosine_columns(c.resolve("csf,cosine*")) == tuple(f"cosine{k:02d}" for k in range(6))


def test_confounds_object_select_keeps_counts():
    c = Confounds(("a", "b"), np.array([[0.0, 1.0], [2.0, 3.0]]), "x.tsv", (1, 0))
    s = c.select(["b", "a"])
    assert s.names == ("b", "a") and s.leading_missing == (0, 1)
    assert_array_equal(s.values, [[1.0, 0.0], [3.0, 2.0]])
    assert pipeline_columns(n=60, n_non_steady=1, outlier_volumes=(3,))["cosine00"].shape == (60,)
