"""Experimental conditions from a BIDS ``events.tsv`` file.

The BIDS specification puts ``onset`` and ``duration`` in seconds. Which column names the
conditions is a choice (``condition_column``, ``trial_type`` by default); without it every
event belongs to one condition named after the task (the ``task-`` entity of the file
name, else ``task``). A duration of 0 (or ``n/a``) means a brief event.

Every other column whose cells are all numbers (or ``n/a``) is kept, per event, in
:attr:`Condition.columns`; a model can then use such a column as a **parametric modulator**
(see :func:`modulator_values`): beside the condition's main regressor, a column
``CONDITION:MODULATOR`` whose events are scaled by the modulator, mean-centred over that
condition's events (common practice), so the main column keeps the average response and the
modulator column carries only the change with the modulator.

Examples
--------
>>> import io
>>> text = "onset\\tduration\\ttrial_type\\tgain\\n0\\t3\\tgamble\\t10\\n30\\t3\\tgamble\\t30\\n"
>>> conds = parse_events(io.StringIO(text), source="demo_events.tsv")
>>> [c.name for c in conds], conds[0].columns["gain"].tolist()
(['gamble'], [10.0, 30.0])
>>> mods, notes = modulator_values(conds[0], ("gain",))
>>> mods[0][0], mods[0][1].tolist()
('gain', [-10.0, 10.0])
"""

from __future__ import annotations

import csv
import io
import math
import os
import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .errors import InputError
from .inputs import excerpt

__all__ = [
    "DEFAULT_CONDITION_COLUMN",
    "Condition",
    "EventsFile",
    "check_events_in_run",
    "condition_column_candidates",
    "default_condition",
    "events_sanity",
    "find_events_sidecar",
    "load_events",
    "modulator_values",
    "parse_events",
    "read_events",
    "scale_conditions",
    "shift_conditions",
    "task_name",
]

_MISSING = {"", "n/a", "na", "nan"}
#: The column that names the conditions unless another is chosen (BIDS).
DEFAULT_CONDITION_COLUMN = "trial_type"
#: Columns never offered as condition names or modulators.
_TIMING = ("onset", "duration")
#: A text column with more distinct values than this is not offered as condition names.
_MAX_CONDITIONS = 20


@dataclass(frozen=True, eq=False)
class Condition:
    """One condition: its events' onsets, durations (seconds) and amplitudes.

    Attributes
    ----------
    name : str
    onsets, durations, amplitudes : ndarray (n_events,)
        Amplitudes are 1 for events read from a file; they scale an event's regressor.
    columns : mapping of str to ndarray (n_events,)
        The events' values in the file's other numeric columns (NaN where ``n/a``),
        candidates for parametric modulators.
    """

    name: str
    onsets: np.ndarray
    durations: np.ndarray
    amplitudes: np.ndarray = field(default=None)  # type: ignore[assignment]
    columns: Mapping[str, np.ndarray] = field(default=None)  # type: ignore[assignment]

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
        cols: dict[str, np.ndarray] = {}
        for k, v in dict(self.columns or {}).items():
            a = np.asarray(v, dtype=float).reshape(-1)
            if a.shape != on.shape:
                raise InputError(
                    f"condition '{self.name}': column '{k}' has {a.size} values "
                    f"for {on.size} events"
                )
            a.setflags(write=False)
            cols[str(k)] = a
        for a in (on, du, am):
            a.setflags(write=False)
        object.__setattr__(self, "onsets", on)
        object.__setattr__(self, "durations", du)
        object.__setattr__(self, "amplitudes", am)
        object.__setattr__(self, "columns", cols)

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
            tuple((k, v.tobytes()) for k, v in sorted(self.columns.items())),
        )

    def carries(self, column: str) -> bool:
        """True when at least one of the condition's events has a value in ``column``."""
        v = self.columns.get(column)
        return v is not None and bool(np.isfinite(v).any())

    def with_timing(self, onsets: np.ndarray, durations: np.ndarray | None = None) -> Condition:
        """The same events (amplitudes and columns kept) at other onsets/durations."""
        return Condition(
            self.name,
            onsets,
            self.durations if durations is None else durations,
            self.amplitudes,
            self.columns,
        )

    def __eq__(self, other: object) -> bool:
        return isinstance(other, Condition) and self.key() == other.key()

    def __hash__(self) -> int:
        return hash(self.key())


@dataclass(frozen=True, eq=False)
class EventsFile:
    """What an events file gives: conditions, the notes on reading it, and its columns.

    Attributes
    ----------
    conditions : tuple of Condition
    warnings : tuple of str
        One line each (e.g. durations that are ``n/a``).
    condition_column : str or None
        The column that named the conditions (None: one condition for the whole task).
    condition_candidates : tuple of str
        Text columns that could name the conditions (for a choice in the window).
    numeric_columns : tuple of str
        Columns usable as parametric modulators.
    source : str
    levels : tuple of str
        The conditions in the order the events file's JSON sidecar lists them (BIDS
        ``Levels`` of the condition column), when it has one; see :func:`default_condition`.
    """

    conditions: tuple[Condition, ...]
    warnings: tuple[str, ...] = ()
    condition_column: str | None = DEFAULT_CONDITION_COLUMN
    condition_candidates: tuple[str, ...] = ()
    numeric_columns: tuple[str, ...] = ()
    source: str = "events.tsv"
    levels: tuple[str, ...] = ()


def default_condition(names: Sequence[str], levels: Sequence[str] = ()) -> str:
    """The one rule for the default contrast, used by the window and the command line:
    the first condition the events file's sidecar lists (BIDS ``Levels``, the dataset's own
    order, the same for every run of a task), else the first condition in the events file.

    >>> default_condition(["tap", "tone"], ["tone", "tap"])
    'tone'
    >>> default_condition(["tap", "tone"])
    'tap'
    """
    for name in levels:
        if name in names:
            return name
    return names[0]


def find_events_sidecar(events: str | Path) -> Path | None:
    """The JSON sidecar of an events file: the same name with ``.json``, else the nearest
    ``*_events.json`` whose entities all belong to the events file, in its folder or up to
    three folders above (BIDS inheritance: ``task-X_events.json`` at the dataset root).

    >>> import tempfile
    >>> d = Path(tempfile.mkdtemp())
    >>> (d / "sub-1" / "func").mkdir(parents=True)
    >>> _ = (d / "task-a_events.json").write_text("{}")
    >>> find_events_sidecar(d / "sub-1" / "func" / "sub-1_task-a_events.tsv").name
    'task-a_events.json'
    """
    from .bids import applies_to, parse_name

    p = Path(events)
    own = p.with_name(p.name[: -len(".tsv")] + ".json") if p.name.endswith(".tsv") else None
    if own is not None and own.is_file():
        return own
    name = parse_name(p.name)
    if name is None:
        return None
    folder = p.parent
    for _ in range(4):
        try:  # names first: a big folder (a home or temporary folder) costs no Path objects
            entries = sorted(n for n in os.listdir(folder) if n.endswith("_events.json"))
        except OSError:
            return None
        best = None
        for n in entries:
            q = folder / n
            if not q.is_file():
                continue
            cand = parse_name(q.name)
            if cand is not None and applies_to(cand, name):
                if best is None or len(cand.entities) > best[0]:
                    best = (len(cand.entities), q)
        if best is not None:
            return best[1]
        if (folder / "dataset_description.json").is_file() or folder.parent == folder:
            return None
        folder = folder.parent
    return None


def sidecar_levels(events: str | Path, column: str | None) -> tuple[tuple[str, ...], list[str]]:
    """The ``Levels`` keys of ``column`` in the events file's sidecar, in order, and notes
    (an unreadable sidecar is a note, never an error: it only orders the default)."""
    from .inputs import parse_json, read_input_text

    if column is None:
        return (), []
    side = find_events_sidecar(events)
    if side is None:
        return (), []
    try:
        data = parse_json(read_input_text(side, "sidecar"), str(side), "sidecar")
    except InputError as err:
        return (), [f"{err} (its condition order is not used)"]
    entry = data.get(column) if isinstance(data, dict) else None
    levels = entry.get("Levels") if isinstance(entry, dict) else None
    if not isinstance(levels, dict):
        return (), []
    return tuple(str(k) for k in levels), []


def task_name(path: str | Path | None) -> str:
    """The BIDS ``task-`` label of a file name, or ``task``.

    >>> task_name("sub-01_task-gamble_run-1_events.tsv"), task_name("onsets.tsv")
    ('gamble', 'task')
    """
    if path is None:
        return "task"
    m = re.search(r"(?:^|_)task-([A-Za-z0-9]+)", Path(str(path)).name)
    return m.group(1) if m else "task"


def _names(header: Sequence[str], most: int = 12) -> str:
    """Column names for a message: short printable excerpts, at most ``most`` of them."""
    if not header:
        return "none"
    shown = ", ".join(excerpt(h) for h in header[:most])
    return shown + (f" and {len(header) - most} more" if len(header) > most else "")


def _number(cell: str, path: str, row: int, column: str, what: str = "in seconds") -> float:
    try:
        value = float(cell)
    except ValueError:
        raise InputError(
            f"{path}: row {row}, column '{column}' is '{excerpt(cell)}', not a number; "
            f"give {column} {what}"
        ) from None
    if not math.isfinite(value):
        raise InputError(f"{path}: row {row}, column '{column}' is not a finite number")
    return value


def _is_missing(cell: str) -> bool:
    return cell.strip().lower() in _MISSING


def _as_float(cell: str) -> float | None:
    """The cell as a finite float, NaN when missing, None when it is text."""
    if _is_missing(cell):
        return math.nan
    try:
        v = float(cell)
    except ValueError:
        return None
    return v if math.isfinite(v) else None


def _read_rows(
    stream: Iterable[str] | io.TextIOBase, source: str
) -> tuple[list[str], list[tuple[int, list[str]]]]:
    # split lines ourselves: a lone carriage return inside a cell would stop the csv module
    text = stream.read() if hasattr(stream, "read") else "".join(stream)
    try:  # Python 3.10's csv refuses NUL bytes, later versions read them as text
        reader = iter(list(csv.reader(text.splitlines(), delimiter="\t")))
    except csv.Error as err:
        raise InputError(
            f"{source}: not a readable table ({err}); save it as plain tab-separated text"
        ) from None
    try:
        header = [h.strip() for h in next(reader)]
    except StopIteration:
        raise InputError(
            f"{source}: the file is empty; it needs a header row with onset and duration"
        ) from None
    for needed in _TIMING:
        if needed not in header:
            raise InputError(
                f"{source}: no '{needed}' column (found: {_names(header)}); "
                "a BIDS events file needs tab-separated onset and duration columns in seconds"
            )
    rows = []
    for row_no, row in enumerate(reader, start=2):
        if not row or all(not c.strip() for c in row):
            continue
        if len(row) < len(header):
            row = row + [""] * (len(header) - len(row))
        rows.append((row_no, [c.strip() for c in row]))
    if not rows:
        raise InputError(f"{source}: no events below the header row")
    return header, rows


def _column_kinds(
    header: list[str], rows: list[tuple[int, list[str]]]
) -> tuple[list[str], list[str]]:
    """(numeric columns, text columns that could name conditions), in file order."""
    numeric, text = [], []
    for j, name in enumerate(header):
        if name in _TIMING or not name:
            continue
        cells = [r[j] for _n, r in rows]
        values = [_as_float(c) for c in cells]
        if all(v is not None for v in values):
            if any(not math.isnan(v) for v in values):  # type: ignore[arg-type]
                numeric.append(name)
            continue
        distinct = {c for c in cells if not _is_missing(c)}
        if 1 <= len(distinct) <= _MAX_CONDITIONS and (
            len(distinct) < len(cells) or len(cells) <= 2
        ):
            text.append(name)
    return numeric, text


def condition_column_candidates(path: str | Path) -> tuple[str, ...]:
    """Text columns of an events file that could name its conditions.

    >>> import tempfile
    >>> p = Path(tempfile.mkdtemp()) / "e.tsv"
    >>> _ = p.write_text("onset\\tduration\\ttrial_type\\thand\\n0\\t1\\ta\\tL\\n5\\t1\\ta\\tR\\n")
    >>> condition_column_candidates(p)
    ('trial_type', 'hand')
    """
    return load_events(path).condition_candidates


def parse_events(
    stream: Iterable[str] | io.TextIOBase,
    source: str = "events.tsv",
    condition_column: str | None = DEFAULT_CONDITION_COLUMN,
    task: str | None = None,
) -> list[Condition]:
    """Parse tab-separated events text into conditions, in order of first appearance.

    See :func:`load_events` for the parameters; this returns the conditions only.
    """
    return list(_parse(stream, source, condition_column, task).conditions)


def _parse(
    stream: Iterable[str] | io.TextIOBase,
    source: str,
    condition_column: str | None,
    task: str | None,
) -> EventsFile:
    header, rows = _read_rows(stream, source)
    i_on, i_du = header.index("onset"), header.index("duration")
    numeric, text_cols = _column_kinds(header, rows)
    default_name = task or task_name(source)
    col = condition_column
    if col is not None and str(col).strip().lower() == "none":
        col = None
    i_tt = None
    if col is not None:
        if col in header and col not in _TIMING:
            i_tt = header.index(col)
        elif col == DEFAULT_CONDITION_COLUMN:
            col = None  # BIDS: trial_type is optional; one condition for the task
        else:
            offer = _names(text_cols)
            raise InputError(
                f"{source}: no column '{excerpt(col)}' to name the conditions (text columns: "
                f"{offer})",
                file=source,
                field=col,
                remedy="condition_column",
            )
    mod_cols = [c for c in numeric if c != col]
    i_mods = [header.index(c) for c in mod_cols]

    by_name: dict[str, list[list[float]]] = {}
    na_durations = 0
    for row_no, row in rows:
        on_cell, du_cell = row[i_on], row[i_du]
        if _is_missing(on_cell):
            raise InputError(
                f"{source}: row {row_no} has no onset; every event needs an onset in seconds"
            )
        onset = _number(on_cell, source, row_no, "onset")
        if _is_missing(du_cell):
            na_durations += 1
            duration = 0.0
        else:
            duration = _number(du_cell, source, row_no, "duration")
        if duration < 0:
            raise InputError(
                f"{source}: row {row_no} has a negative duration ({duration:g} s); "
                "durations must be >= 0"
            )
        name = default_name
        if i_tt is not None:
            cell = row[i_tt]
            name = default_name if _is_missing(cell) else cell
        extra = [_as_float(row[i]) for i in i_mods]
        by_name.setdefault(name, []).append([onset, duration, *extra])  # type: ignore[list-item]
    from .limits import CONDITION_LIMIT

    if len(by_name) > CONDITION_LIMIT:
        raise InputError(
            f"{source}: {len(by_name)} different {excerpt(col or 'trial_type')} values, more "
            f"than the {CONDITION_LIMIT} conditions a model can hold; the column should name "
            "conditions (e.g. tone, tap), not single trials"
        )
    out = []
    for name, values in by_name.items():
        arr = np.array(values, dtype=float).reshape(len(values), 2 + len(mod_cols))
        order = np.argsort(arr[:, 0], kind="stable")
        arr = arr[order]
        cols = {c: arr[:, 2 + j] for j, c in enumerate(mod_cols)}
        out.append(Condition(name, arr[:, 0], arr[:, 1], None, cols))
    notes = []
    if na_durations:
        notes.append(
            f"{source}: {na_durations} event(s) have duration n/a; they are modelled as brief "
            "events (0 s)"
        )
    return EventsFile(
        tuple(out),
        tuple(notes),
        None if i_tt is None else col,
        tuple(text_cols),
        tuple(mod_cols),
        source,
    )


def load_events(
    path: str | Path,
    condition_column: str | None = DEFAULT_CONDITION_COLUMN,
    task: str | None = None,
) -> EventsFile:
    """Read a BIDS ``events.tsv`` file with the notes on reading it.

    Parameters
    ----------
    path : path
    condition_column : str or None
        Column whose values name the conditions (default ``trial_type``). None or
        ``"none"``: every event in one condition named after the task. A missing
        ``trial_type`` gives one condition too; a missing other column is an error.
    task : str, optional
        Name of that one condition; default the file name's ``task-`` label.

    Raises
    ------
    InputError
        A missing file, missing or non-numeric ``onset``/``duration``, negative durations,
        an unknown condition column, or no events at all: one line naming file and field.
    """
    import dataclasses

    from .inputs import read_input_text

    p = Path(path)
    text = read_input_text(p, "events")  # bounded; one line for size, encoding, access
    got = _parse(io.StringIO(text), str(p), condition_column, task)
    levels, notes = sidecar_levels(p, got.condition_column)
    if levels or notes:
        got = dataclasses.replace(got, levels=levels, warnings=got.warnings + tuple(notes))
    return got


def read_events(
    path: str | Path,
    condition_column: str | None = DEFAULT_CONDITION_COLUMN,
    task: str | None = None,
) -> list[Condition]:
    """Read a BIDS ``events.tsv`` file. See :func:`load_events`."""
    return list(load_events(path, condition_column, task).conditions)


def shift_conditions(conditions: Iterable[Condition], shift_s: float) -> list[Condition]:
    """The same conditions with every onset moved by ``shift_s`` seconds (timing checks)."""
    if shift_s == 0:
        return list(conditions)
    return [c.with_timing(c.onsets + shift_s) for c in conditions]


def scale_conditions(conditions: Iterable[Condition], factor: float) -> list[Condition]:
    """Onsets and durations multiplied by ``factor`` (volume numbers -> seconds: the TR).

    >>> c = scale_conditions([Condition("a", [3.0], [2.0])], 2.5)[0]
    >>> c.onsets.tolist(), c.durations.tolist()
    ([7.5], [5.0])
    """
    return [c.with_timing(c.onsets * factor, c.durations * factor) for c in conditions]


# ----------------------------------------------------------------------------- modulators


def modulator_values(
    condition: Condition, names: Sequence[str], orthogonalize: bool = False
) -> tuple[list[tuple[str, np.ndarray]], list[str]]:
    """The condition's parametric modulators, ready to scale its events.

    Each named column the condition carries is mean-centred over the condition's events
    (common practice). An ``n/a`` value takes the condition's mean (0 after centring), so
    the event keeps its main regressor; one note gives the count. A modulator that is
    constant over the condition's events (or has fewer than two values) is left out with a
    note. With ``orthogonalize``, each modulator is made orthogonal, over the events, to the
    ones named before it (serial Gram-Schmidt on the centred values, in the order given);
    by default modulators are not orthogonalised, so each one's beta is its own effect
    adjusted for the others (Mumford et al. 2015, PLoS ONE 10:e0126255, argue against
    orthogonalising by default).

    Parameters
    ----------
    condition : Condition
    names : sequence of str
        Column names; columns the condition does not carry are skipped silently.
    orthogonalize : bool

    Returns
    -------
    list of (name, values)
        Per event, in the condition's event order.
    list of str
        Notes, one line each.

    >>> c = Condition("g", [0, 10, 20, 30], [3] * 4, columns={"gain": [1, 2, float("nan"), 6]})
    >>> mods, notes = modulator_values(c, ["gain"])
    >>> mods[0][1].tolist()
    [-2.0, -1.0, 0.0, 3.0]
    >>> notes[0].startswith("condition 'g': modulator 'gain' is n/a for 1 of 4 events")
    True
    """
    out: list[tuple[str, np.ndarray]] = []
    notes: list[str] = []
    done: list[np.ndarray] = []
    for name in dict.fromkeys(names):
        if not condition.carries(name):
            continue
        v = condition.columns[name]
        ok = np.isfinite(v)
        n_na = int((~ok).sum())
        if ok.sum() < 2 or np.ptp(v[ok]) == 0:
            only = v[ok][0] if ok.any() else math.nan
            notes.append(
                f"condition '{condition.name}': modulator '{name}' has the same value "
                f"({only:g}) for every event, so it cannot modulate anything; left out"
            )
            continue
        if n_na:
            notes.append(
                f"condition '{condition.name}': modulator '{name}' is n/a for {n_na} of "
                f"{v.size} events; they keep the main regressor and take the condition's mean"
            )
        centred = np.where(ok, v - v[ok].mean(), 0.0)
        if orthogonalize:
            for prev in done:
                centred = centred - prev * (float(prev @ centred) / float(prev @ prev))
            scale = float(np.max(np.abs(v[ok] - v[ok].mean())))
            if float(np.max(np.abs(centred))) <= 1e-9 * scale:
                notes.append(
                    f"condition '{condition.name}': modulator '{name}' is a combination of the "
                    "modulators before it, so nothing is left after orthogonalising; left out"
                )
                continue
        done.append(centred)
        out.append((name, centred))
    return out, notes


# ----------------------------------------------------------------------------- sanity


def events_sanity(
    conditions: Sequence[Condition], n_volumes: int, tr: float, onset_unit: str = "seconds"
) -> list[str]:
    """Plain warnings about an events file against its run, one line per kind, with counts.

    * onsets that look like volume numbers: all integers, the last below the number of
      volumes and in the second half of it, while the run lasts more than 1.5 times the
      span of the events in seconds (the TR factor is named);
    * events that start before the first volume (onset < 0);
    * events that start after the run ends, and events that run past its end;
    * events of one condition that overlap the previous event of that condition.

    >>> c = Condition("a", [2, 10, 18, 26, 34], [1] * 5)
    >>> w = events_sanity([c], 40, 2.0)
    >>> len(w), "volume numbers" in w[0], "TR (2 s)" in w[0]
    (1, True, True)
    """
    out = []
    if not conditions:
        return out
    on = np.concatenate([c.onsets for c in conditions])
    du = np.concatenate([c.durations for c in conditions])
    run_s = n_volumes * tr
    if (
        onset_unit == "seconds"
        and on.size >= 2
        and np.all(on == np.round(on))
        and float(on.max()) < n_volumes
        and float(on.max()) >= 0.5 * n_volumes
        and run_s > 1.5 * float(np.max(on + du))
    ):
        out.append(
            f"the onsets look like volume numbers, not seconds: all are whole numbers and the "
            f"last ({on.max():g}) is below the run's {n_volumes} volumes, while the run lasts "
            f"{run_s:g} s; if they count volumes, multiply them by the TR ({tr:g} s) or pass "
            "--onset-unit volumes"
        )
    early = [c.name for c in conditions if np.any(c.onsets < 0)]
    n_early = int(np.sum(on < 0))
    if n_early:
        out.append(
            f"{n_early} event(s) start before the first volume (negative onset; "
            f"{', '.join(repr(n) for n in early)}); onsets count seconds from the start of "
            "the first volume"
        )
    late = int(np.sum(on >= run_s))
    over = int(np.sum((on < run_s) & (on + du > run_s)))
    if late:
        names = [c.name for c in conditions if np.any(c.onsets >= run_s)]
        out.append(
            f"{late} event(s) start after the run ends ({run_s:g} s; "
            f"{', '.join(repr(n) for n in names)}); check the TR and whether onsets are in "
            "seconds"
        )
    if over:
        names = [
            c.name
            for c in conditions
            if np.any((c.onsets < run_s) & (c.onsets + c.durations > run_s))
        ]
        out.append(
            f"{over} event(s) run past the end of the run ({run_s:g} s; "
            f"{', '.join(repr(n) for n in names)})"
        )
    n_over, names = 0, []
    for c in conditions:
        if c.n_events < 2:
            continue
        k = int(np.sum(c.onsets[1:] < c.onsets[:-1] + c.durations[:-1] - 1e-9))
        if k:
            n_over += k
            names.append(c.name)
    if n_over:
        out.append(
            f"{n_over} event(s) overlap the previous event of the same condition "
            f"({', '.join(repr(n) for n in names)}); their regressors add up where they overlap"
        )
    return out


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
