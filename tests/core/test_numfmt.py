"""The one rule for writing numbers for people (voxelscope/core/numfmt.py).

References: the rule itself is ours, written down in DEVELOPERS.md; two decimals for test
statistics (t, z, F) and p values written exactly down to 0.001 are common practice in
journal tables (from memory of common journal style guides); Python's own ``float`` parsing
is the outside check that every text reads back as the number it stands for.
"""

from __future__ import annotations

import math
import re
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st

from voxelscope.core.numfmt import KINDS, MISSING, format_seconds, format_value, format_xyz

finite = st.floats(allow_nan=False, allow_infinity=False, min_value=-1e12, max_value=1e12)


@pytest.mark.parametrize(
    ("kind", "x", "text"),
    [
        ("t", 4.56789, "4.57"),
        ("t", -0.004, "0.00"),  # no "-0.00"
        ("z", 3.0, "3.00"),
        ("F", 123.456, "123.46"),
        ("p", 0.5, "0.500"),
        ("p", 0.04234, "0.0423"),
        ("p", 0.001, "0.00100"),
        ("p", 0.000999, "9.99e-04"),
        ("p", 1.234e-12, "1.23e-12"),
        ("p", 0.0, "0"),
        ("estimate", 12.345, "12.3"),
        ("estimate", 0.045, "0.0450"),
        ("estimate", 99.96, "100"),
        ("estimate", 1234.56, "1235"),
        ("estimate", 2.5e-5, "2.50e-05"),
        ("variance", 3.2e7, "3.20e+07"),
        ("r", 0.99849, "0.998"),
        ("df", 298.0, "298"),
        ("df", 87.37, "87.4"),
        ("psc", 0.854, "0.85"),
        ("s", 1.25, "1.25"),
        ("s", 128.0, "128"),
        ("s", 0.7349, "0.735"),
        ("mm", -12, "-12.0"),
    ],
)
def test_examples_of_the_rule(kind, x, text):
    assert format_value(kind, x) == text


@pytest.mark.parametrize("bad", [None, math.nan, math.inf, -math.inf, "x"])
def test_missing_values_are_one_dash(bad):
    for kind in KINDS:
        assert format_value(kind, bad) == MISSING


def test_unknown_kind_is_refused():
    with pytest.raises(ValueError, match="unknown kind"):
        format_value("tstat", 1.0)


def test_signed_and_units():
    assert format_value("s", 2.0, signed=True) == "+2"
    assert format_value("s", 0.0, signed=True) == "0"
    assert format_value("t", -1.5, signed=True) == "-1.50"
    assert format_seconds(-0.5, signed=True) == "-0.5 s"
    assert format_xyz((1, -2.26, 3.04)) == "(1.0, -2.3, 3.0)"


@given(finite)
def test_fixed_decimals_read_back_within_half_a_unit(x):
    # float() of the text is the outside check: the text is the number, rounded once
    for kind, decimals in (("t", 2), ("r", 3), ("mm", 1), ("s", 3)):
        assert abs(float(format_value(kind, x)) - x) <= 0.5 * 10**-decimals * (
            1 + 1e-9
        ) + 1e-12 * abs(x)


@given(finite)
def test_significant_digits_read_back_to_three_digits(x):
    for kind in ("estimate", "variance", "p"):
        if kind == "p" and not 0 <= x <= 1:
            continue
        back = float(format_value(kind, x))
        # three significant digits: relative error at most half a unit in the third digit
        # (whole numbers from 100 on keep more digits, never fewer)
        assert abs(back - x) <= 5e-3 * abs(x) + 1e-300


def test_scientific_only_where_the_rule_says():
    assert "e" not in format_value("estimate", 0.001)
    assert "e" in format_value("estimate", 0.000999)
    assert "e" not in format_value("estimate", 999_999.0)
    assert "e" in format_value("estimate", 1e6)
    assert "e" not in format_value("t", 1e7)  # test statistics never go scientific


# Modules that write results for people: each uses core/numfmt.py, and no format spec of
# its own for these quantities remains (a grep that can fail).
_RESULT_WRITERS = [
    "voxelscope/gui/fits.py",
    "voxelscope/gui/findings.py",
    "voxelscope/gui/marks_panel.py",
    "voxelscope/gui/checks_panel.py",
    "voxelscope/gui/slices.py",
    "voxelscope/gui/agreement_panel.py",
    "voxelscope/core/combine.py",
    "voxelscope/cli/map.py",
    "voxelscope/cli/fit.py",
    "voxelscope/core/report.py",
    "voxelscope/core/runs_report.py",
]
_SPEC = re.compile(r"""(\{[^{}]*:[+ ]?\d*\.\d+[fge%]\}|format\([^)]*["']\.\d+[fge]["']\))""")


@pytest.mark.parametrize("module", _RESULT_WRITERS)
def test_result_writers_use_the_one_rule(module):
    text = (Path(__file__).resolve().parents[2] / module).read_text(encoding="utf-8")
    assert "numfmt" in text
    assert _SPEC.findall(text) == []
