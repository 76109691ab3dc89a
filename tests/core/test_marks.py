"""Tests of voxelscope/core/marks.py: the mark list and the marks TSV file.

Outside reference: Python's ``csv`` module (tab delimiter, no quoting) must read our files
as a plain table with five fields per row, and list semantics (``list.insert``/``pop``)
define the expected order after moves and deletions.
"""

from __future__ import annotations

import csv
import io
import math
import tempfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from voxelscope.core.errors import InputError
from voxelscope.core.marks import (
    Mark,
    MarkList,
    escape_field,
    format_marks_tsv,
    parse_marks_tsv,
    read_marks_tsv,
    unescape_field,
    write_marks_tsv,
)
from voxelscope.core.model import ModelSettings

SAMPLE = Path(__file__).resolve().parents[2] / "sample_data" / "demo_marks.tsv"

coords = st.floats(allow_nan=False, allow_infinity=False, width=64)
marks_st = st.lists(
    st.builds(Mark, coords, coords, coords, title=st.text(), note=st.text()), max_size=8
)


@given(marks_st)
def test_tsv_round_trip_of_arbitrary_text(marks):
    ml = MarkList(marks)
    text = format_marks_tsv(ml)
    assert parse_marks_tsv(text) == ml
    # outside reference: the csv module sees one header and one 5-field row per mark
    rows = list(csv.reader(io.StringIO(text, newline=""), delimiter="\t", quoting=csv.QUOTE_NONE))
    assert rows[0] == ["x_mm", "y_mm", "z_mm", "title", "note"]
    assert len(rows) == len(marks) + 1
    for row, m in zip(rows[1:], marks):
        assert len(row) == 5
        assert float(row[0]) == m.x_mm and float(row[2]) == m.z_mm


@given(marks_st)
def test_file_round_trip(marks):
    with tempfile.TemporaryDirectory() as d:
        p = write_marks_tsv(marks, Path(d) / "marks.tsv")
        assert read_marks_tsv(p) == MarkList(marks)
        assert [x.name for x in Path(d).iterdir()] == ["marks.tsv"]


@given(st.text())
def test_escape_is_inverted_and_leaves_no_tab_or_newline(s):
    e = escape_field(s)
    assert "\t" not in e and "\n" not in e and "\r" not in e
    assert unescape_field(e) == s


def test_literal_backslash_sequences_survive():
    m = Mark(1, 2, 3, r"C:\new\table", "a\\tb\tc\\\\n")
    assert parse_marks_tsv(format_marks_tsv([m]))[0] == m


def test_windows_line_ends_bom_column_order_and_missing_note():
    text = "\ufefftitle\tz_mm\ty_mm\tx_mm\textra\r\nA\t3\t2\t1\tjunk\r\n\r\n"
    ml = parse_marks_tsv(text)
    assert len(ml) == 1 and ml[0] == Mark(1.0, 2.0, 3.0, "A", "")


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("x_mm\ty_mm\tz_mm\ttitle\tnote\n1\t2\t3\ta\n", r"m\.tsv: line 2 has 4 .*header has 5"),
        ("x_mm\ty_mm\tz_mm\ttitle\tnote\n1\t2\t3\ta\tb\n1\tq\t3\ta\tb\n", r"line 3, column 'y_mm'"),
        ("x_mm\ty_mm\ttitle\n1\t2\ta\n", r"m\.tsv: line 1: the header has no column\(s\) z_mm"),
        ("x_mm\ty_mm\tz_mm\n1\tinf\t3\n", r"line 2, column 'y_mm' is not a finite number"),
        ("\n\n", r"m\.tsv: the file is empty"),
    ],
)
def test_bad_rows_give_one_line_naming_file_and_row(text, expected):
    with pytest.raises(InputError, match=expected) as err:
        parse_marks_tsv(text, source="m.tsv")
    assert "\n" not in str(err.value)


def test_read_errors_name_the_file(tmp_path):
    with pytest.raises(InputError, match="marks file not found"):
        read_marks_tsv(tmp_path / "none.tsv")
    bad = tmp_path / "latin.tsv"
    bad.write_bytes(b"x_mm\ty_mm\tz_mm\ttitle\n1\t2\t3\tcaf\xe9\n")
    with pytest.raises(
        InputError, match=r"latin\.tsv: the marks file is not UTF-8 text \(byte 0xe9 at line 2"
    ):
        read_marks_tsv(bad)


def test_write_refuses_to_overwrite(tmp_path):
    p = write_marks_tsv([Mark(0, 0, 0, "a")], tmp_path / "m.tsv")
    with pytest.raises(InputError, match="already exists"):
        write_marks_tsv([], p)
    write_marks_tsv([], p, force=True)
    assert len(read_marks_tsv(p)) == 0


@given(
    st.lists(
        st.tuples(st.sampled_from(["add", "move", "delete", "rename", "note"]), st.integers(0, 9)),
        max_size=30,
    )
)
def test_operations_follow_list_semantics(ops):
    """Reference model: a plain Python list with insert/pop (language semantics)."""
    ml, ref = MarkList(), []
    rng = np.random.default_rng(len(ops))
    for op, k in ops:
        if op == "add":
            xyz = tuple(float(v) for v in rng.normal(size=3))
            ml.add(xyz, f"m{k}", "n")
            ref.append(Mark(*xyz, f"m{k}", "n"))
            continue
        if not ref:
            with pytest.raises(InputError):
                ml.delete(0)
            continue
        i, j = k % len(ref), (k * 7 + 3) % len(ref)
        if op == "move":
            ml.move(i, j)
            ref.insert(j, ref.pop(i))
        elif op == "delete":
            assert ml.delete(i) == ref.pop(i)
        elif op == "rename":
            ml.rename(i, "renamed")
            ref[i] = Mark(*ref[i].xyz_mm, "renamed", ref[i].note)
        else:
            ml.set_note(i, "new\tnote")
            ref[i] = Mark(*ref[i].xyz_mm, ref[i].title, "new\tnote")
        assert list(ml) == ref
    assert list(ml) == ref
    for i, m in enumerate(ref):
        assert ml.jump(i) == m.xyz_mm


def test_missing_index_and_default_title():
    ml = MarkList()
    m = ml.add([1, 2, 3])
    assert m.title == "Mark 1"
    with pytest.raises(InputError, match="no mark number 5"):
        ml.rename(5, "x")
    with pytest.raises(InputError, match="finite"):
        Mark(math.nan, 0, 0)


def test_json_round_trip():
    ml = MarkList([Mark(1.5, -2, 3, "t", "n\nm")])
    assert MarkList.from_json(ml.to_json()) == ml
    with pytest.raises(InputError):
        MarkList.from_json([{"x_mm": "a", "y_mm": 0, "z_mm": 0}])


@pytest.mark.skipif(not SAMPLE.exists(), reason="sample data not generated")
def test_sample_marks_file_reads():
    ml = read_marks_tsv(SAMPLE)
    assert len(ml) >= 1
    assert all(m.title for m in ml)


#: Models a mark may carry: text anywhere a setting is text (tabs, newlines, quotes).
models_st = st.builds(
    ModelSettings,
    kernels=st.lists(
        st.sampled_from(["boxcar", "gamma", "double-gamma", "fir"]), min_size=1, unique=True
    ).map(tuple),
    contrast=st.one_of(st.none(), st.text(max_size=20)),
    noise=st.sampled_from(["ols", "ar1", "arp"]),
    highpass_s=st.one_of(st.none(), st.floats(20.0, 500.0)),
    confound_columns=st.one_of(st.none(), st.lists(st.text(max_size=8), max_size=3).map(tuple)),
    onset_shift_s=st.floats(-5, 5),
)


@given(
    st.lists(
        st.builds(Mark, coords, coords, coords, st.text(), st.text(), models_st | st.none()),
        max_size=5,
    )
)
def test_marks_keep_their_model_through_tsv_and_json(marks):
    ml = MarkList(marks)
    text = format_marks_tsv(ml)
    assert parse_marks_tsv(text) == ml
    if all(abs(v) <= 1e6 for m in marks for v in m.xyz_mm):  # JSON's bound on positions
        assert MarkList.from_json(ml.to_json()) == ml
    # outside reference: the csv module sees 6 fields per row when some mark has a model
    rows = list(csv.reader(io.StringIO(text, newline=""), delimiter="\t", quoting=csv.QUOTE_NONE))
    width = 6 if any(m.model is not None for m in marks) else 5
    assert all(len(r) == width for r in rows)


def test_marks_without_a_model_still_read():
    """Files and sessions written before marks kept their model load with model None."""
    old = "x_mm\ty_mm\tz_mm\ttitle\tnote\n1\t2\t3\tt\tn\n"
    assert parse_marks_tsv(old)[0].model is None
    assert MarkList.from_json([{"x_mm": 1, "y_mm": 2, "z_mm": 3}])[0].model is None
    # a partial model: the missing settings are the defaults
    m = parse_marks_tsv('x_mm\ty_mm\tz_mm\tmodel\n1\t2\t3\t{"contrast":"tap"}\n')[0]
    assert m.model == ModelSettings(contrast="tap")


@pytest.mark.parametrize(
    ("cell", "expected"),
    [
        ("{not json", "line 2, column 'model'.*one line of JSON"),
        ('{"noise":"loud"}', "line 2, column 'model'.*model.noise"),
        ("[1, 2]", "line 2, column 'model' must be an object"),
    ],
)
def test_a_bad_model_is_one_line_naming_row_and_column(cell, expected):
    text = f"x_mm\ty_mm\tz_mm\tmodel\n1\t2\t3\t{cell}\n"
    with pytest.raises(InputError, match=expected) as err:
        parse_marks_tsv(text, "m.tsv")
    assert "\n" not in str(err.value) and str(err.value).startswith("m.tsv")


def test_add_keeps_the_model():
    ml = MarkList()
    model = ModelSettings(contrast="tap", noise="ols")
    assert ml.add((1, 2, 3), "a", model=model).model == model
    assert ml.rename(0, "b").model == model and ml.set_note(0, "n").model == model
