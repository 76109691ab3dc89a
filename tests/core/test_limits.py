"""Tests of the plausible ranges of model settings (voxelscope/core/limits.py).

The ranges are facts of the trade (common practice): TRs of 0.1-10 s, FIR windows of tens
of seconds, high-pass cutoffs of about 100 s; the bounds only exclude what cannot describe a
run. Hypothesis checks that any float gives a phrase or None, never an exception.
"""

from __future__ import annotations

import math

import pytest
from hypothesis import given
from hypothesis import strategies as st

from voxelscope.core.errors import InputError
from voxelscope.core.limits import RANGES, check_settings, setting_problem
from voxelscope.core.model import ModelSettings


@given(st.sampled_from(sorted(RANGES)), st.floats(allow_nan=True, allow_infinity=True))
def test_any_float_gives_a_phrase_or_none(name, value):
    problem = setting_problem(name, value)
    lo, hi, _, whole = RANGES[name]
    ok = math.isfinite(value) and lo <= value <= hi and (not whole or value == int(value))
    assert (problem is None) == ok


@pytest.mark.parametrize("value", ["abc", [1], {"a": 1}, True])
def test_non_numbers_are_named(value):
    assert "must be a number" in setting_problem("threshold", value)


def test_defaults_pass():
    check_settings(ModelSettings())


def test_first_problem_is_raised_with_the_users_name():
    with pytest.raises(InputError, match=r"model\.fir_bin_s must be at most 600 s"):
        check_settings(ModelSettings(fir_bin_s=1e9), label=lambda n: f"model.{n}")
