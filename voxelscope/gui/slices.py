"""Slices: three orthogonal views through the current voxel, and the Map colour bar.

Each view shows one plane of the R-A-S display layout (:mod:`voxelscope.gui.orient`): the
backdrop in grey (the anatomy or the run's mean image), the thresholded map on top, a
crosshair at the current voxel and the orientation letters at the edges. Pixels have the
voxel's size in mm, so the aspect ratio is true.

Mouse: left click or drag selects a voxel; the wheel steps through slices; Ctrl + wheel
zooms about the pointer; right or middle drag pans; double click resets the view.
Keys (the view under focus): arrows move the voxel in the plane, Page Up / Page Down step
the slice, Home resets the view.

Items are made once; a change of voxel only replaces image data in place
(``setImage(..., autoLevels=False)``) and moves the crosshair lines.
"""

from __future__ import annotations

from collections import OrderedDict

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import QPointF, QRectF, Qt, Signal
from PySide6.QtGui import QColor, QFont, QFontMetrics, QPen, QTextDocumentFragment, QTransform
from PySide6.QtWidgets import (
    QGraphicsRectItem,
    QGraphicsSimpleTextItem,
    QHBoxLayout,
    QLabel,
    QSizePolicy,
    QVBoxLayout,
    QWidget,
)

from voxelscope.core.numfmt import format_value as fmt
from voxelscope.core.numfmt import format_xyz, stat_kind
from voxelscope.gui.colours import colours
from voxelscope.gui.plaintext import esc
from voxelscope.gui.sizing import LabelHolder
from voxelscope.gui.state import ViewerState

__all__ = ["PLANES", "ColourBar", "SliceView", "SlicesPanel"]

#: plane name -> (horizontal display axis, vertical display axis, normal display axis)
PLANES = {"axial": (0, 1, 2), "coronal": (0, 2, 1), "sagittal": (1, 2, 0)}
#: Bytes of sampled planes of a tilted backdrop each view keeps (its last planes).
TILTED_KEEP_BYTES = 16 * 1024 * 1024
_TITLES = {"axial": "Axial", "coronal": "Coronal", "sagittal": "Sagittal"}
_WORLD = "xyz"


def overlay_rgba(
    values: np.ndarray, lut: np.ndarray, limit: float, threshold: float, opacity: float
) -> np.ndarray:
    """RGBA uint8 image of a signed map slice: colour from ``lut``; only ``|v| > threshold``
    is drawn, the rule Findings' clusters use (:func:`voxelscope.core.clusters.find_clusters`).

    Examples
    --------
    >>> lut = np.zeros((256, 3), np.uint8)
    >>> rgba = overlay_rgba(np.array([[3.0, 4.0], [np.nan, -5.0]]), lut, 5.0, 3.0, 1.0)
    >>> rgba[..., 3].tolist()
    [[0, 255], [0, 255]]
    """
    v = np.asarray(values, dtype=np.float32)
    finite = np.isfinite(v)
    vv = np.where(finite, v, 0.0)
    idx = np.clip(((vv + limit) / (2.0 * limit) * 255.0 + 0.5).astype(np.int32), 0, 255)
    rgba = np.empty((*v.shape, 4), dtype=np.uint8)
    rgba[..., :3] = lut[idx]
    show = finite & (np.abs(vv) > threshold)
    rgba[..., 3] = np.where(show, np.uint8(round(255 * min(max(opacity, 0.0), 1.0))), 0)
    return rgba


class _SliceBox(pg.ViewBox):
    """ViewBox that turns left clicks/drags into picks and the wheel into slice steps."""

    picked = Signal(float, float)
    stepped = Signal(int)
    reset = Signal()
    dragging = Signal(bool)

    def __init__(self) -> None:
        super().__init__(lockAspect=True, enableMenu=False, invertY=False, defaultPadding=0.02)

    def mouseClickEvent(self, ev) -> None:
        if ev.button() == Qt.MouseButton.LeftButton:
            ev.accept()
            if ev.double():
                self.reset.emit()
                return
            p = self.mapSceneToView(ev.scenePos())
            self.picked.emit(p.x(), p.y())
        else:
            ev.ignore()

    def mouseDoubleClickEvent(self, ev) -> None:
        self.reset.emit()
        ev.accept()

    def mouseDragEvent(self, ev, axis=None) -> None:
        if ev.button() == Qt.MouseButton.LeftButton:
            ev.accept()
            if ev.isStart():
                self.dragging.emit(True)
            p = self.mapSceneToView(ev.scenePos())
            self.picked.emit(p.x(), p.y())
            if ev.isFinish():
                self.dragging.emit(False)
        elif ev.button() in (Qt.MouseButton.RightButton, Qt.MouseButton.MiddleButton):
            ev.accept()
            d = self.mapToView(ev.lastPos()) - self.mapToView(ev.pos())
            self.translateBy(x=d.x(), y=d.y())
        else:
            ev.ignore()

    def wheelEvent(self, ev, axis=None) -> None:
        if ev.modifiers() & Qt.KeyboardModifier.ControlModifier:
            super().wheelEvent(ev, axis)
            return
        ev.accept()
        delta = ev.delta()
        if delta:
            self.stepped.emit(1 if delta > 0 else -1)


class SliceView(pg.GraphicsView):
    """One plane through the current voxel."""

    def __init__(self, state: ViewerState, plane: str, parent: QWidget | None = None) -> None:
        c = colours()
        super().__init__(parent, background=c["slice_background"])
        self.setObjectName(f"slice_{plane}")
        self.state = state
        self.plane = plane
        self.h_axis, self.v_axis, self.n_axis = PLANES[plane]
        self.setFocusPolicy(Qt.FocusPolicy.StrongFocus)
        self.setMinimumSize(120, 120)
        self.setSizePolicy(QSizePolicy.Policy.Expanding, QSizePolicy.Policy.Expanding)
        self.setToolTip(
            "Click or drag: choose a voxel · wheel: next slice · Ctrl+wheel: zoom · right or "
            "middle drag: pan · double click or Home: reset the view · arrows, Page Up/Down: move"
        )
        self.box = _SliceBox()
        self.setCentralItem(self.box)
        self.under = pg.ImageItem(axisOrder="col-major")
        self.over = pg.ImageItem(axisOrder="col-major")
        self.over.setZValue(5)
        self.box.addItem(self.under)
        self.box.addItem(self.over)
        cross = QColor(c["crosshair"])
        cross.setAlpha(190)
        pen = QPen(cross)
        pen.setWidthF(1.2)
        pen.setCosmetic(True)
        self.vline = pg.InfiniteLine(angle=90, movable=False, pen=pen)
        self.hline = pg.InfiniteLine(angle=0, movable=False, pen=pen)
        for line in (self.vline, self.hline):
            line.setZValue(10)
            self.box.addItem(line, ignoreBounds=True)
        text = QColor(c["slice_text"])
        self._letters: dict[str, QGraphicsSimpleTextItem] = {}
        font = QFont()
        font.setPixelSize(15)
        font.setBold(True)
        for where in ("left", "right", "top", "bottom"):
            item = QGraphicsSimpleTextItem(self.box)
            item.setBrush(text)
            item.setFont(font)
            item.setZValue(20)
            self._letters[where] = item
        # a dark plate under each label, so the crosshair never runs through its text
        self._plates: dict[str, QGraphicsRectItem] = {}
        plate = QColor(c["slice_background"])
        plate.setAlpha(215)
        for where in ("left", "right", "top", "bottom", "caption"):
            rect = QGraphicsRectItem(self.box)
            rect.setBrush(plate)
            rect.setPen(QPen(Qt.PenStyle.NoPen))
            rect.setZValue(15)
            self._plates[where] = rect
        self.caption = QGraphicsSimpleTextItem(self.box)
        cap_font = QFont()
        cap_font.setPixelSize(13)
        self.caption.setFont(cap_font)
        self.caption.setBrush(text)
        self.caption.setZValue(20)
        self._set_letters()
        self.box.sigResized.connect(self._place_labels)
        self.box.picked.connect(self._picked)
        self.box.stepped.connect(self._stepped)
        self.box.reset.connect(self.reset_view)
        self.box.dragging.connect(state.set_dragging)
        self._under_vol: np.ndarray | None = None
        self._under_factor = 1
        self._under_affine: np.ndarray | None = None  # display index -> mm, own-grid backdrop
        self._run_from_world = np.eye(4)
        # a backdrop tilted against the run: resampled in the run's planes (data, affine)
        self._tilted: tuple[np.ndarray, np.ndarray] | None = None
        # its planes as sampled, most recent last (a drag comes back to the same planes)
        self._tilted_planes: OrderedDict[int, tuple[np.ndarray, QRectF]] = OrderedDict()
        self._map_vol: np.ndarray | None = None
        self._shown_under: int | None = None
        self._shown_map: int | None = None
        self._sizes = (1.0, 1.0)
        self._lut = None
        state.run_changed.connect(self._on_run)
        state.backdrop_changed.connect(self._on_backdrop)
        state.overlay_changed.connect(self._on_map)
        state.voxel_changed.connect(self._on_voxel)

    # ------------------------------------------------------------------ geometry

    def _set_letters(self) -> None:
        from voxelscope.gui.orient import DisplayGrid

        lo_h, hi_h = DisplayGrid.letters(self.h_axis)
        lo_v, hi_v = DisplayGrid.letters(self.v_axis)
        for where, letter in (("left", lo_h), ("right", hi_h), ("bottom", lo_v), ("top", hi_v)):
            self._letters[where].setText(letter)
        self._place_labels()

    def _place_labels(self, *args) -> None:
        r = self.box.rect()
        m = 6.0
        for where, item in self._letters.items():
            b = item.boundingRect()
            if where == "left":
                pos = QPointF(r.left() + m, r.center().y() - b.height() / 2)
            elif where == "right":
                pos = QPointF(r.right() - m - b.width(), r.center().y() - b.height() / 2)
            elif where == "top":
                # never under the caption at the top left (a narrow view, large text)
                cap = self.caption.boundingRect()
                x = max(r.center().x() - b.width() / 2, r.left() + 2 * m + cap.width() + 4)
                pos = QPointF(min(x, r.right() - m - b.width()), r.top() + m)
            else:
                pos = QPointF(r.center().x() - b.width() / 2, r.bottom() - m - b.height())
            item.setPos(pos)
        self.caption.setPos(QPointF(r.left() + m, r.top() + m))
        for where in self._plates:
            self._fit_plate(where)

    def _fit_plate(self, where: str) -> None:
        item = self.caption if where == "caption" else self._letters[where]
        b = item.boundingRect()
        p = item.pos()
        rect = QRectF(p.x() - 3, p.y() - 1, b.width() + 6, b.height() + 2)
        plate = self._plates[where]
        if plate.rect() != rect:
            plate.setRect(rect)
        plate.setVisible(bool(item.text()))

    def view_point(self, display_ijk) -> QPointF:
        """View coordinates (mm from the grid corner) of a display voxel's centre."""
        sh, sv = self._sizes
        return QPointF((display_ijk[self.h_axis] + 0.5) * sh, (display_ijk[self.v_axis] + 0.5) * sv)

    def viewport_point(self, display_ijk):
        """Viewport pixel position of a display voxel's centre (for tests and tools)."""
        scene = self.box.mapViewToScene(self.view_point(display_ijk))
        return self.mapFromScene(scene)

    def reset_view(self) -> None:
        grid = self.state.grid
        if grid is None:
            return
        sh, sv = self._sizes
        w = grid.display_shape[self.h_axis] * sh
        h = grid.display_shape[self.v_axis] * sv
        self.box.setRange(QRectF(0, 0, w, h), padding=0.03)

    # ------------------------------------------------------------------ state events

    def _on_run(self) -> None:
        grid = self.state.grid
        if grid is None:
            return
        self._sizes = (grid.display_voxel_mm[self.h_axis], grid.display_voxel_mm[self.v_axis])
        self._map_vol = None
        self.reset_view()

    def _on_backdrop(self) -> None:
        grid, layer = self.state.grid, self.state.backdrop
        if grid is None or layer is None:
            return
        if layer.affine is not None:  # on its own grid: reoriented to the display axes
            from voxelscope.gui.orient import DisplayGrid

            own = DisplayGrid(layer.data.shape, layer.affine)
            self._under_vol = np.ascontiguousarray(own.display(layer.data))
            self._under_affine = own.display_affine()
            self._run_from_world = np.linalg.inv(grid.display_affine())
            rel = (self._run_from_world @ self._under_affine)[:3, :3]
            self._tilted = (layer.data, np.asarray(layer.affine, float)) if _tilted(rel) else None
            self._tilted_planes.clear()
            self._under_factor = 1
            self.under.setImage(
                self._slice(self._under_vol, 0), autoLevels=False, levels=layer.levels
            )
            self._shown_under = None
            self._update_slices(force=True)
            return
        self._under_affine = None
        self._tilted = None
        self._tilted_planes.clear()
        self._under_vol = np.ascontiguousarray(grid.display(layer.data))
        self._under_factor = int(layer.factor)
        self.under.setImage(self._slice(self._under_vol, 0), autoLevels=False, levels=layer.levels)
        sh, sv = self._sizes
        n_h = grid.display_shape[self.h_axis]
        n_v = grid.display_shape[self.v_axis]
        self.under.setTransform(QTransform())
        self.under.setRect(QRectF(0, 0, n_h * sh, n_v * sv))
        self.under.setVisible(True)
        self._shown_under = None
        self._update_slices(force=True)

    def tilted_plane(self, k: int) -> tuple[np.ndarray, QRectF]:
        """A backdrop tilted against the run, sampled in the run's display plane ``k``.

        Its own planes cut the run's at an angle, so no plane of it is the one shown: the
        plane is sampled (trilinear, through the two affines) on a grid as fine as the
        backdrop's smallest voxel over the run's field of view; outside the backdrop it is
        the backdrop's lowest level. Returns the image and its rectangle in the view.
        """
        from scipy.ndimage import map_coordinates

        data, affine = self._tilted  # type: ignore[misc]
        grid = self.state.grid
        sh, sv = self._sizes
        fine = float(np.min(np.linalg.norm(affine[:3, :3], axis=0)))
        n_h = grid.display_shape[self.h_axis]
        n_v = grid.display_shape[self.v_axis]
        m_h = max(1, min(4 * n_h, int(np.ceil(n_h * sh / fine))))  # at most 4x the run's grid
        m_v = max(1, min(4 * n_v, int(np.ceil(n_v * sv / fine))))
        h = (np.arange(m_h) + 0.5) * (n_h / m_h) - 0.5  # pixel centres, run display index
        v = (np.arange(m_v) + 0.5) * (n_v / m_v) - 0.5
        idx = np.zeros((4, m_h, m_v))
        idx[self.h_axis], idx[self.v_axis] = np.meshgrid(h, v, indexing="ij")
        idx[self.n_axis], idx[3] = float(k), 1.0
        own = np.linalg.inv(affine) @ grid.display_affine() @ idx.reshape(4, -1)
        low = float(self.state.backdrop.levels[0])
        plane = map_coordinates(data, own[:3], order=1, mode="constant", cval=low)
        return plane.reshape(m_h, m_v).astype(np.float32), QRectF(0, 0, n_h * sh, n_v * sv)

    def _tilted_plane_kept(self, k: int) -> tuple[np.ndarray, QRectF]:
        """:meth:`tilted_plane`, keeping the last planes sampled (up to
        :data:`TILTED_KEEP_BYTES`): a drag passes the same planes again and again, and
        sampling one took about 2 ms of each step of a drag on the demo."""
        got = self._tilted_planes.get(k)
        if got is None:
            got = self._tilted_planes[k] = self.tilted_plane(k)
            kept = sum(p.nbytes for p, _r in self._tilted_planes.values())
            while kept > TILTED_KEEP_BYTES and len(self._tilted_planes) > 1:
                kept -= self._tilted_planes.popitem(last=False)[1][0].nbytes
        else:
            self._tilted_planes.move_to_end(k)
        return got

    def backdrop_plane_transform(self, k: int) -> QTransform:
        """Image pixel -> view coordinates for plane ``k`` of a backdrop on its own grid.

        Pixel ``(p, q)`` of the plane covers the backdrop display voxel ``(p, q, k)``
        (centre at ``p + 0.5``); its world position, through the run's display affine,
        gives the view position (``(d + 0.5) * voxel size`` along each axis, as the
        overlay and the crosshair). Three points fix the affine map.
        """
        sh, sv = self._sizes
        pts = []
        for p, q in ((0.0, 0.0), (1.0, 0.0), (0.0, 1.0)):
            idx = np.zeros(4)
            idx[self.h_axis], idx[self.v_axis], idx[self.n_axis] = p - 0.5, q - 0.5, k
            idx[3] = 1.0
            d = self._run_from_world @ (self._under_affine @ idx)
            pts.append(((d[self.h_axis] + 0.5) * sh, (d[self.v_axis] + 0.5) * sv))
        (x0, y0), (x1, y1), (x2, y2) = pts
        return QTransform(x1 - x0, y1 - y0, x2 - x0, y2 - y0, x0, y0)

    def _on_map(self) -> None:
        grid, layer = self.state.grid, self.state.overlay
        if grid is None or layer is None or not self.state.map_settings.visible:
            self._map_vol = None
            self.over.setVisible(False)
            return
        self._map_vol = np.ascontiguousarray(grid.display(layer.data))
        self._lut = pg.colormap.get(self.state.map_settings.colour_scale).getLookupTable(
            nPts=256, alpha=False
        )
        sh, sv = self._sizes
        n_h = grid.display_shape[self.h_axis]
        n_v = grid.display_shape[self.v_axis]
        self._shown_map = None
        self._update_slices(force=True)
        self.over.setRect(QRectF(0, 0, n_h * sh, n_v * sv))
        self.over.setVisible(True)

    def _on_voxel(self, voxel) -> None:
        self._update_slices()

    def _slice(self, vol: np.ndarray, index: int) -> np.ndarray:
        return np.take(vol, index, axis=self.n_axis)

    def _update_slices(self, force: bool = False) -> None:
        grid = self.state.grid
        if grid is None:
            return
        d = grid.to_display(self.state.voxel)
        k = d[self.n_axis]
        if self._under_vol is not None and self._tilted is not None:
            if force or self._shown_under != k:  # sampled in the run's plane through k
                plane, rect = self._tilted_plane_kept(k)
                self.under.setImage(plane, autoLevels=False)
                self.under.setTransform(QTransform())
                self.under.setRect(rect)
                self.under.setVisible(True)
                self._shown_under = k
        elif self._under_vol is not None and self._under_affine is not None:
            # the backdrop's own plane nearest to the current voxel's centre
            world = grid.display_affine() @ np.array([*d, 1.0], dtype=float)
            u = np.linalg.inv(self._under_affine) @ world
            ku = int(np.floor(u[self.n_axis] + 0.5))
            if force or self._shown_under != ku:
                inside = 0 <= ku < self._under_vol.shape[self.n_axis]
                if inside:
                    self.under.setImage(self._slice(self._under_vol, ku), autoLevels=False)
                    self.under.setTransform(self.backdrop_plane_transform(ku))
                self.under.setVisible(inside)
                self._shown_under = ku
        elif self._under_vol is not None and (force or self._shown_under != k):
            f = self._under_factor
            fine = min(k * f + f // 2, self._under_vol.shape[self.n_axis] - 1)
            self.under.setImage(self._slice(self._under_vol, fine), autoLevels=False)
            self._shown_under = k
        if self._map_vol is not None and (force or self._shown_map != k):
            ms = self.state.map_settings
            rgba = overlay_rgba(
                self._slice(self._map_vol, k),
                self._lut,
                self.state.map_limit(),
                ms.threshold,
                ms.opacity,
            )
            self.over.setImage(rgba, autoLevels=False, levels=(0, 255))
            self._shown_map = k
        p = self.view_point(d)
        self.vline.setPos(p.x())
        self.hline.setPos(p.y())
        run = self.state.run
        world = run.voxel_to_mm(self.state.voxel)
        self.caption.setText(
            f"{_TITLES[self.plane]}\n{_WORLD[self.n_axis]} = {fmt('mm', world[self.n_axis])} mm"
        )
        self._place_labels()  # the caption's width may change

    # ------------------------------------------------------------------ user input

    def _picked(self, x: float, y: float) -> None:
        grid = self.state.grid
        if grid is None:
            return
        sh, sv = self._sizes
        a, b = int(np.floor(x / sh)), int(np.floor(y / sv))
        if not (
            0 <= a < grid.display_shape[self.h_axis] and 0 <= b < grid.display_shape[self.v_axis]
        ):
            return
        d = list(grid.to_display(self.state.voxel))
        d[self.h_axis], d[self.v_axis] = a, b
        self.state.set_voxel(grid.to_voxel(d))

    def _stepped(self, step: int) -> None:
        self.state.move_display(self.n_axis, step)

    def keyPressEvent(self, ev) -> None:
        key = ev.key()
        moves = {
            Qt.Key.Key_Left: (self.h_axis, -1),
            Qt.Key.Key_Right: (self.h_axis, 1),
            Qt.Key.Key_Up: (self.v_axis, 1),
            Qt.Key.Key_Down: (self.v_axis, -1),
            Qt.Key.Key_PageUp: (self.n_axis, 1),
            Qt.Key.Key_PageDown: (self.n_axis, -1),
        }
        if key in moves:
            self.state.move_display(*moves[key])
            ev.accept()
        elif key == Qt.Key.Key_Home:
            self.reset_view()
            ev.accept()
        else:
            super().keyPressEvent(ev)


class ColourBar(QWidget):
    """The Map colour bar with the threshold drawn on it (hidden values shaded)."""

    def __init__(self, state: ViewerState, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        c = colours()
        self.state = state
        self.setObjectName("colour_bar")
        lay = QVBoxLayout(self)
        lay.setContentsMargins(0, 0, 0, 0)
        lay.setSpacing(2)
        self.title = QLabel("Map")
        self.title.setObjectName("colour_bar_title")
        self.title.setAlignment(Qt.AlignmentFlag.AlignCenter)
        self.title.setWordWrap(True)
        lay.addWidget(self.title)
        self.canvas = pg.GraphicsLayoutWidget()
        self.canvas.setBackground(c["slice_background"])
        self.canvas.setFixedWidth(92)
        self.bar = pg.ColorBarItem(
            values=(-1, 1),
            colorMap=pg.colormap.get(state.map_settings.colour_scale),
            interactive=False,
            width=18,
            pen=pg.mkPen(c["slice_text"]),
            colorMapMenu=False,
        )
        axis = self.bar.axis
        axis.setTextPen(pg.mkPen(c["slice_text"]))
        axis.setPen(pg.mkPen(c["slice_text"]))
        tick_font = QFont()
        tick_font.setPixelSize(12)
        axis.setStyle(tickFont=tick_font)
        self.canvas.addItem(self.bar)
        self.hidden = pg.LinearRegionItem(
            values=(120, 136),
            orientation="horizontal",
            movable=False,
            brush=pg.mkBrush(43, 45, 48, 200),
            pen=pg.mkPen(c["crosshair"], width=1.5),
        )
        self.hidden.setZValue(10)
        self.bar.addItem(self.hidden)
        lay.addWidget(self.canvas, 1)
        self.note = QLabel("")
        self.note.setObjectName("colour_bar_note")
        self.note.setAlignment(Qt.AlignmentFlag.AlignCenter)
        self.note.setWordWrap(True)
        lay.addWidget(self.note)
        self.setFixedWidth(96)
        self._tick_font = tick_font
        state.overlay_changed.connect(self._on_map)
        state.run_changed.connect(self._on_map)
        self._on_map()

    def set_large(self, on: bool) -> bool:
        """Numbers at 20 px and a wider bar (Show mode); returns the previous state."""
        was = self.width() > 96
        font = QFont(self._tick_font)
        if on:
            font.setPixelSize(20)
        self.bar.axis.setStyle(tickFont=font)
        self.bar.axis.setWidth(None)
        self.canvas.setFixedWidth(150 if on else 92)
        self.setFixedWidth(154 if on else 96)
        return was

    def _on_map(self) -> None:
        layer = self.state.overlay
        if layer is None or not self.state.map_settings.visible:
            self.setVisible(False)
            return
        ms = self.state.map_settings
        lim = self.state.map_limit()
        self.bar.setColorMap(pg.colormap.get(ms.colour_scale))
        self.bar.setLevels((-lim, lim))
        thr = min(abs(ms.threshold), lim)
        lo = (-thr + lim) / (2 * lim) * 256
        hi = (thr + lim) / (2 * lim) * 256
        self.hidden.setRegion((lo, hi))
        self.hidden.setVisible(thr > 0)
        name = layer.path.name if layer.path is not None else "map"
        for ext in (".nii.gz", ".nii"):
            if name.endswith(ext):
                name = name[: -len(ext)]
        self.title.setText(_short(name))
        self.title.setToolTip(str(layer.path))
        self.note.setText(f"hidden\n|v| ≤ {ms.threshold:g}")
        self.setVisible(True)


def _short(name: str, n: int = 14) -> str:
    parts = name.split("_")
    tail = parts[-1] if parts else name
    return tail if len(tail) <= n else tail[: n - 1] + "…"


def _tilted(rel: np.ndarray, tol: float = 1e-3) -> bool:
    """Whether a 3 x 3 map between display grids mixes axes (a rotation beyond flips and
    swaps): each column then has more than one part above ``tol`` of its length.

    >>> _tilted(np.diag([2.0, 1.0, 3.0])), _tilted(np.array([[1, 1, 0], [-1, 1, 0], [0, 0, 1.0]]))
    (False, True)
    """
    cols = np.abs(np.asarray(rel, float))
    cols = cols / np.maximum(cols.max(axis=0, keepdims=True), 1e-300)
    return bool(np.any((cols > tol).sum(axis=0) > 1))


class SlicesPanel(QWidget):
    """Slices: the three views, the colour bar and the readout line."""

    def __init__(self, state: ViewerState, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setObjectName("slices_panel")
        self.state = state
        outer = QVBoxLayout(self)
        outer.setContentsMargins(0, 0, 0, 0)
        outer.setSpacing(0)
        row_widget = QWidget()
        row_widget.setObjectName("slices_row")
        row = QHBoxLayout(row_widget)
        row.setContentsMargins(4, 4, 4, 4)
        row.setSpacing(4)
        self.views = {name: SliceView(state, name) for name in PLANES}
        for view in self.views.values():
            row.addWidget(view, 1)
        self.colour_bar = ColourBar(state)
        row.addWidget(self.colour_bar)
        outer.addWidget(row_widget, 1)
        from voxelscope.gui.goto import GoToBox

        self.goto = GoToBox(state, self.reset_views)
        self.readout = QLabel("")
        self.readout.setTextFormat(Qt.TextFormat.RichText)  # numbers only, bold labels
        self.readout.setObjectName("readout")
        self.readout.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        # one line that never widens the window (cut at the right when very narrow); no
        # word wrap, so its height, and with it the views, never jump from click to click
        self.readout.setMinimumWidth(100)
        self.readout.setSizePolicy(QSizePolicy.Policy.Ignored, QSizePolicy.Policy.Preferred)
        # the readout and the coordinate box share one line, so the views keep their height
        bottom = QWidget()
        bottom.setObjectName("slices_bottom")
        line = QHBoxLayout(bottom)
        line.setContentsMargins(0, 0, 0, 0)
        line.setSpacing(0)
        #: Show mode: the readout keeps to its width, dropping its least needed parts
        self.fit_readout = False
        self._readout_parts: list[tuple[int, str]] = []
        line.addWidget(LabelHolder(self.readout, on_resize=self.show_readout), 1)
        line.addWidget(self.goto)
        outer.addWidget(bottom)
        state.voxel_changed.connect(self._on_voxel)
        state.overlay_changed.connect(self._refresh)
        state.backdrop_changed.connect(self._refresh)
        state.atlas_changed.connect(self._refresh)

    def reset_views(self) -> None:
        """Undo zoom and pan in the three views (the Reset view button, Home in a view)."""
        for view in self.views.values():
            view.reset_view()

    def _refresh(self) -> None:
        if self.state.run is not None:
            self._on_voxel(self.state.voxel)

    def _on_voxel(self, voxel) -> None:
        run = self.state.run
        if run is None:
            return
        i, j, k = voxel
        x, y, z = (float(v) for v in run.voxel_to_mm(voxel))
        # (rank, text): when the line must fit (Show mode) the highest ranks go first; a room
        # wants the place in mm, the region and the map value before the voxel's indices
        parts = [
            (3, f"<b>Voxel</b> ({i}, {j}, {k})"),
            (0, f"<b>World</b> {format_xyz((x, y, z))} mm"),
            (4, f"<b>Mean</b> {fmt('value', run.mean_image()[i, j, k])}"),
        ]
        under = self.state.backdrop
        if under is not None and under.path is not None:
            value = fmt("value", under.value_at((x, y, z), voxel))
            parts.append((5, f"<b>Anatomy</b> {value}"))
        layer = self.state.overlay
        if layer is not None:
            kind = stat_kind(self.state.map_settings.stat)
            parts.append((2, f"<b>Map</b> {fmt(kind, layer.data[i, j, k])}"))
        atlas = self.state.atlas
        if atlas is not None:  # the region at the voxel's centre, through the affines
            parts.append((1, f"<b>Region</b> {esc(atlas.region_at((x, y, z)).text)}"))
        self._readout_parts = parts
        self.show_readout()

    def show_readout(self) -> None:
        """Write the readout line; in Show mode (:attr:`fit_readout`) leave out the parts
        that do not fit, least needed first (anatomy, mean, voxel indices, map value, region),
        rather than cut the line at the right edge; the whole line is then the tooltip."""
        parts = list(self._readout_parts)

        def html(ps) -> str:
            return "&nbsp;&nbsp; ".join(f"<nobr>{p}</nobr>" for _r, p in ps)

        full = html(parts)
        if self.fit_readout and parts:
            font = QFont(self.readout.font())
            font.setBold(True)  # measure as if all bold: never too wide
            metrics = QFontMetrics(font)
            room = self.readout.contentsRect().width() - 24  # the style's padding

            def width(ps) -> int:
                plain = "    ".join(QTextDocumentFragment.fromHtml(p).toPlainText() for _r, p in ps)
                return metrics.horizontalAdvance(plain)

            while len(parts) > 1 and width(parts) > room:
                parts.remove(max(parts, key=lambda rp: rp[0]))
        shown = html(parts)
        self.readout.setText(shown)
        self.readout.setToolTip(
            "" if shown == full else QTextDocumentFragment.fromHtml(full).toPlainText()
        )
