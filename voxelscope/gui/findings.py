"""Findings: clusters of the overlay above the Map threshold, with their peaks.

The table comes from :func:`voxelscope.core.clusters.find_clusters` on the map the Slices
show (live model map, kernel difference, file or disagreement), at the Map threshold,
with the connectivity, minimum size and sign chosen here. Clicking a row moves the voxel
to the cluster's peak. The table follows the map and the threshold; the cluster holding
the current voxel is selected.
"""

from __future__ import annotations

from PySide6.QtCore import QAbstractTableModel, QModelIndex, QPersistentModelIndex, Qt, QTimer
from PySide6.QtGui import QGuiApplication
from PySide6.QtWidgets import (
    QAbstractItemView,
    QComboBox,
    QDoubleSpinBox,
    QHBoxLayout,
    QHeaderView,
    QLabel,
    QPushButton,
    QSpinBox,
    QTableView,
    QVBoxLayout,
    QWidget,
)

from voxelscope.core.clusters import CONNECTIVITIES, ClusterTable, find_clusters
from voxelscope.core.errors import VoxelscopeError
from voxelscope.gui.sizing import compact_combo, compact_spin, shrinkable
from voxelscope.gui.state import ViewerState

__all__ = ["MODES", "ClusterModel", "FindingsPanel"]

#: Sign modes of find_clusters, with their words.
MODES = (
    ("signed", "± separately"),
    ("positive", "positive only"),
    ("negative", "negative only"),
    ("abs", "± together"),
)

_INDEX = QModelIndex | QPersistentModelIndex
_ROOT = QModelIndex()


class ClusterModel(QAbstractTableModel):
    """Rows of a :class:`~voxelscope.core.clusters.ClusterTable` for a QTableView."""

    HEADERS = ("#", "sign", "voxels", "mm³", "peak", "peak (x, y, z) mm")

    def __init__(self, parent=None) -> None:
        super().__init__(parent)
        self.table: ClusterTable | None = None
        self.stat = "t"

    def set_table(self, table: ClusterTable | None, stat: str = "t") -> None:
        self.beginResetModel()
        self.table = table
        self.stat = stat
        self.endResetModel()

    def rowCount(self, parent: _INDEX = _ROOT) -> int:
        return 0 if parent.isValid() or self.table is None else len(self.table.clusters)

    def columnCount(self, parent: _INDEX = _ROOT) -> int:
        return 0 if parent.isValid() else len(self.HEADERS)

    def headerData(self, section, orientation, role=Qt.ItemDataRole.DisplayRole):
        if orientation == Qt.Orientation.Horizontal:
            if role == Qt.ItemDataRole.DisplayRole:
                if section == 4:
                    return f"peak {self.stat}"
                return self.HEADERS[section]
            if role == Qt.ItemDataRole.ToolTipRole:
                return (
                    "cluster number (largest first)",
                    "+ positive, − negative, ± both signs together",
                    "size in voxels",
                    "size in cubic millimetres",
                    "the map's value at the peak (largest |value|)",
                    "world position of the peak; click the row to go there",
                )[section]
        return None

    def data(self, index: _INDEX, role=Qt.ItemDataRole.DisplayRole):
        if not index.isValid() or self.table is None:
            return None
        c = self.table.clusters[index.row()]
        col = index.column()
        if role == Qt.ItemDataRole.DisplayRole:
            if col == 0:
                return str(c.label)
            if col == 1:
                return {1: "+", -1: "−", 0: "±"}[c.sign]
            if col == 2:
                return str(c.size_voxels)
            if col == 3:
                return f"{c.size_mm3:.0f}" if c.size_mm3 >= 100 else f"{c.size_mm3:.3g}"
            if col == 4:
                return f"{c.peak_value:.2f}"
            return "({:.1f}, {:.1f}, {:.1f})".format(*c.peak_mm)
        if role == Qt.ItemDataRole.TextAlignmentRole:
            if col in (2, 3, 4):
                return int(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
            return int(Qt.AlignmentFlag.AlignCenter)
        if role == Qt.ItemDataRole.ToolTipRole:
            return f"peak at voxel {c.peak_voxel}; click to go there"
        if role == Qt.ItemDataRole.UserRole:
            return c
        return None


class FindingsPanel(QWidget):
    """Clusters of the overlay, a table with a row per cluster."""

    def __init__(self, state: ViewerState, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setObjectName("findings_panel")
        self.state = state
        self.table: ClusterTable | None = None
        self._key = None
        self._layer = None
        lay = QVBoxLayout(self)
        lay.setContentsMargins(8, 6, 8, 6)
        lay.setSpacing(5)
        row = QHBoxLayout()
        row.setSpacing(6)
        self.threshold = QDoubleSpinBox()
        self.threshold.setObjectName("findings_threshold")
        self.threshold.setRange(0.0, 1000.0)
        self.threshold.setDecimals(2)
        self.threshold.setSingleStep(0.25)
        self.threshold.setPrefix("|v| > ")
        self.threshold.setToolTip("The Map threshold: voxels beyond ±threshold form clusters")
        self.threshold.valueChanged.connect(
            lambda v: self.state.set_map_settings(threshold=float(v))
        )
        row.addWidget(self.threshold)
        self.mode = QComboBox()
        for key, text in MODES:
            self.mode.addItem(text, key)
        self.mode.setToolTip("Signs: positive and negative clusters apart, one side, or together")
        self.mode.currentIndexChanged.connect(self.refresh)
        row.addWidget(self.mode)
        self.connectivity = QComboBox()
        for c, text in zip(CONNECTIVITIES, ("sides", "sides + edges", "sides + edges + corners")):
            self.connectivity.addItem(f"{c} ({text})", c)
        self.connectivity.setCurrentIndex(CONNECTIVITIES.index(26))
        self.connectivity.setToolTip("Which neighbours join a cluster: 6, 18 or 26 neighbours")
        self.connectivity.currentIndexChanged.connect(self.refresh)
        row.addWidget(self.connectivity)
        row.addWidget(QLabel("min"))
        self.min_voxels = QSpinBox()
        self.min_voxels.setRange(1, 100000)
        self.min_voxels.setValue(1)
        self.min_voxels.setSuffix(" vox")
        self.min_voxels.setToolTip("Smaller clusters are left out")
        self.min_voxels.valueChanged.connect(self.refresh)
        row.addWidget(self.min_voxels)
        row.addStretch(1)
        self.copy_button = QPushButton("Copy")
        self.copy_button.setToolTip("Copy the table as tab-separated text")
        self.copy_button.clicked.connect(self.copy)
        row.addWidget(self.copy_button)
        for combo in (self.mode, self.connectivity):
            compact_combo(combo, 7)
        compact_spin(self.threshold, 100)
        compact_spin(self.min_voxels, 76)
        lay.addLayout(row)
        self.summary = QLabel("")
        self.summary.setObjectName("hint")
        self.summary.setWordWrap(True)
        shrinkable(self.summary, 80)
        lay.addWidget(self.summary)
        self.model = ClusterModel(self)
        self.view = QTableView()
        self.view.setObjectName("findings_table")
        self.view.setModel(self.model)
        self.view.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        self.view.setSelectionMode(QAbstractItemView.SelectionMode.SingleSelection)
        self.view.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.view.verticalHeader().setVisible(False)
        self.view.setAlternatingRowColors(True)
        head = self.view.horizontalHeader()
        head.setSectionResizeMode(QHeaderView.ResizeMode.ResizeToContents)
        # widths from the first rows only: a map with thousands of clusters would otherwise
        # ask for every cell of every row on each new map (about a second at 2 mm)
        head.setResizeContentsPrecision(100)
        head.setStretchLastSection(True)
        self.view.clicked.connect(self._clicked)
        self.view.activated.connect(self._clicked)
        lay.addWidget(self.view, 1)
        self.timer = QTimer(self)
        self.timer.setSingleShot(True)
        self.timer.setInterval(40)
        self.timer.timeout.connect(self.refresh)
        state.map_changed.connect(self.timer.start)
        state.run_changed.connect(self.timer.start)
        state.voxel_changed.connect(self._select_current)
        self.refresh()

    # ------------------------------------------------------------------ computing

    def options(self) -> dict:
        """The find_clusters options in use."""
        return dict(
            threshold=float(self.state.map_settings.threshold),
            mode=self.mode.currentData(),
            connectivity=int(self.connectivity.currentData()),
            min_voxels=int(self.min_voxels.value()),
        )

    def refresh(self, *_args) -> None:
        """Recompute the clusters when the map or an option changed."""
        self.timer.stop()
        st = self.state
        self.threshold.blockSignals(True)
        self.threshold.setValue(st.map_settings.threshold)
        self.threshold.blockSignals(False)
        layer = st.stat_map
        if getattr(layer, "preview", False):
            return  # the live map's preview holds a few planes only; the full map follows
        opts = self.options()
        key = (tuple(sorted(opts.items())), st.run)
        if layer is self._layer and key == self._key:
            return
        self._layer, self._key = layer, key
        if st.run is None or layer is None:
            self.table = None
            self.model.set_table(None)
            self.summary.setText("No map: choose what the Map shows." if st.run else "")
            return
        try:
            table = find_clusters(layer.data, affine=st.run.affine, sort="size", **opts)
        except VoxelscopeError as err:
            self.table = None
            self.model.set_table(None)
            self.summary.setText(str(err))
            st.message.emit(str(err))
            return
        self.table = table
        stat = getattr(layer, "stat", "value")
        self.model.set_table(table, stat if len(stat) <= 10 else "value")
        name = getattr(layer, "title", "") or (layer.path.name if layer.path else "map")
        n = len(table)
        total = sum(c.size_voxels for c in table.clusters)
        self.summary.setText(
            f"{n} cluster{'s' if n != 1 else ''} ({total} voxels) in {name} at |v| > "
            f"{opts['threshold']:g}, {opts['connectivity']}-connected, "
            f"at least {opts['min_voxels']} voxel{'s' if opts['min_voxels'] != 1 else ''}"
        )
        self._select_current(st.voxel)

    # ------------------------------------------------------------------ interaction

    def _clicked(self, index: QModelIndex) -> None:
        c = self.model.data(index, Qt.ItemDataRole.UserRole)
        if c is not None:
            self.state.set_voxel(c.peak_voxel)

    def go_to_row(self, row: int) -> None:
        """Move to the peak of the cluster in ``row`` (as a click on it does)."""
        self._clicked(self.model.index(row, 0))

    def _select_current(self, voxel) -> None:
        table = self.table
        if table is None or self.state.run is None:
            return
        i, j, k = voxel
        if not all(0 <= a < n for a, n in zip(voxel, table.labels.shape)):
            return
        lab = int(table.labels[i, j, k])
        sel = self.view.selectionModel()
        if lab == 0:
            sel.clearSelection()
            return
        self.view.selectRow(lab - 1)

    def copy(self) -> None:
        if self.table is not None:
            QGuiApplication.clipboard().setText(self.table.to_tsv())
            self.state.message.emit(f"Copied {len(self.table)} clusters as tab-separated text")

    def cluster_at(self, voxel) -> int:
        """Label of the cluster holding ``voxel`` (0: none)."""
        if self.table is None:
            return 0
        return int(self.table.labels[tuple(int(v) for v in voxel)])
