"""Signal: the voxel's time series, each kernel's fitted signal and the residuals.

Time runs in seconds (volume ``n`` at ``n * TR + reference time``). Volumes left out of the
fit (non-steady-state, censored) sit on grey bands as hollow grey points, outside the
autoscaled range; their residuals are not drawn. Condition blocks (as the
model places them, after any onset shift) are light bands, one hue per condition. Values
are in data units or in percent signal change relative to the voxel's mean
(``100 * (y - mean) / mean``; residuals ``100 * r / mean``), a common practice.

The curves are made once per kernel and only get new data (``setData``) when the voxel or
the model changes. While the crosshair is dragged, the new voxel's data are drawn at once
and its fitted curves and residuals when its fit arrives from the background (never the
curves of a voxel the pointer has left).
"""

from __future__ import annotations

import html

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import QEvent, QRectF, Qt
from PySide6.QtGui import QColor, QFont, QPainter
from PySide6.QtWidgets import (
    QButtonGroup,
    QComboBox,
    QHBoxLayout,
    QLabel,
    QRadioButton,
    QSizePolicy,
    QVBoxLayout,
    QWidget,
)

from voxelscope.core.design import volume_times
from voxelscope.core.errors import VoxelscopeError
from voxelscope.core.events import shift_conditions
from voxelscope.core.hrf import KERNEL_NAMES
from voxelscope.gui.colours import colours, condition_colour_map, kernel_colour
from voxelscope.gui.state import ViewerState

__all__ = ["MIN_CANVAS_HEIGHT", "RESID_SHARE", "SignalPanel", "to_percent"]

#: The plots never get less than this many pixels (signal and residuals together).
MIN_CANVAS_HEIGHT = 200
#: Share of the plots' height that the residuals get (the signal gets the rest).
RESID_SHARE = 0.34
#: The residual plot is never lower than this (its axis, tick labels and title).
MIN_RESID_HEIGHT = 84
#: Axis title size outside Show mode (pixels).
LABEL_PX = 13

#: Left-out volumes (non-steady-state, censored): a neutral grey band and hollow points.
_LEFT_OUT_BAND = (120, 120, 120, 60)
_LEFT_OUT_EDGE = "#8a8a8a"


def to_percent(values: np.ndarray, mean: float, centre: bool = True) -> np.ndarray:
    """Percent signal change: ``100 * (v - mean) / mean`` (``100 * v / mean`` if not centred).

    Examples
    --------
    >>> to_percent(np.array([100.0, 102.0]), 100.0).tolist()
    [0.0, 2.0]
    """
    if not np.isfinite(mean) or mean == 0:
        return np.full_like(np.asarray(values, float), np.nan)
    v = np.asarray(values, float)
    return 100.0 * ((v - mean) if centre else v) / mean


def _style_plot(plot: pg.PlotItem, font: QFont) -> None:
    for name in ("left", "bottom"):
        ax = plot.getAxis(name)
        ax.setTextPen(pg.mkPen("#303030"))
        ax.setPen(pg.mkPen("#8a8a8a"))
        ax.setStyle(tickFont=font)
    plot.setMenuEnabled(False)
    plot.hideButtons()


class _Bands(pg.GraphicsObject):
    """All condition bands as one item, filled without antialiasing over the view's
    current vertical range (one cheap paint instead of one antialiased region per block)."""

    def __init__(self) -> None:
        super().__init__()
        self._rects: list[tuple[float, float, QColor]] = []
        self._y = (0.0, 1.0)
        self._x = (0.0, 0.0)

    def set_bands(self, rects: list[tuple[float, float, QColor]]) -> None:
        self.prepareGeometryChange()
        self._rects = list(rects)
        if rects:
            self._x = (min(r[0] for r in rects), max(r[1] for r in rects))
        self.update()

    def set_y(self, lo: float, hi: float) -> None:
        if (lo, hi) != self._y:
            self.prepareGeometryChange()
            self._y = (lo, hi)

    def boundingRect(self) -> QRectF:
        (x0, x1), (y0, y1) = self._x, self._y
        return QRectF(x0, y0, x1 - x0, y1 - y0)

    def paint(self, painter: QPainter, *args) -> None:
        y0, y1 = self._y
        painter.setRenderHint(QPainter.RenderHint.Antialiasing, False)
        painter.setPen(Qt.PenStyle.NoPen)
        for x0, x1, colour in self._rects:
            painter.fillRect(QRectF(x0, y0, x1 - x0, y1 - y0), colour)


def _title_only_when_changed(axis: pg.AxisItem) -> None:
    """Lay out an axis title only when its words change.

    pyqtgraph sets the title's HTML again at every change of the axis range (for its SI
    prefix), which lays the text out anew at every click and every step of a drag; here the title is
    set when its HTML differs and the axis is otherwise only repainted, as before.
    """
    shown: list[str | None] = [None]

    def update() -> None:
        text = axis.labelString()
        if text != shown[0]:
            shown[0] = text
            axis.label.setHtml(text)
            axis._adjustSize()
        axis.picture = None
        axis.update()

    axis._updateLabel = update


def _span(arrays) -> tuple[float, float] | None:
    """Smallest and largest finite value over several arrays (None if there is none)."""
    lo, hi = np.inf, -np.inf
    for a in arrays:
        a = np.asarray(a, dtype=float)
        finite = a[np.isfinite(a)]
        if finite.size:
            lo, hi = min(lo, float(finite.min())), max(hi, float(finite.max()))
    return (lo, hi) if lo <= hi else None


def _set_y(plot: pg.PlotItem, span: tuple[float, float] | None) -> None:
    """Fit the vertical range to ``span`` now, so the plot is painted once per change
    (automatic ranging would repaint it a second time, one event-loop pass later)."""
    if span is None:
        plot.enableAutoRange(axis="y")
        return
    lo, hi = span
    if hi - lo <= 0:
        pad = max(abs(lo) * 0.05, 1e-9)
        lo, hi = lo - pad, hi + pad
    plot.setYRange(lo, hi, padding=0.05)
    # apply the new range now: left to the paint, it would change the scene during the
    # paint and make the plot paint a second time
    plot.getViewBox().updateMatrix()


class SignalPanel(QWidget):
    """Signal: data, fitted signals, condition bands; residuals below on a linked time axis."""

    def __init__(self, state: ViewerState, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setObjectName("signal_panel")
        self.state = state
        c = colours()
        lay = QVBoxLayout(self)
        lay.setContentsMargins(6, 4, 6, 4)
        lay.setSpacing(2)
        head = QHBoxLayout()
        self.title = QLabel("Signal")
        self.title.setObjectName("part_title")
        head.addWidget(self.title)
        # several runs: which run is drawn (one at a time, each with its own fits)
        self.run_box = QComboBox()
        self.run_box.setObjectName("signal_run")
        self.run_box.setToolTip("The run whose signal and fits are drawn")
        self.run_box.setVisible(False)
        self.run_box.activated.connect(self.state.set_signal_run)
        head.addWidget(self.run_box)
        head.addSpacing(12)
        self.legend = QLabel("")
        self.legend.setObjectName("legend")
        self.legend.setTextFormat(Qt.TextFormat.RichText)
        # the legend wraps (items never split) so it never sets the window's width
        self.legend.setWordWrap(True)
        self.legend.setMinimumWidth(120)
        self.legend.setSizePolicy(QSizePolicy.Policy.Ignored, QSizePolicy.Policy.Preferred)
        head.addWidget(self.legend, 1)
        self.unit_data = QRadioButton("data values")
        self.unit_pct = QRadioButton("% signal change")
        self.unit_data.setChecked(True)
        self.unit_data.setToolTip("Plot the run's own values")
        self.unit_pct.setToolTip("Plot the change from the voxel's mean, in percent of it")
        group = QButtonGroup(self)
        group.addButton(self.unit_data)
        group.addButton(self.unit_pct)
        head.addWidget(self.unit_data)
        head.addWidget(self.unit_pct)
        lay.addLayout(head)

        font = QFont()
        font.setPixelSize(13)
        label_style = {"color": "#303030", "font-size": "13px"}
        self.canvas = pg.GraphicsLayoutWidget()
        self.canvas.setBackground(c["panel_background"])
        self.canvas.setObjectName("signal_canvas")
        self.plot = self.canvas.addPlot(row=0, col=0)
        self.resid = self.canvas.addPlot(row=1, col=0)
        # Row heights are set from the canvas height (``_share_rows``): the layout's stretch
        # factors only share what is left above each plot's preferred height, which let the
        # residuals take more than the signal in a short part.
        self.resid_share = RESID_SHARE
        self._label_px: int | None = None
        self.canvas.setMinimumHeight(MIN_CANVAS_HEIGHT)
        self.canvas.installEventFilter(self)
        _style_plot(self.plot, font)
        _style_plot(self.resid, font)
        self.resid.setXLink(self.plot)
        self.plot.getAxis("bottom").setStyle(showValues=False)
        self.resid.setLabel("bottom", "time (s)", **label_style)
        self.resid.setLabel("left", "residuals", **label_style)
        for p in (self.plot, self.resid):
            p.getAxis("left").setWidth(64)
            for name in ("left", "bottom"):
                _title_only_when_changed(p.getAxis(name))
        lay.addWidget(self.canvas, 1)

        grey = c["data_trace"]
        self.data_curve = self.plot.plot(
            pen=pg.mkPen(grey, width=1),
            symbol="o",
            symbolSize=4,
            symbolPen=None,
            symbolBrush=pg.mkBrush(grey),
            name="data",
        )
        self.data_curve.setZValue(5)
        self.zero = pg.InfiniteLine(angle=0, pos=0, movable=False, pen=pg.mkPen("#9a9a9a"))
        self.resid.addItem(self.zero, ignoreBounds=True)
        self.curves: dict[str, pg.PlotDataItem] = {}
        self.resid_curves: dict[str, pg.PlotDataItem] = {}
        for z, name in enumerate(KERNEL_NAMES):
            col = kernel_colour(name)
            self.curves[name] = self.plot.plot(pen=pg.mkPen(col, width=2.2), name=name)
            self.curves[name].setZValue(10 + z)
            self.resid_curves[name] = self.resid.plot(pen=pg.mkPen(col, width=1))
            self.resid_curves[name].setZValue(10 + z)
        for item in self.curves.values():
            # wide antialiased paths are slow to stroke in software; segments are ~3x faster
            item.curve.setSegmentedLineMode("on")
        self._bands = _Bands()
        self._bands.setZValue(-10)
        self.plot.addItem(self._bands, ignoreBounds=True)
        self.plot.getViewBox().sigYRangeChanged.connect(
            lambda _vb, rng: self._bands.set_y(float(rng[0]), float(rng[1]))
        )
        # left-out volumes: grey bands on both plots and hollow grey points, kept out of the
        # y range so a large non-steady-state transient does not squash the rest
        self.left_out_points = pg.PlotDataItem(
            [],
            [],
            pen=None,
            symbol="o",
            symbolSize=6,
            symbolPen=pg.mkPen(_LEFT_OUT_EDGE, width=1),
            symbolBrush=pg.mkBrush("#ffffff"),
        )
        self.left_out_points.setZValue(6)
        self.plot.addItem(self.left_out_points, ignoreBounds=True)
        self._left_bands: list[tuple[pg.PlotItem, pg.LinearRegionItem]] = []
        self._left_key = None
        self.left_out: np.ndarray = np.zeros(0, dtype=int)
        self._band_key = None
        self._label_key: bool | None = None
        self._x_span: tuple[float, float] | None = None
        self._drawn: set[str] = set()  # kernels whose curves hold data
        self._data_y: np.ndarray | None = None  # the series the data points show
        self._data_key = None  # and how (units, left-out volumes, time span)
        self.unit_data.toggled.connect(self._units_clicked)
        state.run_changed.connect(self._on_run)
        state.settings_changed.connect(self._on_settings)
        state.fits_changed.connect(self._on_fits)
        state.units_changed.connect(self._on_units)
        state.runs_changed.connect(self._on_runs)

    # ------------------------------------------------------------------ layout

    def eventFilter(self, obj, ev) -> bool:
        if obj is self.canvas and ev.type() == QEvent.Type.Resize:
            self._share_rows(ev.size().height())
        return super().eventFilter(obj, ev)

    def _share_rows(self, height: int | None = None) -> None:
        """Residuals get :attr:`resid_share` of the canvas (at least their axis and
        title), the signal the rest."""
        h = self.canvas.height() if height is None else int(height)
        usable = max(0, h - 12)  # the layout's margins and spacing
        resid = max(MIN_RESID_HEIGHT, round(usable * self.resid_share))
        resid = min(resid, max(MIN_RESID_HEIGHT, usable - 40))
        self.resid.setMinimumHeight(resid)
        self.resid.setMaximumHeight(resid)
        self.plot.setMinimumHeight(0)
        self.plot.setMaximumHeight(max(1, usable - resid))
        if self._label_px is not None:
            self._space_ticks()

    def set_resid_share(self, share: float) -> None:
        """Change the residuals' share of the height (Show mode gives them more room for
        larger tick labels)."""
        self.resid_share = float(share)
        self._share_rows()

    def set_label_size(self, px: int | None) -> None:
        """Axis titles at ``px`` pixels (None: the normal size); with a size, the value
        axes also keep their tick labels at least two text lines apart."""
        self._label_px = px
        self._set_labels()
        self._space_ticks()

    def _space_ticks(self) -> None:
        """Large text (Show mode): on the value axes, about one tick label per one and a
        half text heights (at least two), at a step of 1, 2 or 5 times a power of ten;
        automatic otherwise."""
        for plot in (self.plot, self.resid):
            ax = plot.getAxis("left")
            if self._label_px is None:
                if ax._tickSpacing is not None:
                    ax.setTickSpacing()
                continue
            lo, hi = plot.getViewBox().viewRange()[1]
            room = plot.getViewBox().height()
            fits = max(2, int(room // (1.5 * self._label_px)))
            span = hi - lo
            if not (span > 0 and np.isfinite(span)):
                continue
            raw = span / fits
            base = 10.0 ** np.floor(np.log10(raw))
            steps = [m * base for m in (0.1, 0.2, 0.5, 1, 2, 5, 10)]
            k = next(i for i, v in enumerate(steps) if v >= raw)
            # at least two labels (a lone "0" does not say the scale)
            while k > 0 and np.floor(hi / steps[k]) - np.ceil(lo / steps[k]) < 1:
                k -= 1
            ax.setTickSpacing(levels=[(steps[k], 0.0)])

    def _set_labels(self) -> None:
        pct = self.state.units == "percent"
        style = {"color": "#303030", "font-size": f"{self._label_px or LABEL_PX}px"}
        self.plot.setLabel("left", "% change" if pct else "signal", **style)
        self.resid.setLabel("left", "residuals (%)" if pct else "residuals", **style)
        self.resid.setLabel("bottom", "time (s)", **style)

    # ------------------------------------------------------------------ input

    def _units_clicked(self, data_checked: bool) -> None:
        self.state.set_units("data" if data_checked else "percent")

    # ------------------------------------------------------------------ state events

    def _on_units(self, units: str) -> None:
        for button, on in ((self.unit_data, units == "data"), (self.unit_pct, units != "data")):
            button.blockSignals(True)
            button.setChecked(on)
            button.blockSignals(False)
        self._on_fits(self.state.fits)

    def _on_runs(self) -> None:
        labels = self.state.labels() if len(self.state.bundles) > 1 else []
        self.run_box.blockSignals(True)
        self.run_box.clear()
        self.run_box.addItems(labels)
        self.run_box.setCurrentIndex(min(self.state.signal_run, max(0, len(labels) - 1)))
        self.run_box.blockSignals(False)
        self.run_box.setVisible(bool(labels))
        self._x_span = None

    def _shown(self):
        """(run, analysis, series, fits) of the run drawn: the first, or the chosen one."""
        st = self.state
        other = st.shown_run() if st.signal_run > 0 else None
        if other is None:
            return st.run, st.analysis, st.series, st.fits
        return other.bundle.run, other.bundle.analysis, other.series, other.fits

    def _on_run(self) -> None:
        self._band_key = None
        self._x_span = None
        self._update_bands()

    def _on_settings(self, settings) -> None:
        self._update_bands()

    def _times(self, run=None) -> np.ndarray:
        run = self.state.run if run is None else run
        return volume_times(run.n_volumes, run.tr, run.reference_time_s)

    def _update_bands(self) -> None:
        analysis = self._shown()[1]
        shift = self.state.settings.onset_shift_s
        key = (id(analysis), shift)
        if key == self._band_key:
            return
        self._band_key = key
        rects = []
        if analysis is not None:
            alpha = round(255 * float(colours()["condition_band_alpha"]))
            cmap = condition_colour_map(analysis.condition_names)
            for cond in shift_conditions(analysis.conditions, shift):
                col = QColor(cmap[cond.name])
                col.setAlpha(alpha)
                for on, du in zip(cond.onsets, cond.durations):
                    rects.append((float(on), float(on + max(du, analysis.tr * 0.25)), col))
        self._bands.set_bands(rects)

    def _update_left_out(self, run, analysis) -> np.ndarray:
        """Grey bands over the volumes left out of the fit; returns their indices."""
        left = np.zeros(0, dtype=int)
        if analysis is not None and run is not None:
            try:
                left = np.array(sorted(analysis.excluded_volumes(self.state.settings)), int)
            except VoxelscopeError:
                pass
        key = (id(analysis), tuple(left.tolist()), float(run.tr) if run is not None else None)
        if key == self._left_key:
            return left
        self._left_key = key
        for plot, band in self._left_bands:
            plot.removeItem(band)
        self._left_bands = []
        if left.size:
            t = self._times(run)
            half = 0.5 * float(run.tr)
            brush = pg.mkBrush(_LEFT_OUT_BAND)
            # one band per run of consecutive volumes
            breaks = np.flatnonzero(np.diff(left) > 1) + 1
            for part in np.split(left, breaks):
                lo, hi = float(t[part[0]]) - half, float(t[part[-1]]) + half
                for plot in (self.plot, self.resid):
                    band = pg.LinearRegionItem(
                        values=(lo, hi), movable=False, brush=brush, pen=pg.mkPen(None)
                    )
                    band.setZValue(-5)
                    band.setToolTip("left out of the fit")
                    plot.addItem(band, ignoreBounds=True)
                    self._left_bands.append((plot, band))
        return left

    def _on_fits(self, fits) -> None:
        run, _analysis, y, fits = self._shown()
        self.left_out = self._update_left_out(run, _analysis)
        if self.run_box.isVisible() and self.run_box.currentIndex() != self.state.signal_run:
            self.run_box.setCurrentIndex(self.state.signal_run)
        self._update_bands()
        if run is None:
            return
        if y is None:  # the place is outside this run: nothing to draw
            other = self.state.shown_run()
            self.data_curve.setData([], [])
            self._data_y = None
            for name in self.curves:
                self.curves[name].setData([], [])
                self.resid_curves[name].setData([], [])
            self._drawn.clear()
            self.legend.setText(html.escape(other.note if other is not None else ""))
            return
        t = self._times(run)
        span = (float(t[0]), float(t[-1]))
        pct = self.state.units == "percent"
        mean = float(np.mean(y)) if np.all(np.isfinite(y)) else float("nan")

        def scale(v, centre=True):
            return to_percent(v, mean, centre) if pct else v

        left = self.left_out
        ys = scale(y)
        if left.size:  # left-out volumes: hollow grey points, outside the y range
            ys = np.array(ys, dtype=float)
            ys[left] = np.nan
        # The same series again (a dragged voxel's fits arriving after its data, a new
        # model at the same voxel): the points stay; setting them again costs pyqtgraph's
        # symbols a few ms.
        key = (pct, tuple(left.tolist()), span)
        if y is not self._data_y or key != self._data_key:  # held: its id is not reused
            self._data_y, self._data_key = y, key
            if left.size:
                self.left_out_points.setData(t[left], np.asarray(scale(y), float)[left])
            else:
                self.left_out_points.setData([], [])
            self.data_curve.setData(t, ys, connect="finite")
        shown = {}
        if fits is not None:
            for f in fits.fits:
                shown[f.kernel] = f
        top, bottom = [ys], []
        for name, curve in self.curves.items():
            f = shown.get(name)
            if f is None:
                if name in self._drawn:  # a kernel switched off: clear its curves once
                    curve.setData([], [])
                    self.resid_curves[name].setData([], [])
                    self._drawn.discard(name)
            else:
                top.append(scale(f.fitted))
                r = scale(f.residuals, centre=False)
                if left.size:  # left-out volumes have no residual in the fit: greyed gap
                    r = np.array(r, dtype=float)
                    r[left] = np.nan
                bottom.append(r)
                curve.setData(t, top[-1])
                self._drawn.add(name)
                self.resid_curves[name].setData(t, r, connect="finite")
        if self._label_key != pct:  # axis labels re-lay out the plots: only on a change
            self._label_key = pct
            self._set_labels()
        if self._x_span != span:
            self._x_span = span
            self.plot.setXRange(*span, padding=0.01)
        _set_y(self.plot, _span(top))
        pending = fits is None and self.state.fitting
        if not pending:  # while a dragged voxel's fit is on its way the residuals wait
            _set_y(self.resid, _span([*bottom, [0.0]]))
        self._space_ticks()
        if pending:  # the legend keeps the kernels whose curves are coming
            shown = {str(k): None for k in self.state.settings.kernels}
        self._update_legend(shown)

    def _update_legend(self, shown) -> None:
        grey = colours()["data_trace"]
        parts = [f'<span style="color:{grey}">&#9679;&#8212;</span>&nbsp;data']
        for name in shown:
            col = kernel_colour(name)
            parts.append(
                f'<span style="color:{col}; font-weight:bold">&#9473;&#9473;</span>'
                f"&nbsp;{html.escape(name)}"
            )
        analysis = self._shown()[1]
        if analysis is not None:
            cmap = condition_colour_map(analysis.condition_names)
            for cond in analysis.condition_names:
                col = QColor(cmap[cond])
                parts.append(
                    f'<span style="color:{col.name()}">&#9608;&#9608;</span>&nbsp;'
                    f"{html.escape(cond)}"
                )
        # non-breaking inside an item, breakable between items
        text = "&nbsp;&nbsp; ".join(parts)
        if text != self.legend.text():  # a rich-text relayout costs a few ms per click
            self.legend.setText(text)
