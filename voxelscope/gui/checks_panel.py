"""Checks: is the fit at this voxel to be believed? Flags, key numbers and figures.

Everything shown comes from :func:`voxelscope.core.checks.voxel_checks` (the function the
command line's ``voxelscope fit --checks`` uses); the part only formats and draws it.

* **Flags**: each warning sign as the core's plain sentence; clicking one shows its figure.
  "No warning signs at this voxel" when there are none.
* **Numbers**: a small table (a Qt table model) of Durbin-Watson, lag-1 autocorrelation,
  Ljung-Box p, tSNR, distance to the edge, best onset shift, peak latency, t with and
  without the influential volumes and the largest Cook's distance.
* **Figures**: one reusable plot per figure (see :mod:`voxelscope.gui.checks_figures`).

The checks of one kernel's fit are computed off the GUI thread, after the fits of a click
are shown: the part listens to ``fits_changed``, coalesces requests with a zero-time timer
and runs the latest one as a background job (:mod:`voxelscope.gui.workers`), one at a
time, so a click never waits for them (the first
call under new settings builds the 49 designs of the timing scan). A hidden part computes
nothing; it catches up when it is shown.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import partial
from typing import Any

import numpy as np
from PySide6.QtCore import (
    QAbstractTableModel,
    QModelIndex,
    QObject,
    QSize,
    Qt,
    QTimer,
    Signal,
)
from PySide6.QtWidgets import (
    QAbstractItemView,
    QButtonGroup,
    QComboBox,
    QHBoxLayout,
    QHeaderView,
    QLabel,
    QPushButton,
    QScrollArea,
    QSizePolicy,
    QStackedWidget,
    QTableView,
    QVBoxLayout,
    QWidget,
)

from voxelscope.core.checks import VoxelChecks, voxel_checks
from voxelscope.core.noise import NOISE_LABELS
from voxelscope.core.numfmt import format_seconds
from voxelscope.core.numfmt import format_value as fmt
from voxelscope.gui.checks_figures import FIGURE_TITLES, FIGURES, make_figures
from voxelscope.gui.colours import kernel_colour
from voxelscope.gui.plaintext import esc
from voxelscope.gui.sizing import FlowButtons
from voxelscope.gui.state import ViewerState
from voxelscope.gui.workers import BackgroundJob, JobFailure

__all__ = [
    "ChecksModel",
    "ChecksPanel",
    "FlagLabel",
    "NumbersTable",
    "default_kernel",
    "install_checks",
]

RAW_ROLE = Qt.ItemDataRole.UserRole + 1
NO_FLAGS = "No warning signs at this voxel."

#: Rows of the numbers table: (key, label, tooltip).
ROWS: tuple[tuple[str, str, str], ...] = (
    ("t", "t", "The contrast's t under the settings' noise model (as in Fits)"),
    (
        "t_without_influential",
        "t without influential",
        "t refitted without the influential volumes (up to 3 of largest Cook's distance above 4/n)",
    ),
    ("influential_volumes", "Influential volumes", "Volumes of largest Cook's distance above 4/n"),
    (
        "cooks_distance_max",
        "Largest Cook's distance",
        "Cook (1977): how much one volume moves the fit; above 4/n is worth a look",
    ),
    ("durbin_watson", "Durbin–Watson", "2 for white residuals; below 2 for positive lag-1"),
    ("ar1", "Lag-1 autocorrelation", "AR(1) coefficient of the OLS residuals"),
    ("ar1_whitened", "Lag-1 after AR(1)", "Lag-1 left in the prewhitened residuals"),
    ("ljung_box_p", "Ljung–Box p (10 lags)", "Small p: the residuals are not white noise"),
    (
        "whitened_ljung_box_p",
        "Ljung–Box p, model's residuals",
        "Ljung–Box (10 lags) of the residuals the noise model leaves (prewhitened under "
        "AR(1) and AR(p)); the autocorrelation flag is judged on this",
    ),
    ("tsnr", "tSNR", "Mean over the residual SD of a drift-only fit"),
    ("edge_distance_mm", "Distance to edge", "mm to the nearest voxel outside the brain mask"),
    ("best_shift_s", "Best onset shift", "Onset shift (s) that gives the largest t"),
    ("peak_latency_s", "Peak latency", "Kernel's time to peak plus the best shift"),
)


def _fmt(key: str, value: Any, c: VoxelChecks) -> str:
    """Display text of one number of the table."""
    if key == "influential_volumes":
        return ", ".join(str(v) for v in value) if value else "none"
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        if key == "edge_distance_mm" and c.in_mask is False:
            return "outside the mask"
        return "–"
    v = float(value)
    if key == "edge_distance_mm":
        return "outside the mask" if c.in_mask is False else f"{fmt('mm', v)} mm"
    if key == "best_shift_s":
        return format_seconds(v, signed=True)
    if key == "peak_latency_s":
        return f"{format_seconds(v)} (kernel {format_seconds(c.kernel_peak_s)})"
    if key == "cooks_distance_max":
        at = "" if c.cooks_volume is None else f" (volume {c.cooks_volume})"
        return f"{fmt('value', v)}{at}"
    return fmt(_CHECK_KINDS.get(key, "value"), v)


#: Kind of number (core/numfmt.py) of the table's other rows.
_CHECK_KINDS = {
    "ljung_box_p": "p",
    "whitened_ljung_box_p": "p",
    "durbin_watson": "t",  # a test statistic: 2 decimals
    "ar1": "r",
    "ar1_whitened": "r",
    "t_without_influential": "t",
    "t": "t",
}


#: During a drag, the checks run once the pointer has rested this long (ms).
DRAG_REST_MS = 150


class FlagLabel(QLabel):
    """One flag's sentence; a click shows its figure (``clicked(figure)``)."""

    clicked = Signal(str)

    def __init__(self, text: str, figure: str | None, ident: str | None) -> None:
        super().__init__(text)
        self.figure = figure
        self.ident = ident
        self.setWordWrap(True)
        self.setObjectName("flag" if figure is not None else "no_flags")
        if figure is not None:
            self.setCursor(Qt.CursorShape.PointingHandCursor)
            self.setToolTip(f"Click to see the evidence ({FIGURE_TITLES.get(figure, figure)})")

    def mousePressEvent(self, ev) -> None:
        if self.figure is not None and ev.button() == Qt.MouseButton.LeftButton:
            self.clicked.emit(self.figure)
        super().mousePressEvent(ev)


class ChecksModel(QAbstractTableModel):
    """The key numbers of one :class:`VoxelChecks` (rows: quantities; columns: name, value)."""

    def __init__(self, parent: QObject | None = None) -> None:
        super().__init__(parent)
        self.checks: VoxelChecks | None = None
        self._rows: list[tuple[str, str, str]] = []

    def set_checks(self, checks: VoxelChecks | None) -> None:
        self.beginResetModel()
        self.checks = checks
        rows = []
        if checks is not None:
            for key, label, tip in ROWS:
                if key == "ar1_whitened" and checks.ar1_whitened is None:
                    continue
                rows.append((key, label, tip))
        self._rows = rows
        self.endResetModel()

    def keys(self) -> list[str]:
        return [k for k, _, _ in self._rows]

    def raw(self, key: str) -> Any:
        """The core's unformatted value of a row (KeyError for a row not shown)."""
        if key not in self.keys():
            raise KeyError(key)
        return getattr(self.checks, key)

    def rowCount(self, parent=QModelIndex()) -> int:  # noqa: B008
        return 0 if parent.isValid() else len(self._rows)

    def columnCount(self, parent=QModelIndex()) -> int:  # noqa: B008
        return 0 if parent.isValid() else 2

    def data(self, index, role=Qt.ItemDataRole.DisplayRole):
        if not index.isValid() or self.checks is None:
            return None
        key, label, tip = self._rows[index.row()]
        value = getattr(self.checks, key)
        if role == Qt.ItemDataRole.DisplayRole:
            return label if index.column() == 0 else _fmt(key, value, self.checks)
        if role == RAW_ROLE:
            return value
        if role == Qt.ItemDataRole.ToolTipRole:
            return tip
        if role == Qt.ItemDataRole.TextAlignmentRole and index.column() == 1:
            return int(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
        return None

    def headerData(self, section, orientation, role=Qt.ItemDataRole.DisplayRole):
        if orientation == Qt.Orientation.Horizontal and role == Qt.ItemDataRole.DisplayRole:
            return ("quantity", "value")[section]
        return None


# ----------------------------------------------------------------------------- background


@dataclass(frozen=True)
class _Request:
    key: tuple
    analysis: Any
    settings: Any
    kernel: str
    y: np.ndarray
    run: Any
    ijk: tuple[int, int, int]


def _run_checks(req: _Request, _progress) -> VoxelChecks:
    return voxel_checks(req.analysis, req.settings, req.kernel, req.y, run=req.run, ijk=req.ijk)


def default_kernel(enabled, map_kernel: str | None = None) -> str | None:
    """The kernel the Checks part starts with.

    The map's kernel when it is switched on, else double-gamma when switched on, else the
    first kernel switched on; None when none is.

    Examples
    --------
    >>> default_kernel(("boxcar", "gamma"))
    'boxcar'
    >>> default_kernel(("boxcar", "double-gamma"), map_kernel="boxcar")
    'boxcar'
    >>> default_kernel(("boxcar", "double-gamma"))
    'double-gamma'
    """
    names = [str(k) for k in enabled]
    if map_kernel is not None and str(map_kernel) in names:
        return str(map_kernel)
    if "double-gamma" in names:
        return "double-gamma"
    return names[0] if names else None


# ----------------------------------------------------------------------------- the part


class _FigureStack(QStackedWidget):
    """The figure pages; a modest size hint, so the part fits its dock without scrolling
    when there is room (the plots' own hints are large) and the figure takes what is left."""

    def sizeHint(self) -> QSize:
        return QSize(320, 260)

    def hasHeightForWidth(self) -> bool:
        return False

    def heightForWidth(self, _width: int) -> int:
        return -1


class NumbersTable(QTableView):
    """The numbers table: values right-aligned and always whole, names wrapped to what is
    left; exactly as tall as its rows (the part scrolls, never the table)."""

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.verticalHeader().setVisible(False)
        self.horizontalHeader().setVisible(False)
        self.setShowGrid(False)
        self.setAlternatingRowColors(True)
        self.setWordWrap(True)
        self.setTextElideMode(Qt.TextElideMode.ElideRight)
        self.setSelectionMode(QAbstractItemView.SelectionMode.NoSelection)
        self.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.setHorizontalScrollBarPolicy(Qt.ScrollBarPolicy.ScrollBarAlwaysOff)
        self.setVerticalScrollBarPolicy(Qt.ScrollBarPolicy.ScrollBarAlwaysOff)
        self.setSizeAdjustPolicy(QAbstractItemView.SizeAdjustPolicy.AdjustIgnored)
        self.verticalHeader().setMinimumSectionSize(20)
        self.horizontalHeader().setMinimumSectionSize(40)
        self.setSizePolicy(QSizePolicy.Policy.Ignored, QSizePolicy.Policy.Fixed)

    def setModel(self, model) -> None:
        super().setModel(model)
        hh = self.horizontalHeader()
        hh.setSectionResizeMode(0, QHeaderView.ResizeMode.Stretch)
        hh.setSectionResizeMode(1, QHeaderView.ResizeMode.ResizeToContents)
        model.modelReset.connect(self.fit_rows)

    def minimumSizeHint(self) -> QSize:
        return QSize(120, super().minimumSizeHint().height())

    def fit_rows(self) -> None:
        """Row heights to the (wrapped) names at the current width; height to the rows."""
        self.resizeRowsToContents()
        vh = self.verticalHeader()
        height = sum(vh.sectionSize(r) for r in range(vh.count()))
        self.setFixedHeight(height + 2 * self.frameWidth() + 2)

    def resizeEvent(self, ev) -> None:
        super().resizeEvent(ev)
        if ev.oldSize().width() != ev.size().width():
            QTimer.singleShot(0, self.fit_rows)


class ChecksPanel(QWidget):
    """Checks of one kernel's fit at the current voxel."""

    #: Emitted with each newly shown result (None when cleared).
    checks_shown = Signal(object)

    def __init__(self, state: ViewerState, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setObjectName("checks_panel")
        self.state = state
        self.checks: VoxelChecks | None = None
        self.shown_key: tuple | None = None
        self.computing = False
        self.calls = 0
        self._seq = 0
        self._in_flight: tuple | None = None
        self._job: BackgroundJob | None = None
        self._pending: _Request | None = None
        self._chosen: str | None = None

        outer = QVBoxLayout(self)
        outer.setContentsMargins(0, 0, 0, 0)
        self.scroll = QScrollArea()
        self.scroll.setObjectName("checks_scroll")
        self.scroll.setWidgetResizable(True)
        self.scroll.setFrameShape(QScrollArea.Shape.NoFrame)
        self.scroll.setHorizontalScrollBarPolicy(Qt.ScrollBarPolicy.ScrollBarAlwaysOff)
        outer.addWidget(self.scroll)
        body = QWidget()
        body.setObjectName("checks_body")
        self.scroll.setWidget(body)
        lay = QVBoxLayout(body)
        lay.setContentsMargins(6, 4, 6, 4)
        lay.setSpacing(5)
        head = QHBoxLayout()
        head.addWidget(QLabel("Kernel"))
        self.kernel_box = QComboBox()
        self.kernel_box.setObjectName("checks_kernel")
        self.kernel_box.setToolTip("The kernel whose fit is checked")
        self.kernel_box.activated.connect(self._kernel_picked)
        head.addWidget(self.kernel_box, 1)
        self.status = QLabel("")
        self.status.setObjectName("hint")
        head.addWidget(self.status)
        lay.addLayout(head)
        self.caption = QLabel("")
        self.caption.setTextFormat(Qt.TextFormat.RichText)  # outside text escaped (esc)
        self.caption.setObjectName("checks_caption")
        self.caption.setWordWrap(True)
        lay.addWidget(self.caption)
        self.error = QLabel("")
        self.error.setObjectName("error_text")
        self.error.setWordWrap(True)
        self.error.setVisible(False)
        lay.addWidget(self.error)
        # several runs: whether they agree here, for the checked kernel (core.combine)
        self.runs_note = QLabel("")
        self.runs_note.setObjectName("checks_runs")
        self.runs_note.setWordWrap(True)
        self.runs_note.setVisible(False)
        lay.addWidget(self.runs_note)

        self.flags_box = QWidget()
        self.flags_box.setObjectName("checks_flags")
        self.flags_layout = QVBoxLayout(self.flags_box)
        self.flags_layout.setContentsMargins(0, 0, 0, 0)
        self.flags_layout.setSpacing(3)
        self.flag_labels: list[FlagLabel] = []
        lay.addWidget(self.flags_box)

        figures = QWidget()
        fl = QVBoxLayout(figures)
        fl.setContentsMargins(0, 0, 0, 0)
        fl.setSpacing(3)
        self.figure_row = FlowButtons(max_columns=3, spacing=3)
        self.figure_row.setObjectName("checks_figure_buttons")
        self.figure_buttons: dict[str, QPushButton] = {}
        self.figure_group = QButtonGroup(self)
        self.figure_group.setExclusive(True)
        for key in FIGURES:
            b = QPushButton(FIGURE_TITLES[key])
            b.setObjectName("figure_button")
            b.setToolTip(f"Show the {FIGURE_TITLES[key].lower()} figure of this voxel below")
            b.setCheckable(True)
            b.clicked.connect(lambda _c=False, k=key: self.show_figure(k))
            self.figure_group.addButton(b)
            self.figure_row.add(b)
            self.figure_buttons[key] = b
        fl.addWidget(self.figure_row)
        self.stack = _FigureStack()
        self.stack.setMinimumHeight(230)
        self.stack.setObjectName("checks_figures")
        self.figures = make_figures()
        for key in FIGURES:
            self.stack.addWidget(self.figures[key])
        fl.addWidget(self.stack, 1)

        self.model = ChecksModel(self)
        self.table = NumbersTable()
        self.table.setObjectName("checks_table")
        self.table.setModel(self.model)

        lay.addWidget(figures, 1)
        lay.addWidget(self.table)
        self.show_figure(FIGURES[0])

        self._timer = QTimer(self)
        self._timer.setSingleShot(True)
        self._timer.setInterval(0)
        self._timer.timeout.connect(self._launch)
        state.fits_changed.connect(self._on_fits)
        # let go of a dragged crosshair: the checks of where it rests, now
        state.dragging_changed.connect(lambda on: None if on else self.request())
        state.run_changed.connect(self._on_run)
        state.overlay_changed.connect(self.request)
        self._on_run()

    # ------------------------------------------------------------------ figures and flags

    def show_figure(self, key: str) -> None:
        """Bring a figure to the front (``acf``, ``influence``, ``shift_scan``, ...)."""
        page = self.figures.get(key)
        if page is None:
            return
        self.stack.setCurrentWidget(page)
        button = self.figure_buttons[key]
        if not button.isChecked():
            button.setChecked(True)

    def current_figure(self) -> str:
        return self.stack.currentWidget().key

    def flag_items(self) -> list[FlagLabel]:
        """The shown flag labels (one per flag; one "no warning signs" label when none)."""
        return list(self.flag_labels)

    def _fill_flags(self, checks: VoxelChecks | None) -> None:
        for label in self.flag_labels:
            self.flags_layout.removeWidget(label)
            label.deleteLater()
        self.flag_labels = []
        if checks is not None:
            items = [(f.text, f.figure, f.id) for f in checks.flags] or [(NO_FLAGS, None, None)]
            for n, (text, figure, ident) in enumerate(items):
                label = FlagLabel(text, figure, ident)
                if figure is not None:
                    label.clicked.connect(self.show_figure)
                self.flags_layout.insertWidget(n, label)
                self.flag_labels.append(label)

    # ------------------------------------------------------------------ kernel choice

    def _map_kernel(self) -> str | None:
        """The kernel chosen for the Map (None: the Map's default)."""
        return self.state.map_settings.kernel

    def kernel(self) -> str | None:
        """The kernel whose fit is checked (None when no kernel is switched on)."""
        enabled = [str(k) for k in self.state.settings.kernels]
        if self._chosen in enabled:
            return self._chosen
        return default_kernel(enabled, self._map_kernel())

    def set_kernel(self, name: str) -> None:
        """Check another kernel's fit (one that is switched on in Model)."""
        self._chosen = str(name)
        self._sync_kernels()
        self.request()

    def _kernel_picked(self, index: int) -> None:
        name = self.kernel_box.itemData(index)
        if name:
            self.set_kernel(str(name))

    def _sync_kernels(self) -> None:
        from voxelscope.gui.model_panel import swatch_icon

        enabled = [str(k) for k in self.state.settings.kernels]
        current = self.kernel()
        self.kernel_box.blockSignals(True)
        if [self.kernel_box.itemData(i) for i in range(self.kernel_box.count())] != enabled:
            self.kernel_box.clear()
            for name in enabled:
                self.kernel_box.addItem(swatch_icon(kernel_colour(name)), name, name)
        if current is not None:
            self.kernel_box.setCurrentIndex(max(0, self.kernel_box.findData(current)))
        self.kernel_box.blockSignals(False)

    # ------------------------------------------------------------------ requests

    def _on_run(self) -> None:
        self._chosen = None
        self._show(None, None)
        self.request()

    def _on_fits(self, _fits) -> None:
        self.request()

    def request(self) -> None:
        """Ask for the checks of the current voxel (coalesced; after the fits are shown)."""
        self._sync_kernels()
        self._show_runs()
        # While the crosshair is dragged, the checks wait until the pointer rests: a job
        # per frame would take the CPU and the interpreter from the frames themselves.
        self._timer.start(DRAG_REST_MS if self.state.dragging else 0)

    def runs_text(self) -> str:
        """The agreement between runs for the checked kernel ('' with one run)."""
        st = self.state
        if not st.run_fits:
            return ""
        kernel = self.kernel()
        c = next((c for c in st.combined if c.kernel == kernel), None)
        lines = [f"{r.label}: {r.note}" for r in st.run_fits if r.note]
        if c is None:
            lines.insert(0, f"Runs: {len(st.run_fits)} open; too few can be fitted here.")
            return "\n".join(lines)
        if c.q is None or c.q_p is None:
            head = f"Runs ({c.n_runs}, {kernel}): agreement undefined here."
        else:
            p = fmt("p", c.q_p)
            verdict = "they disagree" if c.q_p < 0.05 else "no sign that they disagree"
            head = (
                f"Runs ({c.n_runs}, {kernel}): Cochran's Q = {fmt('Q', c.q)} on {c.n_runs - 1} df, "
                f"p = {p}: {verdict}."
            )
        lines.insert(0, head)
        lines += [f.text for f in c.flags]
        return "\n".join(lines)

    def _show_runs(self) -> None:
        text = self.runs_text()
        if text != self.runs_note.text():
            self.runs_note.setText(text)
        self.runs_note.setVisible(bool(text))

    def showEvent(self, ev) -> None:
        super().showEvent(ev)
        self.request()

    def wanted(self) -> bool:
        """Whether the part is on screen (a hidden part computes nothing).

        A dock tabbed behind another one stays "visible" to Qt but is moved out of view, so
        the visible region is what counts.
        """
        return self.isVisible() and not self.visibleRegion().isEmpty()

    def _current_request(self) -> _Request | str:
        st = self.state
        analysis, run = st.analysis, st.run
        if run is None:
            return ""
        if analysis is None:
            return "No model: open an events file to check this voxel."
        kernel = self.kernel()
        if kernel is None:
            return "No kernel is switched on: choose one in Model."
        if st.series is None:
            return ""
        key = (id(run), id(analysis), st.settings, kernel, tuple(st.voxel))
        return _Request(key, analysis, st.settings, kernel, st.series.copy(), run, st.voxel)

    def _launch(self) -> None:
        if not self.wanted() or self.state.fits_pending:
            return  # hidden, or the fits of a model change are on their way (they ask again)
        req = self._current_request()
        if isinstance(req, str):
            self._show(None, None)
            self.caption.setText(req)
            return
        if req.key == self.shown_key or (self._in_flight == req.key):
            self._pending = None
            self._set_status()
            return
        if self._in_flight is not None:
            self._pending = req
            self._set_status()
            return
        self._start(req)

    def _start(self, req: _Request) -> None:
        self._seq += 1
        ticket = (self._seq, req.key)
        self._in_flight = req.key
        self._pending = None
        self.calls += 1
        job = BackgroundJob(partial(_run_checks, req), "the checks of this voxel", owner=self)
        job.done.connect(lambda checks, ticket=ticket: self._done(ticket, checks))
        job.failed.connect(lambda failure, ticket=ticket: self._failed(ticket, failure))
        job.finished.connect(lambda job=job: self._job_finished(job))
        self._job = job
        job.start()
        self._set_status()

    def _job_finished(self, job: BackgroundJob) -> None:
        job.wait()
        job.deleteLater()
        if self._job is job:
            self._job = None

    def _finish(self, ticket) -> bool:
        """Book-keeping of a finished job; True when it is this part's current one."""
        self._in_flight = None
        pending, self._pending = self._pending, None
        if pending is not None and self.wanted():
            self._start(pending)
        current = self._current_request()
        return not isinstance(current, str) and current.key == ticket[1]

    def _done(self, ticket, checks) -> None:
        if self._finish(ticket):
            self.error.setVisible(False)
            self._show(ticket[1], checks)
        self._set_status()

    def _failed(self, ticket, failure: JobFailure) -> None:
        if self._finish(ticket):
            self._show(ticket[1], None)
            self.error.setText(failure.line)
            self.error.setVisible(True)
            self.state.message.emit(failure.line)
        self._set_status()

    def _set_status(self) -> None:
        self.computing = self._in_flight is not None
        self.status.setText("checking…" if self.computing else "")

    def is_current(self) -> bool:
        """Whether the shown checks belong to the current voxel, settings and kernel."""
        req = self._current_request()
        return not isinstance(req, str) and req.key == self.shown_key

    # ------------------------------------------------------------------ display

    def _show(self, key, checks: VoxelChecks | None) -> None:
        self.shown_key = key
        self.checks = checks
        self.model.set_checks(checks)
        self.table.setVisible(self.model.rowCount() > 0)
        self.table.fit_rows()
        self._fill_flags(checks)
        for page in self.figures.values():
            if checks is None:
                page.clear()
            else:
                page.update_checks(checks)
        if checks is None:
            self.caption.setText("")
        else:
            i, j, k = key[4]
            noise = NOISE_LABELS.get(checks.noise, checks.noise)
            self.caption.setText(
                f"<b>{esc(checks.kernel)}</b> fit at voxel ({i}, {j}, {k}) · contrast "
                f"{esc(checks.contrast)} · {noise} · response of {esc(checks.condition)}"
            )
        self.checks_shown.emit(checks)


def install_checks(window) -> ChecksPanel:
    """Add the Checks part to a :class:`~voxelscope.gui.main_window.MainWindow`.

    Tabbed with Model on the right (Model stays in front); a hidden part computes nothing.
    Call before the window builds its View menu so the part gets a toggle there.
    """
    panel = ChecksPanel(window.state)
    dock = window.add_part("Checks", panel, Qt.DockWidgetArea.RightDockWidgetArea, tab_with="Model")
    dock.visibilityChanged.connect(lambda on: panel.request() if on else None)
    model = window.docks.get("Model")
    if model is not None:
        model.raise_()
    return panel
