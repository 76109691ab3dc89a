"""Experimental conditions from a BIDS ``events.tsv`` file.

The BIDS specification puts ``onset`` and ``duration`` in seconds, with ``trial_type``
optional. Without ``trial_type`` every event belongs to one condition called ``task``.
A duration of 0 means a brief event. An amplitude column can be chosen by name
(``amplitude_column=``); otherwise every event has amplitude 1.

Examples
--------
>>> import io
>>> text = "onset\\tduration\\ttrial_type\\n0\\t15\\ttone\\n30\\t15\\ttap\\n"
>>> conds = parse_events(io.StringIO(text), source="demo_events.tsv")
>>> [c.name for c in conds]
['tone', 'tap']
>>> conds[1].onsets
array([30.])
"""

from __future__ import annotations

import csv
import io
import math
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .errors import InputError
from .inputs import excerpt

__all__ = ["Condition", "check_events_in_run", "parse_events", "read_events", "shift_conditions"]

_MISSING = {"", "n/a", "na", "nan"}


@dataclass(frozen=True, eq=False)
class Condition:
    """One condition: its events' onsets, durations (seconds) and amplitudes."""

    name: str
    onsets: np.ndarray
    durations: np.ndarray
    amplitudes: np.ndarray = field(default=None)  # type: ignore[assignment]

    def __post_init__(self) -> None:
        on = np.asarray(self.onsets, dtype=float).reshape(-1)
        du = np.asarray(self.durations, dtype=float).reshape(-1)
        am = (
            np.ones_like(on)
            if self.amplitudes is None
            else np.asarray(self.amplitudes, dtype=float).reshape(-1)
        )
        if not (on.shape == du.shape == am.shape):
            raise InputError(
                f"condition '{self.name}': onsets, durations and amplitudes differ in length"
            )
        for a in (on, du, am):
            a.setflags(write=False)
        object.__setattr__(self, "onsets", on)
        object.__setattr__(self, "durations", du)
        object.__setattr__(self, "amplitudes", am)

    @property
    def n_events(self) -> int:
        return int(self.onsets.size)

    def key(self) -> tuple:
        """Hashable content, for caching designs."""
        return (
            self.name,
            self.onsets.tobytes(),
            self.durations.tobytes(),
            self.amplitudes.tobytes(),
        )

    def __eq__(self, other: object) -> bool:
        return isinstance(other, Condition) and self.key() == other.key()

    def __hash__(self) -> int:
        return hash(self.key())


def _names(header: list[str], most: int = 12) -> str:
    """Column names for a message: short printable excerpts, at most ``most`` of them."""
    if not header:
        return "none"
    shown = ", ".join(excerpt(h) for h in header[:most])
    return shown + (f" and {len(header) - most} more" if len(header) > most else "")


def _number(cell: str, path: str, row: int, column: str) -> float:
    try:
        value = float(cell)
    except ValueError:
        raise InputError(
            f"{path}: row {row}, column '{column}' is '{excerpt(cell)}', not a number; "
            f"give {column} in seconds"
        ) from None
    if not math.isfinite(value):
        raise InputError(f"{path}: row {row}, column '{column}' is not a finite number")
    return value


def parse_events(
    stream: Iterable[str] | io.TextIOBase,
    source: str = "events.tsv",
    amplitude_column: str | None = None,
) -> list[Condition]:
    """Parse tab-separated events text into conditions, in order of first appearance.

    Parameters
    ----------
    stream : text stream or iterable of lines
    source : str
        File name used in error messages.
    amplitude_column : str, optional
        Column giving each event's amplitude (e.g. a parametric modulator).

    Raises
    ------
    InputError
        Missing or non-numeric ``onset``/``duration``, negative durations, an unknown
        amplitude column, or no events at all.
    """
    # split lines ourselves: a lone carriage return inside a cell would stop the csv module
    text = stream.read() if hasattr(stream, "read") else "".join(stream)
    reader = csv.reader(text.splitlines(), delimiter="\t")
    try:
        header = [h.strip() for h in next(reader)]
    except StopIteration:
        raise InputError(
            f"{source}: the file is empty; it needs a header row with onset and duration"
        ) from None
    for needed in ("onset", "duration"):
        if needed not in header:
            raise InputError(
                f"{source}: no '{needed}' column (found: {_names(header)}); "
                "a BIDS events file needs tab-separated onset and duration columns in seconds"
            )
    i_on, i_du = header.index("onset"), header.index("duration")
    i_tt = header.index("trial_type") if "trial_type" in header else None
    i_am = None
    if amplitude_column is not None:
        if amplitude_column not in header:
            raise InputError(
                f"{source}: no amplitude column '{excerpt(amplitude_column)}' "
                f"(found: {_names(header)})"
            )
        i_am = header.index(amplitude_column)

    by_name: dict[str, list[tuple[float, float, float]]] = {}
    for row_no, row in enumerate(reader, start=2):
        if not row or all(not c.strip() for c in row):
            continue
        if len(row) < len(header):
            row = row + [""] * (len(header) - len(row))
        on_cell, du_cell = row[i_on].strip(), row[i_du].strip()
        if on_cell.lower() in _MISSING:
            raise InputError(
                f"{source}: row {row_no} has no onset; every event needs an onset in seconds"
            )
        onset = _number(on_cell, source, row_no, "onset")
        duration = (
            0.0 if du_cell.lower() in _MISSING else _number(du_cell, source, row_no, "duration")
        )
        if duration < 0:
            raise InputError(
                f"{source}: row {row_no} has a negative duration ({duration:g} s); "
                "durations must be >= 0"
            )
        amp = 1.0
        if i_am is not None:
            cell = row[i_am].strip()
            amp = (
                0.0 if cell.lower() in _MISSING else _number(cell, source, row_no, amplitude_column)
            )
        name = "task" if i_tt is None else (row[i_tt].strip() or "task")
        if name.lower() == "n/a":
            name = "task"
        by_name.setdefault(name, []).append((onset, duration, amp))
    if not by_name:
        raise InputError(f"{source}: no events below the header row")
    from .limits import CONDITION_LIMIT

    if len(by_name) > CONDITION_LIMIT:
        raise InputError(
            f"{source}: {len(by_name)} different trial_type values, more than the "
            f"{CONDITION_LIMIT} conditions a model can hold; trial_type should name "
            "conditions (e.g. tone, tap), not single trials"
        )
    out = []
    for name, rows in by_name.items():
        arr = np.array(rows, dtype=float)
        order = np.argsort(arr[:, 0], kind="stable")
        arr = arr[order]
        out.append(Condition(name, arr[:, 0], arr[:, 1], arr[:, 2]))
    return out


def read_events(path: str | Path, amplitude_column: str | None = None) -> list[Condition]:
    """Read a BIDS ``events.tsv`` file. See :func:`parse_events`."""
    from .inputs import read_input_text

    p = Path(path)
    text = read_input_text(p, "events")  # bounded; one line for size, encoding, access
    return parse_events(io.StringIO(text), source=str(p), amplitude_column=amplitude_column)


def shift_conditions(conditions: Iterable[Condition], shift_s: float) -> list[Condition]:
    """The same conditions with every onset moved by ``shift_s`` seconds (timing checks)."""
    if shift_s == 0:
        return list(conditions)
    return [Condition(c.name, c.onsets + shift_s, c.durations, c.amplitudes) for c in conditions]


def check_events_in_run(conditions: Iterable[Condition], run_length_s: float) -> list[str]:
    """Warnings for events that start after the run ends or run past its end."""
    warnings = []
    for c in conditions:
        late = int(np.sum(c.onsets >= run_length_s))
        over = int(np.sum((c.onsets < run_length_s) & (c.onsets + c.durations > run_length_s)))
        if late:
            warnings.append(
                f"condition '{c.name}': {late} event(s) start after the run ends "
                f"({run_length_s:g} s); check the TR and whether onsets are in seconds"
            )
        if over:
            warnings.append(f"condition '{c.name}': {over} event(s) run past the end of the run")
    return warnings
