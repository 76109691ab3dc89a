"""Map: the statistic map drawn over the Slices (file, signed threshold, opacity, scale)."""

from __future__ import annotations

from PySide6.QtCore import Qt, Signal
from PySide6.QtWidgets import (
    QCheckBox,
    QComboBox,
    QDoubleSpinBox,
    QFormLayout,
    QHBoxLayout,
    QLabel,
    QPushButton,
    QSlider,
    QVBoxLayout,
    QWidget,
)

from voxelscope.gui.state import ViewerState

__all__ = ["COLOUR_SCALES", "MapPanel"]

#: Diverging, perceptually uniform colour maps shipped with pyqtgraph (from colorcet).
COLOUR_SCALES = (
    ("CET-D1", "blue – white – red"),
    ("CET-D1A", "blue – white – red, deeper"),
    ("CET-D3", "green – white – red"),
    ("CET-D9", "light blue – white – red"),
)


class MapPanel(QWidget):
    """Overlay settings; asks the window to open a map through ``open_requested``."""

    open_requested = Signal()

    def __init__(self, state: ViewerState, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setObjectName("map_panel")
        self.state = state
        lay = QVBoxLayout(self)
        lay.setContentsMargins(8, 6, 8, 6)
        lay.setSpacing(6)
        row = QHBoxLayout()
        self.file_label = QLabel("No map open.")
        self.file_label.setObjectName("hint")
        self.file_label.setWordWrap(False)
        row.addWidget(self.file_label, 1)
        self.open_button = QPushButton("Open map…")
        self.open_button.clicked.connect(self.open_requested.emit)
        row.addWidget(self.open_button)
        lay.addLayout(row)
        form = QFormLayout()
        self.visible = QCheckBox("show the map")
        self.visible.toggled.connect(lambda on: self.state.set_map_settings(visible=bool(on)))
        form.addRow("", self.visible)
        self.threshold = QDoubleSpinBox()
        self.threshold.setObjectName("map_threshold")
        self.threshold.setRange(0.0, 1000.0)
        self.threshold.setDecimals(2)
        self.threshold.setSingleStep(0.25)
        self.threshold.setPrefix("|v| ≥ ")
        self.threshold.setToolTip("Only values at or beyond ±threshold are drawn (both signs)")
        self.threshold.valueChanged.connect(
            lambda v: self.state.set_map_settings(threshold=float(v))
        )
        form.addRow("Threshold", self.threshold)
        self.opacity = QSlider(Qt.Orientation.Horizontal)
        self.opacity.setRange(0, 100)
        self.opacity.valueChanged.connect(
            lambda v: self.state.set_map_settings(opacity=float(v) / 100.0)
        )
        form.addRow("Opacity", self.opacity)
        lim_row = QHBoxLayout()
        self.limit = QDoubleSpinBox()
        self.limit.setRange(0.01, 1000.0)
        self.limit.setDecimals(2)
        self.limit.setPrefix("± ")
        self.limit_auto = QCheckBox("from map")
        self.limit.valueChanged.connect(self._limit_changed)
        self.limit_auto.toggled.connect(self._limit_changed)
        lim_row.addWidget(self.limit, 1)
        lim_row.addWidget(self.limit_auto)
        form.addRow("Scale", lim_row)
        self.scale = QComboBox()
        for name, text in COLOUR_SCALES:
            self.scale.addItem(text, name)
        self.scale.currentIndexChanged.connect(
            lambda _i: self.state.set_map_settings(colour_scale=self.scale.currentData())
        )
        form.addRow("Colours", self.scale)
        lay.addLayout(form)
        lay.addStretch(1)
        state.map_changed.connect(self._on_map)
        state.run_changed.connect(self._on_map)
        self._on_map()

    def _limit_changed(self, *_args) -> None:
        auto = self.limit_auto.isChecked()
        self.limit.setEnabled(not auto)
        self.state.set_map_settings(limit=None if auto else float(self.limit.value()))

    def _on_map(self) -> None:
        s = self.state.map_settings
        layer = self.state.stat_map
        self.open_button.setEnabled(self.state.run is not None)
        widgets = (
            self.visible,
            self.threshold,
            self.opacity,
            self.limit,
            self.limit_auto,
            self.scale,
        )
        for w in widgets:
            w.blockSignals(True)
            w.setEnabled(layer is not None)
        try:
            self.visible.setChecked(s.visible)
            self.threshold.setValue(s.threshold)
            self.opacity.setValue(round(100 * s.opacity))
            self.limit_auto.setChecked(s.limit is None)
            self.limit.setValue(self.state.map_limit())
            self.limit.setEnabled(layer is not None and s.limit is not None)
            self.scale.setCurrentIndex(max(0, self.scale.findData(s.colour_scale)))
        finally:
            for w in widgets:
                w.blockSignals(False)
        if layer is None:
            self.file_label.setText("No map open." if self.state.run else "Open a run first.")
            self.file_label.setToolTip("")
        else:
            name = layer.path.name if layer.path else "map"
            metrics = self.file_label.fontMetrics()
            self.file_label.setText(metrics.elidedText(name, Qt.TextElideMode.ElideLeft, 210))
            self.file_label.setToolTip(str(layer.path))
