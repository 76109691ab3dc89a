"""Model settings as plain JSON data, and the field checker that reads them.

Sessions (``session.py``) keep the model as their ``model`` object and marks
(``marks.py``) keep a mark's model as one JSON cell; both write with
:func:`model_to_json` and read with :func:`model_from_json` (one line for the first
problem) or :func:`read_model_fields` (every problem collected, defaults kept). Living
here, apart from both, the two modules do not import each other for it.

Examples
--------
>>> from voxelscope.core.model import ModelSettings
>>> m = model_from_json(model_to_json(ModelSettings(contrast="tap")), "m.json")
>>> m.contrast
'tap'
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import fields
from typing import Any

from .errors import InputError
from .hrf import KERNEL_NAMES
from .inputs import excerpt
from .limits import CONTRAST_CHARS, setting_problem
from .model import ModelSettings

__all__ = ["MAX_PROBLEMS", "FieldCheck", "model_from_json", "model_to_json", "read_model_fields"]

#: Most problems listed for one file.
MAX_PROBLEMS = 20


class FieldCheck:
    """Field validation with messages that name the file and the field."""

    def __init__(self, source: str) -> None:
        self.source = source
        self.problems: list[str] = []

    def collect(self, fn: Callable[[], Any], default: Any = None) -> Any:
        """Run one field's check; a problem is recorded and ``default`` returned."""
        try:
            return fn()
        except InputError as err:
            if len(self.problems) < MAX_PROBLEMS:
                self.problems.append(str(err))
            return default

    def fail(self, fieldname: str, what: str) -> InputError:
        return InputError(
            f"{self.source}: field '{fieldname}' {what}; fix it or save the session again"
        )

    def obj(self, v: Any, name: str) -> dict[str, Any]:
        if not isinstance(v, dict):
            raise self.fail(name, "must be an object")
        return v

    def number(self, v: Any, name: str, allow_none: bool = False) -> float | None:
        if v is None and allow_none:
            return None
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise self.fail(
                name, f"must be a number{' or null' if allow_none else ''}, not {excerpt(repr(v))}"
            )
        return float(v)

    def integer(self, v: Any, name: str) -> int:
        if isinstance(v, bool) or not isinstance(v, int):
            raise self.fail(name, f"must be a whole number, not {excerpt(repr(v))}")
        return int(v)

    def text(self, v: Any, name: str, allow_none: bool = False) -> str | None:
        if v is None and allow_none:
            return None
        if not isinstance(v, str):
            raise self.fail(
                name, f"must be text{' or null' if allow_none else ''}, not {excerpt(repr(v))}"
            )
        return v

    def texts(self, v: Any, name: str, allow_none: bool = False) -> tuple[str, ...] | None:
        if v is None and allow_none:
            return None
        if not isinstance(v, list) or not all(isinstance(x, str) for x in v):
            raise self.fail(name, "must be a list of text")
        return tuple(v)


def read_model_fields(d: dict[str, Any], c: FieldCheck, warnings: list[str]) -> ModelSettings:
    """Model settings; each bad field is one problem in ``c`` (and the default is kept)."""
    known = {f.name for f in fields(ModelSettings)}
    for k in sorted(set(d) - known - {"fir_bins"}):
        warnings.append(f"{c.source}: unknown model setting '{excerpt(k)}' ignored")
    kw: dict[str, Any] = {}

    def kernels() -> tuple[str, ...]:
        ks = c.texts(d["kernels"], "model.kernels")
        bad = [excerpt(k) for k in ks if k.lower() not in KERNEL_NAMES]
        if bad or not ks:
            raise c.fail(
                "model.kernels",
                f"has unknown kernel(s) {', '.join(bad[:5])}; use {', '.join(KERNEL_NAMES)}"
                if bad
                else "is empty; list at least one kernel",
            )
        return ks

    def contrast() -> str | None:
        text = c.text(d["contrast"], "model.contrast", allow_none=True)
        if text is not None and len(text) > CONTRAST_CHARS:
            raise c.fail("model.contrast", f"is {len(text)} characters long")
        return text

    def noise() -> str:
        value = c.text(d["noise"], "model.noise")
        if value not in ("arp", "ols", "ar1"):
            raise c.fail("model.noise", f"must be 'arp', 'ols' or 'ar1', not '{excerpt(value)}'")
        return value

    def ranged(name: str, integer: bool = False, allow_none: bool = False):
        def check():
            where = f"model.{name}"
            v = d[name]
            if v is None and allow_none:
                return None
            v = c.integer(v, where) if integer else c.number(v, where)
            problem = setting_problem(name, v)
            if problem is not None:
                raise c.fail(where, problem)
            return v

        return check

    def derivatives() -> int:
        der = c.integer(d["derivatives"], "model.derivatives")
        if der not in (0, 1, 2):
            raise c.fail("model.derivatives", f"must be 0, 1 or 2, not {der}")
        return der

    def drop_volumes():
        dv = c.integer(d["drop_volumes"], "model.drop_volumes")
        if dv < 0:
            raise c.fail("model.drop_volumes", "must be 0 or more volumes")
        return dv

    def censor_fd_mm():
        fd = c.number(d["censor_fd_mm"], "model.censor_fd_mm", allow_none=True)
        if fd is not None and fd <= 0:
            raise c.fail("model.censor_fd_mm", "must be a positive number of mm or null")
        return fd

    def orthogonalize() -> bool:
        if not isinstance(d["orthogonalize"], bool):
            raise c.fail("model.orthogonalize", "must be true or false")
        return d["orthogonalize"]

    checks = {
        "kernels": kernels,
        "contrast": contrast,
        "noise": noise,
        "highpass_s": ranged("highpass_s", allow_none=True),
        "confound_columns": lambda: c.texts(
            d["confound_columns"], "model.confound_columns", allow_none=True
        ),
        "onset_shift_s": ranged("onset_shift_s"),
        "derivatives": derivatives,
        "fir_window_s": ranged("fir_window_s"),
        "fir_bin_s": ranged("fir_bin_s", allow_none=True),
        "drop_volumes": drop_volumes,
        "censor_fd_mm": censor_fd_mm,
        "modulators": lambda: c.texts(d["modulators"], "model.modulators"),
        "orthogonalize": orthogonalize,
    }
    bad = object()
    for name, check in checks.items():
        if name in d:
            value = c.collect(check, bad)
            if value is not bad:
                kw[name] = value
    for name in sorted(known - set(checks)):  # fields added later: passed on as given
        if name in d:
            kw[name] = tuple(d[name]) if isinstance(d[name], list) else d[name]
    if "fir_bins" in d and "fir_window_s" not in d:
        # sessions written before the FIR window was given in seconds: bins x bin width
        nb = c.collect(ranged("fir_bins", integer=True), bad)
        if nb is not bad and nb and kw.get("fir_bin_s"):
            window = float(nb) * float(kw["fir_bin_s"])
            if setting_problem("fir_window_s", window) is None:
                kw["fir_window_s"] = window
    try:
        return ModelSettings(**kw)
    except (TypeError, ValueError, InputError) as err:
        c.problems.append(f"{c.source}: field 'model' is not valid ({excerpt(err, 80)})")
        return ModelSettings()


def model_to_json(m: ModelSettings) -> dict[str, Any]:
    """Model settings as plain JSON data (the session's ``model`` object).

    >>> model_to_json(ModelSettings(contrast="tap"))["contrast"]
    'tap'
    """
    out: dict[str, Any] = {}
    for f in fields(ModelSettings):
        v = getattr(m, f.name)
        out[f.name] = list(v) if isinstance(v, tuple) else v
    return out


def model_from_json(d: Any, source: str, where: str = "model") -> ModelSettings:
    """Model settings from plain JSON data, checked field by field like a session's
    ``model``; the first problem is one :class:`InputError` line naming ``where``.
    Unknown fields are ignored (settings of a later version).

    >>> model_from_json({"contrast": "tap", "noise": "ols"}, "m.tsv").noise
    'ols'
    >>> model_from_json({"noise": "loud"}, "m.tsv", "line 2, column 'model'")
    Traceback (most recent call last):
    ...
    voxelscope.core.errors.InputError: m.tsv: line 2, column 'model': field 'model.noise' must be 'arp', 'ols' or 'ar1', not 'loud'; fix it or leave the mark's model out
    """  # noqa: E501
    if not isinstance(d, dict):
        raise InputError(f"{source}: {where} must be an object of model settings")
    c = FieldCheck(source)
    model = read_model_fields(d, c, [])
    if c.problems:
        first = c.problems[0]
        prefix = f"{source}: "
        first = first[len(prefix) :] if first.startswith(prefix) else first
        first = first.replace("; fix it or save the session again", "")
        raise InputError(f"{source}: {where}: {first}; fix it or leave the mark's model out")
    return model
