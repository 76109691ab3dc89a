"""Report figures without Qt: one list of drawing primitives, written as SVG or as PNG.

A :class:`Figure` is a list of primitives (:class:`Rect`, :class:`Polyline`, :class:`Text`)
in logical units (CSS pixels). :meth:`Figure.to_svg` writes them as SVG text;
:meth:`Figure.to_png` rasterises the same list in pure numpy (anti-aliased lines and
rectangle edges, a small built-in 5x7 bitmap font) and encodes a PNG with zlib, so the two
files always show the same content. Text outside printable ASCII appears as ``?`` in the
PNG (the SVG keeps it).

:func:`signal_figure` lays out the report figure for one voxel: the time series in dark
grey, each kernel's fitted signal in its colour (Okabe & Ito, 2008, colour-universal
palette), condition blocks as light shaded bands, a residual panel, ticks, axis labels and
a legend.

Examples
--------
>>> fig = Figure(200, 100)
>>> fig.add(Rect(10, 10, 50, 30, "#e69f00"))
>>> fig.add(Polyline([(0, 90), (200, 60)], "#333333", 2.0))
>>> fig.add(Text(100, 80, "t = 3.25", 12, "#000000", anchor="middle"))
>>> fig.to_svg().startswith("<svg")
True
>>> png = fig.to_png(scale=2.0)
>>> png[:8] == b"\\x89PNG\\r\\n\\x1a\\n", png_size(png)
(True, (400, 200))
"""

from __future__ import annotations

import itertools
import json
import math
import os
import struct
import zlib
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path
from xml.sax.saxutils import escape

import numpy as np

from .atomic import write_bytes, write_text

__all__ = [
    "DATA_COLOUR",
    "FALLBACK_CONDITION_COLOURS",
    "FALLBACK_KERNEL_COLOURS",
    "Figure",
    "Polyline",
    "Rect",
    "Text",
    "colour_mismatches",
    "encode_png",
    "kernel_colours",
    "nice_ticks",
    "png_size",
    "response_figure",
    "signal_figure",
    "text_width",
]

DATA_COLOUR = "#333333"
# Okabe & Ito (2008) colour-universal palette; the same colour per kernel everywhere. These
# fall-backs equal resources/colours.json (the window's colours) when that file is missing.
FALLBACK_KERNEL_COLOURS: dict[str, str] = {
    "boxcar": "#000000",  # black
    "gaussian": "#009E73",  # bluish green
    "gamma": "#CC79A7",  # reddish purple
    "double-gamma": "#D55E00",  # vermillion
    "fir": "#0072B2",  # blue
}
_SPARE_COLOURS = ("#E69F00", "#56B4E9", "#F0E442")
# condition bands: palette hues drawn at low opacity behind the signal
FALLBACK_CONDITION_COLOURS = ("#56B4E9", "#E69F00", "#009E73", "#F0E442", "#CC79A7", "#0072B2")
_BAND_OPACITY = 0.22


# ----------------------------------------------------------------------------- colours


def _colour_files() -> list[Path]:
    here = Path(__file__).resolve().parent.parent  # voxelscope/
    return [here / "resources" / "colours.json", here.parent / "resources" / "colours.json"]


def _load_colour_file() -> dict | None:
    for p in _colour_files():
        if p.is_file():
            try:
                data = json.loads(p.read_text(encoding="utf-8"))
            except (OSError, ValueError):
                return None
            return data if isinstance(data, dict) else None
    return None


def _is_hex(c: object) -> bool:
    return isinstance(c, str) and len(c) == 7 and c[0] == "#" and _parse_ok(c[1:])


def _parse_ok(h: str) -> bool:
    try:
        int(h, 16)
    except ValueError:
        return False
    return True


def _section(data: dict | None, key: str) -> dict[str, str]:
    if not data:
        return {}
    sec = data.get(key)
    if isinstance(sec, dict):
        out = {}
        for k, v in sec.items():
            if isinstance(v, dict):  # {"colour": "#..."} style entries
                v = v.get("colour", v.get("color"))
            if _is_hex(v):
                out[str(k)] = v
        return out
    return {}


def kernel_colours() -> dict[str, str]:
    """Kernel name -> ``#RRGGBB``: from ``resources/colours.json`` (key ``kernels``) when it
    exists, else :data:`FALLBACK_KERNEL_COLOURS`.

    >>> kernel_colours()["double-gamma"].startswith("#")
    True
    """
    colours = dict(FALLBACK_KERNEL_COLOURS)
    colours.update(_section(_load_colour_file(), "kernels"))
    return colours


def colour_mismatches() -> list[str]:
    """Differences between ``resources/colours.json`` and the fallback colours (for checks).

    >>> isinstance(colour_mismatches(), list)
    True
    """
    from_file = _section(_load_colour_file(), "kernels")
    return [
        f"kernel '{k}': colours.json has {from_file[k]}, figure.py falls back to {v}"
        for k, v in FALLBACK_KERNEL_COLOURS.items()
        if k in from_file and from_file[k].lower() != v.lower()
    ]


def _condition_colours() -> list[str]:
    data = _load_colour_file() or {}
    sec = data.get("conditions")
    if isinstance(sec, dict):
        sec = list(sec.values())
    good = [c for c in sec if _is_hex(c)] if isinstance(sec, list) else []
    return good or list(FALLBACK_CONDITION_COLOURS)


def _band_opacity() -> float:
    v = (_load_colour_file() or {}).get("condition_band_alpha")
    ok = isinstance(v, (int, float)) and not isinstance(v, bool) and 0 < v <= 1
    return float(v) if ok else _BAND_OPACITY


def data_colour() -> str:
    """Colour of the voxel's time series (``data_trace`` in colours.json, else dark grey)."""
    v = (_load_colour_file() or {}).get("data_trace")
    return v if _is_hex(v) else DATA_COLOUR


def _rgb(colour: str) -> np.ndarray:
    h = colour.lstrip("#")
    return np.array([int(h[i : i + 2], 16) for i in (0, 2, 4)], dtype=np.float32) / 255.0


# -------------------------------------------------------------------------- primitives


@dataclass(frozen=True)
class Rect:
    """Filled rectangle; ``(x, y)`` is the top-left corner."""

    x: float
    y: float
    w: float
    h: float
    fill: str
    opacity: float = 1.0


@dataclass(frozen=True)
class Polyline:
    """Open line through ``points`` (sequence of (x, y))."""

    points: Sequence[tuple[float, float]]
    stroke: str
    width: float = 1.0
    opacity: float = 1.0


@dataclass(frozen=True)
class Text:
    """One line of text; ``y`` is its vertical centre. ``rotate`` is 0 or -90 degrees."""

    x: float
    y: float
    text: str
    size: float = 11.0
    fill: str = "#000000"
    anchor: str = "start"  # start | middle | end
    rotate: int = 0


def text_width(text: str, size: float) -> float:
    """Advance width of ``text`` at font size ``size`` (0.6 em per character)."""
    return 0.6 * size * len(text)


def _clean(text: str) -> str:
    """Text safe for XML 1.0 and the bitmap font: control characters become spaces."""
    return "".join(
        " "
        if ch < " " or ch == "\x7f" or ch in "\ufffe\uffff" or "\ud800" <= ch <= "\udfff"
        else ch
        for ch in str(text)
    )


class Figure:
    """A drawing of ``width`` x ``height`` logical units on a solid background."""

    def __init__(self, width: float, height: float, background: str = "#ffffff") -> None:
        self.width = float(width)
        self.height = float(height)
        self.background = background
        self.items: list[Rect | Polyline | Text] = []

    def add(self, item: Rect | Polyline | Text) -> None:
        self.items.append(item)

    # ------------------------------------------------------------------------- SVG
    def to_svg(self) -> str:
        """The figure as a standalone SVG document (text)."""
        w, h = _num(self.width), _num(self.height)
        out = [
            f'<svg xmlns="http://www.w3.org/2000/svg" width="{w}" height="{h}" '
            f'viewBox="0 0 {w} {h}">',
            f'<rect x="0" y="0" width="{w}" height="{h}" fill="{self.background}"/>',
        ]
        for it in self.items:
            if isinstance(it, Rect):
                out.append(
                    f'<rect x="{_num(it.x)}" y="{_num(it.y)}" width="{_num(it.w)}" '
                    f'height="{_num(it.h)}" fill="{it.fill}"{_opacity(it.opacity, "fill")}/>'
                )
            elif isinstance(it, Polyline):
                pts = " ".join(f"{_num(x)},{_num(y)}" for x, y in it.points)
                out.append(
                    f'<polyline points="{pts}" fill="none" stroke="{it.stroke}" '
                    f'stroke-width="{_num(it.width)}" stroke-linejoin="round" '
                    f'stroke-linecap="round"{_opacity(it.opacity, "stroke")}/>'
                )
            elif isinstance(it, Text):
                anchor = {"start": "start", "middle": "middle", "end": "end"}[it.anchor]
                rot = (
                    f' transform="rotate({it.rotate} {_num(it.x)} {_num(it.y)})"'
                    if it.rotate
                    else ""
                )
                out.append(
                    f'<text x="{_num(it.x)}" y="{_num(it.y)}" font-family="monospace" '
                    f'font-size="{_num(it.size)}" fill="{it.fill}" text-anchor="{anchor}" '
                    f'dominant-baseline="central"{rot}>{escape(_clean(it.text))}</text>'
                )
        out.append("</svg>")
        return "\n".join(out) + "\n"

    # ------------------------------------------------------------------------- PNG
    def to_array(self, scale: float = 1.0) -> np.ndarray:
        """Rasterise to an RGB uint8 array of shape ``(round(H*scale), round(W*scale), 3)``."""
        if not (scale > 0 and math.isfinite(scale)):
            raise ValueError("scale must be a positive number")
        W = max(1, round(self.width * scale))
        H = max(1, round(self.height * scale))
        canvas = np.empty((H, W, 3), dtype=np.float32)
        canvas[:] = _rgb(self.background)
        for it in self.items:
            if isinstance(it, Rect):
                _fill_rect(canvas, it, scale)
            elif isinstance(it, Polyline):
                _stroke(canvas, it, scale)
            elif isinstance(it, Text):
                _draw_text(canvas, it, scale)
        return np.clip(np.rint(canvas * 255.0), 0, 255).astype(np.uint8)

    def to_png(self, scale: float = 1.0, width_px: int | None = None) -> bytes:
        """PNG bytes at ``scale`` device pixels per unit (or scaled to ``width_px`` wide)."""
        if width_px is not None:
            scale = float(width_px) / self.width
        return encode_png(self.to_array(scale))

    def save_svg(self, path: str | os.PathLike[str], force: bool = False) -> Path:
        """Write the SVG atomically (refuses to overwrite unless ``force``)."""
        return write_text(path, self.to_svg(), force=force)

    def save_png(
        self,
        path: str | os.PathLike[str],
        scale: float = 1.0,
        width_px: int | None = None,
        force: bool = False,
    ) -> Path:
        """Write the PNG atomically (refuses to overwrite unless ``force``)."""
        return write_bytes(path, self.to_png(scale, width_px), force=force)


def _num(v: float) -> str:
    s = f"{float(v):.2f}".rstrip("0").rstrip(".")
    return "0" if s in ("-0", "") else s


def _opacity(op: float, what: str) -> str:
    return "" if op >= 1.0 else f' {what}-opacity="{_num(op)}"'


# ----------------------------------------------------------------------- rasteriser


def _blend(canvas: np.ndarray, ys: slice, xs: slice, alpha: np.ndarray, colour: str) -> None:
    a = alpha[..., None]
    region = canvas[ys, xs]
    region *= 1.0 - a
    region += a * _rgb(colour)


def _cover_1d(lo: float, hi: float, n: int) -> tuple[int, np.ndarray]:
    """Per-pixel coverage of the interval [lo, hi] on pixels 0..n-1; returns (start, cover)."""
    i0 = max(0, math.floor(lo))
    i1 = min(n, math.ceil(hi))
    if i1 <= i0:
        return 0, np.zeros(0, dtype=np.float32)
    px = np.arange(i0, i1, dtype=np.float32)
    cov = np.clip(np.minimum(px + 1, hi) - np.maximum(px, lo), 0.0, 1.0)
    return i0, cov.astype(np.float32)


def _fill_rect(canvas: np.ndarray, r: Rect, s: float) -> None:
    H, W = canvas.shape[:2]
    x0, c_x = _cover_1d(r.x * s, (r.x + r.w) * s, W)
    y0, c_y = _cover_1d(r.y * s, (r.y + r.h) * s, H)
    if c_x.size == 0 or c_y.size == 0:
        return
    alpha = np.outer(c_y, c_x) * float(r.opacity)
    _blend(canvas, slice(y0, y0 + c_y.size), slice(x0, x0 + c_x.size), alpha, r.fill)


def _stroke(canvas: np.ndarray, line: Polyline, s: float) -> None:
    pts = np.asarray(line.points, dtype=np.float64).reshape(-1, 2) * s
    if len(pts) == 0:
        return
    if len(pts) == 1:
        pts = np.vstack([pts, pts])
    H, W = canvas.shape[:2]
    hw = max(line.width * s, 1.0) / 2.0
    pad = hw + 1.0
    lo = np.floor(np.maximum(pts.min(axis=0) - pad, 0)).astype(int)
    hi = np.ceil(np.minimum(pts.max(axis=0) + pad, [W, H])).astype(int)
    if np.any(hi <= lo):
        return
    cov = np.zeros((hi[1] - lo[1], hi[0] - lo[0]), dtype=np.float32)
    for (ax, ay), (bx, by) in itertools.pairwise(pts):
        x0 = max(math.floor(min(ax, bx) - pad), lo[0])
        x1 = min(math.ceil(max(ax, bx) + pad), hi[0])
        y0 = max(math.floor(min(ay, by) - pad), lo[1])
        y1 = min(math.ceil(max(ay, by) + pad), hi[1])
        if x1 <= x0 or y1 <= y0:
            continue
        px = np.arange(x0, x1, dtype=np.float32)[None, :] + 0.5
        py = np.arange(y0, y1, dtype=np.float32)[:, None] + 0.5
        dx, dy = bx - ax, by - ay
        L2 = dx * dx + dy * dy
        if L2 > 0:
            t = np.clip(((px - ax) * dx + (py - ay) * dy) / L2, 0.0, 1.0)
        else:
            t = np.zeros((1, 1), dtype=np.float32)
        d = np.hypot(px - (ax + t * dx), py - (ay + t * dy))
        c = np.clip(hw + 0.5 - d, 0.0, 1.0)
        sub = cov[y0 - lo[1] : y1 - lo[1], x0 - lo[0] : x1 - lo[0]]
        np.maximum(sub, c, out=sub)
    _blend(canvas, slice(lo[1], hi[1]), slice(lo[0], hi[0]), cov * float(line.opacity), line.stroke)


# Our own 5x7 glyphs for printable ASCII (32..126): 7 rows per glyph, each row one base-32
# digit whose 5 bits are the pixels from left to right.
_FONT = (
    "00000004444404aa00000avaaava4fke5u4op248j3cic8lid44000002488842842224804lel40044v440"
    "0000648000v00000000cc01248g0ehjlphe4c4444eeh1248vv2421he26aiv22vgu11he68guhhev124888"
    "ehhehheehhf12c0cc0cc00cc0c48248g84200v0v008421248eh12404eh1dlleehhvhhhuhhuhhuehggghe"
    "sihhhisvgguggvvggugggehgnhhfhhhvhhhe44444e72222ichikokihggggggvhrllhhhhhpljhhehhhhhe"
    "uhhugggehhhliduhhukihfgge11uv444444hhhhhhehhhhha4hhhlllahha4ahhhha4444v1248gve88888e"
    "0g84210e22222e4ah0000000000v840000000e1fhfggmphhu00egghe11djhhf00ehvge698s888fhhhf1e"
    "ggmphhh40c444e20622icggikokic44444e00qllhh00mphhh00ehhheuhhhuggfhhhf1100mpggg00ege1u"
    "88s889600hhhjd00hhha400hhlla00ha4ahhhhhf1e00v248v244844244444448442448008l200"
)
_GLYPHS: dict[str, np.ndarray] = {}
_DESCENDERS = "gpqy"


def _glyph(ch: str) -> np.ndarray:
    g = _GLYPHS.get(ch)
    if g is None:
        code = ord(ch) if " " <= ch <= "~" else ord("?")
        rows = _FONT[(code - 32) * 7 : (code - 32) * 7 + 7]
        bits = [[(int(r, 32) >> (4 - b)) & 1 for b in range(5)] for r in rows]
        g = np.array(bits, dtype=np.float32)
        _GLYPHS[ch] = g
    return g


def _text_mask(text: str, k: int) -> np.ndarray:
    """Bitmap of a text line: cells of 6 x 10 font pixels, each scaled by ``k``.

    Glyphs sit on rows 1-7; ``g p q y`` sit two rows lower so their tails descend.
    """
    n = max(len(text), 1)
    mask = np.zeros((10, 6 * n), dtype=np.float32)
    for i, ch in enumerate(text):
        r = 3 if ch in _DESCENDERS else 1
        mask[r : r + 7, 6 * i : 6 * i + 5] = _glyph(ch)
    return np.kron(mask, np.ones((k, k), dtype=np.float32))


def _draw_text(canvas: np.ndarray, t: Text, s: float) -> None:
    text = _clean(t.text)
    if not text.strip():
        return
    unit = t.size * s / 10.0  # one font pixel: a 7-row glyph is 0.7 em tall
    k = max(1, round(unit))
    mask = _text_mask(text, k)
    # the mask is drawn at the nominal width so layout matches the SVG
    if t.rotate:
        mask = np.rot90(mask)  # -90 degrees: text reads bottom to top
    mh, mw = mask.shape
    along = mw if not t.rotate else mh
    shift = {"start": 0.0, "middle": along / 2.0, "end": float(along)}[t.anchor]
    cx, cy = t.x * s, t.y * s
    centre = 4.5 * k  # middle of the capital letters (rows 1-7 of a cell)
    if not t.rotate:
        x0 = round(cx - shift)
        y0 = round(cy - centre)
    else:
        x0 = round(cx - centre)
        y0 = round(cy - along + shift)
    H, W = canvas.shape[:2]
    xa, ya = max(x0, 0), max(y0, 0)
    xb, yb = min(x0 + mw, W), min(y0 + mh, H)
    if xb <= xa or yb <= ya:
        return
    sub = mask[ya - y0 : yb - y0, xa - x0 : xb - x0]
    _blend(canvas, slice(ya, yb), slice(xa, xb), sub, t.fill)


# ----------------------------------------------------------------------------- PNG io


def encode_png(rgb: np.ndarray) -> bytes:
    """Encode an ``(H, W, 3)`` uint8 array as an 8-bit RGB PNG (zlib, "Up" filter).

    >>> len(encode_png(np.zeros((2, 3, 3), dtype=np.uint8))) > 40
    True
    """
    a = np.ascontiguousarray(rgb, dtype=np.uint8)
    if a.ndim != 3 or a.shape[2] != 3:
        raise ValueError("encode_png takes an (H, W, 3) uint8 array")
    h, w = a.shape[:2]
    rows = a.reshape(h, 3 * w)
    raw = np.empty((h, 1 + 3 * w), dtype=np.uint8)
    raw[:, 0] = 2  # filter type "Up": each byte minus the byte above (PNG specification)
    raw[:, 1:] = rows
    raw[1:, 1:] -= rows[:-1]  # uint8 arithmetic wraps modulo 256, as the filter needs

    def chunk(kind: bytes, data: bytes) -> bytes:
        return (
            struct.pack(">I", len(data))
            + kind
            + data
            + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF)
        )

    ihdr = struct.pack(">IIBBBBB", w, h, 8, 2, 0, 0, 0)
    return (
        b"\x89PNG\r\n\x1a\n"
        + chunk(b"IHDR", ihdr)
        + chunk(b"tEXt", b"Software\x00voxelscope")
        + chunk(b"IDAT", zlib.compress(raw.tobytes(), 6))
        + chunk(b"IEND", b"")
    )


def png_size(png: bytes) -> tuple[int, int]:
    """``(width, height)`` from a PNG's IHDR chunk.

    >>> png_size(encode_png(np.zeros((2, 3, 3), dtype=np.uint8)))
    (3, 2)
    """
    if png[:8] != b"\x89PNG\r\n\x1a\n" or png[12:16] != b"IHDR":
        raise ValueError("not a PNG")
    return struct.unpack(">II", png[16:24])


# ----------------------------------------------------------------------------- layout


def nice_ticks(lo: float, hi: float, target: int = 6) -> list[float]:
    """Round tick values (steps of 1, 2 or 5 times a power of ten) covering [lo, hi].

    >>> nice_ticks(0, 100)
    [0.0, 20.0, 40.0, 60.0, 80.0, 100.0]
    """
    if not (math.isfinite(lo) and math.isfinite(hi)) or hi <= lo:
        return [float(lo)] if math.isfinite(lo) else []
    raw = (hi - lo) / max(target - 1, 1)
    mag = 10 ** math.floor(math.log10(raw))
    step = next(m * mag for m in (1, 2, 2.5, 5, 10) if m * mag >= raw)
    i0 = math.ceil(lo / step - 1e-9)
    i1 = math.floor(hi / step + 1e-9)
    ticks = [i * step for i in range(i0, i1 + 1)]
    return [float(t) + 0.0 for t in ticks]


def _tick_label(v: float, step: float) -> str:
    """Tick text with just enough decimals for the step.

    >>> _tick_label(1000.0, 25.0), _tick_label(97.5, 2.5), _tick_label(0.25, 0.25)
    ('1000', '97.5', '0.25')
    """
    if step > 0:
        k = math.floor(math.log10(step) + 1e-9)
        two_digits = abs(step / 10**k - 2.5) < 1e-6
        d = max(0, 1 - k) if two_digits else max(0, -k)
    else:
        d = 0
    s = f"{v:.{d}f}"
    return "0" if float(s) == 0 else s


def _limits(arrays: Iterable[np.ndarray], include_zero: bool = False) -> tuple[float, float]:
    vals = [np.asarray(a, dtype=float) for a in arrays]
    finite = np.concatenate([a[np.isfinite(a)] for a in vals]) if vals else np.zeros(0)
    if include_zero:
        finite = np.append(finite, 0.0)
    if finite.size == 0:
        return 0.0, 1.0
    lo, hi = float(finite.min()), float(finite.max())
    if hi - lo < 1e-12 * max(1.0, abs(hi)):
        lo, hi = lo - 1.0, hi + 1.0
    pad = 0.06 * (hi - lo)
    return lo - pad, hi + pad


def _segments(x: np.ndarray, y: np.ndarray) -> list[np.ndarray]:
    """Index runs where both x and y are finite (a line breaks at NaN)."""
    ok = np.isfinite(x) & np.isfinite(y)
    runs, start = [], None
    for i, good in enumerate(ok):
        if good and start is None:
            start = i
        elif not good and start is not None:
            runs.append(np.arange(start, i))
            start = None
    if start is not None:
        runs.append(np.arange(start, len(ok)))
    return runs


@dataclass
class _Panel:
    x: float
    y: float
    w: float
    h: float
    xlim: tuple[float, float]
    ylim: tuple[float, float]

    def px(self, t: np.ndarray) -> np.ndarray:
        return self.x + (np.asarray(t) - self.xlim[0]) / (self.xlim[1] - self.xlim[0]) * self.w

    def py(self, v: np.ndarray) -> np.ndarray:
        return self.y + (self.ylim[1] - np.asarray(v)) / (self.ylim[1] - self.ylim[0]) * self.h


def _draw_panel(
    fig: Figure,
    p: _Panel,
    bands: list[tuple[float, float, str]],
    series: list[tuple[np.ndarray, np.ndarray, str, float]],
    ylabel: str,
    xticks: list[float],
    show_x_labels: bool,
    zero_line: bool,
    font: float,
    band_opacity: float = _BAND_OPACITY,
) -> None:
    fig.add(Rect(p.x, p.y, p.w, p.h, "#ffffff"))
    for start, stop, colour in bands:
        a = float(np.clip(p.px(start), p.x, p.x + p.w))
        b = float(np.clip(p.px(stop), p.x, p.x + p.w))
        if b > a:
            fig.add(Rect(a, p.y, b - a, p.h, colour, band_opacity))
    yt = nice_ticks(*p.ylim, target=5)
    ystep = yt[1] - yt[0] if len(yt) > 1 else 1.0
    for v in yt:
        yy = float(p.py(v))
        fig.add(Polyline([(p.x, yy), (p.x + p.w, yy)], "#e4e4e4", 0.8))
        fig.add(Polyline([(p.x - 4, yy), (p.x, yy)], "#555555", 1.0))
        fig.add(Text(p.x - 7, yy, _tick_label(v, ystep), font, "#333333", "end"))
    xstep = xticks[1] - xticks[0] if len(xticks) > 1 else 1.0
    for v in xticks:
        xx = float(p.px(v))
        fig.add(Polyline([(xx, p.y + p.h), (xx, p.y + p.h + 4)], "#555555", 1.0))
        if show_x_labels:
            fig.add(Text(xx, p.y + p.h + 13, _tick_label(v, xstep), font, "#333333", "middle"))
    if zero_line and p.ylim[0] < 0 < p.ylim[1]:
        yy = float(p.py(0.0))
        fig.add(Polyline([(p.x, yy), (p.x + p.w, yy)], "#999999", 1.0))
    for t, v, colour, width in series:
        for run in _segments(t, v):
            pts = list(zip(p.px(t[run]).tolist(), p.py(v[run]).tolist()))
            fig.add(Polyline(pts, colour, width))
    frame = [(p.x, p.y), (p.x + p.w, p.y), (p.x + p.w, p.y + p.h), (p.x, p.y + p.h), (p.x, p.y)]
    fig.add(Polyline(frame, "#555555", 1.0))
    fig.add(Text(p.x - 54, p.y + p.h / 2, ylabel, font + 1, "#222222", "middle", rotate=-90))


def signal_figure(
    frame_times: np.ndarray,
    y: np.ndarray,
    fits: Sequence[tuple[str, np.ndarray, np.ndarray]],
    conditions: Sequence = (),
    title: str = "",
    width: float = 900.0,
    height: float = 560.0,
    run_length_s: float | None = None,
    colours: dict[str, str] | None = None,
) -> Figure:
    """The report figure for one voxel.

    Parameters
    ----------
    frame_times : ndarray (T,)
        Sampling time of each volume, seconds.
    y : ndarray (T,)
        The voxel's time series.
    fits : sequence of (kernel name, fitted (T,), residuals (T,))
        In display order, for example from ``Analysis.fit_voxel``.
    conditions : sequence of Condition
        Shown as light bands (one hue per condition) from onset to onset + duration.
    title : str
    width, height : float
        Logical size; the PNG is ``round(width * scale)`` pixels wide.
    run_length_s : float, optional
        End of the time axis (default: last frame time plus one frame step).
    colours : dict, optional
        Kernel colours (default :func:`kernel_colours`).

    Examples
    --------
    >>> t = np.arange(40) * 2.0
    >>> y = np.sin(t / 8)
    >>> fig = signal_figure(t, y, [("gamma", 0.9 * y, 0.1 * y)], title="demo")
    >>> "gamma" in fig.to_svg()
    True
    """
    t = np.asarray(frame_times, dtype=float).reshape(-1)
    y = np.asarray(y, dtype=float).reshape(-1)
    colours = {**kernel_colours(), **(colours or {})}
    spare = iter(_SPARE_COLOURS * 4)
    kcol = {}
    for name, _f, _r in fits:
        kcol[name] = colours.get(name) or next(spare)
    ccols = _condition_colours()
    conds = list(conditions)
    cond_colour = {c.name: ccols[i % len(ccols)] for i, c in enumerate(conds)}

    dcol = data_colour()
    band_opacity = _band_opacity()
    fig = Figure(width, height)
    font = 11.0
    left, right = 84.0, 18.0
    top = 14.0
    if title:
        fig.add(Text(left, top + 8, title, 13.0, "#111111", "start"))
        top += 24.0

    # legend rows
    entries: list[tuple[str, str, str]] = [("data", dcol, "line")]
    entries += [(name, kcol[name], "line") for name, _f, _r in fits]
    entries += [(c.name, cond_colour[c.name], "band") for c in conds]
    x = left
    row_y = top + 7
    for label, colour, kind in entries:
        w_entry = 26 + text_width(label, font) + 18
        if x + w_entry > width - right and x > left:
            x = left
            row_y += 18
        if kind == "line":
            fig.add(
                Polyline([(x, row_y), (x + 20, row_y)], colour, 2.5 if label != "data" else 1.5)
            )
        else:
            fig.add(Rect(x, row_y - 6, 20, 12, colour, min(1.0, band_opacity * 2)))
        fig.add(Text(x + 26, row_y, label, font, "#222222", "start"))
        x += w_entry
    top = row_y + 16

    if run_length_s is None:
        step = float(np.median(np.diff(t))) if t.size > 1 else 1.0
        run_length_s = float(t[-1] + step) if t.size else 1.0
    xlim = (0.0, max(float(run_length_s), 1e-9))
    xticks = nice_ticks(*xlim, target=8)
    bottom = 44.0
    gap = 14.0
    avail = height - top - bottom - gap
    h_sig = 0.68 * avail
    h_res = avail - h_sig
    pw = width - left - right

    fitted = [np.asarray(f, dtype=float).reshape(-1) for _n, f, _r in fits]
    resid = [np.asarray(r, dtype=float).reshape(-1) for _n, _f, r in fits]
    sig = _Panel(left, top, pw, h_sig, xlim, _limits([y, *fitted]))
    res = _Panel(left, top + h_sig + gap, pw, h_res, xlim, _limits(resid, include_zero=True))

    bands = []
    for c in conds:
        for on, du in zip(c.onsets, c.durations):
            bands.append(
                (float(on), float(on) + max(float(du), 0.004 * xlim[1]), cond_colour[c.name])
            )
    series = [(t, y, dcol, 1.4)]
    series += [(t, f, kcol[name], 2.0) for (name, _f, _r), f in zip(fits, fitted)]
    _draw_panel(fig, sig, bands, series, "signal", xticks, False, False, font, band_opacity)
    rseries = [(t, r, kcol[name], 1.3) for (name, _f, _r), r in zip(fits, resid)]
    _draw_panel(fig, res, bands, rseries, "residual", xticks, True, True, font, band_opacity)
    fig.add(Text(left + pw / 2, height - 12, "time (s)", font + 1, "#222222", "middle"))
    return fig


def response_figure(
    response: dict,
    fir: dict | None = None,
    title: str = "",
    width: float = 900.0,
    height: float = 420.0,
    colours: dict[str, str] | None = None,
) -> Figure:
    """The peri-event response of one condition, for reports.

    Parameters
    ----------
    response : dict
        :meth:`voxelscope.core.response.PeriEventResponse.to_json` (``None`` for missing
        values is accepted).
    fir : dict, optional
        :meth:`voxelscope.core.timing.FirEstimate.to_json`, drawn as the FIR estimate.
    title : str
    width, height : float
    colours : dict, optional
        Kernel colours (default :func:`kernel_colours`).

    The data average is drawn with its 95% band as two thin lines, each kernel's
    prediction in its colour, the FIR estimate in the FIR colour; the baseline before the
    onset is shaded.

    Examples
    --------
    >>> r = {"times": [-2, 0, 2, 4], "mean": [0, 0.1, 1.0, 0.5], "ci_low": [-.1, 0, .8, .3],
    ...      "ci_high": [.1, .2, 1.2, .7], "baseline_s": 4.0,
    ...      "predictions": {"gamma": [0, 0, 1, .4]}}
    >>> "gamma" in response_figure(r, title="tone").to_svg()
    True
    """

    def arr(v) -> np.ndarray:
        return np.array([np.nan if x is None else float(x) for x in (v or [])], dtype=float)

    colours = {**kernel_colours(), **(colours or {})}
    spare = iter(_SPARE_COLOURS * 4)
    t = arr(response.get("times"))
    mean, lo, hi = (
        arr(response.get("mean")),
        arr(response.get("ci_low")),
        arr(response.get("ci_high")),
    )
    preds = {k: arr(v) for k, v in (response.get("predictions") or {}).items()}
    fir = fir or {}
    ft, fe = arr(fir.get("times")), arr(fir.get("estimate"))
    dcol = data_colour()
    fig = Figure(width, height)
    font = 11.0
    left, right, top = 84.0, 18.0, 14.0
    if title:
        fig.add(Text(left, top + 8, title, 13.0, "#111111", "start"))
        top += 24.0
    entries = [("data, mean over events", dcol, 2.2), ("95% band", dcol, 0.9)]
    kcol = {k: colours.get(k) or next(spare) for k in preds}
    entries += [(k, kcol[k], 2.0) for k in preds]
    if fe.size:
        entries.append(("FIR estimate", colours.get("fir", "#0072B2"), 1.4))
    x, row_y = left, top + 7
    for label, colour, w in entries:
        w_entry = 26 + text_width(label, font) + 18
        if x + w_entry > width - right and x > left:
            x, row_y = left, row_y + 18
        fig.add(Polyline([(x, row_y), (x + 20, row_y)], colour, w))
        fig.add(Text(x + 26, row_y, label, font, "#222222", "start"))
        x += w_entry
    top = row_y + 16
    all_t = np.concatenate([t, ft]) if ft.size else t
    finite_t = all_t[np.isfinite(all_t)]
    xlim = (float(finite_t.min()), float(finite_t.max())) if finite_t.size else (0.0, 1.0)
    if xlim[1] <= xlim[0]:
        xlim = (xlim[0], xlim[0] + 1.0)
    panel = _Panel(
        left,
        top,
        width - left - right,
        height - top - 44.0,
        xlim,
        _limits([mean, lo, hi, *preds.values(), fe], include_zero=True),
    )
    base = float(response.get("baseline_s") or 0.0)
    bands = [(-base, 0.0, "#999999")] if base > 0 else []
    series = [(t, lo, dcol, 0.9), (t, hi, dcol, 0.9), (t, mean, dcol, 2.2)]
    series += [(t, v, kcol[k], 2.0) for k, v in preds.items()]
    if fe.size:
        series.append((ft, fe, colours.get("fir", "#0072B2"), 1.4))
    _draw_panel(
        fig,
        panel,
        bands,
        series,
        "change from baseline",
        nice_ticks(*xlim, target=8),
        True,
        True,
        font,
    )
    fig.add(
        Text(left + panel.w / 2, height - 12, "time since onset (s)", font + 1, "#222222", "middle")
    )
    return fig
