"""Findings: the cluster table of the overlay.

Reference: voxelscope.core.clusters.find_clusters called directly on the same map,
threshold and options (the table must show exactly its clusters); the peak positions are
checked against the run's affine (voxel -> mm, NIfTI standard: mm = A @ (i, j, k, 1)).
"""

import numpy as np
from PySide6.QtCore import Qt
from PySide6.QtTest import QTest

from voxelscope.core.clusters import find_clusters


def _open(window, files):
    assert window.open_run(files["run"], background=False)
    assert window.map_panel.live.flush(20000)
    window.findings.refresh()
    return window.state, window.findings


def _rows(table):
    return [(c.sign, c.size_voxels, c.size_mm3, c.peak_value, c.peak_voxel) for c in table.clusters]


def test_table_equals_find_clusters(window, ras_run):
    state, panel = _open(window, ras_run)
    data = state.overlay.data
    ref = find_clusters(data, 3.0, affine=state.run.affine)
    assert len(ref) > 0
    assert _rows(panel.table) == _rows(ref)
    assert panel.model.rowCount() == len(ref)
    c = ref.clusters[0]
    assert panel.model.index(0, 2).data() == str(c.size_voxels)
    assert panel.model.index(0, 4).data() == f"{c.peak_value:.2f}"
    assert panel.model.headerData(4, Qt.Orientation.Horizontal) == "peak t"
    mm = state.run.affine @ np.array([*c.peak_voxel, 1.0])
    assert panel.model.index(0, 5).data() == "({:.1f}, {:.1f}, {:.1f})".format(*mm[:3])


def test_threshold_and_options_update_the_table(window, qtbot, ras_run):
    state, panel = _open(window, ras_run)
    state.set_map_settings(threshold=2.0)
    qtbot.waitUntil(lambda: panel.table is not None and panel.table.threshold == 2.0)
    panel.connectivity.setCurrentIndex(panel.connectivity.findData(6))
    panel.min_voxels.setValue(2)
    panel.mode.setCurrentIndex(panel.mode.findData("positive"))
    ref = find_clusters(
        state.overlay.data,
        2.0,
        affine=state.run.affine,
        connectivity=6,
        min_voxels=2,
        mode="positive",
    )
    assert _rows(panel.table) == _rows(ref)
    assert panel.threshold.value() == 2.0
    panel.threshold.setValue(4.0)  # the Findings spin box is the Map threshold
    assert state.map_settings.threshold == 4.0


def test_table_follows_the_map(window, qtbot, ras_run):
    state, panel = _open(window, ras_run)
    assert window.open_map(ras_run["map"])  # planted 9.0 at the hot voxel
    qtbot.waitUntil(
        lambda: (
            panel.table is not None
            and panel.model.headerData(4, Qt.Orientation.Horizontal) == "peak value"
        )
    )
    ref = find_clusters(state.overlay.data, 3.0, affine=state.run.affine)
    assert _rows(panel.table) == _rows(ref)


def test_clicking_a_row_moves_to_the_peak(window, qtbot, ras_run):
    state, panel = _open(window, ras_run)
    state.set_map_settings(threshold=2.0)
    qtbot.waitUntil(lambda: panel.table is not None and len(panel.table) > 1)
    window.docks["Findings"].raise_()
    qtbot.wait(50)
    row = len(panel.table) - 1
    target = panel.table.clusters[row].peak_voxel
    rect = panel.view.visualRect(panel.model.index(row, 1))
    QTest.mouseClick(panel.view.viewport(), Qt.MouseButton.LeftButton, pos=rect.center())
    assert state.voxel == target
    assert panel.view.selectionModel().selectedRows()[0].row() == row


def test_arrow_keys_move_the_selection_and_the_crosshair(window, qtbot, ras_run):
    state, panel = _open(window, ras_run)
    state.set_map_settings(threshold=2.0)
    qtbot.waitUntil(lambda: panel.table is not None and len(panel.table) > 2)
    window.docks["Findings"].raise_()
    panel.go_to_row(0)
    panel.view.setFocus()
    panel.view.setCurrentIndex(panel.model.index(0, 0))
    qtbot.keyClick(panel.view, Qt.Key.Key_Down)
    assert panel.view.currentIndex().row() == 1
    assert state.voxel == panel.table.clusters[1].peak_voxel
    qtbot.keyClick(panel.view, Qt.Key.Key_Up)
    assert state.voxel == panel.table.clusters[0].peak_voxel


def test_threshold_rule_is_the_same_in_map_findings_and_slices(window, ras_run):
    """Both boxes say '|v| > t' and the Slices draw exactly the voxels the clusters hold."""
    from voxelscope.gui.slices import overlay_rgba

    state, panel = _open(window, ras_run)
    assert window.map_panel.threshold.prefix() == panel.threshold.prefix() == "|v| > "
    data = state.overlay.data
    thr = float(np.sort(np.abs(data[np.isfinite(data)]))[-5])  # a value some voxel has
    state.set_map_settings(threshold=thr)
    panel.refresh()
    lut = np.zeros((256, 3), np.uint8)
    drawn = overlay_rgba(data, lut, 10.0, thr, 1.0)[..., 3] > 0
    assert np.array_equal(drawn, panel.table.labels > 0)
    assert (np.abs(data) == thr).any() and not drawn[np.abs(data) == thr].any()


def test_drop_downs_are_not_cut_and_rows_fit_at_1280x800(demo_window, qtbot):
    w = demo_window((1280, 800))
    w.docks["Findings"].raise_()
    assert w.map_panel.live.flush(60000)
    panel = w.findings
    panel.refresh()
    qtbot.waitUntil(lambda: panel.table is not None and len(panel.table) > 4, timeout=20000)
    assert w.width() <= 1280
    for combo in (panel.mode, panel.connectivity):
        fm = combo.fontMetrics()
        longest = max(fm.horizontalAdvance(combo.itemText(i)) for i in range(combo.count()))
        assert combo.width() >= longest + 20, combo.currentText()
    view = panel.view
    rows = sum(
        1
        for r in range(panel.model.rowCount())
        if 0 <= view.rowViewportPosition(r)
        and view.rowViewportPosition(r) + view.rowHeight(r) <= view.viewport().height()
    )
    assert rows > 3


def test_large_maps_are_clustered_off_the_gui_thread(window, qtbot, ras_run, monkeypatch):
    """A map on a large grid is clustered by a background job (the window stays free);
    the table that follows equals find_clusters, and a newer map's table replaces an
    older job's, which is never shown."""
    from voxelscope.gui import findings

    monkeypatch.setattr(findings, "BACKGROUND_MIN_VOXELS", 0)  # the test run counts as large
    assert window.open_run(ras_run["run"], background=False)
    assert window.map_panel.live.flush(20000)
    state, panel = window.state, window.findings
    panel._layer = None  # as if the map were new
    panel.refresh()
    assert panel.job is not None and panel.summary.text().startswith("Finding clusters")
    qtbot.waitUntil(lambda: panel.job is None and panel.table is not None, timeout=20000)
    ref = find_clusters(state.overlay.data, 3.0, affine=state.run.affine)
    assert _rows(panel.table) == _rows(ref)
    # a new threshold while a job runs: only the newest options' table is shown
    state.set_map_settings(threshold=4.0)
    panel.refresh()
    state.set_map_settings(threshold=2.5)
    panel.refresh()
    qtbot.waitUntil(lambda: panel.job is None and panel.table.threshold == 2.5, timeout=20000)
    ref = find_clusters(state.overlay.data, 2.5, affine=state.run.affine)
    assert _rows(panel.table) == _rows(ref)
