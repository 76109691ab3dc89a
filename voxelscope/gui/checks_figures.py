"""The figures of the Checks part: one reusable plot per figure, updated with ``setData``.

Each figure draws the numbers of one :class:`voxelscope.core.checks.VoxelChecks` (the core
computes everything; the figures only draw it). The keys are the ``figure`` names of the
core's flags: ``acf``, ``influence``, ``shift_scan``, ``fir``, ``spectrum``, ``confounds``
and ``edge``, plus ``response`` (the data averaged around the condition's onsets).
Items are made once per figure and only get new data when the voxel, the settings or the
kernel change.
"""

from __future__ import annotations

import html
import math

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt
from PySide6.QtGui import QColor, QFont
from PySide6.QtWidgets import QLabel, QVBoxLayout, QWidget

from voxelscope.core.flags import CONFOUND_R_LIMIT, EDGE_LIMIT_MM
from voxelscope.core.numfmt import format_seconds
from voxelscope.core.numfmt import format_value as fmt
from voxelscope.gui.colours import colours, condition_colour, condition_colour_map, kernel_colour

__all__ = ["FIGURES", "FIGURE_TITLES", "FigurePage", "make_figures"]

#: Figure keys in display order (the core's flag ``figure`` names).
FIGURES = (
    "acf",
    "influence",
    "shift_scan",
    "fir",
    "response",
    "spectrum",
    "confounds",
    "edge",
)
#: Short button titles of the figures.
FIGURE_TITLES = {
    "acf": "Autocorrelation",
    "influence": "Influence",
    "shift_scan": "Timing",
    "fir": "Response shape",
    "response": "Around onsets",
    "spectrum": "Spectrum",
    "confounds": "Confounds",
    "edge": "Edge",
}

_TEXT = "#303030"
_AXIS = "#8a8a8a"
_MARK = "#D55E00"  # Okabe-Ito vermillion: marked volumes, best shift
_GUIDE = "#0072B2"  # Okabe-Ito blue: reference lines (bands, thresholds)
_LABEL = {"color": _TEXT, "font-size": "13px"}


def _font() -> QFont:
    f = QFont()
    f.setPixelSize(12)
    return f


def _style(plot: pg.PlotItem, bottom: str, left: str) -> None:
    for name in ("left", "bottom"):
        ax = plot.getAxis(name)
        ax.enableAutoSIPrefix(False)
        ax.setTextPen(pg.mkPen(_TEXT))
        ax.setPen(pg.mkPen(_AXIS))
        ax.setStyle(tickFont=_font())
    plot.getAxis("left").setWidth(52)
    plot.setLabel("bottom", bottom, **_LABEL)
    plot.setLabel("left", left, **_LABEL)
    plot.setMenuEnabled(False)
    plot.hideButtons()
    plot.showGrid(x=False, y=True, alpha=0.15)


def _arr(values) -> np.ndarray:
    """A float array with None as NaN."""
    if values is None:
        return np.zeros(0)
    return np.array([np.nan if v is None else v for v in np.ravel(values)], dtype=float)


def _finite(v) -> bool:
    return v is not None and math.isfinite(float(v))


class FigurePage(QWidget):
    """One figure: a caption (what is drawn, in plain words) over a plot canvas."""

    key = ""

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setObjectName(f"figure_{self.key}")
        lay = QVBoxLayout(self)
        lay.setContentsMargins(0, 2, 0, 0)
        lay.setSpacing(2)
        self.caption = QLabel("")
        self.caption.setObjectName("figure_caption")
        self.caption.setWordWrap(True)
        self.caption.setTextFormat(Qt.TextFormat.RichText)
        lay.addWidget(self.caption)
        self.canvas = pg.GraphicsLayoutWidget()
        self.canvas.setBackground(colours()["panel_background"])
        self.canvas.setMinimumHeight(150)
        lay.addWidget(self.canvas, 1)

    def update_checks(self, c) -> None:  # pragma: no cover - overridden
        raise NotImplementedError

    def clear(self) -> None:  # pragma: no cover - overridden
        raise NotImplementedError


class AcfFigure(FigurePage):
    """Autocorrelation of the OLS residuals at lags 0..20 with a +-1.96/sqrt(n) band."""

    key = "acf"

    def __init__(self, parent=None) -> None:
        super().__init__(parent)
        self.plot = self.canvas.addPlot()
        _style(self.plot, "lag (volumes)", "autocorrelation")
        band = QColor(_GUIDE)
        band.setAlpha(40)
        self.band = pg.LinearRegionItem(
            orientation="horizontal", movable=False, brush=pg.mkBrush(band), pen=pg.mkPen(None)
        )
        self.plot.addItem(self.band)
        self.bars = pg.BarGraphItem(x=[], height=[], width=0.6, brush="#6E6E6E", pen=None)
        self.plot.addItem(self.bars)
        self.plot.addItem(pg.InfiniteLine(angle=0, pos=0, pen=pg.mkPen(_AXIS)))
        self.plot.setYRange(-0.5, 1.0)

    def update_checks(self, c) -> None:
        a = _arr(c.acf)
        lags = np.arange(a.size, dtype=float)
        ok = np.isfinite(a)
        self.bars.setOpts(x=lags[ok], height=a[ok], width=0.6)
        half = 1.96 / math.sqrt(max(int(c.n_volumes), 1))
        self.band.setRegion((-half, half))
        lo = min(-0.5, float(np.nanmin(a)) - 0.1) if ok.any() else -0.5
        self.plot.setYRange(lo, 1.05, padding=0)
        self.plot.setXRange(-0.7, max(float(lags[-1]) if lags.size else 20.0, 1.0) + 0.7, padding=0)
        self.caption.setText(
            f"Residual autocorrelation by lag; lag-1 is <b>{fmt('r', c.ar1)}</b>. The shaded band "
            f"(±1.96/√n, n = {c.n_volumes}) is where white noise would stay."
        )

    def clear(self) -> None:
        self.bars.setOpts(x=[], height=[])
        self.caption.setText("")


class InfluenceFigure(FigurePage):
    """Cook's distance per volume (marked volumes) over the run's volume-to-volume change."""

    key = "influence"

    def __init__(self, parent=None) -> None:
        super().__init__(parent)
        self.canvas.setMinimumHeight(190)
        self.cooks_plot = self.canvas.addPlot(row=0, col=0)
        self.rms_plot = self.canvas.addPlot(row=1, col=0)
        _style(self.cooks_plot, "", "")
        _style(self.rms_plot, "volume", "")
        self.cooks_plot.setTitle("Cook's distance at this voxel", size="9pt", color=_TEXT)
        self.rms_plot.setTitle(
            "volume-to-volume change of the whole brain", size="9pt", color=_TEXT
        )
        self.cooks_plot.getAxis("bottom").setStyle(showValues=False)
        self.rms_plot.setXLink(self.cooks_plot)
        self.cooks_curve = self.cooks_plot.plot(pen=pg.mkPen("#6E6E6E", width=1))
        self.cooks_marks = pg.ScatterPlotItem(
            size=9, brush=pg.mkBrush(_MARK), pen=pg.mkPen("#FFFFFF", width=0.8)
        )
        self.cooks_plot.addItem(self.cooks_marks)
        self.cooks_line = pg.InfiniteLine(
            angle=0, movable=False, pen=pg.mkPen(_GUIDE, width=1, style=Qt.PenStyle.DashLine)
        )
        self.cooks_plot.addItem(self.cooks_line, ignoreBounds=True)
        self.rms_curve = self.rms_plot.plot(pen=pg.mkPen("#6E6E6E", width=1))
        self.rms_marks = pg.ScatterPlotItem(
            size=9, brush=pg.mkBrush(_MARK), pen=pg.mkPen("#FFFFFF", width=0.8)
        )
        self.rms_plot.addItem(self.rms_marks)
        self.rms_line = pg.InfiniteLine(
            angle=0, movable=False, pen=pg.mkPen(_GUIDE, width=1, style=Qt.PenStyle.DashLine)
        )
        self.rms_plot.addItem(self.rms_line, ignoreBounds=True)

    def update_checks(self, c) -> None:
        cooks = _arr(c.cooks)
        vols = np.arange(cooks.size, dtype=float)
        self.cooks_curve.setData(vols, np.nan_to_num(cooks), connect="finite")
        marked = [v for v in c.outlier_volumes if 0 <= v < cooks.size]
        self.cooks_marks.setData(
            [float(v) for v in marked], [float(np.nan_to_num(cooks[v])) for v in marked]
        )
        if _finite(c.cooks_threshold):
            self.cooks_line.setPos(float(c.cooks_threshold))
            self.cooks_line.show()
        else:
            self.cooks_line.hide()
        parts = []
        if c.outlier_volumes:
            parts.append(f"marked: outlier volumes {', '.join(map(str, c.outlier_volumes[:8]))}")
        if c.cooks_volume is not None and _finite(c.cooks_distance_max):
            parts.append(f"largest {fmt('value', c.cooks_distance_max)} at volume {c.cooks_volume}")
        text = "Cook's distance of each volume (dashed: 4/n)"
        text += "; " + "; ".join(parts) if parts else ""
        rms = _arr(c.volume_rms_change)
        if rms.size:
            spikes = [v for v in (c.rms_spikes or ()) if 0 <= v < rms.size]
            self.rms_curve.setData(np.arange(rms.size, dtype=float), rms, connect="finite")
            self.rms_marks.setData([float(v) for v in spikes], [float(rms[v]) for v in spikes])
            if _finite(c.rms_threshold):
                self.rms_line.setPos(float(c.rms_threshold))
                self.rms_line.show()
            else:
                self.rms_line.hide()
            spk = f"spikes at {', '.join(map(str, spikes[:8]))}" if spikes else "no spikes"
            text += (
                f". Below: the whole brain's volume-to-volume change (dashed: spike line; {spk})."
            )
        else:
            self.rms_curve.setData([], [])
            self.rms_marks.setData([], [])
            self.rms_line.hide()
            text += "."
        self.caption.setText(html.escape(text))
        self.cooks_plot.enableAutoRange()
        self.rms_plot.enableAutoRange(axis="y")

    def clear(self) -> None:
        for item in (self.cooks_curve, self.rms_curve, self.cooks_marks, self.rms_marks):
            item.setData([], [])
        self.caption.setText("")


class ShiftFigure(FigurePage):
    """The contrast's t against an onset shift, best shift marked."""

    key = "shift_scan"

    def __init__(self, parent=None) -> None:
        super().__init__(parent)
        self.plot = self.canvas.addPlot()
        _style(self.plot, "onset shift (s)", "t")
        self.zero = pg.InfiniteLine(
            angle=90, pos=0, movable=False, pen=pg.mkPen(_AXIS, style=Qt.PenStyle.DotLine)
        )
        self.plot.addItem(self.zero, ignoreBounds=True)
        self.curve = self.plot.plot(pen=pg.mkPen("#3A3F44", width=2))
        self.best_line = pg.InfiniteLine(
            angle=90, movable=False, pen=pg.mkPen(_MARK, width=1, style=Qt.PenStyle.DashLine)
        )
        self.plot.addItem(self.best_line, ignoreBounds=True)
        self.best = pg.ScatterPlotItem(size=11, brush=pg.mkBrush(_MARK), pen=pg.mkPen("#FFFFFF"))
        self.plot.addItem(self.best)

    def update_checks(self, c) -> None:
        x, t = _arr(c.shifts_s), _arr(c.shift_t)
        self.curve.setData(x, t, connect="finite")
        if c.best_shift_s is not None and t.size and np.isfinite(t).any():
            i = int(np.argmin(np.abs(x - float(c.best_shift_s))))
            self.best.setData([float(c.best_shift_s)], [float(t[i])])
            self.best_line.setPos(float(c.best_shift_s))
            self.best_line.show()
            lat = (
                ""
                if c.peak_latency_s is None
                else f", response peak {format_seconds(c.peak_latency_s)}"
            )
            self.caption.setText(
                f"t of the contrast with every onset moved (dotted: as given, t "
                f"{fmt('t', c.t_at_zero_shift)}). Best shift "
                f"<b>{format_seconds(c.best_shift_s, signed=True)}</b> (t {fmt('t', t[i])}){lat}."
            )
        else:
            self.best.setData([], [])
            self.best_line.hide()
            self.caption.setText("t of the contrast with every onset moved: not defined here.")
        self.plot.enableAutoRange()

    def clear(self) -> None:
        self.curve.setData([], [])
        self.best.setData([], [])
        self.best_line.hide()
        self.caption.setText("")


class FirFigure(FigurePage):
    """FIR estimate with a 95% band against each kernel's fitted response."""

    key = "fir"

    def __init__(self, parent=None) -> None:
        super().__init__(parent)
        self.plot = self.canvas.addPlot()
        _style(self.plot, "time after onset (s)", "response")
        self.plot.addItem(pg.InfiniteLine(angle=0, pos=0, pen=pg.mkPen(_AXIS)), ignoreBounds=True)
        self.upper = pg.PlotDataItem(pen=pg.mkPen(None))
        self.lower = pg.PlotDataItem(pen=pg.mkPen(None))
        band = QColor("#6E6E6E")
        band.setAlpha(55)
        self.band = pg.FillBetweenItem(self.upper, self.lower, brush=pg.mkBrush(band))
        self.plot.addItem(self.upper)
        self.plot.addItem(self.lower)
        self.plot.addItem(self.band)
        self.estimate = self.plot.plot(
            pen=pg.mkPen("#3A3F44", width=1.5),
            symbol="o",
            symbolSize=6,
            symbolBrush=pg.mkBrush("#3A3F44"),
            symbolPen=None,
        )
        self.estimate.setZValue(20)
        self.kernels: dict[str, pg.PlotDataItem] = {}

    def _curve(self, name: str) -> pg.PlotDataItem:
        item = self.kernels.get(name)
        if item is None:
            item = self.plot.plot(pen=pg.mkPen(kernel_colour(name), width=2))
            item.setZValue(10)
            self.kernels[name] = item
        return item

    def update_checks(self, c) -> None:
        fir = c.fir or {}
        times, est, se = _arr(fir.get("times")), _arr(fir.get("estimate")), _arr(fir.get("se"))
        if times.size == 0:
            self.clear()
            why = "; ".join(c.warnings) or "no FIR estimate at this voxel"
            self.caption.setText(html.escape(f"Response shape: {why}."))
            return
        self.estimate.setData(times, est, connect="finite")
        self.upper.setData(times, est + 1.96 * se, connect="finite")
        self.lower.setData(times, est - 1.96 * se, connect="finite")
        fine_t = _arr(fir.get("kernel_times"))
        fine = fir.get("kernels_fine") or {}
        for name in list(self.kernels) + [n for n in fine if n not in self.kernels]:
            item = self._curve(name)
            values = fine.get(name)
            if values is None:
                item.setData([], [])
            else:
                item.setData(fine_t, _arr(values), connect="finite")
                width = 3.2 if name == c.kernel else 1.8
                item.setPen(pg.mkPen(kernel_colour(name), width=width))
        legend = [
            '<span style="color:#3A3F44">&#9679;</span>&nbsp;FIR ±1.96·se',
            *(
                f'<span style="color:{kernel_colour(n)}; font-weight:bold">&#9473;&#9473;</span>'
                f"&nbsp;{html.escape(n).replace('-', '&#8209;')}"
                for n in fine
            ),
        ]
        peak = fir.get("peak_s")
        peak_text = f"; FIR peak at {format_seconds(peak)}" if _finite(peak) else ""
        self.caption.setText(
            f"Response to <b>{html.escape(str(fir.get('condition', c.condition)))}</b>, free "
            f"shape (bins of {float(fir.get('bin_s') or 0):g} s){peak_text}.<br>"
            + "&nbsp; ".join(legend)
        )
        self.plot.enableAutoRange()

    def clear(self) -> None:
        for item in (self.estimate, self.upper, self.lower, *self.kernels.values()):
            item.setData([], [])
        self.caption.setText("")


class ResponseFigure(FigurePage):
    """The data averaged around the condition's onsets (95% band, baseline before onset),
    each kernel's prediction averaged the same way, and the FIR estimate."""

    key = "response"

    def __init__(self, parent=None) -> None:
        super().__init__(parent)
        self.plot = self.canvas.addPlot()
        _style(self.plot, "time since onset (s)", "change from baseline")
        self.plot.addItem(pg.InfiniteLine(angle=0, pos=0, pen=pg.mkPen(_AXIS)), ignoreBounds=True)
        self.onset = pg.InfiniteLine(
            angle=90, pos=0, pen=pg.mkPen(_AXIS, style=Qt.PenStyle.DashLine)
        )
        self.plot.addItem(self.onset, ignoreBounds=True)
        shade = QColor("#9A9A9A")
        shade.setAlpha(40)
        self.baseline = pg.LinearRegionItem(
            values=(-4, 0), movable=False, brush=pg.mkBrush(shade), pen=pg.mkPen(None)
        )
        self.plot.addItem(self.baseline, ignoreBounds=True)
        self.upper = pg.PlotDataItem(pen=pg.mkPen(None))
        self.lower = pg.PlotDataItem(pen=pg.mkPen(None))
        band = QColor("#6E6E6E")
        band.setAlpha(55)
        self.band = pg.FillBetweenItem(self.upper, self.lower, brush=pg.mkBrush(band))
        for item in (self.upper, self.lower, self.band):
            self.plot.addItem(item)
        self.mean = self.plot.plot(pen=pg.mkPen("#3A3F44", width=2.2))
        self.mean.setZValue(20)
        self.fir = self.plot.plot(
            pen=None,
            symbol="o",
            symbolSize=6,
            symbolBrush=pg.mkBrush(kernel_colour("fir")),
            symbolPen=None,
        )
        self.fir.setZValue(15)
        self.kernels: dict[str, pg.PlotDataItem] = {}

    def _curve(self, name: str) -> pg.PlotDataItem:
        item = self.kernels.get(name)
        if item is None:
            item = self.plot.plot(pen=pg.mkPen(kernel_colour(name), width=2))
            item.setZValue(10)
            self.kernels[name] = item
        return item

    def update_checks(self, c) -> None:
        r = getattr(c, "response", None) or {}
        t, mean = _arr(r.get("times")), _arr(r.get("mean"))
        if t.size == 0 or not np.isfinite(mean).any():
            self.clear()
            why = r.get("note") or "; ".join(c.warnings) or "no events to average here"
            self.caption.setText(html.escape(f"Around onsets: {why}."))
            return
        self.mean.setData(t, mean, connect="finite")
        self.upper.setData(t, _arr(r.get("ci_high")), connect="finite")
        self.lower.setData(t, _arr(r.get("ci_low")), connect="finite")
        self.baseline.setRegion((-float(r.get("baseline_s") or 0.0), 0.0))
        preds = r.get("predictions") or {}
        for name in list(self.kernels) + [n for n in preds if n not in self.kernels]:
            item = self._curve(name)
            values = preds.get(name)
            if values is None:
                item.setData([], [])
            else:
                item.setData(t, _arr(values), connect="finite")
                width = 3.2 if name == c.kernel else 1.8
                item.setPen(pg.mkPen(kernel_colour(name), width=width))
        fir = c.fir or {}
        self.fir.setData(_arr(fir.get("times")), _arr(fir.get("estimate")))
        n = _arr(r.get("n_events"))
        n_max = int(np.nanmax(n)) if n.size else 0
        legend = [
            '<span style="color:#3A3F44; font-weight:bold">&#9473;&#9473;</span>&nbsp;data '
            "with 95% band",
            *(
                f'<span style="color:{kernel_colour(k)}; font-weight:bold">&#9473;&#9473;</span>'
                f"&nbsp;{html.escape(k).replace('-', '&#8209;')}"
                for k in preds
            ),
            f'<span style="color:{kernel_colour("fir")}">&#9679;</span>&nbsp;FIR',
        ]
        self.caption.setText(
            f"The data around the onsets of <b>{html.escape(str(r.get('condition', '')))}</b>, "
            f"averaged over {n_max} events against the {float(r.get('baseline_s') or 0):g} s "
            "before each onset (shaded), beside each kernel's prediction averaged the same "
            "way.<br>" + "&nbsp; ".join(legend)
        )
        self.plot.enableAutoRange()

    def clear(self) -> None:
        for item in (self.mean, self.upper, self.lower, self.fir, *self.kernels.values()):
            item.setData([], [])
        self.caption.setText("")


class SpectrumFigure(FigurePage):
    """Power of the voxel by frequency, task frequency and high-pass cutoff marked."""

    key = "spectrum"

    def __init__(self, parent=None) -> None:
        super().__init__(parent)
        self.plot = self.canvas.addPlot()
        _style(self.plot, "frequency (Hz, log scale)", "power (log)")
        self.plot.setLogMode(x=True, y=True)
        ticks = (0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.5)
        self.plot.getAxis("bottom").setTicks([[(math.log10(v), f"{v:g}") for v in ticks], []])
        self.curve = self.plot.plot(pen=pg.mkPen("#3A3F44", width=1.5))
        opts = {"position": 0.92, "color": _TEXT, "fill": "#FFFFFFCC", "movable": False}
        self.task = pg.InfiniteLine(
            angle=90, pen=pg.mkPen(condition_colour(1), width=2), label="task", labelOpts=opts
        )
        self.highpass = pg.InfiniteLine(
            angle=90,
            pen=pg.mkPen(_GUIDE, width=2, style=Qt.PenStyle.DashLine),
            label="high-pass",
            labelOpts={**opts, "position": 0.78},
        )
        self.plot.addItem(self.task, ignoreBounds=True)
        self.plot.addItem(self.highpass, ignoreBounds=True)

    def update_checks(self, c) -> None:
        sp = c.spectrum or {}
        f, p = _arr(sp.get("freqs_hz")), _arr(sp.get("power"))
        ok = (f > 0) & np.isfinite(p) & (p > 0)
        self.curve.setData(f[ok], p[ok])
        parts = []
        for line, value, what in (
            (self.task, sp.get("task_hz"), "task"),
            (self.highpass, sp.get("highpass_hz"), "high-pass cutoff"),
        ):
            if _finite(value) and float(value) > 0:
                line.setPos(math.log10(float(value)))  # the view is in log10 units
                line.show()
                parts.append(f"{what} {float(value):.4f} Hz (every {1 / float(value):.0f} s)")
            else:
                line.hide()
        drift = c.drift_fraction
        drift_text = (
            f"; {100 * drift:.0f}% of the power lies below the cutoff" if _finite(drift) else ""
        )
        self.caption.setText(
            "Power of the voxel's signal by frequency: " + ", ".join(parts) + drift_text + "."
        )
        self.plot.enableAutoRange()

    def clear(self) -> None:
        self.curve.setData([], [])
        self.caption.setText("")


class ConfoundsFigure(FigurePage):
    """Correlation of each condition's regressor with every confound column (bars)."""

    key = "confounds"

    def __init__(self, parent=None) -> None:
        super().__init__(parent)
        self.plot = self.canvas.addPlot()
        _style(self.plot, "correlation r", "")
        self.plot.showGrid(x=True, y=False, alpha=0.15)
        self.plot.getAxis("left").setWidth(110)
        self.plot.getAxis("left").setStyle(tickTextOffset=4)
        self.plot.getAxis("left").setPen(pg.mkPen(None))
        self.plot.invertY(True)  # first confound column at the top, as in the file
        self.plot.setXRange(-1.0, 1.0)
        self.plot.addItem(pg.InfiniteLine(angle=90, pos=0, pen=pg.mkPen(_AXIS)), ignoreBounds=True)
        for v in (-CONFOUND_R_LIMIT, CONFOUND_R_LIMIT):
            line = pg.InfiniteLine(
                angle=90, pos=v, pen=pg.mkPen(_GUIDE, width=1, style=Qt.PenStyle.DashLine)
            )
            self.plot.addItem(line, ignoreBounds=True)
        self.bars: dict[str, pg.BarGraphItem] = {}

    def update_checks(self, c) -> None:
        table = c.confound_correlation or {}
        conds = list(table)
        columns: list[str] = []
        for row in table.values():
            columns.extend(k for k in row if k not in columns)
        for name in [n for n in self.bars if n not in conds]:
            self.plot.removeItem(self.bars.pop(name))
        if not columns:
            for item in self.bars.values():
                item.setOpts(x0=[], y=[], width=[], height=0.1)
            self.plot.getAxis("left").setTicks([[]])
            self.caption.setText("No confounds file for this run, so there is nothing to compare.")
            return
        thick = 0.8 / max(len(conds), 1)
        legend = []
        cmap = condition_colour_map(conds)
        for n, cond in enumerate(conds):
            colour = cmap[cond]
            item = self.bars.get(cond)
            if item is None:
                item = pg.BarGraphItem(x0=[], y=[], width=[], height=thick, brush=colour, pen=None)
                self.plot.addItem(item)
                self.bars[cond] = item
            r = np.array(
                [np.nan if table[cond].get(k) is None else table[cond][k] for k in columns],
                dtype=float,
            )
            r = np.nan_to_num(r)
            y = np.arange(len(columns)) - 0.4 + thick * (n + 0.5)
            item.setOpts(
                x0=np.minimum(r, 0.0), y=y, width=np.abs(r), height=thick, brush=colour, pen=None
            )
            legend.append(
                f'<span style="color:{colour}">&#9608;&#9608;</span>&nbsp;{html.escape(cond)}'
            )
        self.plot.getAxis("left").setTicks([[(i, k) for i, k in enumerate(columns)]])
        self.plot.setYRange(-0.6, len(columns) - 0.4, padding=0)
        self.plot.setXRange(-1.0, 1.0, padding=0.02)
        vif = [
            f"{html.escape(k)} {fmt('value', v)}"
            for k, v in (c.vif or {}).items()
            if k in conds and v is not None and math.isfinite(v)
        ]
        vif_text = f" VIF: {', '.join(vif)}." if vif else ""
        self.caption.setText(
            f"Correlation of each condition's regressor with the confound columns (dashed: "
            f"±{CONFOUND_R_LIMIT:g}).{vif_text}<br>" + "&nbsp; ".join(legend)
        )

    def clear(self) -> None:
        for item in self.bars.values():
            item.setOpts(x0=[], y=[], width=[])
        self.caption.setText("")


class EdgeFigure(FigurePage):
    """Distance of the voxel to the edge of the brain mask, against the flag limit."""

    key = "edge"

    def __init__(self, parent=None) -> None:
        super().__init__(parent)
        self.canvas.setMinimumHeight(90)
        self.canvas.setMaximumHeight(120)
        self.plot = self.canvas.addPlot()
        _style(self.plot, "distance to the brain edge (mm)", "")
        self.plot.getAxis("left").setStyle(showValues=False)
        self.plot.getAxis("left").setWidth(8)
        self.plot.showGrid(x=True, y=False, alpha=0.15)
        self.bar = pg.BarGraphItem(x0=[0], y=[0], height=0.6, width=[0], brush="#6E6E6E", pen=None)
        self.plot.addItem(self.bar)
        self.limit = pg.InfiniteLine(
            angle=90,
            pos=EDGE_LIMIT_MM,
            pen=pg.mkPen(_MARK, width=2, style=Qt.PenStyle.DashLine),
            label=f"{EDGE_LIMIT_MM:g} mm",
            labelOpts={"position": 0.85, "color": _TEXT, "movable": False},
        )
        self.plot.addItem(self.limit, ignoreBounds=True)
        self.plot.setYRange(-0.6, 0.6, padding=0)
        self.big = QLabel("")
        self.big.setTextFormat(Qt.TextFormat.RichText)  # a number in bold, no outside text
        self.big.setObjectName("edge_text")
        self.big.setWordWrap(True)
        self.layout().insertWidget(1, self.big)
        self.layout().addStretch(1)

    def update_checks(self, c) -> None:
        d = c.edge_distance_mm
        if c.in_mask is False:
            self.bar.setOpts(width=[0])
            self.big.setText("The voxel lies outside the brain mask.")
        elif d is None:
            self.bar.setOpts(width=[0])
            self.big.setText("No run is open, so the distance to the edge is not known.")
        else:
            self.bar.setOpts(width=[float(d)], brush=_MARK if d <= EDGE_LIMIT_MM else "#6E6E6E")
            near = d <= EDGE_LIMIT_MM
            self.big.setText(
                f"<b>{fmt('mm', d)} mm</b> from the edge of the brain mask"
                + (" — close enough for head motion to look like activation." if near else ".")
            )
            self.plot.setXRange(0.0, max(2.0 * EDGE_LIMIT_MM, float(d) * 1.1), padding=0)
        self.caption.setText(
            f"Distance to the nearest voxel outside the brain mask; flagged at ≤ "
            f"{EDGE_LIMIT_MM:g} mm."
        )

    def clear(self) -> None:
        self.bar.setOpts(width=[0])
        self.big.setText("")
        self.caption.setText("")


def make_figures() -> dict[str, FigurePage]:
    """One page per figure key, in :data:`FIGURES` order."""
    pages = [
        AcfFigure(),
        InfluenceFigure(),
        ShiftFigure(),
        FirFigure(),
        ResponseFigure(),
        SpectrumFigure(),
        ConfoundsFigure(),
        EdgeFigure(),
    ]
    return {p.key: p for p in pages}
