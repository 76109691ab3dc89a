"""The inspection window: Slices and Signal in the middle, Model and Map on the right, Fits below.

Parts are dock widgets, so later parts (Findings, Checks, Marks, Show) can be added as
further docks or tabified with the existing ones (see :meth:`MainWindow.add_part`).
"""

from __future__ import annotations

import os
from pathlib import Path

from PySide6.QtCore import (
    QBuffer,
    QByteArray,
    QCoreApplication,
    QEvent,
    QIODevice,
    QSettings,
    Qt,
    QTimer,
)
from PySide6.QtGui import QAction, QGuiApplication
from PySide6.QtWidgets import (
    QDialog,
    QDialogButtonBox,
    QDockWidget,
    QFileDialog,
    QLabel,
    QMainWindow,
    QMessageBox,
    QProgressBar,
    QPushButton,
    QScrollArea,
    QSplitter,
    QStackedWidget,
    QTextBrowser,
    QVBoxLayout,
    QWidget,
)

import voxelscope
from voxelscope.core.confounds import read_confounds
from voxelscope.core.errors import VoxelscopeError
from voxelscope.core.loader import analysis_for
from voxelscope.core.loader import open_events as core_open_events
from voxelscope.gui.agreement_panel import AgreementPanel
from voxelscope.gui.checks_panel import install_checks
from voxelscope.gui.colours import stylesheet
from voxelscope.gui.export import install as install_export
from voxelscope.gui.findings import FindingsPanel
from voxelscope.gui.fits import FitsPanel
from voxelscope.gui.loading import RunBundle, check_nifti_kind, load_backdrop, load_bundle, load_map
from voxelscope.gui.map_panel import MapPanel
from voxelscope.gui.mapjobs import LiveMap
from voxelscope.gui.marks_panel import install as install_marks
from voxelscope.gui.menus import build_menus
from voxelscope.gui.model_panel import ModelPanel
from voxelscope.gui.plaintext import make_plain, plain_tooltip
from voxelscope.gui.runs import install as install_runs
from voxelscope.gui.session_io import install as install_sessions
from voxelscope.gui.show import install as install_show
from voxelscope.gui.signal import SignalPanel
from voxelscope.gui.slices import SlicesPanel
from voxelscope.gui.state import LiveLayer, ViewerState
from voxelscope.gui.status import ElidedLabel, StatusBar
from voxelscope.gui.workers import OpenRunJob, stop_all_at_exit, stop_jobs, wait_for_jobs

__all__ = ["ORGANISATION", "MainWindow"]

#: QSettings organisation and application names (recent files).
ORGANISATION = "voxelscope-project"
APPLICATION = "voxelscope"
MAX_RECENT = 8
NIFTI_FILTER = "NIfTI images (*.nii *.nii.gz);;All files (*)"

WELCOME = (
    "<div style='text-align:center'>"
    "<p style='font-size:24px; font-weight:bold; color:#2E3A46'>voxelscope</p>"
    "<p>Open a run to look at its voxels:</p>"
    "<p><b>File ▸ Open run…</b> (Ctrl+O), or drop a <b>.nii</b> / <b>.nii.gz</b> run here.</p>"
    "<p style='color:#5A5A5A; font-size:15px'>The events, sidecar and confounds files are found "
    "by their BIDS names next to the run.<br>From a terminal: "
    "<code>voxelscope view RUN_bold.nii.gz</code></p></div>"
)


def _is_nifti(path: str) -> bool:
    low = path.lower()
    return low.endswith(".nii") or low.endswith(".nii.gz")


class MainWindow(QMainWindow):
    """The voxelscope inspection window."""

    def __init__(self, settings: QSettings | None = None, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setObjectName("voxelscope_window")
        self.setWindowTitle("voxelscope")
        self.settings = settings if settings is not None else QSettings(ORGANISATION, APPLICATION)
        self.state = ViewerState(self)
        self.job: OpenRunJob | None = None
        self._pending_voxel = None
        self._pending_mm = None
        self.after_open = None
        self.last_error = ""
        # called before a window image: finish background work (the voxel's fits first)
        self.settle_hooks: list = [self.state.settle_fits]
        self.record_recent = True  # False for a one-off offscreen rendering (--screenshot)
        self.study_browser = None  # File > Open study…
        self.keys_dialog = None  # Help > Keys and mouse…
        self.ask_before_closing = not self.offscreen()  # unsaved marks: save, discard, cancel
        self.setStyleSheet(stylesheet())
        self.setAcceptDrops(True)

        self.slices = SlicesPanel(self.state)
        self.signal = SignalPanel(self.state)
        self.workspace = QSplitter(Qt.Orientation.Vertical)
        self.workspace.setObjectName("workspace")
        self.workspace.addWidget(self.slices)
        self.workspace.addWidget(self.signal)
        self.workspace.setStretchFactor(0, 5)
        self.workspace.setStretchFactor(1, 4)
        self.workspace.setChildrenCollapsible(False)
        self.welcome = QLabel(WELCOME)
        self.welcome.setTextFormat(Qt.TextFormat.RichText)
        self.welcome.setObjectName("welcome")
        self.welcome.setAlignment(Qt.AlignmentFlag.AlignCenter)
        self.welcome.setWordWrap(True)
        self.stack = QStackedWidget()
        self.stack.addWidget(self.welcome)
        self.stack.addWidget(self.workspace)
        self.setCentralWidget(self.stack)

        self.model_panel = ModelPanel(self.state)
        scroll = QScrollArea()
        scroll.setWidgetResizable(True)
        scroll.setWidget(self.model_panel)
        scroll.setFrameShape(QScrollArea.Shape.NoFrame)
        # Model scrolls up and down only: the column is as wide as its narrowest layout
        scroll.setHorizontalScrollBarPolicy(Qt.ScrollBarPolicy.ScrollBarAlwaysOff)
        self.model_scroll = scroll
        self.fit_model_column()
        self.model_panel.installEventFilter(self)
        self.map_panel = MapPanel(self.state)
        self.map_panel.open_requested.connect(self.ask_map)
        self.fits = FitsPanel(self.state)
        self.setCorner(Qt.Corner.BottomRightCorner, Qt.DockWidgetArea.RightDockWidgetArea)
        self.setCorner(Qt.Corner.TopRightCorner, Qt.DockWidgetArea.RightDockWidgetArea)
        self.docks: dict[str, QDockWidget] = {}
        self.add_part("Model", scroll, Qt.DockWidgetArea.RightDockWidgetArea)
        self.add_part("Fits", self.fits, Qt.DockWidgetArea.BottomDockWidgetArea)
        self.add_part("Map", self.map_panel, Qt.DockWidgetArea.BottomDockWidgetArea)
        self.splitDockWidget(self.docks["Fits"], self.docks["Map"], Qt.Orientation.Horizontal)
        self.checks = install_checks(self)  # Checks, tabbed with Model (checks_panel.py)
        self._install_map_parts()  # Findings, Agreement, the live map's hooks

        self._build_status()
        build_menus(self)  # File, Edit, View, Help (menus.py)
        # parts that add menu items of their own
        install_marks(self)  # Marks (marks_panel.py)
        install_sessions(self)  # File > Open/Save session, autosave (session_io.py)
        install_export(self)  # File > Export view, Report (export.py)
        install_show(self)  # View > Show mode (show.py)
        install_runs(self)  # File > Add runs: several runs of one subject (runs.py)
        self._arranged = False
        self.auto_arrange = True  # False once a saved layout was restored
        self.state.message.connect(self._note)
        self.state.run_changed.connect(self._on_run)
        self._on_run()
        make_plain(self)  # names from files show literally (see gui/plaintext.py)

    # ------------------------------------------------------------------ layout

    def add_part(
        self, title: str, widget: QWidget, area: Qt.DockWidgetArea, tab_with: str | None = None
    ) -> QDockWidget:
        """Add a part of the window as a dock (optionally tabbed with an existing one)."""
        dock = QDockWidget(title, self)
        dock.setObjectName(f"dock_{title.lower()}")
        dock.setWidget(widget)
        dock.setFeatures(
            QDockWidget.DockWidgetFeature.DockWidgetMovable
            | QDockWidget.DockWidgetFeature.DockWidgetFloatable
            | QDockWidget.DockWidgetFeature.DockWidgetClosable
        )
        self.addDockWidget(area, dock)
        if tab_with is not None and tab_with in self.docks:
            self.tabifyDockWidget(self.docks[tab_with], dock)
        self.docks[title] = dock
        return dock

    def fit_model_column(self) -> None:
        """Keep the Model scroll area at least as wide as Model's content needs (with its
        scroll bar), so Model never has to be cut at the right; called again when Model's
        items change (a run's confounds, longer choices)."""
        bar = self.model_scroll.verticalScrollBar().sizeHint().width()
        need = self.model_panel.minimumSizeHint().width() + bar + 4
        if self.model_scroll.minimumWidth() != need:
            self.model_scroll.setMinimumWidth(need)

    def eventFilter(self, obj, ev) -> bool:
        if obj is self.model_panel and ev.type() == QEvent.Type.LayoutRequest:
            self.fit_model_column()
        return super().eventFilter(obj, ev)

    def arrange(self, width: int | None = None) -> None:
        """Share the width out for a window ``width`` pixels wide (default: its own width).

        The right column gets about a fifth (never less than Model needs, at most 440 px);
        below it, Map gets what Fits leaves once Fits shows every column. Called when the
        window is first shown and for a screenshot; the user's own dock sizes (and a
        session's layout) are left alone after that.
        """
        width = int(width or self.width())
        right = self.docks["Model"]
        self.fit_model_column()
        need = right.minimumSizeHint().width()
        col = max(need, min(440, round(0.22 * width)))
        self.resizeDocks([right], [col], Qt.Orientation.Horizontal)
        bottom = max(0, width - col - 24)  # less the separators between docks
        fits_need = self.fits.table_width()
        map_min = self.docks["Map"].minimumSizeHint().width()
        map_w = max(map_min, min(560, bottom - fits_need))
        self.resizeDocks(
            [self.docks["Fits"], self.docks["Map"]],
            [max(120, bottom - map_w), map_w],
            Qt.Orientation.Horizontal,
        )
        # the bottom row only as tall as Map needs (Slices and Signal get the rest)
        height = self.height()
        low = max(self.docks["Map"].minimumSizeHint().height() + 8, round(0.24 * height))
        self.resizeDocks([self.docks["Fits"]], [min(low, 340)], Qt.Orientation.Vertical)
        # apply the new sizes now, so nothing moves under the next click
        self.layout().activate()
        QCoreApplication.sendPostedEvents(None, QEvent.Type.LayoutRequest)

    def showEvent(self, ev) -> None:
        super().showEvent(ev)
        if not self._arranged and self.auto_arrange:
            self._arranged = True
            self.arrange()
        self.tuck_tab_bars()

    def tuck_tab_bars(self) -> None:
        """Hide the spare tab bars Qt leaves behind.

        Tabbing Findings with Fits, which shares its row with Map, leaves Qt with two
        spare "Fits | Findings" tab bars that it still shows, at the top of Fits, where
        they showed through above the caption. Of the tab bars with the same tabs, the one
        in use is the lowest on the screen (tabs sit below their parts); the others, and
        tab bars without tabs, are hidden. Called after each layout change that can bring
        them back (showing the window, leaving Show mode).
        """
        from PySide6.QtWidgets import QTabBar

        groups: dict[tuple, list] = {}
        for bar in self.findChildren(QTabBar, options=Qt.FindChildOption.FindDirectChildrenOnly):
            if bar.isVisible() and bar.count() == 0:
                bar.hide()
            elif bar.isVisible():
                texts = tuple(bar.tabText(i) for i in range(bar.count()))
                groups.setdefault(texts, []).append(bar)
        for bars in groups.values():
            if len(bars) > 1:
                bars.sort(key=lambda b: b.geometry().bottom())
                for bar in bars[:-1]:
                    bar.hide()

    def _build_status(self) -> None:
        bar = StatusBar(self)
        self.setStatusBar(bar)
        self.progress = QProgressBar()
        self.progress.setRange(0, 1000)
        self.progress.setFixedWidth(220)
        self.progress.setFormat("opening run… %p%")
        self.cancel_button = QPushButton("Cancel")
        self.cancel_button.setToolTip("Stop opening the run")
        self.cancel_button.clicked.connect(self.cancel_open)
        bar.addPermanentWidget(self.progress)
        bar.addPermanentWidget(self.cancel_button)
        self.progress.setVisible(False)
        self.cancel_button.setVisible(False)
        self.run_label = ElidedLabel("")
        self.run_label.setObjectName("run_label")
        bar.addPermanentWidget(self.run_label)

    def _install_map_parts(self) -> None:
        """Findings (tabbed with Fits) and Agreement (with Model), tied to the live map.

        The colour bar names live overlays; a window image waits for the map being
        computed; closing the window stops background jobs (:meth:`closeEvent`).
        """
        live: LiveMap = self.map_panel.live
        self.live_map = live
        self.findings = FindingsPanel(self.state)
        self.agreement = AgreementPanel(self.state)
        area = Qt.DockWidgetArea
        self.add_part("Findings", self.findings, area.BottomDockWidgetArea, tab_with="Fits")
        self.add_part("Agreement", self.agreement, area.RightDockWidgetArea, tab_with="Model")
        self.docks["Fits"].raise_()
        self.docks["Model"].raise_()
        agreement = self.agreement
        self.docks["Agreement"].visibilityChanged.connect(
            lambda on: agreement.catch_up() if on else None
        )
        self.state.overlay_changed.connect(self._name_live_overlay)
        self.settle_hooks.append(lambda: (live.flush(), wait_for_jobs(20000)))
        app = QCoreApplication.instance()
        if app is not None:
            app.aboutToQuit.connect(stop_all_at_exit)

    def _name_live_overlay(self) -> None:
        bar = self.slices.colour_bar
        layer = self.state.overlay
        if isinstance(layer, LiveLayer) and bar.isVisible():
            bar.title.setText(layer.title)
            bar.title.setToolTip(layer.title)

    # ------------------------------------------------------------------ messages

    def offscreen(self) -> bool:
        return QGuiApplication.platformName() in ("offscreen", "minimal")

    def show_error(self, message: str) -> None:
        """One line for the user: a dialog on screen, the status bar offscreen.

        Each line is cut to 1000 characters, so a message that quotes file content stays
        short; the text is shown as plain text.
        """
        message = "\n".join(
            line if len(line) <= 1000 else line[:1000] + "…" for line in str(message).splitlines()
        )
        self.statusBar().showMessage(message)
        self.last_error = message
        if not self.offscreen():
            box = QMessageBox(QMessageBox.Icon.Warning, "voxelscope", message, parent=self)
            box.setTextFormat(Qt.TextFormat.PlainText)  # file content is never markup
            box.exec()

    def _note(self, message: str) -> None:
        self.statusBar().showMessage(message, 20000)

    def show_keys(self) -> None:
        """Help ▸ Keys and mouse…: every shortcut and mouse action (from gui/keys.py)."""
        from voxelscope.gui.keys import keys_html

        if self.keys_dialog is None:
            box = QDialog(self)
            box.setObjectName("keys_dialog")
            box.setWindowTitle("Keys and mouse")
            lay = QVBoxLayout(box)
            text = QTextBrowser()
            text.setObjectName("keys_text")
            text.setHtml(keys_html())
            lay.addWidget(text)
            buttons = QDialogButtonBox(QDialogButtonBox.StandardButton.Close)
            buttons.rejected.connect(box.close)
            lay.addWidget(buttons)
            box.resize(560, 640)
            self.keys_dialog = box
        self.keys_dialog.show()
        self.keys_dialog.raise_()

    def about(self) -> None:
        text = (
            f"<p><b>voxelscope {voxelscope.__version__}</b></p>"
            "<p>Inspect a first-level fMRI model voxel by voxel.</p>"
            f"<p>{voxelscope.RESEARCH_CAUTION}</p>"
        )
        if self.offscreen():
            self.statusBar().showMessage(voxelscope.RESEARCH_CAUTION)
        else:
            QMessageBox.about(self, "About voxelscope", text)

    # ------------------------------------------------------------------ opening

    def ask_run(self) -> None:
        path, _ = QFileDialog.getOpenFileName(self, "Open run", self._last_dir(), NIFTI_FILTER)
        if path:
            self.open_run(path)

    def ask_study(self) -> None:
        path = QFileDialog.getExistingDirectory(self, "Open study", self._last_dir())
        if path:
            self.open_study(path)

    def open_study(self, path):
        """List a study's runs in a browser (File → Open study…); None when it cannot be read."""
        from voxelscope.core.study import list_study
        from voxelscope.gui.study_browser import StudyBrowser

        try:
            study = list_study(path)
        except VoxelscopeError as err:
            self.show_error(str(err))
            return None
        if self.study_browser is not None:
            self.study_browser.close()
            self.study_browser.deleteLater()
        self.study_browser = StudyBrowser(self, study)
        self.study_browser.show()
        self._add_recent(str(Path(path)), key="recent_studies")
        self.statusBar().showMessage(f"Study {Path(path).name}: {study.summary()}")
        return self.study_browser

    def ask_events(self) -> None:
        if self.state.run is None:
            self.show_error("Open a run first (File > Open run).")
            return
        path, _ = QFileDialog.getOpenFileName(
            self, "Open events", self._last_dir(), "Events (*.tsv);;All files (*)"
        )
        if path:
            self.open_events(path)

    def ask_confounds(self) -> None:
        if self.state.run is None or self.state.analysis is None:
            self.show_error("Open a run with its events first (File > Open run).")
            return
        path, _ = QFileDialog.getOpenFileName(
            self,
            "Open confounds",
            self._last_dir(),
            "Confounds tables (*.tsv *.csv *.txt);;All files (*)",
        )
        if path:
            self.open_confounds(path)

    def open_confounds(self, path) -> bool:
        """Use another confounds table for the open run: listed in Model, no column chosen
        yet; the checks and the non-steady-state volumes use it at once."""
        run, analysis = self.state.run, self.state.analysis
        if run is None or analysis is None:
            self.show_error("Open a run with its events first (File > Open run).")
            return False
        try:
            conf = read_confounds(path)
            new = analysis_for(run, list(analysis.conditions), conf)
        except VoxelscopeError as err:
            self.show_error(str(err))
            return False
        self.state.set_analysis(new, self.state.bundle.events_path, Path(path))
        self._note(
            f"Opened {Path(path).name}: {len(conf.file_columns)} columns, none chosen yet; "
            "choose them in Model"
        )
        return True

    def ask_anatomy(self) -> None:
        if self.state.run is None:
            self.show_error("Open a run first (File > Open run).")
            return
        path, _ = QFileDialog.getOpenFileName(self, "Open anatomy", self._last_dir(), NIFTI_FILTER)
        if path:
            self.open_anatomy(path)

    def ask_atlas(self) -> None:
        if self.state.run is None:
            self.show_error("Open a run first (File > Open run).")
            return
        path, _ = QFileDialog.getOpenFileName(
            self, "Open atlas (segmentation image)", self._last_dir(), NIFTI_FILTER
        )
        if path:
            self.open_atlas(path)

    def open_atlas(self, path, labels=None) -> bool:
        """Read an atlas through the core's loader and name regions at the cursor."""
        from voxelscope.core.loader import open_atlas

        try:
            atlas = open_atlas(path, labels)
        except VoxelscopeError as err:
            self.show_error(str(err))
            return False
        self.state.set_atlas(atlas)
        self.statusBar().showMessage(
            f"Atlas {atlas.name}: {len(atlas.names)} named regions; the region at the cursor "
            "is in the Slices readout",
            8000,
        )
        return True

    def ask_map(self) -> None:
        if self.state.run is None:
            self.show_error("Open a run first (File > Open run).")
            return
        path, _ = QFileDialog.getOpenFileName(self, "Open map", self._last_dir(), NIFTI_FILTER)
        if path:
            self.open_map(path)

    def ask_window_image(self) -> None:
        # the file dialog has already asked before replacing an existing file
        path, _ = QFileDialog.getSaveFileName(self, "Save window image", "", "PNG (*.png)")
        if path:
            try:
                out = self.save_image(path, force=True)
            except VoxelscopeError as err:
                self.show_error(str(err))
                return
            self.statusBar().showMessage(f"Saved the window image to {out}", 8000)

    def _last_dir(self) -> str:
        run = self.state.run
        return str(Path(run.path).parent) if run is not None else ""

    def open_run(
        self,
        path,
        events=None,
        confounds=None,
        anatomy=None,
        map_file=None,
        tr=None,
        voxel=None,
        mm=None,
        background: bool = True,
        mask=None,
        bids_root=None,
        no_events: bool = False,
        no_confounds: bool = False,
        atlas=None,
        atlas_labels=None,
    ) -> bool:
        """Open a run (and companions); in the background with progress unless told not to.

        ``no_events`` / ``no_confounds``: open without them and find none beside the run.
        Returns True when the open succeeded (foreground) or was started (background).
        """
        if self.job is not None:
            self.show_error("A run is still opening; wait for it or cancel it first.")
            return False
        kwargs = dict(
            run_path=str(path),
            events=events,
            confounds=confounds,
            anatomy=anatomy,
            map_file=map_file,
            tr=tr,
            mask=mask,
            bids_root=bids_root,
            no_events=no_events,
            no_confounds=no_confounds,
            atlas=atlas,
            atlas_labels=atlas_labels,
        )
        self._pending_voxel, self._pending_mm = voxel, mm
        if not background:
            try:
                bundle = load_bundle(**kwargs)
            except VoxelscopeError as err:
                self.show_error(str(err))
                return False
            return self._opened(bundle)
        self.job = OpenRunJob(self, **kwargs)
        self.job.progress.connect(self._progress)
        self.job.done.connect(self._opened)
        self.job.failed.connect(self.show_error)
        self.job.finished.connect(self._job_finished)
        self.progress.setValue(0)
        self.progress.setVisible(True)
        self.cancel_button.setVisible(True)
        self.statusBar().showMessage(f"Opening {Path(path).name}…")
        self.job.start()
        return True

    def cancel_open(self) -> None:
        if self.job is not None:
            self.job.cancel()

    def _progress(self, fraction: float) -> None:
        self.progress.setValue(int(1000 * min(max(fraction, 0.0), 1.0)))

    def _job_finished(self) -> None:
        if self.job is not None:
            self.job.wait()
            self.job.deleteLater()
        self.job = None
        self.progress.setVisible(False)
        self.cancel_button.setVisible(False)

    def _opened(self, bundle: RunBundle) -> bool:
        voxel = self._pending_voxel
        try:
            if voxel is None and self._pending_mm is not None:
                voxel = bundle.run.mm_to_voxel(self._pending_mm)
            if voxel is not None:
                voxel = bundle.run.check_voxel(voxel)
        except VoxelscopeError as err:
            self.show_error(str(err))
            voxel = None
        self.state.set_bundle(bundle, voxel)
        self._add_recent(str(bundle.run.path))
        if self.after_open is not None:
            hook, self.after_open = self.after_open, None
            hook()
        files = bundle.inputs.files_line() if bundle.inputs is not None else ""
        self.run_label.setToolTip(plain_tooltip(files.replace("; ", "\n")))
        make_plain(self)  # labels the parts added for this run show outside text literally
        if not bundle.warnings:
            short = bundle.inputs.status_line() if bundle.inputs is not None else ""
            self.statusBar().showMessage("Opened: " + short if short else "Opened")
        return True

    def open_events(self, path, confounds=None) -> bool:
        run = self.state.run
        try:
            conf = confounds
            if conf is None and self.state.analysis is not None:
                conf = self.state.analysis.confounds
            analysis = core_open_events(run, path, conf)
        except VoxelscopeError as err:
            self.show_error(str(err))
            return False
        kept = self.state.bundle.confounds_path if conf is not None else None
        self.state.set_analysis(  # the confounds stay offered after new events
            analysis, Path(path), kept if confounds is None else Path(confounds)
        )
        return True

    def open_anatomy(self, path) -> bool:
        warnings: list[str] = []
        try:
            layer = load_backdrop(path, self.state.run, warnings)
        except VoxelscopeError as err:
            self.show_error(str(err))
            return False
        self.state.set_backdrop(layer)
        for w in warnings:
            self._note(w)
        return True

    def open_map(self, path) -> bool:
        warnings: list[str] = []
        try:
            layer = load_map(path, self.state.run, warnings)
        except VoxelscopeError as err:
            self.show_error(str(err))
            return False
        self.state.set_file_layer(layer)
        for w in warnings:
            self._note(w)
        return True

    def open_dropped(self, path: str) -> bool:
        """A dropped NIfTI: a 4D image opens as the run, a 3D image as the map; a dropped
        folder opens as a study (File → Open study…)."""
        if os.path.isdir(path):
            return self.open_study(path) is not None
        try:
            dims = check_nifti_kind(path)
        except VoxelscopeError as err:
            self.show_error(str(err))
            return False
        if dims == 4:
            return self.open_run(path)
        if self.state.run is None:
            self.show_error(f"{path}: a 3D image; open a run first, then drop it as a map")
            return False
        return self.open_map(path)

    # ------------------------------------------------------------------ recent files

    def recent_runs(self, key: str = "recent_runs") -> list[str]:
        value = self.settings.value(key, [])
        if isinstance(value, str):
            value = [value]
        return [str(v) for v in (value or [])]

    def recent_studies(self) -> list[str]:
        return self.recent_runs("recent_studies")

    def _add_recent(self, path: str, key: str = "recent_runs") -> None:
        if not self.record_recent:
            return
        items = [p for p in self.recent_runs(key) if p != path]
        items.insert(0, path)
        self.settings.setValue(key, items[:MAX_RECENT])
        self.fill_recent()

    def fill_recent(self) -> None:
        for menu, key, opener in (
            (self.recent_menu, "recent_runs", self.open_run),
            (self.recent_studies_menu, "recent_studies", self.open_study),
        ):
            menu.clear()
            items = self.recent_runs(key)
            for p in items:
                act = QAction(Path(p).name, self)
                act.setToolTip(plain_tooltip(p))
                act.triggered.connect(lambda _c=False, p=p, f=opener: f(p))
                menu.addAction(act)
            menu.setEnabled(bool(items))

    # ------------------------------------------------------------------ drag and drop

    def dragEnterEvent(self, ev) -> None:
        urls = ev.mimeData().urls() if ev.mimeData().hasUrls() else []
        if urls and all(_is_nifti(u.toLocalFile()) for u in urls):
            ev.acceptProposedAction()
        elif len(urls) == 1 and os.path.isdir(urls[0].toLocalFile()):
            ev.acceptProposedAction()  # a dataset folder: open it as a study
        else:
            ev.ignore()

    def dropEvent(self, ev) -> None:
        urls = ev.mimeData().urls()
        if urls:
            ev.acceptProposedAction()
            path = urls[0].toLocalFile()
            QTimer.singleShot(0, lambda: self.open_dropped(path))

    # ------------------------------------------------------------------ misc

    def _on_run(self) -> None:
        run = self.state.run
        has = run is not None
        self.stack.setCurrentIndex(1 if has else 0)
        for act in (self.events_action, self.anatomy_action, self.atlas_action, self.map_action):
            act.setEnabled(has)
        if has:
            name = Path(run.path).name
            self.setWindowTitle(f"voxelscope — {name}")
            x, y, z = run.shape
            vs = "×".join(f"{v:g}" for v in run.voxel_size)
            short = name if len(name) <= 40 else f"{name[:22]}…{name[-17:]}"
            self.run_label.setText(
                f"{short}   {x}×{y}×{z} × {run.n_volumes} volumes   {vs} mm   "
                f"TR {run.tr:g} s   {''.join(run.axcodes)}"
            )
        else:
            self.setWindowTitle("voxelscope")
            self.run_label.setText("")

    def set_contrast_text(self, text: str) -> bool:
        """Type a contrast into Model (as the user would); returns whether it was accepted."""
        self.model_panel.contrast.setText(text)
        return self.state.set_contrast(text)

    def shutdown(self, timeout_ms: int = 10000) -> None:
        """Stop every background job of the window and wait for its thread (on close).

        The live map's timer, then every job the window or one of its parts owns (the
        map, comparison and explanation jobs, the Checks, a run being opened, a report
        being written): each is cancelled, cut off from the window (no late result
        reaches a deleted part) and waited for, so no thread outlives the window.
        """
        live = getattr(self, "live_map", None)
        if live is not None:
            live.cancel()
        stop_jobs(self, timeout_ms)
        self.job = None
        self.report_job = None
        self.progress.setVisible(False)
        self.cancel_button.setVisible(False)
        if live is not None:
            live.job = None
            live.cancel()
        agreement = getattr(self, "agreement", None)
        if agreement is not None:
            agreement.compare_job = None
            agreement.explain_job = None

    def closeEvent(self, ev) -> None:
        """Closing (Ctrl+Q, the title bar) with unsaved marks asks to save, discard or stay."""
        if self.ask_before_closing and not self.keep_marks():
            ev.ignore()
            return
        autosave = getattr(self, "autosave", None)
        if autosave is not None:
            autosave.clear()  # a clean close leaves no recovery file
        self.shutdown()  # a running QThread must not outlive the window
        super().closeEvent(ev)

    def keep_marks(self) -> bool:
        """Ask what to do with unsaved marks; True when the window may close."""
        st = self.state
        if not st.unsaved_marks():
            return True
        n = len(st.marks)
        box = QMessageBox(
            QMessageBox.Icon.Question,
            "Unsaved marks",
            f"The marks ({n}) changed since they were last saved. Save them before closing?",
            QMessageBox.StandardButton.Save
            | QMessageBox.StandardButton.Discard
            | QMessageBox.StandardButton.Cancel,
            self,
        )
        box.setDefaultButton(QMessageBox.StandardButton.Save)
        box.setInformativeText("Save writes them as a marks file (TSV) you can import again.")
        answer = box.exec()
        if answer == QMessageBox.StandardButton.Discard:
            return True
        if answer == QMessageBox.StandardButton.Save:
            panel = getattr(self, "marks_panel", None)
            return panel is not None and panel.ask_export() is not None
        return False

    def reset_views(self) -> None:
        for view in self.slices.views.values():
            view.reset_view()

    def save_image(
        self,
        path: str | os.PathLike[str],
        size: tuple[int, int] | None = None,
        force: bool = False,
    ) -> Path:
        """Render the window to a PNG, written atomically through the output guard.

        With ``size``, the window is first resized to exactly that size and rendered at it
        (1:1): every part fits in 1280 x 800 and more. Only a size below the window's
        minimum is reached by scaling the rendering. The path is never an input the window
        opened, and an existing file is replaced only with ``force``.
        """
        from voxelscope.core.atomic import write_bytes
        from voxelscope.core.outputs import guard_output

        path = guard_output(path, force=force)  # before any rendering
        if size is not None and (self.width(), self.height()) != tuple(size):
            self.resize(int(size[0]), int(size[1]))
            QCoreApplication.processEvents()
            self.arrange()
            QCoreApplication.processEvents()
        for hook in self.settle_hooks:  # e.g. the live map being computed
            hook()
        pix = self.grab()
        if size is not None and (pix.width(), pix.height()) != tuple(size):
            # only below the window's minimum size (about 1250 x 540): scaled to fit
            pix = pix.scaled(
                int(size[0]),
                int(size[1]),
                Qt.AspectRatioMode.IgnoreAspectRatio,
                Qt.TransformationMode.SmoothTransformation,
            )
        data = QByteArray()
        buf = QBuffer(data)
        buf.open(QIODevice.OpenModeFlag.WriteOnly)
        ok = pix.save(buf, "PNG")
        buf.close()
        if not ok:
            raise VoxelscopeError(f"{path}: could not encode the window image as PNG")
        return write_bytes(path, bytes(data), force=force)
