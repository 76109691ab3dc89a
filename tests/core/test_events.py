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
from voxelscope.core.events import (
    Condition,
    events_sanity,
    load_events,
    modulator_values,
    read_events,
    scale_conditions,
    shift_conditions,
)


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


def test_no_trial_type_gives_one_condition_named_after_the_task(tmp_path):
    conds = read_events(_write(tmp_path, "onset\tduration\n0\t10\n40\t10\n"))
    assert [c.name for c in conds] == ["tonetap"]  # the BIDS task- label of the file name
    assert conds[0].n_events == 2
    plain = read_events(_write(tmp_path, "onset\tduration\n0\t10\n", name="onsets.tsv"))
    assert [c.name for c in plain] == ["task"]


def test_numeric_columns_are_kept_per_event_with_nan_for_na(tmp_path):
    text = (
        "onset\tduration\ttrial_type\tgain\tRT\tside\n"
        "0\t2\tgamble\t10\t0.5\tL\n20\t2\tgamble\t30\tn/a\tR\n40\t2\tcue\tn/a\tn/a\tL\n"
    )
    ev = load_events(_write(tmp_path, text))
    g, c = ev.conditions
    assert_allclose(g.columns["gain"], [10, 30])
    assert np.isnan(g.columns["RT"][1]) and g.carries("RT") and not c.carries("RT")
    assert ev.numeric_columns == ("gain", "RT")
    assert ev.condition_candidates == ("trial_type", "side")
    assert_allclose(g.amplitudes, [1, 1])  # amplitudes stay 1; modulators are separate


def test_condition_column_choice(tmp_path):
    text = "onset\tduration\ttrial_type\tside\n0\t2\tgo\tL\n20\t2\tgo\tR\n40\t2\tgo\tL\n"
    p = _write(tmp_path, text)
    assert [c.name for c in read_events(p, condition_column="side")] == ["L", "R"]
    assert [c.name for c in read_events(p, condition_column="none")] == ["tonetap"]
    with pytest.raises(InputError) as err:
        read_events(p, condition_column="hand")
    msg = str(err.value)
    assert "'hand'" in msg and "side" in msg and "condition column" in msg and "\n" not in msg
    assert err.value.remedy == "condition_column"


def test_na_durations_are_brief_with_one_counted_note(tmp_path):
    text = "onset\tduration\n0\tn/a\n10\tn/a\n20\t3\n"
    ev = load_events(_write(tmp_path, text))
    assert_allclose(ev.conditions[0].durations, [0, 0, 3])
    assert len(ev.warnings) == 1 and "2 event(s) have duration n/a" in ev.warnings[0]


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


def test_na_duration_is_brief_and_na_trial_type_is_the_task(tmp_path):
    conds = read_events(_write(tmp_path, "onset\tduration\ttrial_type\n5\tn/a\tn/a\n"))
    assert conds[0].name == "tonetap"
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


# ----------------------------------------------------------------------------- modulators


def test_modulator_centring_against_hand_values():
    """Centring over the condition's events (common practice): value minus the mean of the
    condition's non-missing values; n/a takes the mean (0). Expected values by hand."""
    nan = float("nan")
    c = Condition("gamble", [0, 8, 16, 24, 32], [3] * 5, columns={"gain": [10, 20, nan, 40, 30]})
    mods, notes = modulator_values(c, ["gain"])
    # mean of 10, 20, 40, 30 = 25
    assert mods[0][0] == "gain"
    assert_allclose(mods[0][1], [-15, -5, 0, 15, 5], atol=1e-12)
    assert notes == [
        "condition 'gamble': modulator 'gain' is n/a for 1 of 5 events; they keep the main "
        "regressor and take the condition's mean"
    ]


def test_constant_and_absent_modulators():
    c = Condition("cue", [0, 10, 20], [1] * 3, columns={"gain": [5, 5, 5], "loss": [1, 2, 3]})
    mods, notes = modulator_values(c, ["gain", "loss", "RT"])
    assert [m for m, _v in mods] == ["loss"]  # RT is not carried: skipped silently
    assert len(notes) == 1 and "'gain'" in notes[0] and "left out" in notes[0]
    assert "(5)" in notes[0]


def test_serial_orthogonalisation_against_least_squares():
    """With orthogonalize, the second modulator is the residual of its centred values on the
    first's (reference: numpy.linalg.lstsq, an independent least-squares solver); without it
    the centred values are unchanged."""
    rng = np.random.default_rng(4)
    gain = rng.normal(20, 5, 30)
    loss = 0.6 * gain + rng.normal(0, 2, 30)
    c = Condition("g", np.arange(30) * 10.0, np.full(30, 3.0), columns={"gain": gain, "loss": loss})
    plain, _ = modulator_values(c, ["gain", "loss"])
    assert_allclose(plain[1][1], loss - loss.mean(), atol=1e-12)
    orth, notes = modulator_values(c, ["gain", "loss"], orthogonalize=True)
    assert notes == []
    g0 = gain - gain.mean()
    coef = np.linalg.lstsq(np.column_stack([np.ones(30), gain]), loss, rcond=None)[0]
    resid = loss - np.column_stack([np.ones(30), gain]) @ coef
    assert_allclose(orth[0][1], g0, atol=1e-12)
    assert_allclose(orth[1][1], resid, atol=1e-10)
    dup = Condition("g", [0, 10, 20], [1] * 3, columns={"a": [1, 2, 4], "b": [2, 4, 8]})
    kept, notes = modulator_values(dup, ["a", "b"], orthogonalize=True)
    assert [m for m, _v in kept] == ["a"] and "nothing is left" in notes[0]


# ----------------------------------------------------------------------------- sanity


def test_sanity_volume_numbers_named_with_the_tr_factor():
    c = Condition("a", np.arange(5.0, 95.0, 10.0), np.full(9, 2.0))
    w = events_sanity([c], 100, 2.0)
    assert len(w) == 1 and "volume numbers" in w[0] and "2 s" in w[0]
    assert "--onset-unit volumes" in w[0]
    # the same numbers converted to seconds are fine
    assert events_sanity(scale_conditions([c], 2.0), 100, 2.0) == []
    # seconds that fill the run are not volume numbers; neither are fractional onsets
    assert events_sanity([Condition("a", np.arange(5.0, 195.0, 10.0), [2] * 19)], 100, 2.0) == []
    assert events_sanity([Condition("a", np.arange(5.5, 95, 10.0), [2] * 9)], 100, 2.0) == []


def test_sanity_counts_each_kind_in_one_line():
    a = Condition("tone", [-3.0, 10.0, 12.0, 250.0], [5.0, 5.0, 5.0, 5.0])
    b = Condition("tap", [195.0, 260.0], [10.0, 2.0])
    w = events_sanity([a, b], 100, 2.0)
    assert len(w) == 4
    assert w[0].startswith("1 event(s) start before the first volume") and "'tone'" in w[0]
    assert w[1].startswith("2 event(s) start after the run ends (200 s;")
    assert w[2].startswith("1 event(s) run past the end of the run") and "'tap'" in w[2]
    assert w[3].startswith("1 event(s) overlap the previous event") and "'tone'" in w[3]
    assert all("\n" not in line for line in w)


def test_default_condition_follows_the_events_sidecar_levels(tmp_path):
    """One rule for the default contrast: the events sidecar's Levels order (BIDS), found
    beside the file or inherited from the dataset root; else the file's first condition."""
    from voxelscope.core.events import default_condition, load_events

    root = tmp_path / "study"
    func = root / "sub-01" / "func"
    func.mkdir(parents=True)
    (root / "dataset_description.json").write_text('{"Name": "x", "BIDSVersion": "1.8.0"}')
    ev = func / "sub-01_task-tt_run-1_events.tsv"
    ev.write_text("onset\tduration\ttrial_type\n0\t5\ttap\n20\t5\ttone\n")
    got = load_events(ev)
    assert got.levels == () and default_condition([c.name for c in got.conditions]) == "tap"
    (root / "task-tt_events.json").write_text(
        '{"trial_type": {"Levels": {"tone": "listen", "tap": "tap", "rest": "none"}}}'
    )
    got = load_events(ev)
    assert got.levels == ("tone", "tap", "rest")
    assert default_condition([c.name for c in got.conditions], got.levels) == "tone"
    (root / "task-other_events.json").write_text('{"trial_type": {"Levels": {"tap": "x"}}}')
    assert load_events(ev).levels[0] == "tone"  # another task's sidecar does not apply
    (func / "sub-01_task-tt_run-1_events.json").write_text("{not json")
    got = load_events(ev)
    assert got.levels == () and any("condition order is not used" in w for w in got.warnings)
