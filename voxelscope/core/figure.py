"""Report figures without Qt: one list of drawing primitives, written as SVG or as PNG.

A :class:`Figure` is a list of primitives (:class:`Rect`, :class:`Polyline`, :class:`Text`)
in logical units (CSS pixels). :meth:`Figure.to_svg` writes them as SVG text;
:meth:`Figure.to_png` draws the same list with matplotlib's Agg renderer (anti-aliased,
text in :data:`~voxelscope.core.palette.FIGURE_FONT`, the family the window's plots use)
and saves it with Pillow, so the two files show the same content. matplotlib is imported
only when a figure is drawn or its text measured, never by the command line's start-up.

:func:`signal_figure` lays out the report figure for one voxel: the time series in grey,
each kernel's fitted signal in its colour (Okabe & Ito, 2008, colour-universal palette, from
``resources/colours.json`` through :mod:`voxelscope.core.palette`), condition blocks as
light shaded bands, a residual panel, ticks, axis labels and a legend.

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

import gc
import io
import itertools
import math
import os
import struct
import warnings
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path
from xml.sax.saxutils import escape, quoteattr

import numpy as np

from .atomic import write_bytes, write_text
from .palette import FIGURE_FONT, colours, condition_colour_map, kernel_colours

__all__ = [
    "Figure",
    "Polyline",
    "Rect",
    "Text",
    "data_colour",
    "kernel_colours",
    "nice_ticks",
    "png_size",
    "response_figure",
    "signal_figure",
    "text_width",
]

# colours for kernels the palette file does not name (Okabe & Ito hues not used by kernels)
_SPARE_COLOURS = ("#E69F00", "#56B4E9", "#F0E442")


def data_colour() -> str:
    """Colour of the voxel's time series (``data_trace`` in colours.json)."""
    return str(colours()["data_trace"])


def _band_opacity() -> float:
    return float(colours()["condition_band_alpha"])


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


@lru_cache(maxsize=1)
def _text_measure():
    from matplotlib.font_manager import FontProperties
    from matplotlib.textpath import TextToPath

    return TextToPath(), FontProperties(family=FIGURE_FONT)


@lru_cache(maxsize=512)
def text_width(text: str, size: float) -> float:
    """Advance width of ``text`` at font size ``size`` in :data:`FIGURE_FONT` (logical
    units; measured by matplotlib with the font the PNG is drawn in).

    >>> round(text_width("tone", 10.0) / text_width("tone", 20.0), 3)
    0.5
    """
    if not text:
        return 0.0
    measure, props = _text_measure()
    p = props.copy()
    p.set_size(size)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # a glyph the font lacks is drawn as a box
        w, _h, _d = measure.get_text_width_height_descent(_clean(text), p, ismath=False)
    return float(w)


def _clean(text: str) -> str:
    """Text safe for XML 1.0: control characters become spaces."""
    return "".join(
        " "
        if ch < " " or ch == "\x7f" or ch in "\ufffe\uffff" or "\ud800" <= ch <= "\udfff"
        else ch
        for ch in str(text)
    )


_ANCHOR = {"start": "left", "middle": "center", "end": "right"}

#: A drawn figure is cyclic garbage (see :meth:`Figure.to_array`); the collector runs after
#: every this many figures. A full collection after every figure cost up to 75 ms each
#: with the program's modules loaded (a report of 6 marks: 2.4-2.7 s, 2.1 s with this);
#: the garbage of 8 figures is what a report holds at most between collections.
FIGURES_PER_COLLECTION = 8
_DRAWN = itertools.count(1)


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
        family = quoteattr(f"{FIGURE_FONT}, sans-serif")
        out = [
            f'<svg xmlns="http://www.w3.org/2000/svg" width="{w}" height="{h}" '
            f'viewBox="0 0 {w} {h}" font-family={family}>',
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
                    f'<text x="{_num(it.x)}" y="{_num(it.y)}" '
                    f'font-size="{_num(it.size)}" fill="{it.fill}" text-anchor="{anchor}" '
                    f'dominant-baseline="central"{rot}>{escape(_clean(it.text))}</text>'
                )
        out.append("</svg>")
        return "\n".join(out) + "\n"

    # ------------------------------------------------------------------------- PNG
    def to_array(self, scale: float = 1.0) -> np.ndarray:
        """Draw with matplotlib (Agg) to an RGB uint8 array of shape
        ``(round(H*scale), round(W*scale), 3)``."""
        if not (scale > 0 and math.isfinite(scale)):
            raise ValueError("scale must be a positive number")
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure as MplFigure
        from matplotlib.lines import Line2D
        from matplotlib.patches import Rectangle

        W = max(1, round(self.width * scale))
        H = max(1, round(self.height * scale))
        # one logical unit = one point at 72 * scale dots per inch, so sizes and line
        # widths in logical units are matplotlib's points; the small margin keeps Agg
        # from rounding the canvas one pixel short
        dpi = 72.0 * scale
        pad = 0.25
        fig = MplFigure(figsize=((W + pad) / dpi, (H + pad) / dpi), dpi=dpi)
        fig.patch.set_facecolor(self.background)
        canvas = FigureCanvasAgg(fig)
        ax = fig.add_axes((0.0, 0.0, 1.0, 1.0))
        ax.set_axis_off()
        ax.set_xlim(0.0, (W + pad) / scale)
        ax.set_ylim(H / scale, -pad / scale)  # the pad lies above the top row, unseen
        for it in self.items:
            if isinstance(it, Rect):
                ax.add_patch(
                    Rectangle(
                        (it.x, it.y),
                        it.w,
                        it.h,
                        facecolor=it.fill,
                        alpha=it.opacity,
                        linewidth=0,
                        snap=False,  # a half-covered pixel is blended, as in the SVG
                        clip_on=False,
                    )
                )
            elif isinstance(it, Polyline):
                xs = [p[0] for p in it.points]
                ys = [p[1] for p in it.points]
                ax.add_line(
                    Line2D(
                        xs,
                        ys,
                        color=it.stroke,
                        linewidth=it.width,
                        alpha=it.opacity,
                        solid_joinstyle="round",
                        solid_capstyle="round",
                        clip_on=False,
                    )
                )
            elif isinstance(it, Text):
                ax.text(
                    it.x,
                    it.y,
                    _clean(it.text),
                    fontsize=it.size,
                    color=it.fill,
                    family=FIGURE_FONT,
                    ha=_ANCHOR[it.anchor],
                    va="center",
                    rotation=-it.rotate,
                    rotation_mode="anchor",
                    parse_math=False,
                    clip_on=False,
                )
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # a glyph the font lacks is drawn as a box
            canvas.draw()
        out = np.ascontiguousarray(np.asarray(canvas.buffer_rgba())[:H, :W, :3])
        # matplotlib's artists and transforms refer to each other: a drawn figure is cyclic
        # garbage that Python's collector reaches late, so a report of many figures would
        # pile them up (tests/core/test_report_faults.py measures the peak); free it every
        # few figures
        fig.clear()
        del fig, canvas, ax
        if next(_DRAWN) % FIGURES_PER_COLLECTION == 0:
            gc.collect()
        return out

    def to_png(self, scale: float = 1.0, width_px: int | None = None) -> bytes:
        """PNG bytes at ``scale`` device pixels per unit (or scaled to ``width_px`` wide)."""
        if width_px is not None:
            scale = float(width_px) / self.width
        from PIL import Image

        buf = io.BytesIO()
        Image.fromarray(self.to_array(scale), "RGB").save(buf, format="PNG")
        return buf.getvalue()

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


def png_size(png: bytes) -> tuple[int, int]:
    """``(width, height)`` from a PNG's IHDR chunk (PNG specification, 11.2.2).

    >>> png_size(Figure(3, 2).to_png())
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
    band_opacity: float = 0.22,
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
    border = [(p.x, p.y), (p.x + p.w, p.y), (p.x + p.w, p.y + p.h), (p.x, p.y + p.h), (p.x, p.y)]
    fig.add(Polyline(border, "#555555", 1.0))
    fig.add(Text(p.x - 54, p.y + p.h / 2, ylabel, font + 1, "#222222", "middle", rotate=-90))


def signal_figure(
    volume_times: np.ndarray,
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
    volume_times : ndarray (T,)
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
        End of the time axis (default: last volume time plus one TR).
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
    t = np.asarray(volume_times, dtype=float).reshape(-1)
    y = np.asarray(y, dtype=float).reshape(-1)
    colours = {**kernel_colours(), **(colours or {})}
    spare = iter(_SPARE_COLOURS * 4)
    kcol = {}
    for name, _f, _r in fits:
        kcol[name] = colours.get(name) or next(spare)
    conds = list(conditions)
    cond_colour = condition_colour_map(c.name for c in conds)

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
    entries += [(n, cond_colour[n], "band") for n in cond_colour]  # the colours' order
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
