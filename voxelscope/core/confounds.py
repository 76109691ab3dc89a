"""Nuisance regressors from a TSV or CSV table with a header row.

Every numeric column is used unless ``columns`` picks some. Empty or ``n/a`` cells in the
leading rows (as produced by frame-to-frame differences) become 0 with a warning; missing
cells anywhere else are an error.

Examples
--------
>>> import io
>>> c = parse_confounds(io.StringIO("a\\tb\\nn/a\\t1\\n0.5\\t2\\n"), source="c.tsv")
>>> c.names, c.values[:, 0].tolist(), len(c.warnings)
(('a', 'b'), [0.0, 0.5], 1)
"""

from __future__ import annotations

import csv
import io
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .errors import InputError

__all__ = ["Confounds", "parse_confounds", "read_confounds"]

_MISSING = {"", "n/a", "na", "nan"}


@dataclass(frozen=True, eq=False)
class Confounds:
    """Named nuisance columns, one row per volume."""

    names: tuple[str, ...]
    values: np.ndarray  # (n_volumes, n_columns) float64
    source: str = "confounds"
    warnings: tuple[str, ...] = field(default=())

    @property
    def n_rows(self) -> int:
        return int(self.values.shape[0])

    def select(self, columns: Sequence[str] | None) -> Confounds:
        """Only the named columns (all when ``columns`` is None)."""
        if columns is None:
            return self
        missing = [c for c in columns if c not in self.names]
        if missing:
            raise InputError(
                f"{self.source}: no column(s) {', '.join(repr(m) for m in missing)}; "
                f"available: {', '.join(self.names)}"
            )
        idx = [self.names.index(c) for c in columns]
        return Confounds(tuple(columns), self.values[:, idx], self.source, self.warnings)

    def check_rows(self, n_volumes: int) -> None:
        """Raise unless there is one row per volume."""
        if self.n_rows != n_volumes:
            raise InputError(
                f"{self.source}: {self.n_rows} rows but the run has {n_volumes} volumes; "
                "give one confound row per volume"
            )

    def key(self) -> tuple:
        return (self.names, self.values.tobytes())


def parse_confounds(
    stream, source: str = "confounds.tsv", columns: Sequence[str] | None = None
) -> Confounds:
    """Parse a confounds table (tab- or comma-separated, header row)."""
    text = stream.read() if hasattr(stream, "read") else "".join(stream)
    lines = [ln for ln in text.splitlines() if ln.strip()]
    if not lines:
        raise InputError(f"{source}: the confounds file is empty; it needs a header row")
    delim = "\t" if "\t" in lines[0] else ","
    rows = list(csv.reader(lines, delimiter=delim))
    header = [h.strip() for h in rows[0]]
    body = rows[1:]
    if not body:
        raise InputError(f"{source}: no rows below the header")
    try:
        float(header[0])
        raise InputError(f"{source}: the first row looks like numbers; the file needs a header row")
    except ValueError:
        pass

    wanted = list(header) if columns is None else list(columns)
    missing = [c for c in wanted if c not in header]
    if missing:
        raise InputError(
            f"{source}: no column(s) {', '.join(repr(m) for m in missing)}; "
            f"available: {', '.join(header)}"
        )
    names: list[str] = []
    cols: list[np.ndarray] = []
    warnings: list[str] = []
    for name in wanted:
        j = header.index(name)
        cells = [(r[j].strip() if j < len(r) else "") for r in body]
        vals = np.zeros(len(cells))
        leading = True
        n_lead = 0
        numeric = True
        for i, cell in enumerate(cells):
            if cell.lower() in _MISSING:
                if leading:
                    n_lead += 1
                    continue
                raise InputError(
                    f"{source}: column '{name}' has an empty or n/a cell at row {i + 2}; "
                    "only leading rows may be empty"
                )
            leading = False
            try:
                v = float(cell)
            except ValueError:
                numeric = False
                break
            if not math.isfinite(v):
                raise InputError(f"{source}: column '{name}' row {i + 2} is not finite")
            vals[i] = v
        if not numeric:
            if columns is not None:
                raise InputError(f"{source}: column '{name}' is not numeric")
            continue  # a text column: skipped when all columns are taken
        if n_lead == len(cells):
            if columns is not None:
                raise InputError(f"{source}: column '{name}' has no values")
            continue
        if n_lead:
            warnings.append(f"{source}: column '{name}': {n_lead} leading empty cell(s) set to 0")
        names.append(name)
        cols.append(vals)
    if not names:
        raise InputError(f"{source}: no numeric columns")
    return Confounds(tuple(names), np.column_stack(cols), source, tuple(warnings))


def read_confounds(path: str | Path, columns: Sequence[str] | None = None) -> Confounds:
    """Read a confounds file; see :func:`parse_confounds`."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise InputError(f"{p}: confounds file not found; check --confounds") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(
            f"{p}: cannot read the confounds file ({exc.__class__.__name__})"
        ) from None
    return parse_confounds(io.StringIO(text), source=str(p), columns=columns)
