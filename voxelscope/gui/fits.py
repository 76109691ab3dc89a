"""Fits: one row per kernel at the current voxel (a Qt table model fed from the state).

Columns: colour marker, kernel, estimate (the contrast's c'b), variance, t, df, p, R², the
same whatever the model, so the table keeps its shape (and its width) when the model
changes. Under the table, one line: the F test of all the condition's columns when the
model has derivatives or FIR bins, then the noise model's coefficients (rho under AR(1),
the AR(p) coefficients), cut with "…" when narrow and whole in its tooltip; the copied
table has them as columns.
The numbers are the fields of :class:`voxelscope.core.model.KernelFit` (from
``Analysis.fit_voxel``), so they equal what the command line prints. Copy as
tab-separated text with Ctrl+C or the context menu.
"""

from __future__ import annotations

import math

import numpy as np
from PySide6.QtCore import QAbstractTableModel, QEvent, QModelIndex, Qt, Signal
from PySide6.QtGui import QAction, QColor, QGuiApplication, QKeySequence
from PySide6.QtWidgets import (
    QAbstractItemView,
    QHeaderView,
    QLabel,
    QTableView,
    QVBoxLayout,
    QWidget,
)

from voxelscope.core.noise import NOISE_LABELS
from voxelscope.core.numfmt import MISSING, format_seconds
from voxelscope.core.numfmt import format_value as format_number
from voxelscope.gui.colours import kernel_colour
from voxelscope.gui.plaintext import esc
from voxelscope.gui.sizing import ElidedLabel, LabelHolder
from voxelscope.gui.state import ViewerState

__all__ = ["FitsModel", "FitsPanel", "f_summary", "format_value", "noise_summary", "runs_summary"]

RAW_ROLE = Qt.ItemDataRole.UserRole + 1

_BASE = [
    ("", "Kernel colour"),
    ("kernel", "Kernel of the condition regressors"),
    ("estimate", "Contrast estimate c'b (data units), est. for short"),
    ("variance", "Variance of the contrast estimate"),
    ("t", "t statistic of the contrast"),
    ("df", "Degrees of freedom of t (effective under the default AR(p) noise model)"),
    ("p", "Two-sided p value of t"),
    ("R²", "Fraction of the data variance explained by the whole model"),
]

#: Header texts shorter than the column's name: "estimate" over numbers of four or five
#: characters took 35 px that the t and df columns need in a 1280 px window (the name
#: stays in the tooltip and in the copied table).
_SHORT_HEADERS = {"estimate": "est."}

#: The line under the table while a dragged voxel's fit is on its way.
PENDING_LINE = "Fitting this voxel…"

#: Columns of the copied table beyond the shown ones, when some kernel has a value.
_EXTRA_TSV = ("F", "df F", "p F", "rho")


#: Typical widest cell texts of a column, for laying out the table before any fit.
_TYPICAL = {
    "kernel": "double-gamma",
    "p": "1.00e-10",
    "p F": "1.00e-10",
    "df F": "00, 000",
    "run": "combined",
    "Q p": "1.00e-10",
}


#: Kind of number (core/numfmt.py) of each numeric column.
_KINDS = {
    "estimate": "estimate",
    "variance": "variance",
    "t": "t",
    "F": "F",
    "Q": "Q",
    "p": "p",
    "p F": "p",
    "Q p": "p",
    "R²": "r",
    "rho": "r",
    "df": "df",
}


def format_value(column: str, value) -> str:
    """Display text of one number in the Fits table, by the project's one rule
    (:func:`voxelscope.core.numfmt.format_value`).

    Examples
    --------
    >>> format_value("p", 0.00001234)
    '1.23e-05'
    >>> format_value("t", 4.56789)
    '4.57'
    >>> format_value("estimate", None)
    '–'
    """
    if value is None:
        return MISSING
    if isinstance(value, str):
        return value
    if column == "df F":
        return str(value)
    return format_number(_KINDS.get(column, "value"), value)


def runs_summary(combined) -> list[str]:
    """One line per kind of flag across kernels (the Checks part has the full sentences).

    Examples
    --------
    >>> from voxelscope.core.combine import combine_fits
    >>> c = combine_fits("gamma", "tap", ["a", "b", "c"], [3.0, 0, 0.1], [.1] * 3, [90] * 3)
    >>> runs_summary([c])[1]
    'The combined effect rests on a alone (gamma).'
    """
    seen: dict[tuple, list[str]] = {}
    for c in combined:
        for f in c.flags:
            seen.setdefault((f.id, f.run), []).append(c.kernel)
    out = []
    for (ident, run), kernels in seen.items():
        under = ", ".join(kernels)
        if ident == "runs-disagree":
            out.append(f"The runs disagree here (Cochran's Q p < 0.05) ({under}).")
        elif ident == "one-run":
            out.append(f"The combined effect rests on {run} alone ({under}).")
        else:
            out.append(f"{run} cannot be combined here ({under}).")
    return out


def f_summary(fits) -> str:
    """The F test of every kernel that has one, in one line ("" when none has).

    Examples
    --------
    >>> from types import SimpleNamespace as NS
    >>> print(f_summary(NS(fits=[NS(kernel="fir", f=12.3456, f_df=(20, 197), f_p=1.2e-8)])))
    F test of all the condition's columns: fir F(20, 197) = 12.35, p 1.20e-08
    """
    parts = [
        f"{f.kernel} F({f.f_df[0]}, {f.f_df[1]}) = {format_value('F', f.f)}, "
        f"p {format_value('p F', f.f_p)}"
        for f in fits.fits
        if f.f_df is not None
    ]
    return ("F test of all the condition's columns: " + " · ".join(parts)) if parts else ""


def noise_summary(fits) -> tuple[str, str]:
    """The noise model's coefficients of every kernel in one line, and the long form.

    AR(p): the coefficients per kernel and where they come from, said once; AR(1): rho per
    kernel; OLS: nothing. The long form (a tooltip) has one line per kernel.
    """
    parts, long = [], []
    source = set()
    for f in fits.fits:
        est = getattr(f, "noise_estimate", None)
        if est is not None:
            parts.append(f"{f.kernel} {', '.join(format_number('r', v) for v in est.phi)}")
            long.append(f"{f.kernel}: {est.describe()}")
            source.add(f"from {est.n_neighbours} voxels around ({est.fwhm_mm:g} mm)")
        elif f.result.noise == "arp" and f.result.ar is not None:
            coefs = np.asarray(f.result.ar, dtype=float).reshape(-1)
            parts.append(f"{f.kernel} {', '.join(format_number('r', v) for v in coefs)}")
            long.append(f"{f.kernel}: {f.noise_text}")
            source.add("from this voxel alone")
        elif f.rho is not None:
            parts.append(f"{f.kernel} {format_number('r', f.rho)}")
            long.append(f"{f.kernel}: {f.noise_text}")
    if not parts:
        return "", ""
    if any(f.result.noise == "arp" for f in fits.fits):
        head = "AR coefficients"
        if len(source) == 1:
            head += " " + source.pop()
    else:
        head = "AR(1) rho"
    return f"{head}: " + " · ".join(parts), "\n".join(long)


class FitsModel(QAbstractTableModel):
    """Table model of the current voxel's fits (rows: kernels).

    A new voxel with the same kernels and columns only changes the numbers
    (``dataChanged`` and ``values_changed``); other changes reset the model.
    """

    values_changed = Signal()

    def __init__(self, state: ViewerState, parent=None) -> None:
        super().__init__(parent)
        self.state = state
        self._columns: list[tuple[str, str]] = list(_BASE)
        self._rows: list[dict] = []
        self._cells: list[list[dict]] = []  # per cell: role -> value, made once per fit
        state.fits_changed.connect(self._on_fits)
        state.runs_changed.connect(lambda: self._on_fits(state.fits))

    # ------------------------------------------------------------------ data

    def _several(self) -> tuple[list[tuple[str, str]], list[dict]] | None:
        """Columns and rows with several runs: per kernel a row per run, then the combined
        row (fixed effects, with Cochran's Q and its p)."""
        st = self.state
        if not st.run_fits:
            return None
        # R² is left out to keep the table narrow (the combined row has none)
        cols = [c for c in _BASE if c[0] != "R²"]
        cols.insert(2, ("run", "The run, or the fixed-effects combination of the runs"))
        cols += [
            ("Q", "Cochran's Q: how far the runs' estimates disagree (combined rows)"),
            ("Q p", "Chi-square p of Q on (runs - 1) df; small p: the runs disagree"),
        ]
        rows: list[dict] = []
        combined = {c.kernel: c for c in st.combined}
        kernels = [f.kernel for f in (st.fits.fits if st.fits is not None else ())]
        for i, kernel in enumerate(kernels):
            for rf in st.run_fits:
                f = rf.fits.fits[i] if rf.fits is not None and i < len(rf.fits.fits) else None
                rows.append(
                    {
                        "": kernel,
                        "kernel": kernel,
                        "run": rf.label,
                        "estimate": None if f is None else f.estimate,
                        "variance": None if f is None else f.variance,
                        "t": None if f is None else f.t,
                        "df": None if f is None else f.df,
                        "p": None if f is None else f.p,
                        "R²": None if f is None else f.r2,
                        "Q": None,
                        "Q p": None,
                    }
                )
            c = combined.get(kernel)
            rows.append(
                {
                    "": kernel,
                    "kernel": kernel,
                    "run": "combined",
                    "estimate": None if c is None else c.estimate,
                    "variance": None if c is None else c.variance,
                    "t": None if c is None else c.t,
                    "df": None if c is None else (int(c.df) if float(c.df).is_integer() else c.df),
                    "p": None if c is None else c.p,
                    "R²": None,
                    "Q": None if c is None else c.q,
                    "Q p": None if c is None else c.q_p,
                }
            )
        return cols, rows

    def _on_fits(self, fits) -> None:
        rows: list[dict] = []
        # the same columns whatever the model (a column that came and went moved the
        # others and could push the table into sideways scrolling): the F test and AR(1)'s
        # rho are lines under the table, and columns of the copied table
        cols = list(_BASE)
        several = self._several()
        if fits is None and self.state.fitting and self._rows:
            # a dragged voxel's fit is on its way: the same rows with no numbers (never
            # the numbers of the voxel the pointer left), so the table keeps its shape
            cols = list(self._columns)
            keep = ("", "kernel", "run")
            rows = [{k: (v if k in keep else None) for k, v in r.items()} for r in self._rows]
        elif several is not None:
            cols, rows = several
        elif fits is not None and fits.fits:
            for f in fits.fits:
                rows.append(
                    {
                        "": f.kernel,
                        "kernel": f.kernel,
                        "estimate": f.estimate,
                        "variance": f.variance,
                        "t": f.t,
                        "df": f.df,
                        "p": f.p,
                        "R²": f.r2,
                        "rho": f.rho,
                        "F": f.f,
                        "df F": None if f.f_df is None else f"{f.f_df[0]}, {f.f_df[1]}",
                        "p F": f.f_p,
                    }
                )
        same_shape = cols == self._columns and [(r["kernel"], r.get("run")) for r in rows] == [
            (r["kernel"], r.get("run")) for r in self._rows
        ]
        cells = [[self._cell(row, name) for name, _ in cols] for row in rows]
        if same_shape and rows:
            if cells == self._cells:  # nothing new to show (a drag's next voxel, no fit yet)
                return
            # same kernels and columns (a click): new numbers only, no reset of the view
            self._rows = rows
            self._cells = cells
            self.dataChanged.emit(self.index(0, 0), self.index(len(rows) - 1, len(cols) - 1))
            self.values_changed.emit()
            return
        self.beginResetModel()
        self._rows = rows
        self._cells = cells
        self._columns = cols
        self.endResetModel()

    def columns(self) -> list[str]:
        return [c for c, _ in self._columns]

    def raw(self, row: int, column: str):
        """The unformatted value of a cell (None where undefined)."""
        return self._rows[row][column]

    def rowCount(self, parent=QModelIndex()) -> int:  # noqa: B008
        return 0 if parent.isValid() else len(self._rows)

    def columnCount(self, parent=QModelIndex()) -> int:  # noqa: B008
        return 0 if parent.isValid() else len(self._columns)

    @staticmethod
    def _cell(row: dict, name: str) -> dict:
        """Every role's value of one cell, computed once per fit: a repaint asks for about
        ten roles of every cell, and a click must not pay for formatting them again."""
        value = row[name]
        left = name in ("", "kernel", "run")
        cell = {
            Qt.ItemDataRole.DisplayRole: "" if name == "" else format_value(name, value),
            RAW_ROLE: value,
            Qt.ItemDataRole.TextAlignmentRole: int(
                (Qt.AlignmentFlag.AlignLeft if left else Qt.AlignmentFlag.AlignRight)
                | Qt.AlignmentFlag.AlignVCenter
            ),
        }
        if name == "":
            cell[Qt.ItemDataRole.DecorationRole] = QColor(kernel_colour(row["kernel"]))
        if name == "kernel":
            cell[Qt.ItemDataRole.ForegroundRole] = QColor("#1f1f1f")
        if row.get("run") == "combined":
            cell[Qt.ItemDataRole.BackgroundRole] = QColor("#e8eef5")
        if not left and value is not None:
            cell[Qt.ItemDataRole.ToolTipRole] = repr(value)
        return cell

    def data(self, index, role=Qt.ItemDataRole.DisplayRole):
        if not index.isValid():
            return None
        return self._cells[index.row()][index.column()].get(role)

    def headerData(self, section, orientation, role=Qt.ItemDataRole.DisplayRole):
        if orientation != Qt.Orientation.Horizontal:
            return None
        if role == Qt.ItemDataRole.DisplayRole:
            name = self._columns[section][0]
            return _SHORT_HEADERS.get(name, name)
        if role == Qt.ItemDataRole.ToolTipRole:
            return self._columns[section][1]
        return None

    def to_tsv(self) -> str:
        """The table as tab-separated text: a header row, then one row per kernel."""
        names = [c for c in self.columns() if c != ""]
        for extra in _EXTRA_TSV:  # shown in the lines under the table, copied as columns
            if extra not in names and any(r.get(extra) is not None for r in self._rows):
                names.append(extra)
        lines = ["\t".join(names)]
        for row in self._rows:
            cells = []
            for c in names:
                v = row.get(c)
                if v is None:
                    cells.append("")
                elif isinstance(v, float):
                    cells.append(repr(v))
                else:
                    cells.append(str(v))
            lines.append("\t".join(cells))
        return "\n".join(lines) + "\n"


class FitsPanel(QWidget):
    """Fits: the table, the contrast and noise model it belongs to, and voxel warnings."""

    def __init__(self, state: ViewerState, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setObjectName("fits_panel")
        self.state = state
        self.model = FitsModel(state, self)
        lay = QVBoxLayout(self)
        lay.setContentsMargins(6, 4, 6, 4)
        lay.setSpacing(3)
        self.caption = QLabel("")
        self.caption.setTextFormat(Qt.TextFormat.RichText)  # outside text escaped (esc)
        self.caption.setObjectName("fits_caption")
        self.caption.setWordWrap(True)
        lay.addWidget(self.caption)
        self.table = QTableView()
        self.table.setObjectName("fits_table")
        self.table.setModel(self.model)
        self.table.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        self.table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.table.verticalHeader().setVisible(False)
        self.table.setAlternatingRowColors(True)
        self.table.setShowGrid(False)
        self.table.setWordWrap(False)
        hh = self.table.horizontalHeader()
        hh.setSectionResizeMode(QHeaderView.ResizeMode.Fixed)
        hh.setHighlightSections(False)
        hh.setStretchLastSection(False)
        self.table.installEventFilter(self)  # font and style changes
        self.table.viewport().installEventFilter(self)  # its size (after the table's)
        self.table.verticalHeader().setDefaultSectionSize(26)
        self.table.setContextMenuPolicy(Qt.ContextMenuPolicy.ActionsContextMenu)
        self.copy_action = QAction("Copy table as TSV", self.table)
        self.copy_action.setShortcut(QKeySequence.StandardKey.Copy)
        self.copy_action.setShortcutContext(Qt.ShortcutContext.WidgetWithChildrenShortcut)
        self.copy_action.triggered.connect(self.copy)
        self.table.addAction(self.copy_action)
        self.addAction(self.copy_action)
        lay.addWidget(self.table, 1)
        self.notes = QLabel("")
        self.notes.setObjectName("fits_notes")
        self.notes.setWordWrap(True)
        lay.addWidget(self.notes)
        # the noise model's coefficients: always one line (cut with "…" when narrow; the
        # whole text, one line per kernel, in the tooltip)
        self.noise_line = ElidedLabel("", min_width=60)
        self.noise_line.setObjectName("fits_notes")
        # its text changes at every voxel: held so that the change repaints the line only
        self._noise_holder = LabelHolder(self.noise_line, min_width=60)
        self._noise_holder.setVisible(False)
        lay.addWidget(self._noise_holder)
        self.fit_width = False  # Show mode: squeeze the columns into the width
        self.hidden_columns: tuple[str, ...] = ()  # Show mode leaves a few out
        self.show_mode = False  # Show mode: no coefficient line
        self._widths: list[int] = []
        self._header_key = None
        self._header_widths: list[int] = []
        self._grown: tuple[tuple, list[int]] = ((), [])
        self.model.modelReset.connect(self._layout_columns)
        self.model.modelReset.connect(self._fit_rows)
        self.model.values_changed.connect(self._layout_columns)
        state.fits_changed.connect(self._on_fits)

    def _layout_columns(self) -> None:
        """Every column at least as wide as its header and cells; spare room shared out.

        Stretched columns of equal width clipped headers such as "variance" in a narrow
        window. Now each column gets its content width plus a little padding; when the
        padding does not fit, it shrinks first; only when even the bare text does not fit
        does the table scroll sideways. With :attr:`fit_width` (Show mode) the columns are
        always squeezed into the width (long numbers are then elided).
        Widths are only set when they change, so a click that keeps the shape is cheap.
        """
        hh = self.table.horizontalHeader()
        n = self.model.columnCount()
        if n == 0:
            return
        names = self.model.columns()
        hidden = self._hidden_now()
        shown = [c for c in range(1, n) if names[c] not in hidden]
        for c in range(1, n):
            hide = c not in shown
            if self.table.isColumnHidden(c) != hide:
                self.table.setColumnHidden(c, hide)
        everything = self._content_widths()
        base = [everything[c - 1] for c in shown]
        first = max(30, hh.minimumSectionSize())  # the colour marker column
        room = self.table.viewport().width() - first
        # While the columns stay the same (clicks, a drag), a column does not narrow as long
        # as the widest texts seen still fit: a new width makes the table lay out and paint
        # a second time, one event-loop pass later.
        cols = tuple(self.model.columns())
        if self._grown[0] == cols and len(self._grown[1]) == len(base):
            grown = [max(a, b) for a, b in zip(base, self._grown[1])]
            if sum(grown) <= room:
                base = grown
        self._grown = (cols, base)
        pad = 8
        while pad > 0 and sum(base) + pad * len(base) > room:
            pad -= 2
        # Each measured width carries a few pixels of its own margin (12 px around the
        # widest cell, the header's own); when the bare sum is a little too wide, give up
        # to half of that margin before the table has to scroll sideways.
        # Never below a column's header, which must stay readable.
        over = sum(base) - room
        if over > 0 and room > 0:
            heads = [self._header_widths[c] for c in shown]
            slack = [max(0, min(6, b - h)) for b, h in zip(base, heads)]
            if sum(slack) > 0:
                frac = min(1.0, over / sum(slack))
                base = [b - math.ceil(s * frac) for b, s in zip(base, slack)]
                base = [max(b, h) for b, h in zip(base, heads)]
        need = [b + pad for b in base]
        spare = room - sum(need)
        if spare >= 0:
            share, rest = divmod(spare, len(need))
            need = [w + share + (1 if c < rest else 0) for c, w in enumerate(need)]
        elif self.fit_width and room > 0:
            scale = room / sum(need)
            need = [max(24, int(w * scale)) for w in need]
        by_column = dict(zip(shown, need))
        widths = [first] + [by_column.get(c, 0) for c in range(1, n)]
        if widths != self._widths:
            self._widths = widths
            for c, width in enumerate(widths):
                if width:
                    self.table.setColumnWidth(c, width)

    def _hidden_now(self) -> set[str]:
        """Columns left out now (:attr:`hidden_columns` that the table has)."""
        names = self.model.columns()
        return set(self.hidden_columns) & set(names)

    def refresh(self) -> None:
        """Caption, notes and columns again (after :attr:`show_mode` changed)."""
        self._on_fits(self.state.fits)
        self.relayout()

    def _fit_rows(self) -> None:
        """Rows a little lower when that shows every kernel without scrolling (never
        lower than the text): a part a few pixels short hid the last row (FIR's)."""
        vh = self.table.verticalHeader()
        n = self.model.rowCount()
        if n == 0:
            return
        full = vh.defaultSectionSize()
        least = self.table.fontMetrics().height() + 2
        if vh.minimumSectionSize() > least:
            vh.setMinimumSectionSize(least)
        h = max(least, min(full, self.table.viewport().height() // n))
        for r in range(n):
            if vh.sectionSize(r) != h:
                vh.resizeSection(r, h)

    def set_hidden_columns(self, names) -> None:
        """Leave these columns out of the table (Show mode); ``()`` shows every column."""
        names = tuple(names)
        if names != self.hidden_columns:
            self.hidden_columns = names
            self.relayout()

    def relayout(self) -> None:
        """Lay the columns out again (after a change of font or of ``fit_width``)."""
        self._widths = []
        self._header_key = None
        self._grown = ((), [])
        self._layout_columns()

    def _content_widths(self) -> list[int]:
        """Width of each column after the marker: its header or its widest cell text.

        Measured with the font metrics of the shown texts (a few dozen strings), not the
        view's per-cell size hints, which cost a layout pass of every cell on each click.
        Header widths are kept until the columns or the font change.
        """
        hh = self.table.horizontalHeader()
        n = self.model.columnCount()
        key = (tuple(self.model.columns()), self.table.font().key(), hh.font().key())
        if key != self._header_key:
            self._header_key = key
            self._header_widths = [hh.sectionSizeHint(c) for c in range(n)]
        fm = self.table.fontMetrics()
        model = self.model
        columns = model.columns()
        out = []
        for c in range(1, n):
            cells = [model.data(model.index(r, c)) or "" for r in range(model.rowCount())]
            if not cells:  # no fit yet: typical widest texts, so the first layout is right
                cells = [_TYPICAL.get(columns[c], "-00.000")]
            text = max((fm.horizontalAdvance(t) for t in cells), default=0) + 12
            out.append(max(text, self._header_widths[c]))
        return out

    def table_width(self) -> int:
        """Pixels the table needs to show every column without scrolling."""
        names = self.model.columns()
        widths = self._content_widths()
        hidden = self._hidden_now()
        need = 30 + sum(w + 8 for c, w in enumerate(widths, start=1) if names[c] not in hidden)
        margins = self.layout().contentsMargins()
        return need + 2 * self.table.frameWidth() + margins.left() + margins.right() + 4

    def eventFilter(self, obj, ev) -> bool:
        if obj is self.table.viewport() and ev.type() == QEvent.Type.Resize:
            self._layout_columns()
            self._fit_rows()
        elif obj is self.table and ev.type() in (QEvent.Type.FontChange, QEvent.Type.StyleChange):
            self.relayout()
        return super().eventFilter(obj, ev)

    def copy(self) -> str:
        """Put the table on the clipboard as TSV; returns the text."""
        text = self.model.to_tsv()
        QGuiApplication.clipboard().setText(text)
        return text

    def _on_fits(self, fits) -> None:
        s = self.state.settings
        analysis = self.state.analysis
        if analysis is None:
            self.caption.setText("No model: open an events file to fit this voxel.")
            self.notes.setText("")
            return
        contrast = s.contrast or analysis.default_contrast()
        noise = NOISE_LABELS.get(s.noise, s.noise)
        hp = "none" if s.highpass_s is None else format_seconds(s.highpass_s)
        shift = (
            f", onsets {format_seconds(s.onset_shift_s, signed=True)}" if s.onset_shift_s else ""
        )
        self.caption.setText(
            f"<b>Contrast</b> {esc(contrast)}&nbsp;&nbsp;·&nbsp;&nbsp;<b>Noise</b> {noise}"
            f"&nbsp;&nbsp;·&nbsp;&nbsp;<b>High-pass</b> {hp}{shift}"
        )
        st = self.state
        if fits is None and st.fitting:
            # a dragged voxel's fit is on its way: the model's own notes stay (the same at
            # every voxel), the voxel's numbers and notes go until its fit arrives
            if st.extra:
                self.caption.setText(
                    self.caption.text()
                    + f"&nbsp;&nbsp;·&nbsp;&nbsp;<b>Runs</b> {len(st.bundles)}, combined by "
                    "fixed effects"
                )
            self._pending_notes(analysis.design_warnings(s))
            return
        notes = list(fits.warnings) if fits is not None else []
        if st.run_fits:
            self.caption.setText(
                self.caption.text()
                + f"&nbsp;&nbsp;·&nbsp;&nbsp;<b>Runs</b> {len(st.run_fits)}, combined by "
                "fixed effects"
            )
            notes += [f"{r.label}: {r.note}" for r in st.run_fits if r.note]
            notes += runs_summary(st.combined)
        # the F test and the noise coefficients share one line (F first: it matters more)
        f_line = f_summary(fits) if fits is not None else ""
        noise_line, noise_tip = noise_summary(fits) if fits is not None else ("", "")
        if self.show_mode:
            noise_line = noise_tip = ""
        line = ".   ".join(t for t in (f_line, noise_line) if t)
        tip = "\n".join(t for t in (f_line, noise_tip) if t)
        if line != self.noise_line.full_text():
            self.noise_line.setText(line)
            self.noise_line.setToolTip(tip)
        self._noise_holder.setVisible(bool(line))
        if fits is not None and not fits.fits:
            notes.append("No kernel is switched on: choose one in Model.")
        self.notes.setText("\n".join(notes))
        self.notes.setVisible(bool(notes))

    def _pending_notes(self, notes: list[str]) -> None:
        """While a fit is on its way: the line under the table says so (it keeps its
        place, so nothing is laid out again) and the notes are the model's own."""
        line = "" if self.show_mode else PENDING_LINE
        if self.noise_line.full_text() != line:
            self.noise_line.setText(line)
            self.noise_line.setToolTip("")
        text = "\n".join(notes)
        if text != self.notes.text():
            self.notes.setText(text)
            self.notes.setVisible(bool(notes))
