"""One rule for writing numbers for people: the window, the command line and reports.

Every result a person reads (a Fits cell, a line of ``voxelscope fit``, a report table, a
sentence of Checks) is written by :func:`format_value` with the kind of quantity it is.
Machine-readable outputs (CSV, JSON, NIfTI) keep full precision and do not come here.

The rule (documented in DEVELOPERS.md, "Numbers for people"):

============  =======================================================  ====================
kind          rule                                                     examples
============  =======================================================  ====================
``estimate``  3 significant digits; whole number from 100 on;          ``1.23``, ``0.0450``,
``variance``  scientific below 0.001 and from 1e6                      ``1234``, ``2.50e-05``
``value``     (any other estimate: the same rule)
``t`` ``z``   2 decimals                                               ``4.57``, ``-0.08``
``F`` ``Q``   (test statistics)
``p``         3 significant digits from 0.001; scientific below        ``0.0423``, ``0.500``,
              (``1.23e-05``); 0 when it underflows                     ``1.23e-05``
``r``         3 decimals (bounded quantities: r, R², rho,              ``0.998``, ``-0.120``
              AR coefficients)
``df``        whole number, or 1 decimal when not whole                ``298``, ``87.4``
``psc``       2 decimals (percent signal change, without ``%``)        ``0.85``
``s``         at most 3 decimals (a millisecond), trailing zeros       ``0.735``, ``128``
              dropped (seconds)
``mm``        1 decimal (millimetres; coordinates and distances)       ``-12.0``, ``3.5``
============  =======================================================  ====================

A missing or non-finite value is an en dash. Negative numbers use the ASCII hyphen-minus, so
text stays plain and copyable. Signs are shown only when asked (``signed=True``), for changes
such as an onset shift.

Examples
--------
>>> format_value("t", 4.56789), format_value("p", 0.00001234), format_value("estimate", 12.345)
('4.57', '1.23e-05', '12.3')
>>> format_value("s", 128.0), format_value("mm", -12), format_value("df", 298.0)
('128', '-12.0', '298')
>>> format_value("estimate", None)
'–'
"""

from __future__ import annotations

import math
from collections.abc import Iterable

__all__ = ["KINDS", "MISSING", "count", "format_seconds", "format_value", "format_xyz", "stat_kind"]

MISSING = "–"

_SIGNIFICANT = ("estimate", "variance", "value")
_TWO_DECIMALS = ("t", "z", "F", "Q", "psc")
KINDS = frozenset((*_SIGNIFICANT, *_TWO_DECIMALS, "p", "r", "df", "s", "mm"))


def _significant(v: float, digits: int = 3) -> str:
    """``digits`` significant digits without an exponent between 0.001 and 1e6."""
    a = abs(v)
    if a == 0.0:
        return "0"
    if a < 1e-3 or a >= 1e6:
        return f"{v:.{digits - 1}e}"
    if a >= 10 ** (digits - 1):
        return f"{v:.0f}"
    decimals = digits - 1 - math.floor(math.log10(a))
    text = f"{v:.{decimals}f}"
    # 9.996 rounds to "10.00": one digit too many after the carry
    if len(text.lstrip("-").replace(".", "").lstrip("0")) > digits and decimals > 0:
        text = f"{v:.{decimals - 1}f}"
    return text


def format_value(kind: str, x: object, signed: bool = False) -> str:
    """Text of one number of a given kind, by the project's one rule.

    Parameters
    ----------
    kind
        One of ``KINDS``: ``estimate``, ``variance``, ``value``, ``t``, ``z``, ``F``, ``Q``,
        ``p``, ``r``, ``df``, ``psc``, ``s``, ``mm``.
    x
        A number (anything ``float`` accepts), ``None`` or NaN (written as ``MISSING``).
    signed
        Write a ``+`` before positive values (changes, shifts).

    Returns
    -------
    str

    Examples
    --------
    >>> [format_value("p", v) for v in (0.5, 0.04234, 0.001, 0.000999, 0.0)]
    ['0.500', '0.0423', '0.00100', '9.99e-04', '0']
    >>> [format_value("estimate", v) for v in (0.045, 2.5, 99.96, 1234.5, 2.5e-5, -3.14159)]
    ['0.0450', '2.50', '100', '1234', '2.50e-05', '-3.14']
    >>> format_value("s", 1.25), format_value("s", 0.5), format_value("s", 2.0, signed=True)
    ('1.25', '0.5', '+2')
    >>> format_value("r", 0.99849), format_value("df", 87.37), format_value("t", float("inf"))
    ('0.998', '87.4', '–')
    """
    if kind not in KINDS:
        raise ValueError(f"unknown kind of number {kind!r}; one of {', '.join(sorted(KINDS))}")
    if x is None:
        return MISSING
    try:
        v = float(x)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return MISSING
    if not math.isfinite(v):
        return MISSING
    if v == 0.0:
        v = 0.0  # no "-0.00"
    if kind in _SIGNIFICANT:
        text = _significant(v)
    elif kind in _TWO_DECIMALS:
        text = f"{v:.2f}"
    elif kind == "p":
        text = "0" if v == 0.0 else (_significant(v) if v >= 1e-3 else f"{v:.2e}")
    elif kind == "r":
        text = f"{v:.3f}"
    elif kind == "df":
        text = f"{v:.0f}" if v == round(v) else f"{v:.1f}"
    elif kind == "s":
        text = f"{v:.3f}".rstrip("0").rstrip(".")
    else:  # mm
        text = f"{v:.1f}"
    if text.startswith("-") and text.strip("-0.") == "":
        text = text[1:]  # a tiny negative value that rounds to zero
    if signed and not text.startswith("-") and text != MISSING and float(text) != 0.0:
        text = "+" + text
    return text


def format_seconds(x: object, signed: bool = False) -> str:
    """Seconds with their unit, e.g. ``"1.25 s"`` (``format_value("s", x)`` plus ``" s"``).

    >>> format_seconds(128), format_seconds(-1.25, signed=True), format_seconds(None)
    ('128 s', '-1.25 s', '–')
    """
    text = format_value("s", x, signed=signed)
    return text if text == MISSING else f"{text} s"


def format_xyz(values: Iterable[object], kind: str = "mm") -> str:
    """A coordinate triple, e.g. ``"(12.0, -4.5, 30.0)"``.

    >>> format_xyz((12, -4.54, 30.0))
    '(12.0, -4.5, 30.0)'
    """
    return "(" + ", ".join(format_value(kind, v) for v in values) + ")"


def stat_kind(stat: str) -> str:
    """Kind of number of a map statistic (``t``, ``z``, ``F``, ``estimate``, ``variance``,
    ``p``...); ``value`` for any other.

    >>> stat_kind("t"), stat_kind("estimate"), stat_kind("neglog10p")
    ('t', 'estimate', 'value')
    """
    return stat if stat in KINDS else "value"


def count(n: int, word: str, plural: str | None = None) -> str:
    """``n`` and ``word`` with the English plural rule: one voxel, two voxels, 0 voxels.

    Examples
    --------
    >>> count(1, "voxel"), count(3, "voxel"), count(0, "run"), count(2, "match", "matches")
    ('1 voxel', '3 voxels', '0 runs', '2 matches')
    >>> count(1, "kept volume")
    '1 kept volume'
    """
    return f"{n} {word if n == 1 else (plural or word + 's')}"
