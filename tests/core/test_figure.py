"""Tests of voxelscope/core/figure.py: the Qt-free SVG writer and the PNG drawn by matplotlib.

Outside references: the PNG specification (W3C / ISO/IEC 15948: signature, chunk layout,
CRC-32 over type and data, IHDR fields, the five row filters) implemented independently
below with ``zlib`` and ``struct`` to read what Pillow writes; ``xml.etree.ElementTree`` for
SVG well-formedness; matplotlib's font manager for the font the PNG text is set in; the
Okabe & Ito (2008) palette hex values (from memory).
"""

from __future__ import annotations

import struct
import subprocess
import sys
import xml.etree.ElementTree as ET
import zlib
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from voxelscope.core import figure as F
from voxelscope.core.events import Condition

OKABE_ITO = {
    "#000000", "#E69F00", "#56B4E9", "#009E73", "#F0E442", "#0072B2", "#D55E00", "#CC79A7",
}  # fmt: skip
SVG = "{http://www.w3.org/2000/svg}"


def decode_png(data: bytes) -> np.ndarray:
    """Minimal 8-bit RGB PNG decoder written from the PNG specification."""
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    pos, idat, ihdr, kinds = 8, b"", None, []
    while pos < len(data):
        (n,) = struct.unpack(">I", data[pos : pos + 4])
        kind, body = data[pos + 4 : pos + 8], data[pos + 8 : pos + 8 + n]
        (crc,) = struct.unpack(">I", data[pos + 8 + n : pos + 12 + n])
        assert crc == zlib.crc32(kind + body) & 0xFFFFFFFF, kind
        kinds.append(kind)
        if kind == b"IHDR":
            ihdr = struct.unpack(">IIBBBBB", body)
        elif kind == b"IDAT":
            idat += body
        pos += 12 + n
    assert kinds[0] == b"IHDR" and kinds[-1] == b"IEND"
    w, h, depth, ctype, comp, filt, interlace = ihdr
    assert (depth, ctype, comp, filt, interlace) == (8, 2, 0, 0, 0)
    raw = zlib.decompress(idat)
    stride, bpp = 3 * w, 3
    assert len(raw) == h * (stride + 1)
    out = np.zeros((h, stride), dtype=np.int64)
    prev = np.zeros(stride, dtype=np.int64)
    for r in range(h):
        ftype = raw[r * (stride + 1)]
        line = np.frombuffer(raw, np.uint8, stride, r * (stride + 1) + 1).astype(np.int64)
        cur = np.zeros(stride, dtype=np.int64)
        for i in range(stride):
            a = cur[i - bpp] if i >= bpp else 0
            b = prev[i]
            c = prev[i - bpp] if i >= bpp else 0
            if ftype == 0:
                pred = 0
            elif ftype == 1:
                pred = a
            elif ftype == 2:
                pred = b
            elif ftype == 3:
                pred = (a + b) // 2
            else:
                p = a + b - c
                pa, pb, pc = abs(p - a), abs(p - b), abs(p - c)
                pred = a if pa <= pb and pa <= pc else (b if pb <= pc else c)
            cur[i] = (line[i] + pred) % 256
        out[r], prev = cur, cur
    return out.reshape(h, w, 3).astype(np.uint8)


def _fits_figure(width=300.0, height=200.0, with_nan=False):
    rng = np.random.default_rng(5)
    t = np.arange(60) * 1.25
    y = 100 + np.sin(t / 6) * 3 + rng.normal(0, 0.5, 60)
    if with_nan:
        y[10:13] = np.nan
    fits = [
        ("boxcar", 100 + np.sin(t / 6) * 2.5, rng.normal(0, 0.4, 60)),
        ("double-gamma", 100 + np.sin(t / 6) * 2.9, rng.normal(0, 0.3, 60)),
    ]
    conds = [Condition("tone", [5.0, 40.0], [10.0, 10.0]), Condition("tap", [22.0], [8.0])]
    return F.signal_figure(t, y, fits, conds, "demo voxel", width=width, height=height)


def test_png_decodes_to_the_drawn_pixels():
    fig = _fits_figure()
    np.testing.assert_array_equal(decode_png(fig.to_png(scale=1.0)), fig.to_array(1.0))


@pytest.mark.parametrize(
    ("scale", "size"), [(1.0, (300, 200)), (2.0, (600, 400)), (1.5, (450, 300))]
)
def test_png_has_requested_size_and_content(scale, size):
    fig = _fits_figure()
    png = fig.to_png(scale=scale)
    assert F.png_size(png) == size
    img = decode_png(png)
    assert img.shape == (size[1], size[0], 3)
    colours = {tuple(px) for px in img.reshape(-1, 3)[::7].tolist()}
    assert len(colours) > 20  # not blank
    for name in ("boxcar", "double-gamma"):
        target = np.array([int(F.kernel_colours()[name][i : i + 2], 16) for i in (1, 3, 5)])
        dist = np.abs(img.astype(float) - target).sum(axis=2)
        assert (dist < 12).sum() > 50 * scale, name  # the fitted curve is drawn in its colour


def test_png_width_px():
    assert F.png_size(_fits_figure().to_png(width_px=1200)) == (1200, 800)


def test_svg_parses_and_shows_the_same_items():
    fig = _fits_figure(with_nan=True)
    root = ET.fromstring(fig.to_svg())
    assert root.tag == f"{SVG}svg" and root.get("width") == "300" and root.get("height") == "200"
    lines = root.findall(f"{SVG}polyline")
    rects = root.findall(f"{SVG}rect")
    texts = [t.text for t in root.findall(f"{SVG}text")]
    assert len(lines) == sum(isinstance(i, F.Polyline) for i in fig.items)
    assert len(rects) == 1 + sum(isinstance(i, F.Rect) for i in fig.items)  # + background
    assert texts == [i.text for i in fig.items if isinstance(i, F.Text)]
    assert {"data", "boxcar", "double-gamma", "tone", "tap", "time (s)", "residual"} <= set(texts)
    strokes = {ln.get("stroke") for ln in lines}
    assert {F.kernel_colours()["boxcar"], F.kernel_colours()["double-gamma"]} <= strokes
    # the NaN gap splits the data trace: two polylines in the data colour in the signal panel
    assert sum(ln.get("stroke") == F.data_colour() for ln in lines) == 1 + 2


@given(st.text(max_size=30), st.text(max_size=12))
def test_svg_is_well_formed_for_any_title_and_condition_name(title, cond):
    t = np.arange(10.0)
    conds = [Condition(cond, [1.0], [2.0])]
    fig = F.signal_figure(t, np.sin(t), [("gamma", np.sin(t), 0 * t)], conds, title)
    root = ET.fromstring(fig.to_svg())
    assert root.tag == f"{SVG}svg"
    assert fig.to_array(0.25).shape == (140, 225, 3)


def test_rect_rasterises_exactly_on_pixel_grid():
    fig = F.Figure(10, 8, background="#ffffff")
    fig.add(F.Rect(2, 3, 4, 2, "#0072b2"))
    img = F.Figure.to_array(fig)
    expected = np.full((8, 10, 3), 255, dtype=np.uint8)
    expected[3:5, 2:6] = (0x00, 0x72, 0xB2)
    np.testing.assert_array_equal(img, expected)


def test_half_pixel_rect_edge_is_blended():
    fig = F.Figure(4, 1, background="#ffffff")
    fig.add(F.Rect(1.5, 0, 1.0, 1, "#000000"))
    row = fig.to_array()[0, :, 0]
    # half coverage: (255 + 0) / 2, within one level of the renderer's rounding
    assert row[0] == row[3] == 255 and all(abs(int(v) - 127.5) <= 1 for v in row[1:3])


def test_horizontal_line_covers_its_width():
    fig = F.Figure(20, 20)
    fig.add(F.Polyline([(2, 10), (18, 10)], "#000000", 2.0))
    img = fig.to_array()[:, :, 0]
    assert (img[9, 4:16] == 0).all() and (img[10, 4:16] == 0).all()
    assert (img[7, :] == 255).all() and (img[12, :] == 255).all()


def test_text_is_drawn_and_anchored():
    fig = F.Figure(100, 20)
    fig.add(F.Text(50, 10, "t=1.25 ü", 10, "#000000", anchor="middle"))
    img = fig.to_array()[:, :, 0]
    cols = np.where((img < 128).any(axis=0))[0]
    assert cols.size > 0
    centre = (cols.min() + cols.max() + 1) / 2
    assert abs(centre - 50) <= 3
    assert abs((cols.max() + 1 - cols.min()) - F.text_width("t=1.25 ü", 10)) <= 6


def test_text_outside_ascii_is_drawn_not_replaced():
    """The bitmap font drew "?" for anything outside ASCII; the figure font has these."""

    def ink(text):
        fig = F.Figure(60, 20)
        fig.add(F.Text(30, 10, text, 12, "#000000", anchor="middle"))
        return fig.to_array()[:, :, 0]

    assert not np.array_equal(ink("ü"), ink("?")) and not np.array_equal(ink("–"), ink("?"))
    assert not np.array_equal(ink("1"), ink("l"))
    assert (ink("$x$") < 128).sum() > 0  # dollar signs are text, not a formula


def test_png_text_is_set_in_the_figure_font():
    """matplotlib resolves FIGURE_FONT to its own copy of the family (no fallback)."""
    from matplotlib.font_manager import FontProperties, findfont, get_font

    from voxelscope.core.palette import FIGURE_FONT

    path = findfont(FontProperties(family=FIGURE_FONT), fallback_to_default=False)
    assert get_font(path).family_name == FIGURE_FONT
    assert f'font-family="{FIGURE_FONT}, sans-serif"' in _fits_figure().to_svg()


@given(
    st.floats(-1e6, 1e6),
    st.floats(1e-3, 1e6),
)
def test_nice_ticks_are_round_and_cover_the_range(lo, span):
    hi = lo + span
    ticks = F.nice_ticks(lo, hi)
    assert 2 <= len(ticks) <= 12
    step = ticks[1] - ticks[0]
    mant = step / 10 ** np.floor(np.log10(step))
    assert min(abs(mant - m) for m in (1, 2, 2.5, 5, 10)) < 1e-6
    # nice_ticks snaps values within 1e-9 of a step onto the tick, so allow that much
    tol_lo = 1e-9 * max(1, abs(lo), step)
    tol_hi = 1e-9 * max(1, abs(hi), step)
    assert ticks[0] >= lo - tol_lo and ticks[0] - step < lo
    assert ticks[-1] <= hi + tol_hi and ticks[-1] + step > hi


def test_kernel_colours_are_okabe_ito_and_match_the_window():
    """Kernel colours come from the Okabe & Ito (2008) palette (hex values from memory) and
    are the window's own: one palette file, read in one place."""
    from voxelscope.core import palette

    assert {c.upper() for c in F.kernel_colours().values()} <= OKABE_ITO
    assert F.kernel_colours() == palette.colours()["kernels"]
    assert F.data_colour() == palette.colours()["data_trace"]


def test_save_writes_atomically_and_refuses_overwrite(tmp_path):
    fig = _fits_figure()
    fig.save_png(tmp_path / "f.png", scale=1)
    fig.save_svg(tmp_path / "f.svg")
    with pytest.raises(Exception, match="already exists"):
        fig.save_png(tmp_path / "f.png")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["f.png", "f.svg"]


def test_figure_module_does_not_import_qt():
    code = (
        "import sys, voxelscope.core.figure, voxelscope.core.report\n"
        "bad = [m for m in sys.modules if m.startswith(('PySide6', 'pyqtgraph', 'matplotlib'))]\n"
        "assert not bad, bad\n"
    )
    subprocess.run([sys.executable, "-c", code], check=True, cwd=Path(__file__).parents[2])


def test_a_condition_keeps_its_colour_whatever_order_the_events_file_lists_it():
    """Two runs whose events files list ``tap`` and ``tone`` in another order draw each
    condition in the same colour (the several-run figures and the window put runs side by
    side, so a colour must mean one condition)."""
    t = np.arange(60) * 1.25
    y = 100 + np.sin(t / 6)
    fits = [("boxcar", y, np.zeros(60))]
    tone = Condition("tone", [5.0, 40.0], [10.0, 10.0])
    tap = Condition("tap", [22.0], [8.0])

    def bands(conds):
        fig = F.signal_figure(t, y, fits, conds, "", width=300.0, height=200.0)
        return {(round(i.x, 3), i.fill) for i in fig.items if isinstance(i, F.Rect)}

    assert bands([tone, tap]) == bands([tap, tone])
    assert len({fill for _, fill in bands([tone, tap])}) >= 2  # still two colours
