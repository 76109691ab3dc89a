"""The live model map: whole-volume fits off the GUI thread, debounced and cancellable.

:class:`LiveMap` listens to the state. When a model setting or the map's kernel, statistic
or source changes, it waits :attr:`LiveMap.debounce_ms` for further changes, then
runs :func:`voxelscope.core.maps.compute_map` on a worker thread (the same fit path as a
clicked voxel) and shows the result as the overlay. A change while a job runs cancels it
(the core's progress callback returns False) and starts one job for the newest settings.
The GUI thread only swaps image data, so clicks and their per-voxel fits stay instant.
On a large run (at least :data:`PREVIEW_MIN_VOXELS` in the mask) the job first fits the
three planes through the current voxel, the ones the Slices part shows, one plane at a
time (:data:`PREVIEW_AXES`: the plane read fastest first), and puts each on screen as it
comes (final values there under OLS and AR(1), close under AR(p); 0 elsewhere); the full
map then replaces the preview in place. The debounce is short
(:attr:`LiveMap.debounce_ms`, 40 ms) because a further change cancels the running job at
its next block; the first change after a quiet spell does not wait for it.

Overlay sources (:data:`SOURCES`):

``"model"``        the model map of one kernel and one statistic (live);
``"difference"``   t under one kernel minus t under another
                   (:func:`voxelscope.core.maps.kernel_difference`);
``"file"``         a map file opened by the user (File > Open map, drop, ``--map``);
``"disagreement"`` where our map and an outside map differ beyond a tolerance (provided
                   by the Agreement part, :mod:`voxelscope.gui.agreement_panel`).

The jobs run through the window's one job class,
:class:`voxelscope.gui.workers.BackgroundJob`.
"""

from __future__ import annotations

import time
from collections import OrderedDict
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
from PySide6.QtCore import QCoreApplication, QElapsedTimer, QObject, QTimer, Signal

from voxelscope.core.maps import MapResult, compute_map, kernel_difference
from voxelscope.core.model import ModelSettings
from voxelscope.gui.loading import Layer
from voxelscope.gui.state import LiveLayer, ViewerState
from voxelscope.gui.workers import (
    BackgroundJob,
    JobFailure,
)

__all__ = [
    "LiveMap",
    "MapOutcome",
    "MapRequest",
    "compute_request",
    "default_kernel",
    "other_kernel",
    "preview_planes",
    "preview_stat",
]

#: Model maps kept for quick switching between kernels, statistics and sources.
CACHE_SIZE = 6

#: Runs with at least this many voxels in the mask get a preview (the planes on screen)
#: first.
PREVIEW_MIN_VOXELS = 150_000


def default_kernel(kernels, wanted: str | None = None) -> str | None:
    """The map's kernel: ``wanted`` if enabled, else double-gamma if enabled, else the first.

    Examples
    --------
    >>> default_kernel(("boxcar", "double-gamma"))
    'double-gamma'
    >>> default_kernel(("boxcar", "gamma"), wanted="gamma"), default_kernel(())
    ('gamma', None)
    """
    kernels = tuple(kernels)
    if wanted is not None and wanted in kernels:
        return wanted
    if "double-gamma" in kernels:
        return "double-gamma"
    return kernels[0] if kernels else None


def other_kernel(kernels, kernel: str | None, wanted: str | None = None) -> str | None:
    """Kernel subtracted in the difference map: ``wanted``, else the first other enabled one.

    Examples
    --------
    >>> other_kernel(("boxcar", "gamma", "double-gamma"), "double-gamma")
    'boxcar'
    >>> other_kernel(("double-gamma",), "double-gamma") is None
    True
    """
    others = [k for k in kernels if k != kernel]
    if wanted is not None and wanted in others:
        return wanted
    return others[0] if others else None


@dataclass(frozen=True)
class MapRequest:
    """What one map job computes: the model map, and for a difference the second kernel."""

    settings: ModelSettings
    kernel: str
    stat: str = "t"
    other: str | None = None
    #: several runs: the paths of every run; the map is their fixed-effects combination
    runs: tuple[str, ...] = ()

    @property
    def stats(self) -> tuple[str, ...]:
        return ("t",) if self.stat == "t" else ("t", self.stat)


@dataclass(eq=False)
class MapOutcome:
    """A finished map job.

    ``model`` is the map of ``request.kernel`` (what the Agreement part compares with);
    ``difference`` is ``t(kernel) - t(other)`` when the request had ``other``.
    """

    request: MapRequest
    model: MapResult
    other: MapResult | None = None
    difference: np.ndarray | None = None
    seconds: float = 0.0


def compute_request(
    run: Any,
    analysis: Any,
    request: MapRequest,
    progress: Callable[[float], bool | None] | None = None,
    cache: dict | None = None,
    extra: tuple = (),
) -> MapOutcome:
    """Run one map request through :func:`voxelscope.core.maps.compute_map` (no Qt).

    ``cache`` maps ``(settings, kernel, stats)`` (plus the run paths for several runs) to
    finished :class:`MapResult` objects; maps found there are not computed again.
    ``progress(fraction)`` returning False cancels
    (:class:`voxelscope.core.errors.Cancelled`). With ``request.runs``, ``extra`` holds the
    other runs' ``(run, analysis)`` and the map is the fixed-effects combination
    (:func:`voxelscope.core.combine.compute_combined_map`, the single-run map per run).
    """
    t0 = time.perf_counter()
    parts = [(request.kernel, request.stats)]
    if request.other is not None:
        parts.append((request.other, ("t",)))
    results: list[MapResult] = []
    for n, (kernel, stats) in enumerate(parts):
        key = (request.settings, kernel, stats) + ((request.runs,) if request.runs else ())
        hit = None if cache is None else cache.get(key)
        if hit is None:
            sub = None
            if progress is not None:

                def sub(f: float, n: int = n) -> bool | None:
                    return progress((n + f) / len(parts))

            if request.runs:
                from voxelscope.core.combine import compute_combined_map

                hit = compute_combined_map(
                    [run, *(r for r, _a in extra)],
                    [analysis, *(a for _r, a in extra)],
                    request.settings,
                    kernel,
                    progress=sub,
                    stats=stats,
                )
            else:
                hit = compute_map(
                    run, analysis, request.settings, kernel, progress=sub, stats=stats
                )
        results.append(hit)
    diff = None
    if request.other is not None:
        diff = kernel_difference(results[0], results[1], "t")
    return MapOutcome(
        request,
        results[0],
        results[1] if len(results) > 1 else None,
        diff,
        time.perf_counter() - t0,
    )


_LOOPS_ASKED: list = []  # a loader job was started in this process


def _load_loops_once(owner: QObject) -> None:
    """After the window's first AR(p) map, load the compiled loops in the background
    (:func:`voxelscope.core.noise.load_loops`, about 0.7 s once per process): its later
    maps use them. Loading at start-up would compete with the first map for the cores."""
    if _LOOPS_ASKED:
        return
    _LOOPS_ASKED.append(True)
    from voxelscope.core.noise import load_loops

    job = BackgroundJob(lambda _progress: load_loops(), "loading the compiled loops", owner=owner)

    def finished(job: BackgroundJob = job) -> None:
        job.wait()
        job.deleteLater()

    job.finished.connect(finished)
    job.start()


#: The order the preview's planes are fitted and shown in: the plane of constant ``k``
#: first (contiguous in every volume of a ``.nii``, so the cheapest to read), then ``j``,
#: then ``i`` (one value of every row of the file).
PREVIEW_AXES = (2, 1, 0)


def _plane_index(voxel, axis: int) -> tuple:
    index: list = [slice(None)] * 3
    index[axis] = int(voxel[axis])
    return tuple(index)


def _plane_stat(
    run: Any,
    analysis: Any,
    request: MapRequest,
    voxel,
    axis: int,
    progress: Callable[[float], bool | None] | None = None,
) -> np.ndarray:
    """The request's statistic on one plane through ``voxel`` (the plane's own 2-D array).

    The plane's voxels are read once into a run of their own, one voxel thick
    (:class:`voxelscope.core.maps.ArrayRun`, the run's voxel sizes), and that run is
    fitted by :func:`voxelscope.core.maps.compute_map`: the same fit, with every
    whole-grid array of the map (the AR(p) sums and their smoothing) the size of a plane,
    on the job's own thread (one worker: a plane is a few blocks, and handing them to
    worker threads cost more wall time than it saved on a loaded machine). Under AR(p)
    the effective df takes the whole run's smoothness, as the full map does (kept per run
    and design, so the voxel's refit and the full map share it), not an estimate from the
    plane alone (which cost 40 % of a plane).
    """
    from voxelscope.core.maps import ArrayRun

    shape = tuple(int(n) for n in run.shape)
    index = _plane_index(voxel, axis)
    mask = np.asarray(run.mask(), dtype=bool)
    on_plane = np.zeros(shape, dtype=bool)
    on_plane[index] = True
    keep = mask & on_plane
    thin = list(shape)
    thin[axis] = 1
    data = np.zeros((int(np.prod(thin)), int(run.n_volumes)), dtype=np.float32)
    # flat C-order index on the grid -> on the one-voxel-thick plane
    coords = np.unravel_index(np.flatnonzero(keep), shape)
    local = list(coords)
    local[axis] = np.zeros_like(local[axis])
    to_plane = np.full(int(np.prod(shape)), -1, dtype=np.int64)
    to_plane[np.flatnonzero(keep)] = np.ravel_multi_index(tuple(local), tuple(thin))
    for idx, block in run.iter_blocks(keep, block_voxels=4096):
        data[to_plane[idx]] = np.asarray(block, dtype=np.float32).T
    sub = ArrayRun(data.reshape(*thin, -1), affine=getattr(run, "affine", None), tr=run.tr)
    fwhm = None
    if request.settings.noise == "arp":
        from voxelscope.core.noise import run_smoothness

        prep = analysis.prepared(request.kernel, request.settings)[1].censored()
        fwhm = run_smoothness(run, prep, mask)
    m = compute_map(
        sub, analysis, request.settings, request.kernel,
        mask=keep[index].reshape(thin), progress=progress, stats=request.stats,
        workers=1, data_fwhm_mm=fwhm,
    )  # fmt: skip
    return np.asarray(m.stat(request.stat), dtype=np.float32).reshape(thin)[
        tuple(0 if a == axis else slice(None) for a in range(3))
    ]


def preview_planes(
    run: Any,
    analysis: Any,
    request: MapRequest,
    voxel: tuple[int, int, int],
    progress: Callable[[float], bool | None] | None = None,
    axes: tuple[int, ...] = PREVIEW_AXES,
):
    """Yield the preview growing plane by plane (``axes`` order, by the voxel axis each
    plane holds fixed): after each plane, the request's statistic on the planes fitted so
    far and 0 elsewhere, float32 (X, Y, Z). Where planes cross, the first plane's value
    stays.

    These are the planes the Slices part shows, so the map is on screen long before the
    whole volume is fitted. Each plane is fitted alone by the same fit as the full map
    (:func:`_plane_stat`): under OLS and AR(1), whose noise estimate is the voxel's own,
    the values are final; under AR(p) the neighbourhood averaging of the noise estimate
    sees only the plane, so they are close but not final.

    Examples
    --------
    >>> from voxelscope.core.events import Condition
    >>> from voxelscope.core.maps import ArrayRun
    >>> from voxelscope.core.model import Analysis, ModelSettings
    >>> run = ArrayRun(np.random.default_rng(0).normal(100, 1, (4, 4, 4, 40)))
    >>> a = Analysis([Condition("tone", [10.0], [10.0])], n_volumes=40, tr=1.0)
    >>> steps = list(preview_planes(run, a, MapRequest(ModelSettings(), "boxcar"), (1, 2, 3)))
    >>> [int(np.count_nonzero(s)) for s in steps]
    [16, 28, 37]
    """
    shape = tuple(int(n) for n in run.shape)
    out = np.zeros(shape, dtype=np.float32)
    filled = np.zeros(shape, dtype=bool)
    n = len(axes)
    for step, axis in enumerate(axes):
        sub = None
        if progress is not None:

            def sub(f: float, step: int = step) -> bool | None:
                return progress((step + f) / n)

        vals = _plane_stat(run, analysis, request, voxel, axis, progress=sub)
        index = _plane_index(voxel, axis)
        new = ~filled[index]
        out[index] = np.where(new, vals, out[index])
        filled[index] = True
        yield out.copy()


def preview_stat(
    run: Any,
    analysis: Any,
    request: MapRequest,
    voxel: tuple[int, int, int],
    progress: Callable[[float], bool | None] | None = None,
    axes: tuple[int, ...] = PREVIEW_AXES,
) -> np.ndarray:
    """The request's statistic on the planes through ``voxel`` (default the three the
    Slices part shows), 0 elsewhere: the last step of :func:`preview_planes` (no Qt).

    Examples
    --------
    >>> from voxelscope.core.events import Condition
    >>> from voxelscope.core.maps import ArrayRun
    >>> from voxelscope.core.model import Analysis, ModelSettings
    >>> run = ArrayRun(np.random.default_rng(0).normal(100, 1, (4, 4, 4, 40)))
    >>> a = Analysis([Condition("tone", [10.0], [10.0])], n_volumes=40, tr=1.0)
    >>> v = preview_stat(run, a, MapRequest(ModelSettings(), "boxcar"), (1, 2, 3))
    >>> v.shape, bool(v[1, 0, 0] != 0), bool(v[0, 0, 0] == 0)
    ((4, 4, 4), True, True)
    """
    out = np.zeros(tuple(int(n) for n in run.shape), dtype=np.float32)
    for step in preview_planes(run, analysis, request, voxel, progress, axes):
        out = step
    return out


# ----------------------------------------------------------------------------- live map


class LiveMap(QObject):
    """Keeps the overlay in step with the Map settings and the model settings.

    Signals
    -------
    busy(bool)
        A map job started (True) or ended (False).
    progress(float)
        Fraction of the running job.
    shown(object)
        The overlay was replaced (the new layer, or None).
    failed(str)
        A job failed: one line (also sent to the status bar through ``state.message``).
    """

    busy = Signal(bool)
    progress = Signal(float)
    shown = Signal(object)
    failed = Signal(str)

    def __init__(self, state: ViewerState, parent: QObject | None = None) -> None:
        super().__init__(parent)
        self.state = state
        self.debounce_ms = 40
        self.maps_shown = 0  # model or difference maps put on screen (previews included)
        self.previews_shown = 0
        self.timer = QTimer(self)
        self.timer.setSingleShot(True)
        self.timer.timeout.connect(self._start)
        self.job: BackgroundJob | None = None
        self.jobs_started = 0
        self.jobs_done = 0
        # the last finished job and the maps kept for quick switching: this part's own
        # cache; what is shown and the model map are in the state
        self.outcome: MapOutcome | None = None
        self.cache: OrderedDict = OrderedDict()
        self.last_seconds: float | None = None
        self.last_latency_s: float | None = None
        self._changed_at: float | None = None
        self._last_change: float | None = None  # when schedule() was last called
        self._pending = False
        self._seen = self._key()
        self._settings_seen = None  # the model settings last heard of
        state.run_changed.connect(self._on_run)
        state.settings_changed.connect(self._on_settings)
        state.overlay_changed.connect(self._on_map)
        state.runs_changed.connect(self._on_runs)
        state.source_layer_changed.connect(self._on_source_layer)

    # ------------------------------------------------------------------ what to show

    def kernels(self) -> tuple[str, ...]:
        return tuple(self.state.settings.kernels)

    def kernel(self) -> str | None:
        """The model map's kernel under the current settings."""
        return default_kernel(self.kernels(), self.state.map_settings.kernel)

    def other(self) -> str | None:
        """The kernel subtracted in the difference map."""
        return other_kernel(self.kernels(), self.kernel(), self.state.map_settings.other_kernel)

    def request(self, source: str | None = None) -> MapRequest | None:
        """The job the current settings ask for (None without a model or kernel)."""
        st = self.state
        if st.run is None or st.analysis is None:
            return None
        kernel = self.kernel()
        if kernel is None:
            return None
        source = source or st.map_settings.source
        stat = st.map_settings.stat
        other = self.other() if source == "difference" else None
        if source == "difference" and other is None:
            return None
        runs = tuple(str(b.run.path) for b in st.bundles) if st.extra else ()
        return MapRequest(st.settings, kernel, stat, other, runs)

    def is_busy(self) -> bool:
        return self.job is not None or self.timer.isActive() or self._pending

    # ------------------------------------------------------------------ state events

    def _key(self):
        ms = self.state.map_settings
        return (ms.source, ms.kernel, ms.other_kernel, ms.stat)

    def _on_run(self) -> None:
        """A new run or events file: the old maps are of no use; with a model and a live
        source the new model map is computed at once (the state has already set the
        source and put a map file opened with the run aside)."""
        self.cancel()
        self.cache.clear()
        self.outcome = None
        self._settings_seen = None
        if self.state.analysis is not None and self.state.map_settings.source in (
            "model",
            "difference",
        ):
            self.schedule(now=True)
        self._seen = self._key()

    def _on_runs(self) -> None:
        """Runs added or removed: the model map becomes (or stops being) the combination."""
        if self.state.run is not None and self.state.analysis is not None:
            self.schedule(now=True)

    def _on_settings(self, settings) -> None:
        if settings == self._settings_seen:
            return  # the same settings again: a refused change put them back
        self._settings_seen = settings
        if self.state.run is not None and self.state.analysis is not None:
            self.schedule(at_once=True)

    def _on_source_layer(self, source: str) -> None:
        """Another part's overlay changed; shown again when its source is on screen."""
        if source == self.state.map_settings.source:
            self.apply()

    def _on_map(self) -> None:
        key = self._key()
        if key != self._seen:
            self._seen = key
            self.apply()

    # ------------------------------------------------------------------ jobs

    def schedule(self, now: bool = False, at_once: bool = False) -> None:
        """Recompute after the debounce delay (restarted by every further change); the
        first change after a quiet spell starts at once (the next event-loop pass), so a
        single change is not kept waiting for changes that do not come. With
        ``at_once`` (a model change) that first change starts its job right here, while
        the state's ``settings_changed`` is being sent: before the voxel's refit and the
        other parts' updates take the GUI thread."""
        quiet = self._last_change is None or (
            time.perf_counter() - self._last_change >= self.debounce_ms / 1e3
        )
        self._last_change = time.perf_counter()
        if quiet and not self.is_busy():
            now = True
            if at_once:
                self._changed_at = self._last_change
                self._start()
                return
        if self._changed_at is None or not self.is_busy():
            self._changed_at = time.perf_counter()
        if self.job is not None:
            self.job.cancel()
        if not now and self.timer.isActive() and self.timer.interval() == 0:
            return  # a new run's first map is already on its way
        self.timer.start(0 if now else self.debounce_ms)

    def cancel(self) -> None:
        """Stop the running job and any scheduled one."""
        self.timer.stop()
        self._pending = False
        if self.job is not None:
            self.job.cancel()

    def flush(self, timeout_ms: int = 20000) -> bool:
        """Start a scheduled job now and wait until the maps are shown (screenshots, tests)."""
        clock = QElapsedTimer()
        clock.start()
        if self.timer.isActive():
            self.timer.stop()
            self._start()
        app = QCoreApplication.instance()
        while self.is_busy() and clock.elapsed() < timeout_ms:
            if self.job is not None:
                self.job.wait(20)
            if app is not None:
                app.processEvents()
            if self.timer.isActive() and self.job is None:
                self.timer.stop()
                self._start()
        return not self.is_busy()

    def _start(self) -> None:
        if self.job is not None:
            self.job.cancel()
            self._pending = True
            return
        self._pending = False
        req = self.request()
        if req is None:
            self.apply()
            return
        # the model map for Agreement is wanted whatever the source shows
        if self.state.map_settings.source not in ("model", "difference"):
            req = self.request("model")
            if req is None:
                return
        run, analysis = self.state.run, self.state.analysis
        cache = dict(self.cache)
        extra = tuple((b.run, b.analysis) for b in self.state.extra) if req.runs else ()
        voxel = self.state.voxel
        preview = (
            self.state.map_settings.source == "model"
            and req.other is None
            and not req.runs
            and (req.settings, req.kernel, req.stats) not in cache
            and int(np.count_nonzero(run.mask())) >= PREVIEW_MIN_VOXELS
        )

        def fn(progress, partial):
            if preview:
                part = 0.05  # of the progress bar

                def sub(f: float) -> bool | None:
                    return progress(part * f)

                for shown in preview_planes(run, analysis, req, voxel, progress=sub):
                    partial((req, shown, _top(shown)))  # the scale here, not on the GUI thread

                def rest(f: float) -> bool | None:
                    return progress(part + (1 - part) * f)

                return compute_request(run, analysis, req, progress=rest, cache=cache, extra=extra)
            return compute_request(run, analysis, req, progress=progress, cache=cache, extra=extra)

        # with a preview, its first plane is what the change waits for: jobs started
        # meanwhile (the voxel's refit, the Checks) wait for it (workers.FIRST_WAIT_MS)
        job = BackgroundJob(fn, "the model map", owner=self, partial=True, first=preview)
        job.partial.connect(self._preview)
        job.progress.connect(self.progress)
        job.done.connect(self._done)
        job.failed.connect(self._failed)
        job.finished.connect(lambda job=job: self._job_finished(job))
        self.job = job
        self.jobs_started += 1
        self.busy.emit(True)
        job.start()

    def _job_finished(self, job: BackgroundJob) -> None:
        job.wait()
        if self.job is job:
            self.job = None
        job.deleteLater()
        if self._pending:
            self._start()
        if not self.is_busy():
            self.busy.emit(False)

    def _done(self, outcome: MapOutcome) -> None:
        if self._pending or outcome.request != self.request(
            "difference" if outcome.request.other is not None else "model"
        ):
            return  # settings changed meanwhile; a newer job follows
        self.jobs_done += 1
        self.last_seconds = outcome.seconds
        if outcome.request.settings.noise == "arp":
            _load_loops_once(self)
        self._remember(outcome.model)
        if outcome.other is not None:
            self._remember(outcome.other)
        self.outcome = outcome
        self.state.set_model_map(outcome.model)
        self.apply()
        if self._changed_at is not None:
            self.last_latency_s = time.perf_counter() - self._changed_at
            self._changed_at = None

    def _preview(self, payload) -> None:
        """Show the preview (the planes on screen) of the map being computed; the full
        map replaces it in place when done."""
        req, data, top = payload
        st = self.state
        if self._pending or st.map_settings.source != "model" or req != self.request():
            return
        layer = LiveLayer(
            None, data, 1, (-top, top), title=f"{req.stat} · {req.kernel} (preview)",
            stat=req.stat, source="model", preview=True,
        )  # fmt: skip
        keep = isinstance(st.overlay, LiveLayer) and st.overlay.source == "model"
        keep = keep and st.overlay.stat == req.stat
        st.set_overlay(layer, keep_scale=keep)
        self.maps_shown += 1
        self.previews_shown += 1
        self.shown.emit(layer)

    def _failed(self, failure: JobFailure) -> None:
        self._changed_at = None
        self.failed.emit(failure.line)
        self.state.message.emit(failure.line)

    def _remember(self, m: MapResult) -> None:
        stats = tuple(
            s for s in ("t", "estimate", "variance", "z", "p") if getattr(m, s) is not None
        )
        paths = tuple(getattr(m, "paths", ()))
        key = (m.settings, m.kernel, stats) + ((paths,) if paths else ())
        self.cache[key] = m
        self.cache.move_to_end(key)
        while len(self.cache) > CACHE_SIZE:
            self.cache.popitem(last=False)

    # ------------------------------------------------------------------ showing

    def apply(self) -> None:
        """Show the overlay the Map settings ask for (start a job when it is not ready)."""
        st = self.state
        if st.run is None:
            return
        source = st.map_settings.source
        layer: Layer | None = None
        if source in ("model", "difference"):
            req = self.request()
            out = self.outcome
            if req is None:
                layer = None
            elif out is None or out.request != req:
                hit = self._from_cache(req)
                if hit is None:
                    self.schedule(now=True)
                    return
                out = self.outcome = hit
                self.state.set_model_map(hit.model)
            if req is not None and out is not None:
                layer = self._layer(out, source)
        elif source == "file":
            layer = st.file_layer
        else:
            layer = st.source_layers.get(source)
        if layer is not st.overlay:
            keep = isinstance(layer, LiveLayer) and isinstance(st.overlay, LiveLayer)
            keep = keep and layer.source == st.overlay.source and layer.stat == st.overlay.stat
            st.set_overlay(layer, keep_scale=keep)
            if isinstance(layer, LiveLayer):
                self.maps_shown += 1
        self.shown.emit(layer)

    def _from_cache(self, req: MapRequest) -> MapOutcome | None:
        try:
            return compute_request(None, None, req, cache=_StrictCache(self.cache))
        except _NotCached:
            return None

    def _layer(self, out: MapOutcome, source: str) -> LiveLayer:
        req = out.request
        if source == "difference" and out.difference is not None:
            data = out.difference
            title = f"t {req.kernel} − {req.other}"
            stat = "t difference"
        else:
            data = out.model.stat(req.stat)
            title = f"{req.stat} · {req.kernel}"
            if req.runs:
                title += f" · {len(req.runs)} runs"
            stat = req.stat
        data = np.asarray(data, dtype=np.float32)
        top = _top(data)
        return LiveLayer(None, data, 1, (-top, top), title=title, stat=stat, source=source)

    def wait(self, timeout_ms: int = 20000) -> bool:
        return self.flush(timeout_ms)


def _top(data: np.ndarray) -> float:
    """The colour scale's end for a map: its largest finite ``|v|`` (1 when none).

    >>> _top(np.array([-3.0, 2.0, np.nan])), _top(np.zeros(2))
    (3.0, 1.0)
    """
    finite = np.abs(data[np.isfinite(data)])
    top = float(finite.max()) if finite.size else 1.0
    return top if top > 0 else 1.0


class _NotCached(Exception):
    """A map the request needs is not in the cache (only this; a KeyError is a bug)."""


class _StrictCache(dict):
    """A read-only view of the map cache that raises :class:`_NotCached` on a miss, so
    nothing is computed."""

    def __init__(self, cache) -> None:
        super().__init__(cache)

    def get(self, key, default=None):
        if key not in self:
            raise _NotCached(key)
        return self[key]
