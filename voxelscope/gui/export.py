"""Export of the view (PNG at a chosen scale, SVG) and the report from the window.

- :func:`export_png` renders a widget (the whole window, or one part such as Signal) into
  an image of the requested size; the painter is scaled, so lines and text are drawn at
  the higher resolution rather than enlarged afterwards.
- :func:`export_svg` renders a widget through ``QSvgGenerator`` (PySide6.QtSvg, part of
  PySide6-Essentials).
- :func:`export_signal_figure` writes the core's Qt-free figure of the current voxel
  (:func:`voxelscope.core.figure.signal_figure`, the figure of the report) as SVG or PNG.
- :func:`write_window_report` runs the core :func:`~voxelscope.core.report.write_report`
  for the current voxel or for every mark on a worker thread; existing outputs are only
  replaced after the user said so (then ``force=True``).

Every file is written atomically (core :mod:`voxelscope.core.atomic`).
"""

from __future__ import annotations

import os
from pathlib import Path

from PySide6.QtCore import (
    QBuffer,
    QByteArray,
    QIODevice,
    QPoint,
    QRect,
    QSize,
)
from PySide6.QtGui import QAction, QColor, QImage, QPainter, QRegion
from PySide6.QtWidgets import (
    QApplication,
    QComboBox,
    QDialog,
    QDialogButtonBox,
    QDoubleSpinBox,
    QFileDialog,
    QFormLayout,
    QLabel,
    QMessageBox,
    QWidget,
)

from voxelscope.core.atomic import write_bytes, write_text
from voxelscope.core.errors import InputError, OutputExistsError, VoxelscopeError
from voxelscope.gui.workers import BackgroundJob

__all__ = [
    "PARTS",
    "ExportDialog",
    "export_png",
    "export_signal_figure",
    "export_svg",
    "export_view",
    "install",
    "render_image",
    "write_window_report",
]

#: What can be exported: label -> attribute of the window (None: the whole window).
PARTS = {"Whole window": None, "Slices": "slices", "Signal": "signal", "Fits": "fits"}
FORMATS = ("PNG image", "SVG drawing", "Signal figure (SVG, from the report)")
MAX_SIDE = 16000


def _part(window, part: str | None) -> QWidget:
    if part in (None, "", "Whole window", "window"):
        return window
    attr = PARTS.get(part, part)
    widget = getattr(window, str(attr), None)
    if not isinstance(widget, QWidget):
        raise InputError(f"there is no part '{part}' to export; use one of {', '.join(PARTS)}")
    return widget


def settle(window) -> None:
    """Let background work that changes the view finish first (e.g. a live map)."""
    for hook in getattr(window, "settle_hooks", []):
        hook()
    QApplication.processEvents()


def render_image(
    widget: QWidget, scale: float = 1.0, size: tuple[int, int] | None = None
) -> QImage:
    """The widget drawn into an image ``scale`` times its size, or exactly ``size`` pixels.

    The painter is scaled, so lines and text are drawn at the new resolution.
    """
    w, h = max(1, widget.width()), max(1, widget.height())
    if size is not None:
        width, height = int(size[0]), int(size[1])
    else:
        if not (0 < float(scale) <= 16):
            raise InputError(f"the export scale must be between 0 and 16, not {scale}")
        width, height = round(w * float(scale)), round(h * float(scale))
    if not (1 <= width <= MAX_SIDE and 1 <= height <= MAX_SIDE):
        raise InputError(
            f"an image of {width} x {height} pixels is too large; use at most {MAX_SIDE} a side"
        )
    image = QImage(width, height, QImage.Format.Format_ARGB32_Premultiplied)
    image.fill(QColor("#FFFFFF"))
    painter = QPainter(image)
    painter.setRenderHint(QPainter.RenderHint.Antialiasing)
    painter.setRenderHint(QPainter.RenderHint.TextAntialiasing)
    painter.setRenderHint(QPainter.RenderHint.SmoothPixmapTransform)
    painter.scale(width / w, height / h)
    widget.render(
        painter,
        QPoint(0, 0),
        QRegion(),
        QWidget.RenderFlag.DrawWindowBackground | QWidget.RenderFlag.DrawChildren,
    )
    painter.end()
    return image


def _image_bytes(image: QImage, fmt: str = "PNG") -> bytes:
    data = QByteArray()
    buf = QBuffer(data)
    buf.open(QIODevice.OpenModeFlag.WriteOnly)
    if not image.save(buf, fmt):
        raise InputError(f"could not encode the image as {fmt}")
    buf.close()
    return bytes(data)


def export_png(
    widget: QWidget,
    path: str | os.PathLike[str],
    scale: float = 1.0,
    size: tuple[int, int] | None = None,
    force: bool = False,
) -> Path:
    """Write the widget as a PNG (``scale`` times its size, or ``size`` pixels), atomically."""
    return write_bytes(path, _image_bytes(render_image(widget, scale, size)), force=force)


def export_svg(
    widget: QWidget, path: str | os.PathLike[str], force: bool = False, title: str = ""
) -> Path:
    """Write the widget as an SVG drawing (QSvgGenerator), atomically."""
    from PySide6.QtSvg import QSvgGenerator

    import voxelscope

    w, h = max(1, widget.width()), max(1, widget.height())
    data = QByteArray()
    buf = QBuffer(data)
    buf.open(QIODevice.OpenModeFlag.WriteOnly)
    gen = QSvgGenerator()
    gen.setOutputDevice(buf)
    gen.setSize(QSize(w, h))
    gen.setViewBox(QRect(0, 0, w, h))
    gen.setTitle(title or "voxelscope view")
    gen.setDescription(f"voxelscope {voxelscope.__version__}. {voxelscope.RESEARCH_CAUTION}")
    painter = QPainter(gen)
    widget.render(
        painter,
        QPoint(0, 0),
        QRegion(),
        QWidget.RenderFlag.DrawWindowBackground | QWidget.RenderFlag.DrawChildren,
    )
    painter.end()
    buf.close()
    return write_bytes(path, bytes(data), force=force)


def signal_figure(state, title: str | None = None, width: float = 900.0, height: float = 560.0):
    """The core figure of the current voxel (the one the report draws), or InputError."""
    from voxelscope.core.events import shift_conditions
    from voxelscope.core.figure import kernel_colours
    from voxelscope.core.figure import signal_figure as core_figure

    state.settle_fits()  # a model change's refit may still be on its way
    fits, analysis = state.fits, state.analysis
    if analysis is None or fits is None or not fits.fits:
        raise InputError("no fit to draw: open a run with its events and switch on a kernel")
    i, j, k = state.voxel
    return core_figure(
        fits.fits[0].design.volume_times,
        fits.y,
        [(f.kernel, f.fitted, f.residuals) for f in fits.fits],
        shift_conditions(analysis.conditions, state.settings.onset_shift_s),
        title=title if title is not None else f"voxel ({i}, {j}, {k})",
        width=width,
        height=height,
        run_length_s=analysis.n_volumes * analysis.tr,
        colours=kernel_colours(),
    )


def export_signal_figure(
    state, path: str | os.PathLike[str], force: bool = False, scale: float = 2.0
) -> Path:
    """The current voxel's report figure as SVG (``.svg``) or PNG (any other ending)."""
    fig = signal_figure(state)
    if str(path).lower().endswith(".svg"):
        return write_text(path, fig.to_svg(), force=force)
    return write_bytes(path, fig.to_png(scale=scale), force=force)


def export_view(
    window, path: str | os.PathLike[str], part: str | None = None, scale: float = 1.0,
    kind: str | None = None, force: bool = False,
) -> Path:  # fmt: skip
    """Export a part of the window by the file's ending (``.svg`` or PNG) or ``kind``."""
    kind = kind or ("svg" if str(path).lower().endswith(".svg") else "png")
    if kind == "figure":
        return export_signal_figure(window.state, path, force=force, scale=max(scale, 1.0))
    settle(window)
    widget = _part(window, part)
    if kind == "svg":
        return export_svg(widget, path, force=force)
    return export_png(widget, path, scale=scale, force=force)


class ExportDialog(QDialog):
    """Which part, which format and, for PNG, the scale (with the resulting pixel size)."""

    def __init__(self, window, parent: QWidget | None = None) -> None:
        super().__init__(parent or window)
        self.window_ = window
        self.setWindowTitle("Export view")
        form = QFormLayout(self)
        self.part = QComboBox()
        self.part.addItems(list(PARTS))
        self.format = QComboBox()
        self.format.addItems(list(FORMATS))
        self.scale = QDoubleSpinBox()
        self.scale.setRange(0.5, 6.0)
        self.scale.setSingleStep(0.5)
        self.scale.setValue(2.0)
        self.scale.setSuffix(" ×")
        self.pixels = QLabel("")
        self.pixels.setObjectName("hint")
        form.addRow("Part", self.part)
        form.addRow("Format", self.format)
        form.addRow("Scale", self.scale)
        form.addRow("", self.pixels)
        buttons = QDialogButtonBox(
            QDialogButtonBox.StandardButton.Save | QDialogButtonBox.StandardButton.Cancel
        )
        buttons.accepted.connect(self.accept)
        buttons.rejected.connect(self.reject)
        form.addRow(buttons)
        for sig in (self.part.currentIndexChanged, self.format.currentIndexChanged):
            sig.connect(self._update)
        self.scale.valueChanged.connect(self._update)
        self._update()

    def kind(self) -> str:
        return ("png", "svg", "figure")[self.format.currentIndex()]

    def _update(self, *args) -> None:
        kind = self.kind()
        self.part.setEnabled(kind != "figure")
        self.scale.setEnabled(kind != "svg")
        if kind == "png":
            w = _part(self.window_, self.part.currentText())
            s = self.scale.value()
            self.pixels.setText(f"{round(w.width() * s)} × {round(w.height() * s)} pixels")
        elif kind == "svg":
            self.pixels.setText("a drawing that scales to any size")
        else:
            self.pixels.setText("the current voxel's signal, fits and residuals")


def ask_export(window) -> Path | None:
    dialog = ExportDialog(window)
    if dialog.exec() != QDialog.DialogCode.Accepted:
        return None
    kind = dialog.kind()
    ext, filt = (".png", "PNG (*.png)") if kind == "png" else (".svg", "SVG (*.svg)")
    part = dialog.part.currentText()
    stem = "figure" if kind == "figure" else part.lower().replace(" ", "-")
    path, _ = QFileDialog.getSaveFileName(window, "Export view", f"{stem}{ext}", filt)
    if not path:
        return None
    try:
        # the file dialog has asked before overwriting
        out = export_view(window, path, part, dialog.scale.value(), kind, force=True)
    except VoxelscopeError as err:
        window.show_error(str(err))
        return None
    window.statusBar().showMessage(f"Wrote {out}", 8000)
    return out


# ---------------------------------------------------------------------------- report


def _write_any(kwargs: dict):
    """The one-run report, or with several runs open the several-run report."""
    if "runs" in kwargs:
        from voxelscope.core.runs_report import write_runs_report

        return write_runs_report(**kwargs)
    from voxelscope.core.report import write_report

    return write_report(**kwargs)


def _runs_report_kwargs(window, out_dir, what: str, force: bool) -> dict:
    """Arguments of :func:`voxelscope.core.runs_report.write_runs_report` for every open run."""
    from voxelscope.core.combine import same_grid
    from voxelscope.core.marks import MarkList

    state = window.state
    bundles = state.bundles
    labels = state.labels()
    inputs = []
    warnings = []
    for label, b in zip(labels, bundles):
        inputs += [(f"events {label}", b.events_path), (f"confounds {label}", b.confounds_path)]
        warnings += [f"{label}: {w}" for w in b.warnings]
    kwargs = dict(
        out_dir=Path(out_dir),
        runs=[b.run for b in bundles],
        analyses=[b.analysis for b in bundles],
        settings=state.settings,
        labels=labels,
        inputs=inputs,
        force=force,
        warnings=warnings,
    )
    if what == "marks":
        if not len(state.marks):
            raise InputError("there are no marks to report; add marks or report the voxel")
        kwargs["marks"] = list(MarkList(state.marks))
    elif same_grid([b.run for b in bundles]):
        kwargs["voxel"] = tuple(state.voxel)
    else:
        kwargs["mm"] = tuple(float(v) for v in state.run.voxel_to_mm(tuple(state.voxel)))
    return kwargs


def _report_kwargs(window, out_dir, what: str, force: bool) -> dict:
    from voxelscope.core.marks import MarkList

    state = window.state
    if state.run is None or state.analysis is None:
        raise InputError("a report needs an open run with its events (File > Open run)")
    if state.extra:
        return _runs_report_kwargs(window, out_dir, what, force)
    bundle = state.bundle
    inputs = {
        "events": bundle.events_path,
        "confounds": bundle.confounds_path,
        "anatomy": bundle.backdrop.path if bundle.backdrop is not None else None,
        "overlay": state.overlay.path if state.overlay is not None else None,
    }
    kwargs = dict(
        out_dir=Path(out_dir),
        run=state.run,
        analysis=state.analysis,
        settings=state.settings,
        inputs=inputs,
        force=force,
        warnings=list(bundle.warnings),
    )
    if what == "marks":
        if not len(state.marks):
            raise InputError("there are no marks to report; add marks or report the voxel")
        kwargs["marks"] = list(MarkList(state.marks))
    else:
        kwargs["voxel"] = tuple(state.voxel)
    return kwargs


def write_window_report(
    window,
    out_dir: str | os.PathLike[str],
    what: str = "voxel",
    force: bool = False,
    background: bool = True,
    confirm=None,
):
    """Write the core report for the current voxel (``what="voxel"``) or every mark.

    When outputs exist and ``force`` is False, ``confirm(message) -> bool`` is asked (a
    question on screen; offscreen nothing is overwritten and the status bar says why); a
    yes writes again with ``force=True``.

    Returns the :class:`~voxelscope.gui.workers.BackgroundJob` when ``background`` (its
    ``done`` carries the ReportResult), else the ReportResult or None on failure.
    """
    if confirm is None:
        confirm = lambda msg: _confirm_overwrite(window, msg)  # noqa: E731
    try:
        kwargs = _report_kwargs(window, out_dir, what, force)
    except VoxelscopeError as err:
        window.show_error(str(err))
        return None

    def finished_ok(result) -> None:
        html = result.html
        more = f"; {len(result.warnings)} warning(s) listed in it" if result.warnings else ""
        window.statusBar().showMessage(f"Wrote the report {html}{more}", 15000)
        window.last_report = result

    def failed(error: BaseException, message: str):
        exists = isinstance(error, OutputExistsError)
        if not kwargs["force"] and exists and confirm(message):
            return write_window_report(window, out_dir, what, True, background, confirm)
        window.show_error(message)
        return None

    if not background:
        try:
            result = _write_any(kwargs)
        except VoxelscopeError as err:
            return failed(err, str(err))
        finished_ok(result)
        return result

    def work(_progress):
        return _write_any(kwargs)

    job = BackgroundJob(work, f"the report into {out_dir}", parent=window)
    window.report_job = job
    job.done.connect(finished_ok)
    job.failed.connect(lambda f: failed(f.error, f.line))

    def cleanup() -> None:
        job.wait()
        job.deleteLater()
        if getattr(window, "report_job", None) is job:
            window.report_job = None

    job.finished.connect(cleanup)
    window.statusBar().showMessage(f"Writing the report into {out_dir}…")
    job.start()
    return job


def _confirm_overwrite(window, message: str) -> bool:
    if window.offscreen():
        return False
    answer = QMessageBox.question(
        window,
        "Replace the report?",
        f"{message.split(';')[0]}.\nReplace the existing report files in that folder?",
    )
    return answer == QMessageBox.StandardButton.Yes


def ask_report(window):
    state = window.state
    if state.run is None or state.analysis is None:
        window.show_error("a report needs an open run with its events (File > Open run)")
        return None
    what = "voxel"
    if len(state.marks):
        box = QMessageBox(window)
        box.setWindowTitle("Report")
        box.setText("What should the report show?")
        marks_b = box.addButton(f"All {len(state.marks)} marks", QMessageBox.ButtonRole.AcceptRole)
        box.addButton("The current voxel", QMessageBox.ButtonRole.AcceptRole)
        cancel = box.addButton(QMessageBox.StandardButton.Cancel)
        box.exec()
        if box.clickedButton() is cancel:
            return None
        what = "marks" if box.clickedButton() is marks_b else "voxel"
    start = str(Path(state.run.path).parent)
    folder = QFileDialog.getExistingDirectory(window, "Folder for the report", start)
    if not folder:
        return None
    return write_window_report(window, folder, what)


def install(window) -> None:
    """File ▸ Export view… and File ▸ Report…."""
    from voxelscope.gui.menus import insert_before_quit, menu_named

    window.report_job = None
    window.last_report = None
    exp = QAction("E&xport view…", window)
    exp.setShortcut("Ctrl+E")
    exp.triggered.connect(lambda: ask_export(window))
    rep = QAction("&Report…", window)
    rep.setShortcut("Ctrl+R")
    rep.triggered.connect(lambda: ask_report(window))
    file_menu = menu_named(window, "File")
    if file_menu is not None:
        insert_before_quit(file_menu, [None, exp, rep])
    window.export_action, window.report_action = exp, rep
