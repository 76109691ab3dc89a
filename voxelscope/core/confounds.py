"""Nuisance regressors from a TSV or CSV table with a header row, and choosing among them.

Reading
-------
Every column of the table is read. Empty or ``n/a`` cells in the leading rows (as produced by
volume-to-volume differences) become 0; the warning about them is given only for columns that
enter the model (:meth:`Confounds.missing_warnings`). Missing cells anywhere else, a text cell
in a column of numbers, a repeated header name or a row with the wrong number of cells stop
the reading with one line naming the file, the column, the row and the value. A column of
text only, or of ``n/a`` only, is kept aside: naming it says why it cannot be used.

Choosing columns
----------------
:meth:`Confounds.resolve` turns a choice such as ``"motion24,a_comp_cor_0[0-4],csf"`` into
column names. Each comma-separated term is a column name, a shell-style wildcard (``*``,
``?``, ``[0-4]``; :mod:`fnmatch` rules, case-sensitive) or a named set:

========== ==========================================================================
set        columns
========== ==========================================================================
motion6    ``trans_x trans_y trans_z rot_x rot_y rot_z``
motion12   motion6 and their first derivatives ``<name>_derivative1``
motion24   motion12 and the squares of all twelve, ``<name>_power2`` and
           ``<name>_derivative1_power2``: the 24-parameter motion model of Friston et al.
           (1996), with the values one volume earlier replaced by first differences
           (common practice)
acompcorN  the first N anatomical CompCor components ``a_comp_cor_00 ..`` (Behzadi et al.
           2007), e.g. ``acompcor5``
csf        ``csf``
wm         ``white_matter``
global     ``global_signal``
outliers   the one-hot outlier columns ``motion_outlier*``
none       no column (the file is still read for the checks and excluded volumes)
all        every usable column
========== ==========================================================================

When a table has the six motion columns but not their derivatives or squares, the motion
sets compute them: ``<name>_derivative1`` is the backward difference ``x_t - x_{t-1}`` with 0
in the first row (as pipelines write it, with ``n/a`` there), ``_power2`` the square.

Outlier columns (a name containing ``outlier``, values 0 and 1 only) are not regressors:
chosen, they leave their volumes out of the fit (see :meth:`Confounds.outlier_volumes`);
``non_steady_state_outlier*`` columns always do, unless the model says otherwise.

Examples
--------
>>> import io
>>> c = parse_confounds(io.StringIO("a\\tb\\nn/a\\t1\\n0.5\\t2\\n"), source="c.tsv")
>>> c.names, c.values[:, 0].tolist()
(('a', 'b'), [0.0, 0.5])
>>> c.missing_warnings(["a"])
["c.tsv: column 'a': 1 leading n/a cell(s) set to 0"]
>>> c.resolve("b,a")
('b', 'a')
"""

from __future__ import annotations

import csv
import difflib
import fnmatch
import io
import math
import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .errors import InputError

__all__ = [
    "MAX_CONFOUNDS_BYTES",
    "MOTION6",
    "NAMED_SETS",
    "SMALL_TABLE",
    "Confounds",
    "choose_columns",
    "parse_confounds",
    "read_confounds",
]

_MISSING = {"", "n/a", "na", "nan"}

#: An explicit confounds file with no column choice enters the model whole only when it has
#: at most this many usable columns; bigger tables (a pipeline's 100+ columns) must be chosen.
SMALL_TABLE = 30
#: Confounds files larger than this are refused before reading (a table of 10,000 volumes by
#: 1,000 columns is about 100 MB).
MAX_CONFOUNDS_BYTES = 256 * 1024 * 1024

#: The six rigid-body motion parameters as preprocessing pipelines name them.
MOTION6 = ("trans_x", "trans_y", "trans_z", "rot_x", "rot_y", "rot_z")
#: Named sets and what they stand for (``acompcorN`` takes a number).
NAMED_SETS = {
    "motion6": "the six motion parameters",
    "motion12": "motion6 and their first derivatives",
    "motion24": "motion12 and the squares of all twelve (Friston et al. 1996)",
    "acompcorN": "the first N anatomical CompCor components, e.g. acompcor5",
    "csf": "csf",
    "wm": "white_matter",
    "global": "global_signal",
    "outliers": "the one-hot outlier columns (they leave their volumes out)",
    "none": "no column",
    "all": "every usable column",
}
_SINGLE = {"csf": "csf", "wm": "white_matter", "global": "global_signal"}
_ACOMPCOR = re.compile(r"acompcor(\d+)$", re.IGNORECASE)
_ACOMPCOR_COLUMN = re.compile(r"a_comp_cor_(\d+)$")
_COSINE = re.compile(r"cosine_?\d+$")
_WILD = re.compile(r"[*?\[]")


def _excerpt(text: str, limit: int = 24) -> str:
    """A short printable quote of a cell: control characters replaced, long text cut."""
    clean = "".join(ch if ch.isprintable() else "?" for ch in str(text))
    return repr(clean if len(clean) <= limit else clean[:limit] + "...")


def motion_sets() -> dict[str, tuple[str, ...]]:
    """The motion sets' column names, in the order they enter the model.

    >>> s = motion_sets()
    >>> len(s["motion6"]), len(s["motion12"]), len(s["motion24"])
    (6, 12, 24)
    >>> s["motion24"][12:14]
    ('trans_x_power2', 'trans_y_power2')
    """
    m6 = MOTION6
    d = tuple(f"{n}_derivative1" for n in m6)
    p = tuple(f"{n}_power2" for n in m6)
    dp = tuple(f"{n}_derivative1_power2" for n in m6)
    return {"motion6": m6, "motion12": m6 + d, "motion24": m6 + d + p + dp}


def _derived_motion(base: np.ndarray, name: str) -> np.ndarray | None:
    """Column ``name`` computed from its base motion parameter, or None when not derived."""
    if name.endswith("_derivative1_power2"):
        d = np.diff(base, prepend=base[0])
        return d * d
    if name.endswith("_derivative1"):
        return np.diff(base, prepend=base[0])
    if name.endswith("_power2"):
        return base * base
    return None


@dataclass(frozen=True, eq=False)
class Confounds:
    """Named nuisance columns, one row per volume.

    Attributes
    ----------
    names : tuple of str
        Usable (numeric) columns in file order, then motion columns computed for a set.
    values : ndarray (n_volumes, n_columns)
        float64; leading missing cells are 0.
    source : str
        The file, for messages.
    leading_missing : tuple of int
        Per column, how many leading cells were empty or ``n/a``.
    unusable : mapping
        Column -> why it cannot be used (text only, no values).
    derived : tuple of str
        Columns computed here, not read from the file.
    """

    names: tuple[str, ...]
    values: np.ndarray  # (n_volumes, n_columns) float64
    source: str = "confounds"
    leading_missing: tuple[int, ...] = ()
    unusable: Mapping[str, str] = field(default_factory=dict)
    derived: tuple[str, ...] = ()

    @property
    def n_rows(self) -> int:
        return int(self.values.shape[0])

    @property
    def warnings(self) -> tuple[str, ...]:
        """No warnings by themselves: see :meth:`missing_warnings` for chosen columns."""
        return ()

    @property
    def file_columns(self) -> tuple[str, ...]:
        """Usable columns read from the file (computed ones left out)."""
        return tuple(n for n in self.names if n not in self.derived)

    def column(self, name: str) -> np.ndarray:
        """One column's values (raises a one-line error for an unknown or unusable name)."""
        self._check_names([name])
        return self.values[:, self.names.index(name)]

    def _check_names(self, columns: Iterable[str]) -> None:
        for c in columns:
            if c in self.names:
                continue
            if c in self.unusable:
                raise InputError(f"{self.source}: column '{c}' {self.unusable[c]}")
            near = difflib.get_close_matches(c, self.names, n=3)
            hint = (
                f"did you mean {', '.join(near)}?"
                if near
                else f"the file has {len(self.file_columns)} columns, e.g. "
                f"{', '.join(self.file_columns[:6])}"
            )
            raise InputError(
                f"{self.source}: no column '{c}'; {hint} (named sets: {', '.join(NAMED_SETS)})"
            )

    def select(self, columns: Sequence[str] | None) -> Confounds:
        """Only the named columns (all file columns when ``columns`` is None)."""
        if columns is None:
            columns = self.file_columns
        columns = tuple(columns)
        self._check_names(columns)
        idx = [self.names.index(c) for c in columns]
        lead = tuple(self.leading_missing[i] for i in idx) if self.leading_missing else ()
        return Confounds(
            columns,
            self.values[:, idx],
            self.source,
            lead,
            self.unusable,
            tuple(c for c in columns if c in self.derived),
        )

    def missing_warnings(self, columns: Sequence[str] | None = None) -> list[str]:
        """One line per number of leading empty or ``n/a`` cells among the chosen columns
        (a pipeline's derivative and power columns all start with one: 24 motion columns
        gave 12 lines, one each, before), naming the columns.

        >>> import io
        >>> c = parse_confounds(io.StringIO("a\\tb\\tc\\nn/a\\tn/a\\t1\\n1\\t2\\t3\\n"), "c.tsv")
        >>> c.missing_warnings()
        ["c.tsv: 2 columns ('a', 'b'): 1 leading n/a cell(s) each set to 0"]
        """
        columns = self.file_columns if columns is None else columns
        by_count: dict[int, list[str]] = {}
        for c in columns:
            if c in self.names and self.leading_missing:
                k = self.leading_missing[self.names.index(c)]
                if k:
                    by_count.setdefault(k, []).append(c)
        out = []
        for k, names in sorted(by_count.items()):
            if len(names) == 1:
                out.append(f"{self.source}: column '{names[0]}': {k} leading n/a cell(s) set to 0")
                continue
            shown = ", ".join(f"'{c}'" for c in names)
            out.append(
                f"{self.source}: {len(names)} columns ({shown}): "
                f"{k} leading n/a cell(s) each set to 0"
            )
        return out

    def check_rows(self, n_volumes: int) -> None:
        """Raise unless there is one row per volume."""
        if self.n_rows != n_volumes:
            raise InputError(
                f"{self.source}: {self.n_rows} rows but the run has {n_volumes} volumes; "
                "give one confound row per volume"
            )

    def key(self) -> tuple:
        return (self.names, self.values.tobytes())

    # ------------------------------------------------------------------ choosing columns

    def with_motion_derivatives(self, names: Sequence[str]) -> Confounds:
        """This table plus any of ``names`` that are motion derivatives or squares the file
        lacks but its six motion columns give (see the module text)."""
        extra: list[str] = []
        cols: list[np.ndarray] = []
        for n in names:
            if n in self.names or n in self.unusable or n in extra:
                continue
            base = next((m for m in MOTION6 if n.startswith(m + "_")), None)
            if base is None or base not in self.names:
                continue
            v = _derived_motion(self.values[:, self.names.index(base)], n)
            if v is not None:
                extra.append(n)
                cols.append(v)
        if not extra:
            return self
        return Confounds(
            self.names + tuple(extra),
            np.column_stack([self.values, *cols]),
            self.source,
            tuple(self.leading_missing) + (0,) * len(extra),
            self.unusable,
            self.derived + tuple(extra),
        )

    def resolve(self, choice: str | Sequence[str] | None) -> tuple[str, ...]:
        """Column names for a choice of names, wildcards and named sets (module text).

        Terms are expanded in the order given, each wildcard in file order; a column named
        twice counts once. Raises InputError for a term that matches nothing.

        >>> import io
        >>> t = "trans_x,trans_y,a_comp_cor_00,a_comp_cor_01,csf\\n1,2,3,4,5\\n"
        >>> c = parse_confounds(io.StringIO(t), source="c.tsv")
        >>> c.resolve("csf,trans_?")
        ('csf', 'trans_x', 'trans_y')
        >>> c.resolve("acompcor1")
        ('a_comp_cor_00',)
        """
        if choice is None:
            return self.file_columns
        terms = (
            [t.strip() for t in choice.split(",")]
            if isinstance(choice, str)
            else [str(t).strip() for t in choice]
        )
        terms = [t for t in terms if t]
        out: list[str] = []
        for term in terms:
            for name in self._expand(term):
                if name not in out:
                    out.append(name)
        return tuple(out)

    def _expand(self, term: str) -> list[str]:
        low = term.lower()
        if low == "none":
            return []
        if low == "all":
            return list(self.file_columns)
        sets = motion_sets()
        if low in sets:
            want = sets[low]
            have = [n for n in MOTION6 if n in self.names]
            if len(have) < len(MOTION6):
                lacking = [n for n in MOTION6 if n not in self.names]
                raise InputError(
                    f"{self.source}: the set '{term}' needs the motion columns "
                    f"{', '.join(lacking)}, which the file lacks; name the columns instead"
                )
            return list(want)
        m = _ACOMPCOR.match(term)
        if m:
            k = int(m.group(1))
            comps = sorted(
                (int(mm.group(1)), n)
                for n in self.file_columns
                if (mm := _ACOMPCOR_COLUMN.match(n))
            )
            if k < 1 or len(comps) < k:
                raise InputError(
                    f"{self.source}: '{term}' asks for {k} anatomical CompCor components but "
                    f"the file has {len(comps)} (a_comp_cor_NN columns); choose fewer"
                )
            return [n for _, n in comps[:k]]
        if low == "acompcor":
            raise InputError(
                f"{self.source}: say how many CompCor components, e.g. acompcor5 (the first 5)"
            )
        if low in _SINGLE:
            self._check_names([_SINGLE[low]])
            return [_SINGLE[low]]
        if low == "outliers":
            found = [n for n in self.file_columns if n.startswith("motion_outlier")]
            return found  # none: a run without outliers is fine
        if _WILD.search(term):
            found = [n for n in self.file_columns if fnmatch.fnmatchcase(n, term)]
            if not found:
                raise InputError(
                    f"{self.source}: the pattern '{term}' matches no column; "
                    f"the file has e.g. {', '.join(self.file_columns[:6])}"
                )
            return found
        self._check_names([term])
        return [term]

    def default_choice(self) -> tuple[str, ...]:
        """Columns for a confounds file given with no choice: all of a small table.

        Raises InputError for a table with more than :data:`SMALL_TABLE` usable columns,
        listing the named sets and how to choose.
        """
        cols = self.file_columns
        if len(cols) <= SMALL_TABLE:
            return cols
        raise InputError(
            f"{self.source}: the table has {len(cols)} columns, too many to use them all (sets: "
            + ", ".join(NAMED_SETS)
            + "; names and wildcards like a_comp_cor_0[0-4] too)",
            file=self.source,
            remedy="confound_columns",
        )

    # ------------------------------------------------------------------ volumes

    def is_outlier_column(self, name: str) -> bool:
        """A column that marks volumes rather than measuring something: its name contains
        ``outlier`` and it holds only 0 and 1."""
        if "outlier" not in name or name not in self.names:
            return False
        v = self.values[:, self.names.index(name)]
        return bool(np.all((v == 0) | (v == 1)))

    def outlier_volumes(self, columns: Iterable[str]) -> dict[int, str]:
        """Volume -> the outlier column that marks it, for the outlier columns among
        ``columns`` (0-based volumes)."""
        out: dict[int, str] = {}
        for c in columns:
            if self.is_outlier_column(c):
                for v in np.flatnonzero(self.values[:, self.names.index(c)] == 1):
                    out.setdefault(int(v), c)
        return out

    def non_steady_columns(self) -> tuple[str, ...]:
        """The ``non_steady_state_outlier*`` columns of the file."""
        return tuple(
            n
            for n in self.file_columns
            if n.startswith("non_steady_state_outlier") and self.is_outlier_column(n)
        )

    def cosine_columns(self, columns: Iterable[str]) -> tuple[str, ...]:
        """The discrete-cosine drift columns (``cosine00`` ...) among ``columns``."""
        return tuple(c for c in columns if _COSINE.match(c))


def choose_columns(
    confounds: Confounds, choice: str | Sequence[str] | None, explicit: bool
) -> tuple[str, ...]:
    """The model's confound columns for a user's choice.

    ``choice`` None means no choice was made: a file the user named (``explicit``) gives all
    columns of a small table (:meth:`Confounds.default_choice`); a file found beside the run
    gives none (it still serves the checks and the excluded volumes).

    >>> import io
    >>> c = parse_confounds(io.StringIO("a,b\\n1,2\\n3,5\\n"), source="c.csv")
    >>> choose_columns(c, None, explicit=True), choose_columns(c, None, explicit=False)
    (('a', 'b'), ())
    >>> choose_columns(c, "b", explicit=False)
    ('b',)
    """
    if choice is None:
        return confounds.default_choice() if explicit else ()
    return confounds.resolve(choice)


def _cells(rows: list[list[str]], j: int) -> list[str]:
    return [r[j].strip() for r in rows]


def parse_confounds(
    stream, source: str = "confounds.tsv", columns: Sequence[str] | None = None
) -> Confounds:
    """Parse a confounds table (tab- or comma-separated, header row); see the module text.

    ``columns`` (names only) keeps just those columns, in that order.
    """
    text = stream.read() if hasattr(stream, "read") else "".join(stream)
    lines = [ln for ln in text.splitlines() if ln.strip()]
    if not lines:
        raise InputError(f"{source}: the confounds file is empty; it needs a header row")
    delim = "\t" if "\t" in lines[0] else ","
    try:  # Python 3.10's csv refuses NUL bytes, later versions read them as text
        rows = list(csv.reader(lines, delimiter=delim))
    except csv.Error as err:
        raise InputError(
            f"{source}: not a readable table ({err}); save it as plain tab-separated text"
        ) from None
    header = [h.strip() for h in rows[0]]
    body = rows[1:]
    try:
        float(header[0])
        raise InputError(f"{source}: the first row looks like numbers; the file needs a header row")
    except ValueError:
        pass
    if not body:
        raise InputError(f"{source}: no rows below the header")
    seen: dict[str, int] = {}
    for j, h in enumerate(header):
        if not h:
            raise InputError(f"{source}: header cell {j + 1} is empty; give every column a name")
        if h in seen:
            raise InputError(
                f"{source}: column name {_excerpt(h)} appears twice in the header (columns "
                f"{seen[h] + 1} and {j + 1}); rename or remove one of them"
            )
        seen[h] = j
    for i, r in enumerate(body):
        if len(r) != len(header):
            raise InputError(
                f"{source}: row {i + 1} (line {i + 2}) has {len(r)} cells but the header has "
                f"{len(header)}; give every row one cell per column"
            )

    names: list[str] = []
    cols: list[np.ndarray] = []
    lead_counts: list[int] = []
    unusable: dict[str, str] = {}
    for j, name in enumerate(header):
        cells = _cells(body, j)
        vals = np.zeros(len(cells))
        n_lead = 0
        first_text: tuple[int, str] | None = None
        first_number: int | None = None
        missing_after: int | None = None
        for i, cell in enumerate(cells):
            if cell.lower() in _MISSING:
                if first_number is None and first_text is None:
                    n_lead += 1
                elif missing_after is None:
                    missing_after = i
                continue
            try:
                v = float(cell)
            except ValueError:
                if first_text is None:
                    first_text = (i, cell)
                continue
            if first_number is None:
                first_number = i
            if not math.isfinite(v):
                raise InputError(
                    f"{source}: column '{name}' row {i + 1} (line {i + 2}) holds "
                    f"{_excerpt(cell)}, not a finite number; fix the cell"
                )
            vals[i] = v
        if first_number is None:
            if first_text is not None:
                i, cell = first_text
                unusable[name] = (
                    f"holds text (row {i + 1}: {_excerpt(cell)}), not numbers; "
                    "choose a numeric column"
                )
            else:
                unusable[name] = (
                    f"has no values (all {len(cells)} rows are empty or n/a); "
                    "choose another column or fill it in"
                )
            continue
        if first_text is not None:
            i, cell = first_text
            raise InputError(
                f"{source}: column '{name}' row {i + 1} (line {i + 2}) holds {_excerpt(cell)} "
                "among numbers; fix the cell (n/a for a missing value) or remove the column"
            )
        if missing_after is not None:
            i = missing_after
            raise InputError(
                f"{source}: column '{name}' row {i + 1} (line {i + 2}) is empty or n/a after "
                "values; only leading rows may be missing; fill it in or remove the column"
            )
        names.append(name)
        cols.append(vals)
        lead_counts.append(n_lead)
    if not names:
        raise InputError(
            f"{source}: no numeric columns; a confounds table holds numbers under a header row"
        )
    conf = Confounds(tuple(names), np.column_stack(cols), source, tuple(lead_counts), unusable)
    conf = conf.with_motion_derivatives(motion_sets()["motion24"])
    if columns is not None:
        conf = conf.select(columns)
    return conf


def read_confounds(path: str | Path, columns: Sequence[str] | None = None) -> Confounds:
    """Read a confounds file; see :func:`parse_confounds`.

    Read through the one bounded text reader: files over :data:`MAX_CONFOUNDS_BYTES` are
    refused by their size before reading, devices are refused, endless streams are read only
    that far; other encodings get one line saying to save the file as UTF-8.
    """
    from .inputs import read_input_text

    p = Path(path)
    text = read_input_text(p, "confounds", limit=MAX_CONFOUNDS_BYTES)
    return parse_confounds(io.StringIO(text), source=str(p), columns=columns)
