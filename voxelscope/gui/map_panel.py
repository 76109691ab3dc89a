"""Map: what the overlay shows (live model map, kernel difference, a file) and how.

The live model map is kept up to date by :class:`voxelscope.gui.mapjobs.LiveMap`, which
this part owns: a change of a model setting, of the map's kernel or statistic, recomputes
the whole-volume map off the GUI thread (progress bar and Cancel here). Threshold,
opacity, colour scale limit and colours apply to whatever the overlay shows. Each source
remembers its own threshold (a t map and a difference map rarely want the same one).
"""

from __future__ import annotations

from PySide6.QtCore import QSize, Qt, Signal
from PySide6.QtGui import QColor, QIcon, QImage, QPixmap
from PySide6.QtWidgets import (
    QCheckBox,
    QComboBox,
    QDoubleSpinBox,
    QGridLayout,
    QHBoxLayout,
    QLabel,
    QProgressBar,
    QPushButton,
    QSlider,
    QVBoxLayout,
    QWidget,
)

from voxelscope.core.noise import NOISE_LABELS
from voxelscope.gui.mapjobs import LiveMap
from voxelscope.gui.plaintext import plain_tooltip
from voxelscope.gui.sizing import ElidedLabel, compact_spin, fit_combo
from voxelscope.gui.state import MAP_STATS, SOURCES, LiveLayer, ViewerState

__all__ = ["COLOUR_SCALES", "MapPanel"]


def _scale_icon(name: str) -> QIcon:
    """A small swatch of a diverging colour scale, for the choice of scale."""
    import pyqtgraph as pg

    lut = pg.colormap.get(name).getLookupTable(nPts=28, alpha=False)
    img = QImage(28, 10, QImage.Format.Format_RGB32)
    for x, (r, g, b) in enumerate(lut[:, :3]):
        for y in range(10):
            img.setPixel(x, y, QColor(int(r), int(g), int(b)).rgb())
    return QIcon(QPixmap.fromImage(img))


#: Diverging, perceptually uniform colour maps shipped with pyqtgraph (from colorcet).
COLOUR_SCALES = (
    ("CET-D1", "blue–red"),
    ("CET-D1A", "blue–red, deep"),
    ("CET-D3", "green–red"),
    ("CET-D9", "light blue–red"),
)


class MapPanel(QWidget):
    """Overlay source and settings; asks the window to open a map through ``open_requested``."""

    open_requested = Signal()

    def __init__(self, state: ViewerState, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setObjectName("map_panel")
        self.state = state
        self.live = LiveMap(state, self)
        # the model map's words (map, text, tooltip): its df median over a 2 mm grid's
        # voxels took 10-40 ms of the GUI thread, three times per settings change
        self._map_words: tuple = (None, "", "")
        lay = QVBoxLayout(self)
        lay.setContentsMargins(8, 6, 8, 6)
        lay.setSpacing(5)

        # One row per line, the row labels in a column of their own. Each row shares its
        # width out by itself (a four-column grid made the kernel names and the colour
        # scale share one column width and cut both at 1280x800).
        grid = QGridLayout()
        grid.setHorizontalSpacing(6)
        grid.setVerticalSpacing(5)
        grid.setColumnStretch(1, 1)
        self.rows: dict[str, QHBoxLayout] = {}

        def add_row(row: int, label: QLabel | str, *items) -> QHBoxLayout:
            box = QHBoxLayout()
            box.setSpacing(6)
            for item in items:
                if isinstance(item, tuple):
                    box.addWidget(*item)
                else:
                    box.addWidget(item)
            label = QLabel(label) if isinstance(label, str) else label
            grid.addWidget(label, row, 0)
            grid.addLayout(box, row, 1)
            return box

        self.source = QComboBox()
        self.source.setObjectName("map_source")
        for key, text in SOURCES:
            self.source.addItem(text, key)
        self.source.setToolTip(
            "What the overlay shows: the model map of the current Model settings (recomputed "
            "when they change), t under one kernel minus t under another, a map file, or the "
            "voxels where our map and the outside map (Agreement) differ"
        )
        self.source.currentIndexChanged.connect(self._source_chosen)
        self.open_button = QPushButton("Open map…")
        self.open_button.setToolTip("Open a map file (any grid; resampled to the run)")
        self.open_button.clicked.connect(self.open_requested.emit)
        self.rows["show"] = add_row(0, "Show", (self.source, 1), self.open_button)

        self.kernel_label = QLabel("Kernel")
        self.kernel = QComboBox()
        self.kernel.setObjectName("map_kernel")
        self.kernel.setToolTip("Kernel of the model map (one of the kernels enabled in Model)")
        self.kernel.currentIndexChanged.connect(self._kernel_chosen)
        self.stat_label = QLabel("Statistic")
        self.stat = QComboBox()
        self.stat.setObjectName("map_stat")
        self.stat.setToolTip("Which number of the model map is drawn at each voxel")
        for key, text in MAP_STATS:
            self.stat.addItem(text, key)
        self.stat.currentIndexChanged.connect(
            lambda _i: self.state.set_map_settings(stat=self.stat.currentData())
        )
        self.other_label = QLabel("minus")
        self.other = QComboBox()
        self.other.setObjectName("map_other_kernel")
        self.other.setToolTip("t under the kernel beside it minus t under this one")
        self.other.currentIndexChanged.connect(self._other_chosen)
        # the second kernel of a difference takes the place of the statistic on the same
        # row: a row of its own made the part taller, which took height from Slices for
        # good (a dock keeps the height it grew to)
        self.rows["kernel"] = add_row(
            1,
            self.kernel_label,
            (self.kernel, 1),
            self.stat_label,
            self.stat,
            self.other_label,
            (self.other, 1),
        )

        self.file_label = ElidedLabel("No map open.", min_width=60)
        self.file_label.setObjectName("hint")
        grid.addWidget(self.file_label, 3, 0, 1, 2)

        self.threshold = QDoubleSpinBox()
        self.threshold.setObjectName("map_threshold")
        self.threshold.setRange(0.0, 1000.0)
        self.threshold.setDecimals(2)
        self.threshold.setSingleStep(0.25)
        self.threshold.setPrefix("|v| > ")
        self.threshold.setToolTip(
            "Only values beyond ±threshold are drawn (both signs); Findings' clusters use "
            "the same rule"
        )
        self.threshold.valueChanged.connect(
            lambda v: self.state.set_map_settings(threshold=float(v))
        )
        self.limit = QDoubleSpinBox()
        self.limit.setObjectName("map_limit")
        self.limit.setRange(0.01, 1000.0)
        self.limit.setDecimals(2)
        self.limit.setPrefix("± ")
        self.limit.setToolTip("Colour scale from -limit to +limit")
        self.limit_auto = QCheckBox("auto")
        self.limit_auto.setToolTip("Take the colour scale from the map's largest |value|")
        self.limit.valueChanged.connect(self._limit_changed)
        self.limit_auto.toggled.connect(self._limit_changed)
        self.rows["threshold"] = add_row(
            4,
            "Threshold",
            (self.threshold, 1),
            QLabel("Scale"),
            (self.limit, 1),
            self.limit_auto,
        )

        self.opacity = QSlider(Qt.Orientation.Horizontal)
        self.opacity.setRange(0, 100)
        self.opacity.setMinimumWidth(60)
        self.opacity.setToolTip("How much of the image below shows through the map")
        self.opacity.valueChanged.connect(
            lambda v: self.state.set_map_settings(opacity=float(v) / 100.0)
        )
        self.scale = QComboBox()
        self.scale.setObjectName("map_colours")
        self.scale.setToolTip("Colours of the map: negative to positive, through white at 0")
        for name, text in COLOUR_SCALES:
            self.scale.addItem(_scale_icon(name), text, name)
            self.scale.setItemData(
                self.scale.count() - 1, f"{text} (through white at 0)", Qt.ItemDataRole.ToolTipRole
            )
        self.scale.setIconSize(QSize(28, 10))
        self.scale.currentIndexChanged.connect(
            lambda _i: self.state.set_map_settings(colour_scale=self.scale.currentData())
        )
        self.rows["opacity"] = add_row(
            5, "Opacity", (self.opacity, 1), QLabel("Colours"), self.scale
        )
        lay.addLayout(grid)
        # every item of a choice shows whole (the combo is as wide as its longest item)
        fit_combo(self.source, grow=True)
        fit_combo(self.stat)
        fit_combo(self.scale)
        for combo in (self.kernel, self.other):
            fit_combo(combo, grow=True)
        compact_spin(self.threshold, 60, sample="|v| > 99.99")
        compact_spin(self.limit, 60, sample="± 999.99")

        job_row = QHBoxLayout()
        job_row.setSpacing(6)
        self.visible = QCheckBox("show the map")
        self.visible.setToolTip("Draw the map over the slices (the map is kept when hidden)")
        self.visible.toggled.connect(lambda on: self.state.set_map_settings(visible=bool(on)))
        job_row.addWidget(self.visible)
        self.job_label = QLabel("")
        self.job_label.setObjectName("hint")
        self.job_label.setWordWrap(True)
        job_row.addWidget(self.job_label, 1)
        self.job_progress = QProgressBar()
        self.job_progress.setObjectName("map_progress")
        self.job_progress.setRange(0, 1000)
        self.job_progress.setTextVisible(False)
        self.job_progress.setFixedWidth(90)
        self.job_progress.setFixedHeight(12)
        job_row.addWidget(self.job_progress)
        self.cancel_button = QPushButton("Cancel")
        self.cancel_button.setToolTip(
            "Stop computing the map (it is recomputed on the next change)"
        )
        self.cancel_button.clicked.connect(self.cancel)
        job_row.addWidget(self.cancel_button)
        lay.addLayout(job_row)
        lay.addStretch(1)
        self.job_progress.setVisible(False)
        self.cancel_button.setVisible(False)

        self.live.busy.connect(self._busy)
        self.live.progress.connect(
            lambda f: self.job_progress.setValue(int(1000 * min(max(f, 0.0), 1.0)))
        )
        self.live.shown.connect(lambda _layer: self._on_map())
        self.live.failed.connect(self._failed)
        state.overlay_changed.connect(self._on_map)
        state.run_changed.connect(self._on_map)
        state.settings_changed.connect(lambda _s: self._on_map())
        self._on_map()

    # ------------------------------------------------------------------ user input

    def _source_chosen(self, _index: int) -> None:
        self.state.set_map_source(self.source.currentData())

    def _kernel_chosen(self, _index: int) -> None:
        k = self.kernel.currentData()
        if k is not None:
            self.state.set_map_settings(kernel=k)

    def _other_chosen(self, _index: int) -> None:
        k = self.other.currentData()
        if k is not None:
            self.state.set_map_settings(other_kernel=k)

    def _limit_changed(self, *_args) -> None:
        auto = self.limit_auto.isChecked()
        self.limit.setEnabled(not auto)
        self.state.set_map_settings(limit=None if auto else float(self.limit.value()))

    def cancel(self) -> None:
        """Stop the running map job."""
        self.live.cancel()
        self.job_label.setText("map cancelled; change a setting to compute it again")

    def _busy(self, on: bool) -> None:
        self.job_progress.setVisible(on)
        self.cancel_button.setVisible(on)
        if on:
            self.job_progress.setValue(0)
            self.job_label.setText("computing the map…")
        else:
            self._on_map()

    def _failed(self, line: str) -> None:
        self.job_label.setText("the map could not be computed (see the status bar)")
        self.job_label.setToolTip(plain_tooltip(line))

    # ------------------------------------------------------------------ state events

    def _fill(self, combo: QComboBox, names, current) -> None:
        combo.clear()
        for n in names:
            combo.addItem(n, n)
        combo.setCurrentIndex(max(0, combo.findData(current)))

    def _on_map(self) -> None:
        st = self.state
        s = st.map_settings
        layer = st.overlay
        has_run = st.run is not None
        has_model = has_run and st.analysis is not None
        live = self.live
        kernels = live.kernels() if has_model else ()
        widgets = (
            self.source,
            self.kernel,
            self.stat,
            self.other,
            self.visible,
            self.threshold,
            self.opacity,
            self.limit,
            self.limit_auto,
            self.scale,
        )
        for w in widgets:
            w.blockSignals(True)
        try:
            self.source.setCurrentIndex(max(0, self.source.findData(s.source)))
            model = self.source.model()
            enable = {
                "model": has_model and bool(kernels),
                "difference": has_model and len(kernels) > 1,
                "file": st.file_layer is not None,
                "disagreement": "disagreement" in st.source_layers and has_model,
            }
            for n, (key, _text) in enumerate(SOURCES):
                item = model.item(n)
                if item is not None:
                    item.setEnabled(bool(enable[key]) or key == s.source)
            self.source.setEnabled(has_run)
            kernel = live.kernel() if has_model else None
            self._fill(self.kernel, kernels, kernel)
            self._fill(self.other, [k for k in kernels if k != kernel], live.other())
            self.stat.setCurrentIndex(max(0, self.stat.findData(s.stat)))
            is_model = s.source in ("model", "difference")
            self.kernel_label.setText("t of" if s.source == "difference" else "Kernel")
            for w in (self.kernel_label, self.kernel):
                w.setVisible(is_model)
            self.stat_label.setVisible(s.source == "model")
            self.stat.setVisible(s.source == "model")
            self.other_label.setVisible(s.source == "difference")
            self.other.setVisible(s.source == "difference")
            self.kernel.setEnabled(has_model)
            self.stat.setEnabled(has_model)
            self.other.setEnabled(has_model)
            for w in (self.visible, self.threshold, self.opacity, self.limit_auto, self.scale):
                w.setEnabled(has_run)
            self.visible.setChecked(s.visible)
            self.threshold.setValue(s.threshold)
            self.opacity.setValue(round(100 * s.opacity))
            self.limit_auto.setChecked(s.limit is None)
            self.limit.setValue(st.map_limit())
            self.limit.setEnabled(has_run and s.limit is not None)
            self.scale.setCurrentIndex(max(0, self.scale.findData(s.colour_scale)))
        finally:
            for w in widgets:
                w.blockSignals(False)
        self.open_button.setEnabled(has_run)
        self._describe(layer)

    def _model_map_words(self, m) -> tuple[str, str]:
        """The line and the tooltip describing the model map ``m`` (kept per map)."""
        if self._map_words[0] is not m:
            text = (
                f"contrast '{m.contrast}', "
                f"{NOISE_LABELS.get(m.noise, m.noise)}, "
                f"{m.df_text()}, {m.n_voxels} voxels"
            )
            self._map_words = (m, text, m.describe())
        return self._map_words[1], self._map_words[2]

    def _describe(self, layer) -> None:
        st = self.state
        s = st.map_settings
        tip = ""
        if st.run is None:
            text = "Open a run first."
        elif s.source == "file":
            f = st.file_layer
            if f is None:
                text = "No map file open: Open map…"
            else:
                text = f"file: {f.path.name if f.path else 'map'}"
                tip = str(f.path)
        elif s.source == "disagreement":
            text = (
                "Voxels where our map and the outside map differ beyond the tolerance "
                "(ours − theirs; set in Agreement)"
                if isinstance(layer, LiveLayer)
                else "Load an outside map in Agreement first."
            )
        elif st.analysis is None:
            text = "No model: open an events file (File > Open events)."
        elif not self.live.kernels():
            text = "No kernel enabled in Model."
        elif s.source == "difference" and self.live.other() is None:
            text = "Enable a second kernel in Model to compare kernels."
        elif isinstance(layer, LiveLayer) and st.model_map is not None:
            text, tip = self._model_map_words(st.model_map)
            if self.live.last_seconds is not None:
                text += f", {1000 * self.live.last_seconds:.0f} ms"
        else:
            text = "computing the map…"
        self.file_label.setText(text)  # shortened with "…" to the width it gets
        self.file_label.setToolTip(plain_tooltip(tip or text))
        if not self.live.is_busy() and not self.job_label.text().startswith("map cancelled"):
            self.job_label.setText("")
