"""Plausible ranges of model settings, checked the same way on every way in.

The command line (options), sessions (``model.*`` fields) and the window use these ranges,
so an absurd value (``--fir-bin 1e9``, ``--highpass 1e-320``, ``--onset-shift nan``, a
session with ``fir_window_s`` 10^9) is one clear line instead of an allocation of terabytes or
a silent null fit. The bounds are generous: they exclude only values that cannot describe
an fMRI run (common practice: TRs of 0.1-10 s, runs of minutes to an hour, haemodynamic
responses lasting about 30 s).

Examples
--------
>>> setting_problem("fir_bin_s", 1e9)
'must be at most 600 s, not 1e+09'
>>> setting_problem("onset_shift_s", float("nan")) is not None
True
>>> setting_problem("highpass_s", 128.0) is None
True
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable
from typing import Any

from .errors import InputError
from .inputs import excerpt

__all__ = [
    "CONDITION_LIMIT",
    "CONTRAST_CHARS",
    "CONTRAST_COEFFICIENT",
    "RANGES",
    "check_settings",
    "setting_problem",
]

#: name -> (lowest, highest, unit, whole number?)
RANGES: dict[str, tuple[float, float, str, bool]] = {
    "highpass_s": (1.0, 1e6, "seconds", False),
    "onset_shift_s": (-1e5, 1e5, "seconds", False),
    "fir_window_s": (0.5, 600.0, "seconds", False),
    "fir_bin_s": (0.01, 600.0, "seconds", False),
    "tr": (0.01, 100.0, "seconds", False),
    "threshold": (0.0, 1e6, "", False),
    "opacity": (0.0, 1.0, "", False),
    "limit": (1e-12, 1e12, "", False),
}
#: Longest contrast expression accepted (characters).
CONTRAST_CHARS = 2000
#: Largest contrast coefficient accepted (absolute value).
CONTRAST_COEFFICIENT = 1e6
#: More conditions than this in one events file is summarised, not drawn one by one.
CONDITION_LIMIT = 200


def _fmt(v: float) -> str:
    return f"{v:g}"


def setting_problem(name: str, value: Any) -> str | None:
    """Why ``value`` is not a usable ``name`` (a phrase), or None when it is fine.

    ``None`` values are not checked here (they mean "the default" where allowed).
    """
    if value is None or name not in RANGES:
        return None
    lo, hi, unit, whole = RANGES[name]
    unit_text = " s" if unit == "seconds" else ""
    of_unit = f" of {unit}" if unit else ""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return f"must be a number{of_unit}, not {excerpt(repr(value))}"
    v = float(value)
    if not math.isfinite(v):
        return f"must be a finite number{of_unit}, not {value}"
    if whole and v != int(v):
        return f"must be a whole number, not {_fmt(v)}"
    if v < lo:
        return f"must be at least {_fmt(lo)}{unit_text}, not {_fmt(v)}"
    if v > hi:
        return f"must be at most {_fmt(hi)}{unit_text}, not {_fmt(v)}"
    return None


def check_settings(
    settings: Any,
    label: Callable[[str], str] = lambda name: name,
    names: Iterable[str] = ("highpass_s", "onset_shift_s", "fir_window_s", "fir_bin_s"),
) -> None:
    """Raise one :class:`InputError` line for the first setting out of range.

    Parameters
    ----------
    settings : object with the named attributes (``ModelSettings``)
    label : callable
        Turns a field name into the name the user knows (``--fir-bin``, ``model.fir_bin_s``).
    names : iterable of str
        Fields to check.

    Examples
    --------
    >>> from voxelscope.core.model import ModelSettings
    >>> check_settings(ModelSettings(fir_window_s=1e9), label=lambda n: "--" + n)
    Traceback (most recent call last):
    ...
    voxelscope.core.errors.InputError: --fir_window_s must be at most 600 s, not 1e+09
    """
    for name in names:
        problem = setting_problem(name, getattr(settings, name, None))
        if problem is not None:
            raise InputError(f"{label(name)} {problem}")
