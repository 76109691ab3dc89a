"""Agreement: our live model map against the user's own map.

Their map (any grid) is resampled onto the run's grid with
:func:`voxelscope.core.agreement.load_their_map`; the comparison is
:func:`voxelscope.core.agreement.compare_maps` of the live model map (the Map's kernel and
statistic) with theirs over our mask, run off the GUI thread whenever our map or the
tolerance changes. The part shows the correlation and slopes, both values at the clicked
voxel, a scatter of ours against theirs (at most :data:`MAX_POINTS` voxels, drawn at
random with a fixed seed), and can show the voxels that differ by more than the tolerance
as the overlay (Map source "where the maps differ"). "Why do they differ?" runs
:func:`voxelscope.core.agreement.explain` on demand (slow: it recomputes our map under
each alternative) and shows its plain statement.
"""

from __future__ import annotations

import html
import math
from pathlib import Path

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt
from PySide6.QtWidgets import (
    QCheckBox,
    QDoubleSpinBox,
    QFileDialog,
    QGridLayout,
    QHBoxLayout,
    QLabel,
    QProgressBar,
    QPushButton,
    QVBoxLayout,
    QWidget,
)

from voxelscope.core.agreement import Agreement, compare_maps, explain, load_their_map
from voxelscope.core.errors import VoxelscopeError
from voxelscope.core.numfmt import format_value, stat_kind
from voxelscope.gui.colours import colours
from voxelscope.gui.plaintext import plain_tooltip
from voxelscope.gui.sizing import breakable, compact_spin, scroll_body
from voxelscope.gui.state import LiveLayer, ViewerState
from voxelscope.gui.workers import BackgroundJob, JobFailure

__all__ = ["MAX_POINTS", "AgreementPanel", "scatter_sample"]

#: Scatter points drawn at most (a random sample of the compared voxels).
MAX_POINTS = 5000
_AGREE = "#7A8794"
_DIFFER = "#A2006D"


def scatter_sample(region: np.ndarray, n: int = MAX_POINTS, seed: int = 0) -> np.ndarray:
    """Flat indices of at most ``n`` voxels of ``region``, drawn without replacement.

    Examples
    --------
    >>> r = np.zeros((10, 10, 10), bool); r[:5] = True
    >>> idx = scatter_sample(r, 100)
    >>> idx.size, bool(r.ravel()[idx].all()), bool(np.all(np.diff(idx) > 0))
    (100, True, True)
    """
    flat = np.flatnonzero(region)
    if flat.size <= n:
        return flat
    rng = np.random.default_rng(seed)
    return np.sort(rng.choice(flat, size=n, replace=False))


class AgreementPanel(QWidget):
    """Compare the live model map with an outside map."""

    def __init__(self, state: ViewerState, parent: QWidget | None = None):
        super().__init__(parent)
        self.setObjectName("agreement_panel")
        self.state = state
        self.theirs: np.ndarray | None = None
        self.their_path: Path | None = None
        self.agreement: Agreement | None = None
        self.explanation = None
        self.compare_job: BackgroundJob | None = None
        self.explain_job: BackgroundJob | None = None
        self._again = False
        self._before = "model"  # the source shown before "where the maps differ"
        self._voxel_stale = False
        self._sample = np.zeros(0, dtype=np.int64)
        c = colours()
        lay = QVBoxLayout(scroll_body(self, "agreement"))
        lay.setContentsMargins(8, 6, 8, 6)
        lay.setSpacing(5)

        top = QHBoxLayout()
        self.file_label = QLabel("No outside map.")
        self.file_label.setObjectName("hint")
        self.file_label.setWordWrap(True)  # long file names wrap (see breakable)
        self.file_label.setMinimumWidth(60)
        top.addWidget(self.file_label, 1)
        self.open_button = QPushButton("Their map…")
        self.open_button.setToolTip(
            "Open your own map (e.g. a t map from your pipeline); any grid, resampled onto the run"
        )
        self.open_button.clicked.connect(self.ask_their_map)
        top.addWidget(self.open_button)
        lay.addLayout(top)

        grid = QGridLayout()
        grid.setHorizontalSpacing(6)
        grid.addWidget(QLabel("Tolerance"), 0, 0)
        self.tolerance = QDoubleSpinBox()
        self.tolerance.setObjectName("agreement_tolerance")
        self.tolerance.setRange(0.0, 1000.0)
        self.tolerance.setDecimals(2)
        self.tolerance.setSingleStep(0.25)
        self.tolerance.setValue(1.0)
        self.tolerance.setPrefix("|difference| > ")
        self.tolerance.setToolTip("Voxels whose values differ by more than this count as differing")
        self.tolerance.valueChanged.connect(lambda _v: self.recompare())
        compact_spin(self.tolerance, 80, sample="|difference| > 99.99")
        grid.addWidget(self.tolerance, 0, 1)
        self.show_differ = QCheckBox("show where they differ")
        self.show_differ.setObjectName("agreement_show_differ")
        self.show_differ.setToolTip(
            "On the Slices: the Map source 'where the maps differ', ours − theirs there"
        )
        self.show_differ.toggled.connect(self._toggle_overlay)
        grid.addWidget(self.show_differ, 1, 0, 1, 2)
        grid.setColumnStretch(1, 1)
        lay.addLayout(grid)

        self.summary = QLabel("")
        self.summary.setTextFormat(Qt.TextFormat.RichText)  # numbers only
        self.summary.setObjectName("agreement_summary")
        self.summary.setWordWrap(True)
        lay.addWidget(self.summary)
        self.at_voxel = QLabel("")
        self.at_voxel.setTextFormat(Qt.TextFormat.RichText)  # numbers only
        self.at_voxel.setObjectName("agreement_at_voxel")
        self.at_voxel.setWordWrap(True)
        lay.addWidget(self.at_voxel)

        self.plot = pg.PlotWidget(background=c.get("panel_background", "#FFFFFF"))
        self.plot.setObjectName("agreement_plot")
        self.plot.setMinimumHeight(170)
        self.plot.setMenuEnabled(False)
        self.plot.showGrid(x=True, y=True, alpha=0.15)
        text_pen = pg.mkPen(c.get("text", "#1F1F1F"))
        for name in ("left", "bottom"):
            ax = self.plot.getAxis(name)
            ax.setTextPen(text_pen)
            ax.setPen(text_pen)
        self.plot.setLabel("bottom", "ours")
        self.plot.setLabel("left", "theirs")
        self.identity = pg.PlotCurveItem(
            pen=pg.mkPen("#9A9A9A", width=1, style=Qt.PenStyle.DashLine)
        )
        self.fit_line = pg.PlotCurveItem(pen=pg.mkPen("#2E3A46", width=1.5))
        self.scatter = pg.ScatterPlotItem(size=4, pen=None)
        self.here = pg.ScatterPlotItem(
            size=13, pen=pg.mkPen("#1F1F1F", width=2), brush=pg.mkBrush(240, 228, 66, 220)
        )
        for item in (self.identity, self.fit_line, self.scatter, self.here):
            self.plot.addItem(item)
        self.here.setZValue(10)
        lay.addWidget(self.plot, 1)

        why = QHBoxLayout()
        self.explain_button = QPushButton("Why do they differ?")
        self.explain_button.setToolTip(
            "Recompute our map under other kernels, onsets shifted by one TR and the other "
            "noise model, and say which agrees best with theirs (takes a while)"
        )
        self.explain_button.clicked.connect(self.start_explain)
        why.addWidget(self.explain_button)
        self.explain_progress = QProgressBar()
        self.explain_progress.setRange(0, 1000)
        self.explain_progress.setTextVisible(False)
        self.explain_progress.setFixedHeight(12)
        self.explain_progress.setVisible(False)
        why.addWidget(self.explain_progress, 1)
        self.explain_cancel = QPushButton("Cancel")
        self.explain_cancel.setVisible(False)
        self.explain_cancel.setToolTip("Stop looking for why the maps differ")
        self.explain_cancel.clicked.connect(self.cancel_explain)
        why.addWidget(self.explain_cancel)
        why.addStretch(0)
        lay.addLayout(why)
        self.statement = QLabel("")
        self.statement.setObjectName("agreement_statement")
        self.statement.setWordWrap(True)
        self.statement.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        lay.addWidget(self.statement)

        state.set_source_layer("disagreement", None)  # this part offers the source
        state.model_map_changed.connect(self._on_model_map)
        state.run_changed.connect(self._on_run)
        state.voxel_changed.connect(self._on_voxel)
        state.overlay_changed.connect(self._sync_toggle)
        self._on_run()

    # ------------------------------------------------------------------ their map

    def ask_their_map(self) -> None:
        if self.state.run is None:
            self.state.message.emit("Open a run first (File > Open run).")
            return
        folder = str(Path(self.state.run.path).parent) if self.state.run.path else ""
        path, _ = QFileDialog.getOpenFileName(
            self, "Their map", folder, "NIfTI images (*.nii *.nii.gz);;All files (*)"
        )
        if path:
            self.load_their_map(path)

    def load_their_map(self, path) -> bool:
        """Load an outside map onto the run's grid; an error is one line in the status bar."""
        run = self.state.run
        if run is None:
            return False
        warnings: list[str] = []
        try:
            theirs = load_their_map(path, run, warnings)
        except VoxelscopeError as err:
            self.state.message.emit(str(err))
            self.file_label.setText("Could not load their map (see the status bar).")
            self.file_label.setToolTip(plain_tooltip(err))
            return False
        self.theirs = np.asarray(theirs)
        self.their_path = Path(path)
        self.file_label.setText(f"theirs: {breakable(self.their_path.name)}")
        self.file_label.setToolTip(plain_tooltip(self.their_path))
        for w in warnings:
            self.state.message.emit(w)
        self.statement.setText("")
        self.recompare()
        return True

    def _on_run(self) -> None:
        self.cancel_explain()
        self.theirs = None
        self.their_path = None
        self._set_agreement(None)
        self.file_label.setText("No outside map: Their map…" if self.state.run else "")
        self.file_label.setToolTip("")
        self.statement.setText("")
        f = self.state.file_layer
        if self.state.run is not None and f is not None and f.path is not None:
            self.load_their_map(f.path)  # a map opened with the run is the user's own
        self._show()

    # ------------------------------------------------------------------ comparing

    def recompare(self) -> None:
        """Compare the current model map with theirs, off the GUI thread."""
        model = self.state.model_map
        if self.theirs is None or model is None:
            self._set_agreement(None)
            self._show()
            return
        if self.compare_job is not None:
            self._again = True
            self.compare_job.cancel()
            return
        self._again = False
        self._before = "model"  # the source shown before "where the maps differ"
        theirs, tol = self.theirs, float(self.tolerance.value())
        stat = self.state.map_settings.stat
        stat = stat if getattr(model, stat, None) is not None else "t"

        def fn(progress):
            return compare_maps(model, theirs, tolerance=tol, stat=stat), model

        job = BackgroundJob(fn, "the comparison with their map", owner=self)
        job.done.connect(self._compared)
        job.failed.connect(self._failed)
        job.finished.connect(lambda job=job: self._compare_finished(job))
        self.compare_job = job
        job.start()

    def _compare_finished(self, job) -> None:
        job.wait()
        job.deleteLater()
        self.compare_job = None
        if self._again:
            self.recompare()

    def _compared(self, out) -> None:
        agreement, model = out
        if self._again or model is not self.state.model_map:
            return
        self._set_agreement(agreement)
        self._show()

    def _set_agreement(self, agreement: Agreement | None) -> None:
        """Keep the comparison and offer its overlay to the Map (source "disagreement")."""
        self.agreement = agreement
        self.state.set_source_layer("disagreement", self.disagreement_layer())

    def _on_model_map(self, model) -> None:
        if model is not None:
            self.recompare()

    def _failed(self, failure: JobFailure) -> None:
        self.state.message.emit(failure.line)
        self.summary.setText(failure.line)

    def disagreement_layer(self) -> LiveLayer | None:
        """Ours − theirs at the voxels beyond the tolerance (NaN elsewhere), for the Map."""
        a = self.agreement
        if a is None:
            return None
        data = np.where(a.disagree, a.ours - a.theirs, np.nan).astype(np.float32)
        finite = np.abs(data[np.isfinite(data)])
        top = float(finite.max()) if finite.size else 1.0
        return LiveLayer(
            None,
            data,
            1,
            (-top, top),
            title=f"ours − theirs, |d| > {a.tolerance:g}",
            stat="difference",
            source="disagreement",
        )

    def _toggle_overlay(self, on: bool) -> None:
        ms = self.state.map_settings
        if on and ms.source != "disagreement":
            self._before = ms.source
            self.state.set_map_source("disagreement")
        elif not on and ms.source == "disagreement":
            self.state.set_map_source(self._before)

    def _sync_toggle(self) -> None:
        on = self.state.map_settings.source == "disagreement"
        if self.show_differ.isChecked() != on:
            self.show_differ.blockSignals(True)
            self.show_differ.setChecked(on)
            self.show_differ.blockSignals(False)

    # ------------------------------------------------------------------ explain

    def start_explain(self) -> None:
        """Run :func:`voxelscope.core.agreement.explain` in the background."""
        st = self.state
        model = self.state.model_map
        if self.theirs is None or model is None or st.analysis is None:
            st.message.emit("Load their map and wait for our model map first.")
            return
        if self.explain_job is not None:
            return
        run, analysis, theirs = st.run, st.analysis, self.theirs
        settings, kernel = model.settings, model.kernel
        stat = "t"

        def fn(progress):
            return explain(
                run,
                analysis,
                settings,
                theirs,
                kernel=kernel,
                stat=stat,
                ours=model,
                progress=progress,
            )

        job = BackgroundJob(fn, "the search for causes", owner=self)
        job.progress.connect(lambda f: self.explain_progress.setValue(int(1000 * f)))
        job.done.connect(self._explained)
        job.failed.connect(self._failed)
        job.cancelled.connect(lambda: self.statement.setText("Cancelled."))
        job.finished.connect(lambda job=job: self._explain_finished(job))
        self.explain_job = job
        self.explain_progress.setValue(0)
        self.explain_progress.setVisible(True)
        self.explain_cancel.setVisible(True)
        self.explain_button.setEnabled(False)
        self.statement.setText("Recomputing our map under the alternatives…")
        job.start()

    def cancel_explain(self) -> None:
        if self.explain_job is not None:
            self.explain_job.cancel()

    def _explain_finished(self, job) -> None:
        job.wait()
        job.deleteLater()
        self.explain_job = None
        self.explain_progress.setVisible(False)
        self.explain_cancel.setVisible(False)
        self.explain_button.setEnabled(True)

    def _explained(self, explanation) -> None:
        self.explanation = explanation
        self.statement.setText(explanation.statement)

    # ------------------------------------------------------------------ showing

    def _show(self) -> None:
        a = self.agreement
        has = self.theirs is not None
        self.explain_button.setEnabled(
            has and self.state.model_map is not None and self.explain_job is None
        )
        self.show_differ.setEnabled(a is not None)
        model = self.state.model_map
        if a is None:
            self.summary.setText(
                "" if not has else ("Waiting for our model map…" if model is None else "Comparing…")
            )
            self.scatter.setData([], [])
            self.identity.setData([], [])
            self.fit_line.setData([], [])
            self._sample = np.zeros(0, dtype=np.int64)
        else:
            r = format_value("r", a.r)
            self.summary.setText(
                f"<b>r {r}</b> over {a.n_voxels} voxels · theirs ≈ "
                f"{format_value('value', a.slope)} × ours "
                f"{'+' if a.intercept >= 0 else '−'} {format_value('value', abs(a.intercept))} "
                f"(robust slope {format_value('value', a.robust_slope)}) · "
                f"<b>{a.n_disagree}</b> voxels differ "
                f"by more than {a.tolerance:g}"
            )
            idx = scatter_sample(a.region)
            self._sample = idx
            x = a.ours.ravel()[idx]
            y = a.theirs.ravel()[idx]
            bad = a.disagree.ravel()[idx]
            brushes = np.where(bad, pg.mkBrush(_DIFFER), pg.mkBrush(_AGREE))
            self.scatter.setData(x, y, brush=list(brushes))
            if x.size:
                lo = float(min(x.min(), y.min()))
                hi = float(max(x.max(), y.max()))
                self.identity.setData([lo, hi], [lo, hi])
                if math.isfinite(a.slope):
                    self.fit_line.setData(
                        [lo, hi], [a.intercept + a.slope * lo, a.intercept + a.slope * hi]
                    )
            kernel = model.kernel if model is not None else ""
            self.plot.setLabel("bottom", f"ours ({self.state.map_settings.stat}, {kernel})")
            name = self.their_path.name if self.their_path else "theirs"
            for ext in (".nii.gz", ".nii"):
                name = name[: -len(ext)] if name.endswith(ext) else name
            self.plot.setLabel("left", f"theirs ({html.escape(name.split('_')[-1])})")
        self._on_voxel(self.state.voxel)

    def value_at(self, voxel) -> tuple[float | None, float | None]:
        """(ours, theirs) at a voxel; None where a map has no value there."""
        i, j, k = (int(v) for v in voxel)
        theirs = None
        if self.theirs is not None:
            v = float(self.theirs[i, j, k])
            theirs = v if math.isfinite(v) else None
        ours = None
        if self.agreement is not None:
            ours = self.agreement.value_at((i, j, k))[0]
        elif self.state.model_map is not None:
            m = self.state.model_map
            stat = self.state.map_settings.stat
            vol = getattr(m, stat, None)
            vol = m.t if vol is None else vol
            v = float(np.asarray(vol)[i, j, k])
            ours = v if math.isfinite(v) else None
        return ours, theirs

    def showEvent(self, ev) -> None:
        super().showEvent(ev)
        self.catch_up()

    def catch_up(self) -> None:
        """Show the current voxel's values if they changed while the part was hidden."""
        if self._voxel_stale:
            self._on_voxel(self.state.voxel)

    def _on_voxel(self, voxel) -> None:
        # a part tabbed behind another is not drawn: it catches up when it is shown
        if self.theirs is not None and (not self.isVisible() or self.visibleRegion().isEmpty()):
            self._voxel_stale = True
            return
        self._voxel_stale = False
        if self.state.run is None or self.theirs is None:
            self.at_voxel.setText("")
            self.here.setData([], [])
            return
        ours, theirs = self.value_at(voxel)

        kind = stat_kind(self.state.map_settings.stat)

        def fmt(v):
            return format_value(kind, v)

        where = tuple(int(v) for v in voxel)
        text = f"At voxel {where}: ours <b>{fmt(ours)}</b>, theirs <b>{fmt(theirs)}</b>"
        a = self.agreement
        if ours is not None and theirs is not None:
            i, j, k = voxel
            text += f", difference {format_value(kind, ours - theirs, signed=True)}"
            if a is not None and bool(a.disagree[i, j, k]):
                text += " (beyond the tolerance)"
            self.here.setData([ours], [theirs])
        else:
            self.here.setData([], [])
        self.at_voxel.setText(text)
