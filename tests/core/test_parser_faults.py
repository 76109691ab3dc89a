"""Property-based fault injection on every text parser (hypothesis).

Whatever text reaches a parser -- events, confounds, marks, contrasts, JSON -- the result is
a value or one :class:`InputError` line that quotes at most a short excerpt, never another
exception and never a multi-line message. Reference for "one line": the message holds no
newline and is at most a few hundred characters however long the input.
"""

from __future__ import annotations

import io

from hypothesis import given, settings
from hypothesis import strategies as st

from voxelscope.core.confounds import parse_confounds
from voxelscope.core.errors import InputError
from voxelscope.core.events import parse_events
from voxelscope.core.glm import parse_contrast
from voxelscope.core.marks import parse_marks_tsv

cells = st.text(alphabet=st.characters(blacklist_categories=("Cs",)), max_size=30)
rows = st.lists(st.lists(cells, max_size=6), max_size=12)


def _tsv(header, body, sep="\t"):
    return "\n".join(sep.join(r) for r in [header, *body]) + "\n"


def _one_line(err: InputError, limit: int = 600) -> None:
    text = str(err)
    assert "\n" not in text and len(text) <= limit, text[:200]


@settings(max_examples=80)
@given(st.lists(cells, max_size=6), rows)
def test_events_parser_gives_conditions_or_one_line(header, body):
    for h in (header, ["onset", "duration", "trial_type", *header]):
        try:
            parse_events(io.StringIO(_tsv(h, body)), source="e.tsv")
        except InputError as err:
            _one_line(err)


@settings(max_examples=80)
@given(st.lists(cells, max_size=6), rows)
def test_confounds_parser_gives_a_table_or_one_line(header, body):
    try:
        parse_confounds(io.StringIO(_tsv(header, body)), source="c.tsv")
    except InputError as err:
        _one_line(err)


@settings(max_examples=80)
@given(rows)
def test_marks_parser_gives_marks_or_one_line(body):
    header = ["x_mm", "y_mm", "z_mm", "title", "note"]
    try:
        parse_marks_tsv(_tsv(header, body), source="m.tsv")
    except InputError as err:
        _one_line(err)


@settings(max_examples=120)
@given(st.text(max_size=3000))
def test_contrast_parser_gives_weights_or_one_short_line(expr):
    names = ["tone", "tap", "constant"]
    try:
        w = parse_contrast(expr, names, groups={"tone": [0], "tap": [1]}, default="tone")
    except InputError as err:
        _one_line(err, limit=400)
    else:
        assert all(abs(v) < 1e12 for v in w)


_PIECES = st.sampled_from(["tone", "tap", "tapp", "2", "0.5", "*", "+", "-", " ", "1e9", "x"])


@settings(max_examples=150)
@given(st.lists(_PIECES, max_size=12).map("".join))
def test_contrast_errors_point_inside_the_text(expr):
    """Near-miss contrasts built from real pieces: weights, or one line whose every
    "character N" lies within the text (N counted from 1)."""
    import re

    try:
        parse_contrast(expr, ["tone", "tap", "constant"], groups={"tone": [0], "tap": [1]})
    except InputError as err:
        _one_line(err, limit=400)
        for n in re.findall(r"character (\d+)", str(err)):
            assert 1 <= int(n) <= max(1, len(expr)), (expr, str(err))
