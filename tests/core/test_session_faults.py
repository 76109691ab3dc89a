"""Fault injection on session files (voxelscope/core/session.py).

Each case is named for what it protects: every bad field is reported (one line per
problem, naming the file and the field), absurd numbers are refused with the same ranges as
the command line, deeply nested JSON is one line, and no message quotes more than a short
excerpt of what it could not use.
"""

from __future__ import annotations

import json

import pytest

from voxelscope.core import session as S
from voxelscope.core.errors import InputError


def _write(tmp_path, data) -> object:
    p = tmp_path / "s.voxelscope.json"
    p.write_text(data if isinstance(data, str) else json.dumps(data))
    return p


def _base(**changes):
    data = S.session_to_json(S.Session())
    for key, value in changes.items():
        section, _, field = key.partition("__")
        if field:
            data[section][field] = value
        else:
            data[section] = value
    return data


def test_every_bad_map_field_is_one_line_each(tmp_path):
    data = _base(map={"threshold": "abc", "opacity": 1e308, "colour_scale": "rainbow-x"})
    with pytest.raises(S.SessionInvalid) as info:
        S.load_session(_write(tmp_path, data))
    problems = info.value.problems
    assert len(problems) == 3
    assert "field 'map.threshold' must be a number" in problems[0]
    assert "field 'map.opacity' must be at most 1" in problems[1]
    assert "field 'map.colour_scale' is 'rainbow-x'; use one of CET-D1" in problems[2]
    assert all("s.voxelscope.json" in p and "\n" not in p for p in problems)


@pytest.mark.parametrize(
    ("change", "says"),
    [
        ({"voxel": [10**12, 0, 0]}, "field 'voxel' has an index above"),
        ({"model__fir_window_s": 1e9}, "field 'model.fir_window_s' must be at most 600 s"),
        ({"model__fir_bin_s": 1e9}, "field 'model.fir_bin_s' must be at most 600 s"),
        ({"model__onset_shift_s": 1e300}, "field 'model.onset_shift_s' must be at most"),
        ({"model__highpass_s": 1e-320}, "field 'model.highpass_s' must be at least 1 s"),
        ({"model__contrast": "t" * 5000}, "field 'model.contrast' is 5000 characters"),
        ({"map": {"source": "elsewhere"}}, "field 'map.source' is 'elsewhere'"),
        ({"map": {"stat": 3}}, "field 'map.stat' must be text"),
        ({"map": {"visible": "yes"}}, "field 'map.visible' must be true or false"),
        ({"map": {"limit": -1}}, "field 'map.limit' must be at least"),
        ({"map": {"kernel": "spline"}}, "field 'map.kernel' is 'spline'"),
        ({"marks": [{"x_mm": "nan", "y_mm": 0, "z_mm": 0}]}, "field 'marks' is not valid"),
        ({"files": {"run": {"path": 5}}}, "field 'files.run.path' must be text"),
        ({"kernels": {"gamma": {"wobble": 2.0}}}, "field 'kernels.gamma' is not valid"),
        ({"files": {"run": {"path": "r.nii", "size": -4}}}, "field 'files.run.size' must not"),
    ],
)
def test_absurd_values_are_refused(tmp_path, change, says):
    with pytest.raises(S.SessionInvalid) as info:
        S.load_session(_write(tmp_path, _base(**change)))
    assert any(says in p for p in info.value.problems), info.value.problems


def test_problems_are_capped(tmp_path):
    data = _base(files={f"r{n}": {"path": n} for n in range(100)})
    with pytest.raises(S.SessionInvalid) as info:
        S.load_session(_write(tmp_path, data))
    assert len(info.value.problems) == 20


def test_huge_text_in_a_field_is_quoted_as_an_excerpt(tmp_path):
    data = _base(model={"noise": "x" * 100_000})
    with pytest.raises(InputError) as info:
        S.load_session(_write(tmp_path, data))
    assert len(str(info.value)) < 300


def test_deeply_nested_session_is_one_line(tmp_path):
    p = _write(tmp_path, '{"schema": "voxelscope-session", "layout": ' + "[" * 200_000)
    with pytest.raises(InputError, match="nests deeper than 64 levels") as info:
        S.load_session(p)
    assert "\n" not in str(info.value)


def test_window_fields_in_map_are_kept(tmp_path):
    data = _base(map={"threshold": 2.5, "two_sided": True})
    loaded = S.load_session(_write(tmp_path, data))
    assert loaded.session.map == {"threshold": 2.5, "two_sided": True}


def test_changed_input_is_a_digest_problem_before_it_is_read(tmp_path):
    from voxelscope.core.outputs import forget_inputs, noted_inputs

    ev = tmp_path / "events.tsv"
    ev.write_text("onset\tduration\n0\t1\n")
    p = S.save_session(S.Session(files={"events": ev}), tmp_path / "v.voxelscope.json")
    ev.write_text("onset\tduration\n0\t2\n")
    forget_inputs()
    loaded = S.load_session(p)
    assert [q.kind for q in loaded.problems] == ["digest"]
    assert "has changed since the session was saved" in loaded.problems[0].message
    assert ev.resolve() not in noted_inputs()  # hashed, not parsed
