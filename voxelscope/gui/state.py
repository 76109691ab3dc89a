"""The one observable state of the window.

Views listen to :class:`ViewerState` and never to each other; user actions call its
setters. Data flow is one way: input event -> state -> recompute -> views. A voxel's fits
come from :meth:`voxelscope.core.model.Analysis.fit_voxel`, the same function the command
line uses, so the window and ``voxelscope fit`` print the same numbers.

While the crosshair is dragged (:attr:`ViewerState.dragging`), a new voxel's series is
read at once and its fit follows from the same background refit as a model change's
(:meth:`ViewerState.refit_later`, newest wins); until it arrives ``fits`` is None
(:attr:`ViewerState.fitting`), so no view ever shows the fits of a voxel other than
``voxel``, and a fit for a voxel the pointer has already left is dropped.

Undo and redo (Edit menu) live here too: ``ViewerState.history`` is one ``QUndoStack``.
Every model change that goes through :meth:`ViewerState.update_settings` (contrast,
kernels, noise, drift, confounds, ...) and every change to the marks
(:meth:`ViewerState.record_marks`, :meth:`ViewerState.set_marks`) is one step; a step
holds the settings, or the (immutable) marks, before and after, so undoing puts back
exactly what was there whatever a setting or a mark holds. Opening a run or another
events file starts a new history (the old steps name another model).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, fields, replace

import numpy as np
from PySide6.QtCore import QObject, QTimer, Signal
from PySide6.QtGui import QUndoCommand, QUndoStack

from voxelscope.core.bids import run_labels
from voxelscope.core.combine import CombinedFit, combine_fits
from voxelscope.core.errors import Cancelled, VoxelscopeError
from voxelscope.core.marks import MarkList
from voxelscope.core.model import Analysis, ModelSettings, VoxelFits
from voxelscope.gui.loading import Layer, RunBundle
from voxelscope.gui.orient import DisplayGrid
from voxelscope.gui.workers import BackgroundJob, JobFailure

__all__ = [
    "FIRST_THRESHOLD",
    "MAP_STATS",
    "SOURCES",
    "LiveLayer",
    "MapSettings",
    "PlaceFit",
    "RunFit",
    "ViewerState",
    "fit_place",
    "settings_change_words",
]

UNITS = ("data", "percent")

#: Overlay sources, with the words the Map part shows for them.
SOURCES = (
    ("model", "model map (live)"),
    ("difference", "kernel difference"),
    ("file", "map file"),
    ("disagreement", "where the maps differ"),
)

#: Statistics the model map can show, with their labels.
MAP_STATS = (("t", "t"), ("z", "z"), ("estimate", "estimate"), ("variance", "variance"))

#: Threshold a source starts with the first time it is shown (others keep the current one).
FIRST_THRESHOLD = {"disagreement": 0.0, "difference": 1.0}


#: Model settings a newly opened run starts with: the default model exactly (conditions,
#: cosine drift, constant), as on the command line. Confound columns found beside the run
#: are listed in Model but switched off until the user picks them.
START_SETTINGS = ModelSettings(confound_columns=())


#: Words for a model setting in the Edit menu ("Undo contrast", "Redo noise model").
_SETTING_WORDS = {
    "contrast": "contrast",
    "kernels": "kernels",
    "noise": "noise model",
    "highpass_s": "high-pass",
    "onset_shift_s": "onset shift",
    "derivatives": "derivatives",
    "confound_columns": "confounds",
    "fir_window_s": "FIR span",
    "fir_bin_s": "FIR bins",
    "drop_volumes": "volumes dropped",
    "censor_fd_mm": "motion limit",
    "modulators": "modulators",
    "orthogonalize": "modulator orthogonalising",
}


def settings_change_words(old: ModelSettings, new: ModelSettings) -> str:
    """What changed between two model settings, in the Edit menu's words.

    >>> settings_change_words(ModelSettings(), ModelSettings(contrast="tap"))
    "contrast 'tap'"
    >>> settings_change_words(ModelSettings(), ModelSettings(noise="ols", drop_volumes=2))
    'noise model, volumes dropped'
    """
    changed = [
        f.name for f in fields(ModelSettings) if getattr(old, f.name) != getattr(new, f.name)
    ]
    if changed == ["contrast"]:
        text = new.contrast or "default"
        return f"contrast '{text if len(text) <= 30 else text[:29] + '…'}'"
    words = [_SETTING_WORDS.get(n, n.replace("_", " ")) for n in changed]
    return ", ".join(words) if len(words) <= 3 else "model settings"


class _SettingsStep(QUndoCommand):
    """One model change: the settings before and after (the change is already made)."""

    def __init__(self, state: ViewerState, old: ModelSettings, new: ModelSettings) -> None:
        super().__init__(settings_change_words(old, new))
        self.state, self.old, self.new = state, old, new
        self.done = True  # pushed after the state applied it

    def redo(self) -> None:
        if self.done:
            self.done = False
            return
        self.state._put_settings(self.new, f"Redone: {self.text()}")

    def undo(self) -> None:
        self.state._put_settings(self.old, f"Undone: {self.text()}")


class _MarksStep(QUndoCommand):
    """One change to the marks: the list before and after (marks are immutable)."""

    def __init__(self, state: ViewerState, text: str, before, after, merge: str = "") -> None:
        super().__init__(text)
        self.state, self.before, self.after, self.merge = state, list(before), list(after), merge
        self.done = True

    def id(self) -> int:
        return 17 if self.merge else -1

    def mergeWith(self, other) -> bool:
        if not isinstance(other, _MarksStep) or other.merge != self.merge:
            return False
        self.after = other.after
        return True

    def redo(self) -> None:
        if self.done:
            self.done = False
            return
        self.state._put_marks(self.after, f"Redone: {self.text()}")

    def undo(self) -> None:
        self.state._put_marks(self.before, f"Undone: {self.text()}")


@dataclass(frozen=True)
class MapSettings:
    """How the map is drawn over the backdrop.

    Attributes
    ----------
    threshold : float
        Only values with ``|v| > threshold`` are drawn (both tails); Findings' clusters
        use the same rule.
    opacity : float
        0..1.
    limit : float or None
        Colour scale runs from ``-limit`` to ``+limit``; None: from the map (99.9th
        percentile of ``|v|``).
    visible : bool
    colour_scale : str
        A pyqtgraph colour map name (a diverging, perceptually uniform one).
    source : str
        What the overlay shows (see :data:`SOURCES`): ``"model"``
        the live model map, ``"difference"`` t under ``kernel`` minus t under
        ``other_kernel``, ``"file"`` a loaded map file, ``"disagreement"`` where our map
        and an outside map differ.
    kernel : str or None
        Kernel of the model map; None: double-gamma if enabled, else the first enabled one.
    other_kernel : str or None
        Kernel subtracted in the difference map; None: the first other enabled kernel.
    stat : str
        Statistic of the model map (``t``, ``z``, ``estimate``, ``variance``).
    """

    threshold: float = 3.0
    opacity: float = 0.8
    limit: float | None = None
    visible: bool = True
    colour_scale: str = "CET-D1"
    source: str = "model"
    kernel: str | None = None
    other_kernel: str | None = None
    stat: str = "t"

    def with_(self, **changes) -> MapSettings:
        return replace(self, **changes)


@dataclass(eq=False)
class LiveLayer(Layer):
    """An overlay made in the window (no file): ``title`` names it on the colour bar."""

    title: str = ""
    stat: str = "t"
    source: str = "model"
    preview: bool = False  # the planes on screen only, until the full map replaces it


@dataclass(frozen=True, eq=False)
class RunFit:
    """One run's fit at the current place (several runs): its voxel, series and fits.

    ``voxel``, ``series`` and ``fits`` are None with a one-line ``note`` when the place is
    outside that run or its model does not fit."""

    label: str
    bundle: RunBundle
    voxel: tuple[int, int, int] | None
    series: np.ndarray | None
    fits: VoxelFits | None
    note: str = ""


@dataclass(frozen=True, eq=False)
class PlaceFit:
    """Everything :meth:`ViewerState.recompute` shows for one voxel and one model: the
    first run's series and fits, and with several runs each run's fit and their
    combination per kernel."""

    series: np.ndarray | None
    fits: VoxelFits | None
    run_fits: list[RunFit]
    combined: list[CombinedFit]


def fit_place(
    bundles: list[RunBundle],
    labels: list[str],
    voxel: tuple[int, int, int],
    settings: ModelSettings,
    go_on: Callable[[], bool] | None = None,
) -> PlaceFit:
    """Fit ``voxel`` of the first run under ``settings`` (no Qt: runs on the GUI thread or
    in a background job); with several runs, each other run at its voxel nearest the same
    place in mm, and the runs combined per kernel. A run that cannot be fitted there is
    left out of the combination with a note.

    ``go_on()`` returning False between the steps (a newer voxel or model is waiting)
    stops the work with :class:`~voxelscope.core.errors.Cancelled`.

    Raises
    ------
    VoxelscopeError
        The first run's voxel cannot be read or fitted.
    """

    def step() -> None:
        if go_on is not None and not go_on():
            raise Cancelled("a newer refit is waiting")

    first = bundles[0]
    run, analysis = first.run, first.analysis
    y = run.timeseries(voxel)
    fits = None
    if analysis is not None:
        # under the default model: the voxel's AR(p) coefficients from its
        # neighbourhood, exactly as the map whitens it
        noise = analysis.noise_at(run, voxel, settings)
        step()
        fits = analysis.fit_voxel(y, settings, noise)
    run_fits: list[RunFit] = []
    combined: list[CombinedFit] = []
    if len(bundles) < 2:
        return PlaceFit(y, fits, run_fits, combined)
    mm = run.voxel_to_mm(voxel)
    run_fits.append(RunFit(labels[0], first, tuple(voxel), y, fits))
    for label, b in zip(labels[1:], bundles[1:]):
        step()
        try:
            ijk = b.run.mm_to_voxel(tuple(float(v) for v in mm))
            yb = b.run.timeseries(ijk)
            noise = b.analysis.noise_at(b.run, ijk, settings)
            f = b.analysis.fit_voxel(yb, settings, noise)
        except VoxelscopeError as err:
            run_fits.append(RunFit(label, b, None, None, None, str(err)))
            continue
        run_fits.append(RunFit(label, b, ijk, yb, f))
    usable = [r for r in run_fits if r.fits is not None and r.fits.fits]
    if len(usable) >= 2:
        for i, one in enumerate(usable[0].fits.fits):
            per = [r.fits.fits[i] for r in usable]
            combined.append(
                combine_fits(
                    one.kernel,
                    one.contrast,
                    [r.label for r in usable],
                    [f.estimate for f in per],
                    [f.variance for f in per],
                    [f.df for f in per],
                )
            )
    return PlaceFit(y, fits, run_fits, combined)


class ViewerState(QObject):
    """Current run, voxel, model settings, map settings, maps and fits, with change signals.

    The map part of the state:

    ``overlay``
        The overlay on screen (a map file, a :class:`LiveLayer` made in the window, or
        None); :meth:`set_overlay`, signal ``overlay_changed`` (also sent when ``map_settings``
        change).
    ``map_settings.source``
        What the overlay shows (:data:`SOURCES`); :meth:`set_map_source` remembers the
        threshold each source was last shown with.
    ``file_layer``
        The map file opened over the run (with the run, File > Open map, a drop); it stays
        one choice away while the model map is shown. :meth:`set_file_layer`, signal
        ``file_layer_changed``.
    ``model_map``
        The whole-volume model map (a :class:`~voxelscope.core.maps.MapResult`) of the
        map's kernel under the current model settings, None until it is computed (by
        :class:`voxelscope.gui.mapjobs.LiveMap`). :meth:`set_model_map`, signal
        ``model_map_changed``.
    ``source_layers``
        Overlays other parts make for a source of their own (the Agreement part's
        ``"disagreement"``); a key present means the source can be chosen.
        :meth:`set_source_layer`, signal ``source_layer_changed(source)``.

    Opening a run or another events file (``run_changed``) resets ``model_map``; a new
    run also ``file_layer``.
    """

    run_changed = Signal()
    backdrop_changed = Signal()
    atlas_changed = Signal()
    overlay_changed = Signal()
    file_layer_changed = Signal()
    model_map_changed = Signal(object)
    source_layer_changed = Signal(str)
    voxel_changed = Signal(object)
    settings_changed = Signal(object)
    fits_changed = Signal(object)
    contrast_error = Signal(str)
    units_changed = Signal(str)
    message = Signal(str)
    marks_changed = Signal()
    dragging_changed = Signal(bool)
    runs_changed = Signal()

    def __init__(self, parent: QObject | None = None) -> None:
        super().__init__(parent)
        self.dragging = False  # the crosshair is being dragged (Slices sets it)
        self.bundle: RunBundle | None = None
        self.grid: DisplayGrid | None = None
        self.voxel: tuple[int, int, int] = (0, 0, 0)
        self.settings = ModelSettings()
        self.map_settings = MapSettings()
        self._overlay: Layer | None = None
        self.file_layer: Layer | None = None
        self.model_map = None  # MapResult of the map's kernel under the current settings
        self.source_layers: dict[str, Layer | None] = {}
        self._source_thresholds: dict[str, float] = {}
        self.fits: VoxelFits | None = None
        self.series: np.ndarray | None = None
        self.units = "data"
        self.contrast_text = ""
        self.contrast_problem = ""
        self.marks = MarkList()
        # several runs of one subject: the other runs, each run's fit at the current place
        # (label, voxel or None, series, fits or None, note) and the combination per kernel
        self.extra: list[RunBundle] = []
        self.run_fits: list[RunFit] = []
        self.combined: list[CombinedFit] = []
        self.signal_run = 0
        self.refusal = ""
        # undo/redo of model changes and marks; the marks as last written or read
        self.history = QUndoStack(self)
        self._recording = True
        self._saved_marks: list = []
        # the voxel's refit after a model change runs in the background (newest wins):
        # what the shown fits are of, the running job, and a timer that gathers the
        # changes of one event-loop pass into one refit
        self._inputs = 0  # counts opened runs, events files and added runs
        self._fits_key: tuple | None = None
        self._refit_job: BackgroundJob | None = None
        self._refit_key: tuple | None = None  # what the running job fits
        self._series_at: tuple | None = None  # (inputs, voxel) of ``series``
        self._refit_timer = QTimer(self)
        self._refit_timer.setSingleShot(True)
        self._refit_timer.timeout.connect(self._start_refit)

    # ------------------------------------------------------------------ accessors

    @property
    def run(self):
        return None if self.bundle is None else self.bundle.run

    @property
    def analysis(self) -> Analysis | None:
        return None if self.bundle is None else self.bundle.analysis

    @property
    def backdrop(self) -> Layer | None:
        return None if self.bundle is None else self.bundle.backdrop

    @property
    def overlay(self) -> Layer | None:
        """The overlay on screen (None without a run)."""
        return None if self.bundle is None else self._overlay

    def map_limit(self) -> float:
        """Colour scale limit in use (settings, else from the map)."""
        if self.map_settings.limit is not None:
            return float(self.map_settings.limit)
        layer = self.overlay
        top = 1.0 if layer is None else float(layer.levels[1])
        return top if top > 0 else 1.0

    # ------------------------------------------------------------------ setters

    def set_bundle(self, bundle: RunBundle, voxel: tuple[int, int, int] | None = None) -> None:
        """A newly opened run; the voxel goes to ``voxel`` or the brain's centre."""
        self.bundle = bundle
        self._inputs += 1
        run = bundle.run
        self.grid = DisplayGrid(run.shape, run.affine)
        settings = START_SETTINGS
        if bundle.analysis is not None and self.contrast_text:
            try:
                bundle.analysis.check_contrast(self.contrast_text)
                settings = settings.with_(contrast=self.contrast_text)
            except VoxelscopeError:
                self.contrast_text = ""
        else:
            self.contrast_text = ""
        self.contrast_problem = ""
        self.settings = settings
        # the map file opened with the run; with a model the live model map replaces it
        # shortly and the file stays one choice away (source "file")
        self.file_layer = self._overlay = bundle.file_layer
        self.model_map = None
        if bundle.file_layer is not None:
            self.map_settings = self.map_settings.with_(limit=None)
            source = self.map_settings.source
            if bundle.analysis is not None and source in ("model", "difference"):
                self._overlay = None
            elif source != "file":
                self.map_settings = self.map_settings.with_(source="file")
        self.voxel = run.check_voxel(voxel) if voxel is not None else self._centre()
        self.fits = None
        self.extra = []
        self.run_fits = []
        self.combined = []
        self.signal_run = 0
        self.history.clear()  # the old steps name another run's model
        self.run_changed.emit()
        self.runs_changed.emit()
        self.backdrop_changed.emit()
        self.file_layer_changed.emit()
        self.overlay_changed.emit()
        self.settings_changed.emit(self.settings)
        self.contrast_error.emit("")
        self.voxel_changed.emit(self.voxel)
        self.recompute()
        for w in bundle.warnings:
            self.message.emit(w)

    def set_backdrop(self, layer: Layer) -> None:
        if self.bundle is None:
            return
        self.bundle.backdrop = layer
        self.backdrop_changed.emit()

    @property
    def atlas(self):
        """The atlas giving region names at the cursor (core ``Atlas``), or None."""
        return None if self.bundle is None else getattr(self.bundle, "atlas", None)

    def set_atlas(self, atlas) -> None:
        """Name regions with ``atlas`` (None: no region names)."""
        if self.bundle is None:
            return
        self.bundle.atlas = atlas
        self.atlas_changed.emit()

    def set_overlay(self, layer: Layer | None, keep_scale: bool = False) -> None:
        """Show ``layer`` as the overlay; ``keep_scale`` keeps a fixed colour scale limit."""
        if self.bundle is None:
            return
        self._overlay = layer
        if not keep_scale:
            self.map_settings = self.map_settings.with_(limit=None)
        self.overlay_changed.emit()

    def set_file_layer(self, layer: Layer) -> None:
        """A map file opened over the run (File > Open map, a drop): it becomes the
        ``"file"`` source and is shown."""
        if self.bundle is None:
            return
        self.file_layer = layer
        self.map_settings = self.map_settings.with_(source="file")
        self.file_layer_changed.emit()
        self.set_overlay(layer)

    def set_map_source(self, source: str) -> None:
        """Show another source (:data:`SOURCES`); each source keeps the threshold it was
        last shown with (the first time: :data:`FIRST_THRESHOLD`, else the current one)."""
        ms = self.map_settings
        if source == ms.source:
            return
        if source not in dict(SOURCES):
            raise ValueError(f"unknown map source {source!r}")
        self._source_thresholds[ms.source] = ms.threshold
        thr = self._source_thresholds.get(source, FIRST_THRESHOLD.get(source, ms.threshold))
        self.set_map_settings(source=source, threshold=float(thr))

    def set_model_map(self, result) -> None:
        """The model map of the current model settings (a
        :class:`~voxelscope.core.maps.MapResult`, or None); parts comparing with it
        (Agreement) listen to ``model_map_changed``."""
        self.model_map = result
        self.model_map_changed.emit(result)

    def set_source_layer(self, source: str, layer: Layer | None) -> None:
        """The overlay a part makes for ``source`` (None: nothing to show yet); the key
        being present makes the source selectable."""
        self.source_layers[source] = layer
        self.source_layer_changed.emit(source)

    def set_analysis(self, analysis: Analysis | None, events_path=None, confounds_path=None):
        """New conditions/confounds for the open run (settings back to defaults)."""
        if self.bundle is None:
            return
        self.bundle.analysis = analysis
        self._inputs += 1
        self.bundle.events_path = events_path
        self.bundle.confounds_path = confounds_path
        self.model_map = None
        self.settings = START_SETTINGS
        self.contrast_text = ""
        self.contrast_problem = ""
        self.history.clear()  # the old steps name other conditions
        self.run_changed.emit()
        self.settings_changed.emit(self.settings)
        self.contrast_error.emit("")
        self.recompute()

    def set_dragging(self, on: bool) -> None:
        """The crosshair is being dragged (True) or was let go (False)."""
        if bool(on) != self.dragging:
            self.dragging = bool(on)
            self.dragging_changed.emit(self.dragging)

    def set_voxel(self, ijk) -> None:
        """Move to a voxel (clipped into the grid)."""
        run = self.run
        if run is None:
            return
        v = tuple(int(min(max(int(a), 0), n - 1)) for a, n in zip(ijk, run.shape))
        if v == self.voxel and self.series is not None:
            return
        self.voxel = v
        self.voxel_changed.emit(v)
        if self.dragging:
            self._drag_to(v)
        else:
            self.recompute()

    def _drag_to(self, voxel: tuple[int, int, int]) -> None:
        """A drag reached ``voxel``: its data now, its fits from the background (until
        they arrive ``fits`` is None: never the fits of the voxel the pointer left)."""
        try:
            y = self.run.timeseries(voxel)
        except VoxelscopeError as err:
            self.message.emit(str(err))
            return
        self.series = y
        self._series_at = (self._inputs, tuple(voxel))
        self.fits = None
        self.run_fits = []
        self.combined = []
        self.refit_later()
        self.fits_changed.emit(None)

    def set_mm(self, xyz) -> None:
        """Move to the voxel nearest a world position (mm)."""
        if self.run is not None:
            self.set_voxel(self.run.mm_to_voxel(xyz))

    def move_display(self, axis: int, step: int) -> None:
        """Move the voxel ``step`` voxels along a display axis (0 R, 1 A, 2 S)."""
        if self.grid is None:
            return
        d = list(self.grid.to_display(self.voxel))
        d[axis] += int(step)
        self.set_voxel(self.grid.to_voxel(self.grid.clamp_display(d)))

    def update_settings(self, **changes) -> bool:
        """Change model settings; on a model error the old settings stay.

        The new settings are checked first (:meth:`Analysis.check_settings`: the
        designs build, the contrast parses), then ``settings_changed`` is sent at once,
        so the live map starts without waiting for the voxel; the voxel is refitted in
        the background (:meth:`refit_later`) and ``fits_changed`` follows.
        """
        new = self.settings.with_(**changes)
        if new == self.settings:
            return True
        if not self._acceptable(new):
            self.settings_changed.emit(self.settings)
            return False
        old = self.settings
        self.settings = new
        self.settings_changed.emit(new)
        self.refit_later()
        if self._recording:
            self.history.push(_SettingsStep(self, old, new))
        if self.analysis is not None and (
            new.modulators != old.modulators or new.orthogonalize != old.orthogonalize
        ):
            for note in self.analysis.check_modulators(new):
                self.message.emit(note)
        return True

    def set_condition_column(self, column: str | None) -> bool:
        """Name the conditions by another events column (None: one condition for the task);
        the events file is read again and the model starts over."""
        return self.reload_events(condition_column=column)

    def reload_events(self, **changes) -> bool:
        """Read the events file again with ``condition_column`` and/or ``onset_unit``
        (``"seconds"`` or ``"volumes"``) changed; the model starts over."""
        from voxelscope.core.loader import open_events

        bundle, analysis = self.bundle, self.analysis
        if bundle is None or analysis is None or bundle.events_path is None:
            return False
        ev = analysis.events_file
        options = {
            "condition_column": "trial_type" if ev is None else ev.condition_column,
            "onset_unit": analysis.onset_unit,
            **changes,
        }
        try:
            new = open_events(bundle.run, bundle.events_path, analysis.confounds, **options)
        except VoxelscopeError as err:
            self.message.emit(str(err))
            return False
        self.set_analysis(new, bundle.events_path, bundle.confounds_path)
        for w in new.warnings:
            self.message.emit(w)
        return True

    # ------------------------------------------------------------------ history

    @contextmanager
    def without_history(self) -> Iterator[None]:
        """Changes made inside are not undo steps (a session being applied, a slide
        showing a mark's own model)."""
        before = self._recording
        self._recording = False
        try:
            yield
        finally:
            self._recording = before

    def _put_settings(self, settings: ModelSettings, say: str) -> None:
        """Undo/redo: put back whole settings (the contrast box follows)."""
        if not self._acceptable(settings):
            self.settings_changed.emit(self.settings)
            return
        self.settings = settings
        self.contrast_text = settings.contrast or ""
        self.contrast_problem = ""
        self.settings_changed.emit(settings)
        self.refit_later()
        self.contrast_error.emit("")
        self.message.emit(say)

    def record_marks(self, text: str, before, merge: str = "") -> None:
        """The marks were just changed from ``before`` (a list of marks): one undo step
        called ``text``; consecutive steps with the same non-empty ``merge`` key (typing in
        one note) are one step. Emits ``marks_changed``."""
        if self._recording:
            self.history.push(_MarksStep(self, text, before, list(self.marks), merge))
        self.marks_changed.emit()

    def _put_marks(self, marks, say: str) -> None:
        self.marks = MarkList(marks)
        self.marks_changed.emit()
        self.message.emit(say)

    def marks_saved(self) -> None:
        """The marks as they are now were written to (or read from) a file."""
        self._saved_marks = list(self.marks)

    def unsaved_marks(self) -> bool:
        """The marks differ from those last saved or read (an undo back to them counts as
        saved)."""
        return list(self.marks) != self._saved_marks

    def set_contrast(self, text: str) -> bool:
        """Contrast as typed; a bad one shows an error and keeps the last good fit."""
        self.contrast_text = text
        expr = text.strip() or None
        analysis = self.analysis
        if analysis is None:
            return False
        try:
            analysis.check_contrast(expr, self.settings)
        except VoxelscopeError as err:
            self.contrast_problem = str(err)
            self.contrast_error.emit(self.contrast_problem)
            return False
        ok = self.update_settings(contrast=expr)
        self.contrast_problem = "" if ok else self.contrast_problem
        if ok:
            self.contrast_error.emit("")
        return ok

    def set_map_settings(self, **changes) -> None:
        new = self.map_settings.with_(**changes)
        if new != self.map_settings:
            self.map_settings = new
            self.overlay_changed.emit()

    def set_units(self, units: str) -> None:
        if units not in UNITS:
            raise ValueError(f"units must be one of {UNITS}")
        if units != self.units:
            self.units = units
            self.units_changed.emit(units)

    # ------------------------------------------------------------------ marks

    def set_marks(self, marks: MarkList, saved: bool = True, text: str = "replace marks") -> None:
        """Replace the marks (import, session); views listen to ``marks_changed``.

        One undo step; ``saved``: the new marks are those of a file (nothing to save)."""
        before = list(self.marks)
        self.marks = marks if isinstance(marks, MarkList) else MarkList(marks)
        self.record_marks(text, before)
        if saved:
            self.marks_saved()

    def jump_to_mark(self, index: int) -> bool:
        """Move to the voxel nearest a mark; a mark outside the grid is a one-line message."""
        if self.run is None:
            return False
        try:
            self.set_voxel(self.run.mm_to_voxel(self.marks.jump(index)))
        except VoxelscopeError as err:
            self.message.emit(str(err))
            return False
        return True

    # ------------------------------------------------------------------ recompute

    def recompute(self) -> bool:
        """Refit the current voxel under the current settings now; emit ``fits_changed``.

        A click refits at once; a model change refits in the background
        (:meth:`refit_later`). Both go through :func:`fit_place`.
        """
        run = self.run
        if run is None:
            return False
        key = self._fit_key()
        try:
            out = fit_place(self.bundles, self.labels(), self.voxel, self.settings)
        except VoxelscopeError as err:
            self.message.emit(str(err))
            return False
        self._apply_fit(key, out)
        return True

    def refit_later(self) -> None:
        """Refit the current voxel under the current settings in a background job
        (:class:`~voxelscope.gui.workers.BackgroundJob`); ``fits_changed`` follows.

        Newest wins: the changes of one event-loop pass are one refit; a refit asked
        while one runs waits for it (the running one stops at its next step) and its
        result, no longer the current voxel's and model's, is dropped; a result that
        arrives after :meth:`recompute` already showed the same voxel and model is
        dropped too. Until it arrives ``fits`` are those of the previous model
        (``fits_pending`` says so), or None after a drag moved the voxel (``fitting``).
        """
        if self.run is None:
            return
        self._refit_timer.start(0)
        if self._refit_job is not None and self._refit_key != self._fit_key():
            self._refit_job.cancel()  # it would be dropped: stop it at its next step

    @property
    def fitting(self) -> bool:
        """A dragged voxel's fits are on their way (``fits`` is None until they come)."""
        return self.fits is None and self.fits_pending

    def wait_refit(self, timeout_ms: int = 10000) -> bool:
        """Wait for the running background refit's thread to end (its result still
        comes through the event loop); True when none is running."""
        job = self._refit_job
        return job is None or job.wait(int(timeout_ms))

    @property
    def fits_pending(self) -> bool:
        """The shown fits are not yet those of the current voxel and settings."""
        return self.run is not None and self._fits_key != self._fit_key()

    @property
    def refitting(self) -> bool:
        """A background refit is asked for or running."""
        return self._refit_job is not None or self._refit_timer.isActive()

    def settle_fits(self) -> bool:
        """Make ``fits`` those of the current voxel and settings now (a pending
        background refit is done here instead; its result is then dropped). For
        whatever reads the fits right after a change: an export, a test."""
        if not self.fits_pending:
            return True
        self._refit_timer.stop()
        return self.recompute()

    def _fit_key(self) -> tuple:
        return (self._inputs, tuple(self.voxel), self.settings)

    def _acceptable(self, settings: ModelSettings) -> bool:
        """Whether ``settings`` can be fitted (one status line when not)."""
        if self.run is None:
            return False
        if self.analysis is None:
            return True
        try:
            self.analysis.check_settings(settings)
            for b in self.extra:
                b.analysis.check_settings(settings)
        except VoxelscopeError as err:
            self.message.emit(str(err))
            return False
        return True

    def _apply_fit(self, key: tuple, out: PlaceFit) -> None:
        self._say_later_run_lines(self.run)
        if self._series_at != key[:2] or out.series is None:
            # the same place keeps its series object (a drag read it already): Signal
            # then leaves its data points alone
            self.series = out.series
            self._series_at = key[:2]
        self.fits = out.fits
        self.run_fits = out.run_fits
        self.combined = out.combined
        self._fits_key = key
        self.fits_changed.emit(out.fits)

    def _start_refit(self) -> None:
        if not self.fits_pending or self._refit_job is not None:
            return  # shown already, or the running job starts the newest when it ends
        key = self._fit_key()
        bundles, labels = self.bundles, self.labels()
        voxel, settings = tuple(self.voxel), self.settings

        def fn(progress):
            return fit_place(bundles, labels, voxel, settings, go_on=lambda: progress(0.5))

        job = BackgroundJob(fn, "the voxel's fit", owner=self)
        job.done.connect(lambda out, key=key: self._refit_done(key, out))
        job.failed.connect(lambda failure, key=key: self._refit_failed(key, failure))
        job.finished.connect(lambda job=job: self._refit_finished(job))
        self._refit_job = job
        self._refit_key = key
        job.start()

    def _refit_done(self, key: tuple, out: PlaceFit) -> None:
        if key == self._fit_key() and key != self._fits_key:
            self._apply_fit(key, out)

    def _refit_failed(self, key: tuple, failure: JobFailure) -> None:
        if key == self._fit_key() and key != self._fits_key:
            self.message.emit(failure.line)
            self._apply_fit(key, PlaceFit(None, None, [], []))

    def _refit_finished(self, job: BackgroundJob) -> None:
        job.wait()
        if self._refit_job is job:
            self._refit_job = None
        job.deleteLater()
        if self.fits_pending and not self._refit_timer.isActive():
            self._start_refit()

    def _say_later_run_lines(self, run) -> None:
        """Show what the run said while it was read after loading (a cache block that
        failed its checksum and was rebuilt, voxels read from the file), once each."""
        loaded = set(self.bundle.warnings) if self.bundle is not None else set()
        said = self.__dict__.setdefault("_later_lines", set())
        for line in list(getattr(run, "warnings", ())):
            if line not in loaded and line not in said:
                said.add(line)
                self.message.emit(line)

    # ------------------------------------------------------------------ several runs

    @property
    def bundles(self) -> list[RunBundle]:
        """Every open run: the first (shown in Slices), then the added ones."""
        return ([] if self.bundle is None else [self.bundle]) + list(self.extra)

    def labels(self) -> list[str]:
        """Short names of the open runs (the BIDS ``run-`` entity where it tells them apart)."""
        return run_labels([b.run.path for b in self.bundles])

    def add_run(self, bundle: RunBundle) -> bool:
        """Add another run of the subject; it is fitted at the same place (by mm) and
        combined with the others. A run without a model, or whose conditions do not have
        the current contrast, is refused with a message."""
        if self.bundle is None or self.analysis is None:
            return self._refuse("Open a run with its events first; then add the other runs.")
        path = str(bundle.run.path)
        if any(str(b.run.path) == path for b in self.bundles):
            return self._refuse(f"{path} is already open")
        if bundle.analysis is None:
            return self._refuse(
                f"{path}: no events file was found beside it; a run needs its events to be "
                "combined (name it as BIDS does, X_events.tsv)"
            )
        try:
            bundle.analysis.check_contrast(self.settings.contrast)
        except VoxelscopeError as err:
            return self._refuse(f"{path}: {err}")
        self.extra.append(bundle)
        self._inputs += 1
        for w in bundle.warnings:
            self.message.emit(w)
        self.runs_changed.emit()
        self.recompute()
        return True

    def _refuse(self, text: str) -> bool:
        self.refusal = text
        self.message.emit(text)
        return False

    def remove_runs(self) -> None:
        """Back to the first run alone."""
        if not self.extra:
            return
        self.extra = []
        self._inputs += 1
        self.signal_run = 0
        self.runs_changed.emit()
        self.recompute()

    def set_signal_run(self, index: int) -> None:
        """Which run Signal draws (0 the first)."""
        index = int(min(max(index, 0), len(self.bundles) - 1)) if self.bundles else 0
        if index != self.signal_run:
            self.signal_run = index
            self.fits_changed.emit(self.fits)

    def shown_run(self) -> RunFit | None:
        """The run Signal draws, with its fit (None for the first run alone)."""
        if not self.run_fits or self.signal_run >= len(self.run_fits):
            return None
        return self.run_fits[self.signal_run]

    def _centre(self) -> tuple[int, int, int]:
        run = self.run
        mask = run.mask()
        if mask.any():
            idx = np.argwhere(mask)
            centre = idx.mean(axis=0)
            best = idx[np.argmin(((idx - centre) ** 2).sum(axis=1))]
            return tuple(int(v) for v in best)  # type: ignore[return-value]
        return tuple(int(n) // 2 for n in run.shape)  # type: ignore[return-value]
