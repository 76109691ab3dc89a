"""Export of the view (PNG at a scale, SVG) and the report written from the window."""

import struct
import xml.etree.ElementTree as ET
from html.parser import HTMLParser

import numpy as np
import pytest

from voxelscope.core.errors import InputError
from voxelscope.core.marks import Mark, MarkList
from voxelscope.gui.export import (
    export_png,
    export_signal_figure,
    export_svg,
    export_view,
    write_window_report,
)

SVG_NS = "{http://www.w3.org/2000/svg}"


def png_size(path):
    """Width and height from the IHDR chunk (PNG specification, ISO/IEC 15948, 11.2.2)."""
    data = path.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


@pytest.fixture
def opened(window, ras_run):
    assert window.open_run(ras_run["run"], voxel=ras_run["hot"], background=False)
    return window


def test_png_of_the_whole_window_at_a_scale(opened, tmp_path):
    out = export_view(opened, tmp_path / "window.png", scale=2.0)
    assert png_size(out) == (2 * opened.width(), 2 * opened.height())
    assert not list(tmp_path.glob(".window.png*"))  # atomic: no temporary left


@pytest.mark.parametrize("scale", [1.0, 1.5, 3.0])
def test_png_of_the_signal_part_has_the_requested_size(opened, tmp_path, scale):
    w, h = opened.signal.width(), opened.signal.height()
    out = export_png(opened.signal, tmp_path / "signal.png", scale=scale)
    assert png_size(out) == (round(w * scale), round(h * scale))


def test_png_of_an_exact_size_is_not_blank(opened, tmp_path):
    from PySide6.QtGui import QImage

    out = export_png(opened.slices, tmp_path / "slices.png", size=(900, 333))
    assert png_size(out) == (900, 333)
    img = QImage(str(out)).convertToFormat(QImage.Format.Format_Grayscale8)
    arr = np.frombuffer(img.constBits(), np.uint8).reshape(img.height(), img.bytesPerLine())
    assert arr[:, : img.width()].astype(float).var() > 50.0


def test_png_does_not_overwrite_without_force(opened, tmp_path):
    target = tmp_path / "x.png"
    target.write_bytes(b"keep")
    with pytest.raises(InputError, match="already exists"):
        export_png(opened.signal, target)
    assert target.read_bytes() == b"keep"
    export_png(opened.signal, target, force=True)
    assert png_size(target) == (opened.signal.width(), opened.signal.height())


def test_too_large_png_is_one_line(opened, tmp_path):
    with pytest.raises(InputError, match="too large"):
        export_png(opened, tmp_path / "big.png", size=(50000, 10))


def test_svg_of_the_signal_part_parses(opened, tmp_path):
    out = export_svg(opened.signal, tmp_path / "signal.svg")
    root = ET.parse(out).getroot()
    assert root.tag == f"{SVG_NS}svg"
    assert len(list(root.iter())) > 20  # drawn content, not an empty document
    view_box = [float(v) for v in root.get("viewBox").split()]
    assert view_box[2:] == [opened.signal.width(), opened.signal.height()]


def test_svg_of_the_window_by_file_ending(opened, tmp_path):
    out = export_view(opened, tmp_path / "window.svg")
    assert ET.parse(out).getroot().tag == f"{SVG_NS}svg"


def test_signal_figure_svg_and_png(opened, tmp_path):
    svg = export_signal_figure(opened.state, tmp_path / "figure.svg")
    root = ET.parse(svg).getroot()
    texts = " ".join(t.text or "" for t in root.iter(f"{SVG_NS}text"))
    for f in opened.state.fits.fits:
        assert f.kernel in texts  # every fitted kernel is in the legend
    png = export_signal_figure(opened.state, tmp_path / "figure.png", scale=1.0)
    assert png_size(png) == (900, 560)


def test_signal_figure_without_model_is_one_line(window, ras_run, tmp_path):
    assert window.open_run(ras_run["run"], events=None, background=False)
    window.state.set_analysis(None)
    with pytest.raises(InputError, match="no fit"):
        export_signal_figure(window.state, tmp_path / "f.svg")


class _Text(HTMLParser):
    def __init__(self):
        super().__init__()
        self.text = []

    def handle_data(self, data):
        self.text.append(data)


def read_html(path):
    p = _Text()
    p.feed(path.read_text(encoding="utf-8"))
    return " ".join(p.text)


def test_report_of_the_voxel_from_the_window(opened, tmp_path):
    out = tmp_path / "report"
    result = write_window_report(opened, out, "voxel", background=False)
    assert result is not None
    assert (out / "report.html").is_file()
    text = read_html(out / "report.html")
    i, j, k = opened.state.voxel
    assert f"({i}, {j}, {k})" in text
    assert (out / "figure.svg").is_file() and (out / "timeseries.csv").is_file()
    assert "report.html" in opened.statusBar().currentMessage()


def test_report_of_the_marks_on_a_worker(opened, qtbot, tmp_path):
    opened.state.set_marks(
        MarkList([Mark(-6.0, -6.0, 5.0, "first place"), Mark(0.0, 0.0, 0.0, "second place")])
    )
    out = tmp_path / "marks-report"
    job = write_window_report(opened, out, "marks")
    with qtbot.waitSignal(job.done, timeout=30000) as blocker:
        pass
    result = blocker.args[0]
    assert result.html == out / "report.html"
    text = read_html(out / "report.html")
    assert "first place" in text and "second place" in text
    assert (out / "01-first-place.svg").is_file()
    qtbot.waitUntil(lambda: opened.report_job is None, timeout=5000)


def test_report_asks_before_overwriting(opened, tmp_path):
    out = tmp_path / "report"
    assert write_window_report(opened, out, "voxel", background=False) is not None
    before = (out / "report.html").stat().st_mtime_ns
    (out / "report.html").write_text("old report")
    # offscreen nobody can be asked: nothing is overwritten, the status bar says why
    assert write_window_report(opened, out, "voxel", background=False) is None
    assert (out / "report.html").read_text() == "old report"
    assert "already exists" in opened.statusBar().currentMessage()
    asked = []
    result = write_window_report(
        opened, out, "voxel", background=False, confirm=lambda m: asked.append(m) or True
    )
    assert result is not None and len(asked) == 1
    assert (out / "report.html").read_text() != "old report"
    assert (out / "report.html").stat().st_mtime_ns >= before


def test_report_without_marks_is_one_line(opened, tmp_path):
    assert write_window_report(opened, tmp_path / "r", "marks", background=False) is None
    msg = opened.statusBar().currentMessage()
    assert "no marks" in msg and "\n" not in msg


def test_export_dialog_shows_the_pixel_size_of_the_choice(opened):
    from voxelscope.gui.export import ExportDialog

    d = ExportDialog(opened)
    d.part.setCurrentText("Signal")
    d.scale.setValue(3.0)
    w, h = opened.signal.width(), opened.signal.height()
    assert d.kind() == "png"
    assert d.pixels.text() == f"{3 * w} × {3 * h} pixels"
    d.format.setCurrentIndex(1)
    assert d.kind() == "svg" and not d.scale.isEnabled()
    d.format.setCurrentIndex(2)
    assert d.kind() == "figure" and not d.part.isEnabled()


def test_file_menu_has_the_new_entries(window):
    from voxelscope.gui.menus import menu_named

    names = [a.text().replace("&", "") for a in menu_named(window, "File").actions()]
    for entry in ("Open session…", "Save session…", "Export view…", "Report…", "Quit"):
        assert entry in names
    assert names[-1] == "Quit"
    view = [a.text().replace("&", "") for a in menu_named(window, "View").actions()]
    assert "Show mode" in view and "Marks" in view
