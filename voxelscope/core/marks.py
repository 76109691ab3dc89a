"""Marks: saved places in a run (world coordinates in mm) with a title and a note.

A :class:`MarkList` is plain data with the operations the window offers (add, rename,
edit the note, reorder, delete, jump). Marks are kept in world coordinates, so they stay
valid for another run of the same subject on a different grid.

A mark also keeps the model it was made under (:class:`~voxelscope.core.model.ModelSettings`:
contrast, kernels, noise model, drift, confounds, ...), so a slide in Show mode can show
the voxel as it was when the mark was made. Marks from files without a model have
``model`` None.

Marks file (TSV)
----------------
UTF-8, a header row and one mark per row, columns ``x_mm``, ``y_mm``, ``z_mm``, ``title``,
``note`` and ``model`` separated by tabs. In ``title``, ``note`` and ``model`` a backslash,
tab, newline and carriage return are written as ``\\\\``, ``\\t``, ``\\n`` and ``\\r``, so
any text survives a round trip. ``model`` is the model as one line of JSON (the fields of
a session's ``model``), empty for a mark without one; the column is written only when some
mark has a model. On reading, columns may come in any order, ``title``, ``note`` and
``model`` may be left out and other columns are ignored.

Examples
--------
>>> marks = MarkList()
>>> m = marks.add((12.0, -30.5, 40.0), "late peak", "FIR shows\\ta delay")
>>> text = format_marks_tsv(marks)
>>> text.splitlines()[1]
'12.0\\t-30.5\\t40.0\\tlate peak\\tFIR shows\\\\ta delay'
>>> parse_marks_tsv(text) == marks
True
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

from .atomic import write_text
from .errors import InputError
from .inputs import read_input_text
from .model import ModelSettings
from .model_json import model_from_json, model_to_json

__all__ = [
    "MARK_COLUMNS",
    "MODEL_COLUMN",
    "Mark",
    "MarkList",
    "escape_field",
    "format_marks_tsv",
    "parse_marks_tsv",
    "read_marks_tsv",
    "unescape_field",
    "write_marks_tsv",
]

MARK_COLUMNS = ("x_mm", "y_mm", "z_mm", "title", "note")
#: The optional column with each mark's model (one line of JSON).
MODEL_COLUMN = "model"
# NUL is escaped too, so a marks file is always text (the text reader refuses NUL bytes)
_ESCAPES = {"\\": "\\\\", "\t": "\\t", "\n": "\\n", "\r": "\\r", "\x00": "\\0"}
_UNESCAPES = {"\\": "\\", "t": "\t", "n": "\n", "r": "\r", "0": "\x00"}


@dataclass(frozen=True)
class Mark:
    """One mark: a point in world coordinates (mm) with a title and a note."""

    x_mm: float
    y_mm: float
    z_mm: float
    title: str = ""
    note: str = ""
    #: The model the mark was made under (None: not known, e.g. an older marks file).
    model: ModelSettings | None = None

    def __post_init__(self) -> None:
        for name in ("x_mm", "y_mm", "z_mm"):
            v = float(getattr(self, name))
            if not math.isfinite(v):
                raise InputError(f"mark '{self.title}': {name} must be a finite number of mm")
            object.__setattr__(self, name, v)
        object.__setattr__(self, "title", str(self.title))
        object.__setattr__(self, "note", str(self.note))
        if self.model is not None and not isinstance(self.model, ModelSettings):
            raise TypeError("a mark's model is a ModelSettings or None")

    @property
    def xyz_mm(self) -> tuple[float, float, float]:
        """The point as ``(x, y, z)`` in mm."""
        return (self.x_mm, self.y_mm, self.z_mm)

    def to_json(self) -> dict[str, Any]:
        """Plain dict with the TSV column names as keys (``model`` only when known)."""
        out: dict[str, Any] = {c: getattr(self, c) for c in MARK_COLUMNS}
        if self.model is not None:
            out[MODEL_COLUMN] = model_to_json(self.model)
        return out

    @classmethod
    def from_json(cls, data: dict[str, Any]) -> Mark:
        """Inverse of :meth:`to_json` (raises InputError on a bad entry)."""
        if not isinstance(data, dict):
            raise InputError("a mark must be an object with x_mm, y_mm, z_mm, title and note")
        try:
            xyz = [float(data[c]) for c in MARK_COLUMNS[:3]]
        except (KeyError, TypeError, ValueError):
            raise InputError(
                "a mark needs numeric x_mm, y_mm and z_mm; fix or delete that mark"
            ) from None
        if not all(abs(v) <= 1e6 for v in xyz):  # also NaN and inf
            raise InputError(
                "a mark's x_mm, y_mm and z_mm must be finite positions within 1 km of the "
                "origin; fix or delete that mark"
            )
        title, note = data.get("title", ""), data.get("note", "")
        if not isinstance(title, str) or not isinstance(note, str):
            raise InputError("a mark's title and note must be text")
        model = None
        if data.get(MODEL_COLUMN) is not None:
            model = model_from_json(data[MODEL_COLUMN], f"mark '{title}'", "its model")
        return cls(*xyz, title=title, note=note, model=model)


class MarkList:
    """An ordered, editable list of :class:`Mark` (plain data, no Qt).

    Indices are 0-based. Every operation raises :class:`InputError` for an index that
    does not exist.

    Examples
    --------
    >>> ml = MarkList()
    >>> _ = ml.add((0, 0, 0), "a"); _ = ml.add((1, 2, 3), "b", "second")
    >>> ml.move(1, 0); [m.title for m in ml]
    ['b', 'a']
    >>> _ = ml.rename(1, "first"); ml.jump(0)
    (1.0, 2.0, 3.0)
    >>> ml.delete(0).title, len(ml)
    ('b', 1)
    """

    def __init__(self, marks: Iterable[Mark] = ()) -> None:
        self._marks: list[Mark] = list(marks)
        for m in self._marks:
            if not isinstance(m, Mark):
                raise TypeError(f"MarkList holds Mark objects, not {type(m).__name__}")

    # container protocol ---------------------------------------------------------------
    def __len__(self) -> int:
        return len(self._marks)

    def __iter__(self) -> Iterator[Mark]:
        return iter(list(self._marks))

    def __getitem__(self, index: int) -> Mark:
        return self._marks[self._index(index)]

    def __eq__(self, other: object) -> bool:
        return isinstance(other, MarkList) and self._marks == other._marks

    def __repr__(self) -> str:
        return f"MarkList({self._marks!r})"

    def _index(self, index: int) -> int:
        n = len(self._marks)
        if not isinstance(index, int) or not -n <= index < n:
            raise InputError(f"there is no mark number {index} (the list has {n})")
        return index % n

    # operations -----------------------------------------------------------------------
    def add(
        self,
        xyz_mm: Sequence[float],
        title: str | None = None,
        note: str = "",
        index: int | None = None,
        model: ModelSettings | None = None,
    ) -> Mark:
        """Save a point as a new mark (at the end, or before ``index``); returns it.

        An empty or missing title becomes ``"Mark N"``; ``model`` is the model the mark is
        made under.
        """
        x, y, z = (float(v) for v in xyz_mm)
        if not title:
            title = f"Mark {len(self._marks) + 1}"
        mark = Mark(x, y, z, title, note, model)
        if index is None:
            self._marks.append(mark)
        else:
            self._marks.insert(max(0, min(int(index), len(self._marks))), mark)
        return mark

    def rename(self, index: int, title: str) -> Mark:
        """Change a mark's title; returns the new mark."""
        i = self._index(index)
        self._marks[i] = replace(self._marks[i], title=str(title))
        return self._marks[i]

    def set_note(self, index: int, note: str) -> Mark:
        """Change a mark's note; returns the new mark."""
        i = self._index(index)
        self._marks[i] = replace(self._marks[i], note=str(note))
        return self._marks[i]

    def move(self, source: int, destination: int) -> None:
        """Move the mark at ``source`` so that it ends up at index ``destination``."""
        i = self._index(source)
        j = self._index(destination)
        self._marks.insert(j, self._marks.pop(i))

    def delete(self, index: int) -> Mark:
        """Remove a mark; returns it (so the window can offer undo)."""
        return self._marks.pop(self._index(index))

    def jump(self, index: int) -> tuple[float, float, float]:
        """World coordinates (mm) to go to for a mark; the window maps them to a voxel."""
        return self[index].xyz_mm

    def clear(self) -> None:
        self._marks.clear()

    def to_json(self) -> list[dict[str, Any]]:
        """List of plain dicts (for sessions)."""
        return [m.to_json() for m in self._marks]

    @classmethod
    def from_json(cls, data: Any) -> MarkList:
        """Inverse of :meth:`to_json`."""
        if not isinstance(data, list):
            raise InputError("marks must be a list")
        return cls(Mark.from_json(d) for d in data)


# ------------------------------------------------------------------------------ TSV


def escape_field(text: str) -> str:
    r"""Escape backslash, tab, newline, carriage return and NUL for one TSV cell.

    >>> escape_field("a\tb\\c\n")
    'a\\tb\\\\c\\n'
    """
    return "".join(_ESCAPES.get(ch, ch) for ch in text)


def unescape_field(text: str) -> str:
    r"""Inverse of :func:`escape_field`; an unknown escape such as ``\x`` is kept as it is.

    >>> unescape_field(r"a\tb\\c\n") == "a\tb\\c\n"
    True
    """
    if "\\" not in text:
        return text
    out = []
    i, n = 0, len(text)
    while i < n:
        ch = text[i]
        if ch == "\\" and i + 1 < n and text[i + 1] in _UNESCAPES:
            out.append(_UNESCAPES[text[i + 1]])
            i += 2
        else:
            out.append(ch)
            i += 1
    return "".join(out)


def _coord(v: float) -> str:
    return repr(float(v))


def format_marks_tsv(marks: Iterable[Mark]) -> str:
    """The marks as TSV text (header row, ``\\n`` line ends).

    >>> format_marks_tsv([Mark(1, 2, 3, "t", "n")]).split("\\n")
    ['x_mm\\ty_mm\\tz_mm\\ttitle\\tnote', '1.0\\t2.0\\t3.0\\tt\\tn', '']
    """
    marks = list(marks)
    with_model = any(m.model is not None for m in marks)
    lines = ["\t".join(MARK_COLUMNS + ((MODEL_COLUMN,) if with_model else ()))]
    for m in marks:
        cells = [
            _coord(m.x_mm),
            _coord(m.y_mm),
            _coord(m.z_mm),
            escape_field(m.title),
            escape_field(m.note),
        ]
        if with_model:
            cells.append(escape_field(_model_cell(m.model)))
        lines.append("\t".join(cells))
    return "\n".join(lines) + "\n"


def _model_cell(model: ModelSettings | None) -> str:
    """A model as one line of JSON ("" for None)."""
    if model is None:
        return ""
    return json.dumps(model_to_json(model), ensure_ascii=False, separators=(",", ":"))


def _parse_model_cell(cell: str, source: str, line: int) -> ModelSettings | None:
    if not cell.strip():
        return None
    from .inputs import parse_json

    where = f"line {line}, column '{MODEL_COLUMN}'"
    try:
        data = parse_json(cell, f"{source} ({where})", "marks")
    except InputError as err:
        raise InputError(f"{err}; give the model as one line of JSON or leave it empty") from None
    return model_from_json(data, source, where)


def parse_marks_tsv(text: str, source: str = "marks.tsv") -> MarkList:
    """Marks from TSV text; a bad row raises one :class:`InputError` line naming it.

    Lines are split on ``\\n`` only (a trailing ``\\r`` of Windows line ends is dropped),
    so other control characters inside a note are kept. Blank lines are skipped.

    >>> parse_marks_tsv("x_mm\\ty_mm\\tz_mm\\ttitle\\n1\\t2\\tthree\\tx\\n", "m.tsv")
    Traceback (most recent call last):
    ...
    voxelscope.core.errors.InputError: m.tsv: line 2, column 'z_mm' is 'three', not a number; give coordinates in mm
    """  # noqa: E501
    if text.startswith("\ufeff"):
        text = text[1:]
    lines = text.split("\n")
    lines = [ln[:-1] if ln.endswith("\r") else ln for ln in lines]
    header_at = next((i for i, ln in enumerate(lines) if ln.strip()), None)
    if header_at is None:
        raise InputError(
            f"{source}: the file is empty; expected a header row {', '.join(MARK_COLUMNS)}"
        )
    header = [h.strip() for h in lines[header_at].split("\t")]
    missing = [c for c in MARK_COLUMNS[:3] if c not in header]
    if missing:
        raise InputError(
            f"{source}: line {header_at + 1}: the header has no column(s) {', '.join(missing)}; "
            f"expected tab-separated columns {', '.join(MARK_COLUMNS)}"
        )
    dup = sorted({h for h in header if h and header.count(h) > 1})
    if dup:
        raise InputError(f"{source}: line {header_at + 1}: column(s) {', '.join(dup)} appear twice")
    col = {h: i for i, h in enumerate(header)}
    marks = []
    for n, line in enumerate(lines[header_at + 1 :], start=header_at + 2):
        if not line.strip():
            continue
        cells = line.split("\t")
        if len(cells) != len(header):
            raise InputError(
                f"{source}: line {n} has {len(cells)} tab-separated fields but the header has "
                f"{len(header)}; escape tabs in notes as \\t"
            )
        xyz = []
        for c in MARK_COLUMNS[:3]:
            cell = cells[col[c]].strip()
            try:
                v = float(cell)
            except ValueError:
                raise InputError(
                    f"{source}: line {n}, column '{c}' is '{cell}', not a number; "
                    "give coordinates in mm"
                ) from None
            if not math.isfinite(v):
                raise InputError(f"{source}: line {n}, column '{c}' is not a finite number")
            xyz.append(v)
        title = unescape_field(cells[col["title"]]) if "title" in col else ""
        note = unescape_field(cells[col["note"]]) if "note" in col else ""
        model = None
        if MODEL_COLUMN in col:
            model = _parse_model_cell(unescape_field(cells[col[MODEL_COLUMN]]), source, n)
        marks.append(Mark(*xyz, title=title, note=note, model=model))
    return MarkList(marks)


def read_marks_tsv(path: str | os.PathLike[str]) -> MarkList:
    """Read a marks TSV file (see the module notes); raises InputError with one line."""
    p = Path(path)
    text = read_input_text(p, "marks")  # bounded; one line for other encodings
    return parse_marks_tsv(text, source=str(p))


def write_marks_tsv(
    marks: Iterable[Mark], path: str | os.PathLike[str], force: bool = False
) -> Path:
    """Write marks as TSV atomically; refuses to overwrite unless ``force``."""
    return write_text(path, format_marks_tsv(marks), force=force, kind="marks")
