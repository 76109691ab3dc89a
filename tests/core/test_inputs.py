"""Tests of the bounded text reader and the safe quoting helpers (voxelscope/core/inputs.py).

Hypothesis (property-based) drives the parsers: whatever bytes or text come in, the result
is text or one InputError line, never another exception; excerpts stay short and printable.
The JSON reference is Python's own ``json`` module (standard library).
"""

from __future__ import annotations

import json

import pytest
from hypothesis import given
from hypothesis import strategies as st

from voxelscope.core.errors import InputError
from voxelscope.core.inputs import (
    EXCERPT_CHARS,
    decode_text,
    excerpt,
    format_size,
    parse_json,
    printable,
    read_input_bytes,
    read_input_text,
)
from voxelscope.core.outputs import noted_inputs


@given(st.text())
def test_excerpt_is_short_and_printable(text):
    e = excerpt(text)
    assert len(e) <= EXCERPT_CHARS + 1
    assert all(ch.isprintable() for ch in e)


@given(st.text())
def test_printable_has_no_control_characters(text):
    assert all(ch.isprintable() for ch in printable(text))


@given(st.binary(max_size=600))
def test_decode_gives_text_or_one_line(data):
    try:
        text = decode_text(data, "f.tsv", "events")
    except InputError as err:
        assert "\n" not in str(err) and str(err).startswith("f.tsv: ")
    else:
        assert isinstance(text, str)


@given(st.text(max_size=300))
def test_utf8_text_round_trips(text):
    if "\x00" in text:
        return
    data = text.encode("utf-8")
    try:
        assert decode_text(data, "f", "events") == text
    except InputError as err:  # only for text that looks like UTF-16 (many NULs: excluded)
        pytest.fail(str(err))


@given(
    st.recursive(
        st.none() | st.booleans() | st.integers() | st.text(),
        lambda c: st.lists(c, max_size=4) | st.dictionaries(st.text(max_size=5), c, max_size=4),
        max_leaves=20,
    )
)
def test_parse_json_agrees_with_the_json_module(value):
    """Reference: the standard library's json module."""
    text = json.dumps(value)
    assert parse_json(text, "s", "session") == json.loads(text)


@given(st.text(max_size=200))
def test_parse_json_never_raises_anything_else(text):
    try:
        parse_json(text, "s.json", "session")
    except InputError as err:
        assert "\n" not in str(err)


def test_deep_nesting_is_refused_in_linear_time():
    text = "[" * 200_000 + "]" * 200_000
    with pytest.raises(InputError, match="nests deeper than 64"):
        parse_json(text, "s.json", "session")
    ok = "[" * 60 + "]" * 60
    assert parse_json(ok, "s.json", "session") is not None


def test_brackets_inside_strings_do_not_count_as_nesting():
    value = {"note": "[" * 500}
    assert parse_json(json.dumps(value), "s", "session") == value


def test_nan_is_not_json():
    with pytest.raises(InputError, match="not valid JSON"):
        parse_json('{"threshold": NaN}', "s.json", "session")


def test_reader_notes_the_input_and_respects_the_limit(tmp_path):
    p = tmp_path / "e.tsv"
    p.write_bytes(b"x" * 100)
    assert read_input_bytes(p, "events", limit=100) == b"x" * 100
    assert p.resolve() in noted_inputs()
    with pytest.raises(InputError, match="100 bytes, more than the 99 bytes an events file"):
        read_input_bytes(p, "events", limit=99)


def test_stream_without_size_is_read_only_up_to_the_limit(tmp_path):
    import os

    fifo = tmp_path / "pipe"
    os.mkfifo(fifo)
    import threading

    def feed():
        with open(fifo, "wb") as fh:
            try:
                fh.write(b"y" * 10_000)
            except BrokenPipeError:
                pass

    t = threading.Thread(target=feed)
    t.start()
    with pytest.raises(InputError, match=r"larger than the 1\.0 KiB"):
        read_input_bytes(fifo, "events", limit=1024)
    t.join()


def test_bom_is_dropped_and_latin1_is_named(tmp_path):
    p = tmp_path / "e.tsv"
    p.write_bytes("\ufeffonset\n".encode("utf-8"))
    assert read_input_text(p, "events") == "onset\n"
    p.write_bytes("onset\ncaf\xe9\n".encode("latin-1"))
    with pytest.raises(InputError, match=r"byte 0xe9 at line 2\); it looks like Latin-1"):
        read_input_text(p, "events")


def test_format_size():
    assert format_size(512) == "512 bytes"
    assert format_size(5 * 1024**3) == "5.0 GiB"
