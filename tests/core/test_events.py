"""Tests of voxelscope.core.events: BIDS events.tsv parsing.

Reference: the BIDS specification (references.md): ``events.tsv`` columns ``onset`` and
``duration`` in seconds, ``trial_type`` optional. Expected values are written from the file
text in each test.
"""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

from voxelscope.core.errors import InputError
from voxelscope.core.events import Condition, read_events, shift_conditions


def _write(tmp_path, text, name="sub-01_task-tonetap_events.tsv"):
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


def test_conditions_in_order_of_first_appearance(tmp_path):
    p = _write(
        tmp_path,
        "onset\tduration\ttrial_type\n30\t15\ttap\n0\t15\ttone\n60\t15\ttone\n90\t0\ttap\n",
    )
    before = p.read_bytes()
    conds = read_events(p)
    assert [c.name for c in conds] == ["tap", "tone"]
    assert_allclose(conds[0].onsets, [30, 90])
    assert_allclose(conds[0].durations, [15, 0])
    assert_allclose(conds[1].onsets, [0, 60])
    assert_allclose(conds[1].amplitudes, [1, 1])
    assert p.read_bytes() == before  # inputs are never modified


def test_unsorted_onsets_are_sorted(tmp_path):
    conds = read_events(_write(tmp_path, "onset\tduration\n50\t5\n10\t5\n"))
    assert_allclose(conds[0].onsets, [10, 50])


def test_no_trial_type_gives_one_task_condition(tmp_path):
    conds = read_events(_write(tmp_path, "onset\tduration\n0\t10\n40\t10\n"))
    assert [c.name for c in conds] == ["task"]
    assert conds[0].n_events == 2


def test_amplitude_column(tmp_path):
    text = "onset\tduration\ttrial_type\tloudness\n0\t2\ttone\t0.5\n20\t2\ttone\t1.5\n"
    conds = read_events(_write(tmp_path, text), amplitude_column="loudness")
    assert_allclose(conds[0].amplitudes, [0.5, 1.5])
    with pytest.raises(InputError) as err:
        read_events(_write(tmp_path, text), amplitude_column="pitch")
    assert "'pitch'" in str(err.value) and "loudness" in str(err.value)


@pytest.mark.parametrize(
    ("text", "column"),
    [
        ("duration\ttrial_type\n10\ttone\n", "onset"),
        ("onset\ttrial_type\n10\ttone\n", "duration"),
        ("onset\tduration\nabc\t10\n", "onset"),
        ("onset\tduration\n10\tlong\n", "duration"),
        ("onset\tduration\n10\t-2\n", "duration"),
        ("onset\tduration\nn/a\t2\n", "onset"),
        ("onset\tduration\ninf\t2\n", "onset"),
    ],
)
def test_bad_onset_or_duration_names_file_and_column(tmp_path, text, column):
    p = _write(tmp_path, text, "bad_events.tsv")
    with pytest.raises(InputError) as err:
        read_events(p)
    msg = str(err.value)
    assert "bad_events.tsv" in msg and column in msg
    assert "\n" not in msg


def test_empty_and_missing_files(tmp_path):
    with pytest.raises(InputError, match="empty"):
        read_events(_write(tmp_path, ""))
    with pytest.raises(InputError, match="no events"):
        read_events(_write(tmp_path, "onset\tduration\n"))
    with pytest.raises(InputError, match="not found"):
        read_events(tmp_path / "nope_events.tsv")


def test_na_duration_is_brief_and_na_trial_type_is_task(tmp_path):
    conds = read_events(_write(tmp_path, "onset\tduration\ttrial_type\n5\tn/a\tn/a\n"))
    assert conds[0].name == "task"
    assert_allclose(conds[0].durations, [0.0])


def test_shift_conditions_and_equality():
    c = Condition("tone", [1.0, 5.0], [2.0, 2.0])
    s = shift_conditions([c], 0.5)[0]
    assert_allclose(s.onsets, [1.5, 5.5])
    assert_allclose(s.durations, c.durations)
    assert shift_conditions([c], 0.0)[0] == c
    assert hash(Condition("tone", [1.0, 5.0], [2.0, 2.0])) == hash(c)
    assert not c.onsets.flags.writeable
    with pytest.raises(InputError):
        Condition("x", [1.0, 2.0], [1.0])
    assert np.all(c.amplitudes == 1.0)
