"""Model settings as JSON (core/model_json.py): the shape sessions and marks share."""

from __future__ import annotations

import json

import pytest

from voxelscope.core.errors import InputError
from voxelscope.core.model import ModelSettings
from voxelscope.core.model_json import (
    FieldCheck,
    model_from_json,
    model_to_json,
    read_model_fields,
)


def test_round_trip_through_json_text():
    m = ModelSettings(contrast="tap", noise="ols", drop_volumes=3, confound_columns=("csf",))
    text = json.dumps(model_to_json(m))  # plain JSON data (json module of the standard library)
    assert model_from_json(json.loads(text), "m.json") == m


def test_every_problem_is_collected_and_the_default_kept():
    c = FieldCheck("s.json")
    m = read_model_fields({"noise": "loud", "derivatives": 7, "contrast": "tap"}, c, [])
    assert len(c.problems) == 2
    assert all(p.startswith("s.json: field 'model.") for p in c.problems)
    assert m.noise == ModelSettings().noise and m.contrast == "tap"


def test_the_first_problem_is_one_line_naming_the_place():
    with pytest.raises(InputError) as err:
        model_from_json({"derivatives": 7}, "marks.tsv", "line 3, column 'model'")
    msg = str(err.value)
    assert "\n" not in msg
    assert msg.startswith("marks.tsv: line 3, column 'model': field 'model.derivatives'")


def test_an_older_fir_setting_in_bins_still_reads():
    c = FieldCheck("old.json")
    m = read_model_fields({"fir_bins": 6, "fir_bin_s": 2.0}, c, [])
    assert c.problems == [] and m.fir_window_s == 12.0
