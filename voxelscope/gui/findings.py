"""Findings: clusters of the overlay above the Map threshold, with their peaks.

The table comes from :func:`voxelscope.core.clusters.find_clusters` on the map the Slices
show (live model map, kernel difference, file or disagreement), at the Map threshold,
with the connectivity, minimum size and sign chosen here. Clicking a row, or moving the
selection with the arrow keys, moves the voxel to the cluster's peak. The table follows
the map and the threshold; the cluster holding the current voxel is selected. The rule is
the one the Slices draw with: ``|v| > threshold``.
"""

from __future__ import annotations

from PySide6.QtCore import (
    QAbstractTableModel,
    QModelIndex,
    QPersistentModelIndex,
    Qt,
    QTimer,
    Signal,
)
from PySide6.QtGui import QAction, QGuiApplication, QKeySequence
from PySide6.QtWidgets import (
    QAbstractItemView,
    QComboBox,
    QDoubleSpinBox,
    QHBoxLayout,
    QHeaderView,
    QSpinBox,
    QTableView,
    QVBoxLayout,
    QWidget,
)

from voxelscope.core.clusters import CONNECTIVITIES, ClusterTable, find_clusters
from voxelscope.core.errors import VoxelscopeError
from voxelscope.core.numfmt import format_value as fmt
from voxelscope.core.numfmt import format_xyz, stat_kind
from voxelscope.gui.sizing import compact_spin, fit_combo
from voxelscope.gui.state import ViewerState
from voxelscope.gui.status import ElidedLabel

#: Maps on grids of at least this many voxels are clustered off the GUI thread (a 2 mm
#: map with thousands of small clusters took most of a second, during which a settings
#: change could not even start its map); smaller ones at once.
BACKGROUND_MIN_VOXELS = 250_000

__all__ = ["MODES", "ClusterModel", "FindingsPanel"]

#: Sign modes of find_clusters, with their words.
MODES = (
    ("signed", "± apart"),
    ("positive", "+ only"),
    ("negative", "− only"),
    ("abs", "± together"),
)
#: What each sign mode does (the drop-down's tooltips).
MODE_TIPS = {
    "signed": "Positive and negative clusters found separately",
    "positive": "Positive values only",
    "negative": "Negative values only",
    "abs": "Positive and negative voxels that touch form one cluster",
}
#: Which neighbours join a cluster, per connectivity (the drop-down's tooltips).
CONNECTIVITY_TIPS = {
    6: "Voxels that share a side",
    18: "Voxels that share a side or an edge",
    26: "Voxels that share a side, an edge or a corner",
}
#: Keys that move the selection in the table; the voxel follows to the cluster's peak.
MOVE_KEYS = (
    Qt.Key.Key_Up,
    Qt.Key.Key_Down,
    Qt.Key.Key_PageUp,
    Qt.Key.Key_PageDown,
    Qt.Key.Key_Home,
    Qt.Key.Key_End,
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
                return fmt("value", c.size_mm3)
            if col == 4:
                return fmt(stat_kind(self.stat), c.peak_value)
            return format_xyz(c.peak_mm)
        if role == Qt.ItemDataRole.TextAlignmentRole:
            if col in (2, 3, 4):
                return int(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
            return int(Qt.AlignmentFlag.AlignCenter)
        if role == Qt.ItemDataRole.ToolTipRole:
            return f"peak at voxel {c.peak_voxel}; click to go there"
        if role == Qt.ItemDataRole.UserRole:
            return c
        return None


class FindingsTable(QTableView):
    """The clusters table: moving the selection with the keys emits ``moved`` (row)."""

    moved = Signal(int)

    def keyPressEvent(self, ev) -> None:
        before = self.currentIndex().row()
        super().keyPressEvent(ev)
        row = self.currentIndex().row()
        if ev.key() in MOVE_KEYS and row >= 0 and row != before:
            self.moved.emit(row)


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
        lay.setContentsMargins(6, 3, 6, 3)  # tight: every pixel is a table row at 1280x800
        lay.setSpacing(3)
        row = QHBoxLayout()
        row.setSpacing(6)
        self.threshold = QDoubleSpinBox()
        self.threshold.setObjectName("findings_threshold")
        self.threshold.setRange(0.0, 1000.0)
        self.threshold.setDecimals(2)
        self.threshold.setSingleStep(0.25)
        self.threshold.setPrefix("|v| > ")
        self.threshold.setToolTip(
            "The Map threshold: voxels beyond ±threshold form clusters, the ones the Slices draw"
        )
        self.threshold.valueChanged.connect(
            lambda v: self.state.set_map_settings(threshold=float(v))
        )
        row.addWidget(self.threshold)
        self.mode = QComboBox()
        for key, text in MODES:
            self.mode.addItem(text, key)
            self.mode.setItemData(
                self.mode.count() - 1, MODE_TIPS[key], Qt.ItemDataRole.ToolTipRole
            )
        self.mode.setToolTip("Signs: positive and negative clusters apart, one side, or together")
        self.mode.currentIndexChanged.connect(self.refresh)
        row.addWidget(self.mode)
        self.connectivity = QComboBox()
        for c in CONNECTIVITIES:
            self.connectivity.addItem(f"{c} neighbours", c)
            self.connectivity.setItemData(
                self.connectivity.count() - 1, CONNECTIVITY_TIPS[c], Qt.ItemDataRole.ToolTipRole
            )
        self.connectivity.setCurrentIndex(CONNECTIVITIES.index(26))
        self.connectivity.setToolTip(
            "Which neighbours join a cluster: 6 share a side, 18 also an edge, 26 also a corner"
        )
        self.connectivity.currentIndexChanged.connect(self.refresh)
        row.addWidget(self.connectivity)
        self.min_voxels = QSpinBox()
        self.min_voxels.setRange(1, 100000)
        self.min_voxels.setValue(1)
        self.min_voxels.setPrefix("min ")
        self.min_voxels.setSuffix(" vox")
        self.min_voxels.setToolTip("Smaller clusters are left out")
        self.min_voxels.valueChanged.connect(self.refresh)
        row.addWidget(self.min_voxels)
        row.addStretch(1)
        for combo in (self.mode, self.connectivity):
            fit_combo(combo)  # never cut: as wide as the longest choice
        compact_spin(self.threshold, 60, sample="|v| > 99.99")
        compact_spin(self.min_voxels, 60, sample="min 999 vox")
        lay.addLayout(row)
        self.summary = ElidedLabel("")  # one line; the whole text is its tooltip
        self.summary.setObjectName("hint")
        lay.addWidget(self.summary)
        self.model = ClusterModel(self)
        self.view = FindingsTable()
        self.view.setObjectName("findings_table")
        self.view.setModel(self.model)
        self.view.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        self.view.setSelectionMode(QAbstractItemView.SelectionMode.SingleSelection)
        self.view.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.view.verticalHeader().setVisible(False)
        # compact rows, so more clusters fit in the bottom row of the window
        self.view.verticalHeader().setMinimumSectionSize(0)
        self.view.verticalHeader().setDefaultSectionSize(self.fontMetrics().height() + 6)
        self.view.horizontalHeader().setFixedHeight(self.fontMetrics().height() + 10)
        self.view.setAlternatingRowColors(True)
        head = self.view.horizontalHeader()
        head.setSectionResizeMode(QHeaderView.ResizeMode.ResizeToContents)
        # widths from the first rows only: a map with thousands of clusters would otherwise
        # ask for every cell of every row on each new map (about a second at 2 mm)
        head.setResizeContentsPrecision(100)
        head.setStretchLastSection(True)
        self.view.clicked.connect(self._clicked)
        self.view.moved.connect(self.go_to_row)
        self.view.setToolTip(
            "Click a cluster, or move with the arrow keys, to go to its peak; "
            "Ctrl+C or the right button copies the table"
        )
        self.view.setContextMenuPolicy(Qt.ContextMenuPolicy.ActionsContextMenu)
        self.copy_action = QAction("Copy table as TSV", self.view)
        self.copy_action.setShortcut(QKeySequence.StandardKey.Copy)
        self.copy_action.setShortcutContext(Qt.ShortcutContext.WidgetWithChildrenShortcut)
        self.copy_action.triggered.connect(self.copy)
        self.view.addAction(self.copy_action)
        self.view.activated.connect(self._clicked)
        lay.addWidget(self.view, 1)
        self.job = None  # clustering a large map off the GUI thread
        self.timer = QTimer(self)
        self.timer.setSingleShot(True)
        self.timer.setInterval(40)
        self.timer.timeout.connect(self.refresh)
        state.overlay_changed.connect(self.timer.start)
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
        layer = st.overlay
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
        if self.job is not None:
            self.job.cancel()  # its table is for another map or options: never shown
            self.job = None
        affine = st.run.affine
        if layer.data.size >= BACKGROUND_MIN_VOXELS:
            self._clustering(layer, key, opts, affine)
            return
        try:
            table = find_clusters(layer.data, affine=affine, sort="size", **opts)
        except VoxelscopeError as err:
            self._problem(str(err))
            return
        self._show(table, layer, opts)

    def _clustering(self, layer, key, opts: dict, affine) -> None:
        """Cluster a large map on a worker thread; the table follows when it is done."""
        from voxelscope.gui.workers import BackgroundJob

        data = layer.data

        def fn(_progress):
            return find_clusters(data, affine=affine, sort="size", **opts)

        job = BackgroundJob(fn, "the clusters", owner=self)

        def done(table, job=job) -> None:
            if self.job is job and self._layer is layer and self._key == key:
                self._show(table, layer, opts)

        def failed(failure, job=job) -> None:
            if self.job is job:
                self._problem(failure.line)

        def finished(job=job) -> None:
            job.wait()
            if self.job is job:
                self.job = None
            job.deleteLater()

        job.done.connect(done)
        job.failed.connect(failed)
        job.finished.connect(finished)
        self.job = job
        self.summary.setText("Finding clusters…")
        job.start()

    def _problem(self, line: str) -> None:
        self.table = None
        self.model.set_table(None)
        self.summary.setText(line)
        self.summary.setToolTip(line)
        self.state.message.emit(line)

    def _show(self, table: ClusterTable, layer, opts: dict) -> None:
        st = self.state
        self.table = table
        stat = getattr(layer, "stat", "value")
        self.model.set_table(table, stat if len(stat) <= 10 else "value")
        name = getattr(layer, "title", "") or (layer.path.name if layer.path else "map")
        n = len(table)
        total = sum(c.size_voxels for c in table.clusters)
        text = (
            f"{n} cluster{'s' if n != 1 else ''} ({total} voxels) in {name} at |v| > "
            f"{opts['threshold']:g}, {opts['connectivity']} neighbours, "
            f"at least {opts['min_voxels']} voxel{'s' if opts['min_voxels'] != 1 else ''}"
        )
        self.summary.setText(text)
        self.summary.setToolTip(text)
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
