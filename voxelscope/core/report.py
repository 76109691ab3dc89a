"""Reports to hand around: one standalone HTML page, a CSV per voxel and the figures.

:func:`write_report` is used by ``voxelscope report`` and by the window. For one voxel it
writes::

    DIR/report.html     standalone page (images embedded as data: URIs, no outside files)
    DIR/timeseries.csv  time_s, signal, fitted_<kernel>, residual_<kernel>; one row per volume
    DIR/figure.png      the figure (also DIR/figure.svg)

For marks, one section per mark and per mark ``DIR/NN-<slug>.csv``, ``.png`` and ``.svg``
(``NN`` the mark's number, ``slug`` its title in plain lower-case letters).

Every number comes from :meth:`voxelscope.core.model.Analysis.fit_voxel`, the function
the window and ``voxelscope fit`` use. Inputs are never modified; existing outputs are
not overwritten unless ``force=True``, and every file is written atomically.
"""

from __future__ import annotations

import base64
import datetime as _dt
import html
import math
import os
import re
import unicodedata
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any

import numpy as np

from .atomic import check_outputs, publish_folder, write_bytes, write_text
from .errors import InputError, VoxelscopeError
from .events import shift_conditions
from .figure import signal_figure
from .marks import Mark
from .model import Analysis, ModelSettings, VoxelFits
from .noise import AR_ORDER
from .numfmt import MISSING, format_seconds, format_value, format_xyz
from .session import file_digest

__all__ = [
    "ReportResult",
    "ReportSection",
    "format_csv",
    "slugify",
    "write_report",
]


@dataclass
class ReportSection:
    """One voxel of a report: where it is, its fits and the files written for it."""

    number: int
    title: str
    note: str
    ijk: tuple[int, int, int] | None
    xyz_mm: tuple[float, float, float] | None
    fits: VoxelFits | None = None
    checks: dict[str, dict[str, Any]] = field(default_factory=dict)
    checks_note: str = ""
    error: str = ""
    csv: Path | None = None
    png: Path | None = None
    svg: Path | None = None
    png_bytes: bytes = b""
    responses: list[tuple[str, bytes]] = field(default_factory=list)
    region: str = ""  # the atlas region at the voxel (empty without an atlas)


@dataclass
class ReportResult:
    """What :func:`write_report` wrote."""

    directory: Path
    html: Path
    files: list[Path]
    sections: list[ReportSection]
    warnings: list[str]


def slugify(text: str, limit: int = 40) -> str:
    """Plain lower-case ASCII letters, digits and hyphens; ``mark`` when nothing is left.

    >>> slugify("Hearing area, right: late peak")
    'hearing-area-right-late-peak'
    >>> slugify("  ")
    'mark'
    """
    t = unicodedata.normalize("NFKD", str(text)).encode("ascii", "ignore").decode("ascii")
    t = re.sub(r"[^a-z0-9]+", "-", t.lower()).strip("-")
    t = t[:limit].rstrip("-")
    return t or "mark"


def format_csv(fits: VoxelFits) -> str:
    """Time series CSV of one voxel: ``time_s, signal`` and per kernel ``fitted_<k>``,
    ``residual_<k>``; one row per volume, full precision.

    >>> from voxelscope.core.events import Condition
    >>> a = Analysis([Condition("tone", [5.0], [10.0])], n_volumes=20, tr=2.0)
    >>> y = np.arange(20.0) % 7
    >>> text = format_csv(a.fit_voxel(y, ModelSettings(kernels=("gamma",))))
    >>> text.splitlines()[0]
    'time_s,signal,fitted_gamma,residual_gamma'
    >>> len(text.splitlines())
    21
    """
    t = fits.fits[0].design.volume_times if fits.fits else np.arange(len(fits.y), dtype=float)
    cols = [("time_s", np.asarray(t, float)), ("signal", np.asarray(fits.y, float))]
    for f in fits.fits:
        cols.append((f"fitted_{f.kernel}", f.fitted))
        cols.append((f"residual_{f.kernel}", f.residuals))
    lines = [",".join(name for name, _ in cols)]
    for i in range(len(fits.y)):
        lines.append(",".join(repr(float(v[i])) for _, v in cols))
    return "\n".join(lines) + "\n"


# ------------------------------------------------------------------------------- helpers


def _fmt(v: float | None, kind: str) -> str:
    return format_value(kind, v)


def _value_attr(v: float | None) -> str:
    if v is None or not math.isfinite(float(v)):
        return ""
    return f' data-value="{float(v)!r}"'


def _e(text: Any) -> str:
    return html.escape(str(text), quote=True)


def _mm(run: Any, ijk: Sequence[int]) -> tuple[float, float, float]:
    v = np.asarray(run.voxel_to_mm(tuple(int(i) for i in ijk)), dtype=float).reshape(-1)
    return (float(v[0]), float(v[1]), float(v[2]))


def _checks_for(
    analysis: Analysis, settings: ModelSettings, fits: VoxelFits, run: Any, ijk
) -> tuple[dict[str, dict[str, Any]], str]:
    from .checks import voxel_checks

    out: dict[str, dict[str, Any]] = {}
    try:
        for f in fits.fits:
            c = voxel_checks(analysis, settings, f.kernel, fits.y, run=run, ijk=tuple(ijk))
            out[f.kernel] = c.to_json()
    except VoxelscopeError as err:  # the data or model at this voxel (said in the report)
        return out, f"checks could not be run here: {err}"
    return out, ""


_CHECK_NUMBERS = (  # key, label, kind of number (core/numfmt.py)
    ("durbin_watson", "Durbin-Watson", "t"),
    ("ar1", "lag-1 autocorrelation of residuals", "r"),
    ("ljung_box_p", "Ljung-Box p", "p"),
    ("whitened_ljung_box_p", "Ljung-Box p, model's residuals", "p"),
    ("tsnr", "tSNR", "value"),
    ("cooks_distance_max", "largest Cook's distance", "value"),
    ("t_without_influential", "t without influential volumes", "t"),
    ("best_shift_s", "onset shift with the largest t (s)", "s"),
    ("peak_latency_s", "peak latency (s)", "s"),
    ("drift_fraction", "drift fraction", "r"),
)


# ---------------------------------------------------------------------------------- HTML

# the page is set in the figures' font (palette.FIGURE_FONT), as the window's plots are
_STYLE = """
body{font-family:"DejaVu Sans",system-ui,sans-serif;max-width:1000px;margin:2em auto;padding:0 1em;
color:#1f1f1f;background:#fff;line-height:1.45}
h1{font-size:1.6em;margin-bottom:.2em}h2{border-bottom:1px solid #ddd;padding-bottom:.2em;
margin-top:2em}
.caution{background:#fff7e0;border-left:4px solid #e69f00;padding:.5em .8em}
table{border-collapse:collapse;margin:.6em 0}th,td{padding:.25em .7em;border-bottom:1px solid
#e4e4e4;text-align:left}td.num{text-align:right;font-variant-numeric:tabular-nums}
img{max-width:100%;height:auto;border:1px solid #e4e4e4}
.note{white-space:pre-wrap;font-style:italic}.warn{color:#8a4b00}
.swatch{display:inline-block;width:.9em;height:.9em;margin-right:.4em;vertical-align:-.1em}
code{font-size:.95em}.muted{color:#5a5a5a}
"""


def _fits_table(fits: VoxelFits, noise: str, colours: Mapping[str, str]) -> str:
    has_f = any(f.f is not None or f.f_df is not None for f in fits.fits)
    head = ["kernel", "contrast", "estimate", "variance", "t", "df", "p", "R²"]
    if noise == "ar1":
        head.append("rho")
    if has_f:
        head += ["F", "F df", "F p"]
    rows = ["<table class='fits'><thead><tr>" + "".join(f"<th>{_e(h)}</th>" for h in head)]
    rows.append("</tr></thead><tbody>")
    for f in fits.fits:
        colour = colours.get(f.kernel, "#777777")
        cells = [
            f"<td class='kernel'><span class='swatch' style='background:{colour}'></span>"
            f"{_e(f.kernel)}</td>",
            f"<td class='contrast'>{_e(f.contrast)}</td>",
            f"<td class='num estimate'{_value_attr(f.estimate)}>"
            f"{_fmt(f.estimate, 'estimate')}</td>",
            f"<td class='num variance'{_value_attr(f.variance)}>"
            f"{_fmt(f.variance, 'variance')}</td>",
            f"<td class='num t'{_value_attr(f.t)}>{_fmt(f.t, 't')}</td>",
            f"<td class='num df' data-value='{f.df}'>{_fmt(f.df, 'df')}</td>",
            f"<td class='num p'{_value_attr(f.p)}>{_fmt(f.p, 'p')}</td>",
            f"<td class='num r2'{_value_attr(f.r2)}>{_fmt(f.r2, 'r')}</td>",
        ]
        if noise == "ar1":
            cells.append(f"<td class='num rho'{_value_attr(f.rho)}>{_fmt(f.rho, 'r')}</td>")
        if has_f:
            fdf = f"{f.f_df[0]}, {f.f_df[1]}" if f.f_df else MISSING
            cells.append(f"<td class='num f'{_value_attr(f.f)}>{_fmt(f.f, 'F')}</td>")
            cells.append(f"<td class='num fdf'>{fdf}</td>")
            cells.append(f"<td class='num fp'{_value_attr(f.f_p)}>{_fmt(f.f_p, 'p')}</td>")
        rows.append(f"<tr data-kernel='{_e(f.kernel)}'>" + "".join(cells) + "</tr>")
    rows.append("</tbody></table>")
    return "\n".join(rows)


def _response_pngs(
    analysis: Analysis,
    settings: ModelSettings,
    sec: ReportSection,
    colours: Mapping[str, str],
    size: tuple[float, float],
    scale: float,
) -> list[tuple[str, bytes]]:
    """One peri-event response figure per condition of the contrast (at most four)."""
    from .figure import response_figure
    from .response import peri_event_response
    from .timing import fir_estimate

    assert sec.fits is not None
    first = sec.fits.fits[0]
    w = first.result.weights
    names = [
        c
        for c in analysis.condition_names
        if np.any(w[list(first.design.condition_columns.get(c, ()))] != 0)
    ] or [analysis.condition_names[0]]
    out = []
    for cond in names[:4]:
        try:
            by_kernel = {
                f.kernel: f.result.ar[:, 0] for f in sec.fits.fits if f.result.ar is not None
            }
            r = peri_event_response(
                analysis, settings, sec.fits.y, cond, ar_by_kernel=by_kernel or None
            ).to_json()
        except VoxelscopeError:
            continue
        try:
            fir = fir_estimate(
                analysis, settings, sec.fits.y, cond, ar=next(iter(by_kernel.values()), None)
            ).to_json()
        except VoxelscopeError:
            fir = None
        fig = response_figure(
            r,
            fir,
            title=f"{sec.title}: response to {cond}",
            width=size[0],
            height=max(320.0, 0.7 * size[1]),
            colours=dict(colours),
        )
        out.append((cond, fig.to_png(scale=scale)))
    return out


def _checks_html(sec: ReportSection) -> str:
    out = ["<h3>Checks</h3>"]
    if sec.checks_note:
        out.append(f"<p class='muted'>{_e(sec.checks_note)}</p>")
    for kernel, c in sec.checks.items():
        flags = c.get("flags") or []
        texts = [fl.get("text", str(fl)) if isinstance(fl, dict) else str(fl) for fl in flags]
        out.append(f"<h4>{_e(kernel)}</h4>")
        if texts:
            out.append("<ul class='flags'>" + "".join(f"<li>{_e(t)}</li>" for t in texts))
            out.append("</ul>")
        else:
            out.append("<p class='muted'>No flags.</p>")
        nums = []
        for key, label, spec in _CHECK_NUMBERS:
            v = c.get(key)
            if isinstance(v, (int, float)) and not isinstance(v, bool):
                text = format_value(spec, v, signed=key == "best_shift_s")
                nums.append(f"<tr><td>{_e(label)}</td><td class='num'>{text}</td></tr>")
        if nums:
            out.append("<table class='checks'>" + "".join(nums) + "</table>")
    return "\n".join(out)


def _section_html(sec: ReportSection, settings: ModelSettings, colours) -> str:
    anchor = f"sec-{sec.number}"
    out = [f"<section id='{anchor}'>", f"<h2>{sec.number}. {_e(sec.title)}</h2>"]
    if sec.note:
        out.append(f"<p class='note'>{_e(sec.note)}</p>")
    where = []
    if sec.ijk is not None:
        where.append("voxel ({}, {}, {})".format(*sec.ijk))
    if sec.xyz_mm is not None:
        where.append(f"world {format_xyz(sec.xyz_mm)} mm")
    if sec.region:
        where.append(f"region: {sec.region}")
    if where:
        out.append(f"<p>{_e(', '.join(where))}</p>")
    if sec.error:
        out.append(f"<p class='warn'>{_e(sec.error)}</p></section>")
        return "\n".join(out)
    assert sec.fits is not None
    for w in sec.fits.warnings:
        out.append(f"<p class='warn'>{_e(w)}</p>")
    b64 = base64.b64encode(sec.png_bytes).decode("ascii")
    alt = f"signal, fitted signals and residuals at {sec.title}"
    out.append(f"<figure><img alt='{_e(alt)}' src='data:image/png;base64,{b64}'>")
    shift = (
        f" Onsets shifted by {format_seconds(settings.onset_shift_s, signed=True)} as in the model."
        if settings.onset_shift_s
        else ""
    )
    out.append(
        "<figcaption>Time series (grey), each kernel's fitted signal (colour) and the "
        f"residuals below; shaded bands are the condition blocks.{_e(shift)}</figcaption>"
        "</figure>"
    )
    for cond, png in sec.responses:
        b64 = base64.b64encode(png).decode("ascii")
        alt = f"response around the onsets of {cond} at {sec.title}"
        out.append(f"<figure><img alt='{_e(alt)}' src='data:image/png;base64,{b64}'>")
        out.append(
            f"<figcaption>Response around the onsets of <b>{_e(cond)}</b>: the data averaged "
            "over events relative to the seconds before each onset (shaded), with its 95% "
            "confidence band (thin lines), each kernel's prediction averaged the same way "
            "and the FIR estimate.</figcaption></figure>"
        )
    out.append(_fits_table(sec.fits, settings.noise, colours))
    out.append(_checks_html(sec))
    names = [p.name for p in (sec.csv, sec.png, sec.svg) if p is not None]
    out.append(
        "<p class='muted'>Files beside this page: "
        + ", ".join(f"<code>{_e(n)}</code>" for n in names)
        + "</p>"
    )
    out.append("</section>")
    return "\n".join(out)


#: Model settings in words for people: field -> label (the report's Model section).
SETTING_LABELS = {
    "kernels": "Kernels",
    "contrast": "Contrast",
    "noise": "Noise model",
    "highpass_s": "High-pass cut-off",
    "confound_columns": "Confound columns",
    "onset_shift_s": "Onset shift",
    "derivatives": "Kernel derivatives",
    "fir_window_s": "FIR window",
    "fir_bin_s": "FIR bin width",
    "drop_volumes": "Volumes dropped at the start",
    "censor_fd_mm": "Framewise-displacement limit",
    "modulators": "Parametric modulators",
    "orthogonalize": "Modulators orthogonalised",
}

#: Noise models in words (the report; the window's short labels are noise.NOISE_LABELS).
NOISE_WORDS = {
    "ols": "ordinary least squares",
    "ar1": "AR(1) prewhitening, rho from each voxel's own residuals",
    "arp": f"AR({AR_ORDER}) prewhitening, coefficients bias-corrected and smoothed in space; "
    "df of t effective (the coefficients' uncertainty counted)",
}

_DERIVATIVES = {0: "none", 1: "time derivative", 2: "time and dispersion derivatives"}


def _setting_text(name: str, v: Any, analysis: Analysis) -> str:
    """One model setting's value in words, numbers by the one rule (core/numfmt.py)."""
    if name == "contrast":
        return v if v is not None else f"{analysis.default_contrast()} (the first condition)"
    if name == "noise":
        return NOISE_WORDS.get(v, str(v))
    if name == "confound_columns":
        if v is None:
            v = analysis.confound_names
        return ", ".join(v) if v else "none"
    if name == "derivatives":
        return _DERIVATIVES.get(v, str(v))
    if name == "fir_bin_s" and v is None:
        return f"{format_seconds(analysis.tr)} (one TR)"
    if name == "highpass_s" and v is None:
        return "none (no drift columns)"
    if name == "censor_fd_mm":
        return "none" if v is None else f"{format_value('mm', v)} mm (volumes above it left out)"
    if name == "onset_shift_s":
        return format_seconds(v, signed=True) if v else "none"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, tuple):
        return ", ".join(v) if v else "none"
    if name.endswith("_s") and isinstance(v, (int, float)):
        return format_seconds(v)
    return str(v)


def _settings_rows(settings: ModelSettings, analysis: Analysis) -> list[tuple[str, str]]:
    """The Model section's rows, in words: the run's TR, volumes and conditions, then
    every model setting (:data:`SETTING_LABELS`).

    >>> from voxelscope.core.events import Condition
    >>> a = Analysis([Condition("tone", [5.0], [10.0])], n_volumes=30, tr=2.0)
    >>> rows = dict(_settings_rows(ModelSettings(noise="ols"), a))
    >>> rows["Noise model"], rows["High-pass cut-off"], rows["FIR bin width"], rows["TR"]
    ('ordinary least squares', '128 s', '2 s (one TR)', '2 s')
    """
    rows = [("TR", format_seconds(analysis.tr)), ("Volumes", str(analysis.n_volumes))]
    rows.append(("Conditions", ", ".join(analysis.condition_names)))
    for f in fields(ModelSettings):
        label = SETTING_LABELS.get(f.name, f.name.replace("_", " ").capitalize())
        rows.append((label, _setting_text(f.name, getattr(settings, f.name), analysis)))
    ex = analysis.excluded_volumes(settings)
    if ex:  # every number in the report leaves these volumes out
        parts = [f"{v} ({why})" for v, why in list(ex.items())[:20]]
        more = f" and {len(ex) - 20} more" if len(ex) > 20 else ""
        rows.append(("Volumes left out", f"{len(ex)}: " + "; ".join(parts) + more))
    return rows


def _page(
    title: str,
    sections: list[ReportSection],
    settings: ModelSettings,
    analysis: Analysis,
    inputs: list[tuple[str, Path, str, int]],
    warnings: list[str],
    colours: Mapping[str, str],
) -> str:
    """The whole page as one string (small reports; :func:`write_report` streams it)."""
    body = "".join(_section_html(s, settings, colours) + "\n" for s in sections)
    return _page_head(title, sections) + body + _page_tail(settings, analysis, inputs, warnings)


def _page_head(title: str, sections: list[ReportSection]) -> str:
    from voxelscope import RESEARCH_CAUTION, __version__

    now = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
    out = [
        "<!DOCTYPE html>",
        "<html lang='en'><head><meta charset='utf-8'>",
        "<meta name='viewport' content='width=device-width, initial-scale=1'>",
        f"<title>{_e(title)}</title><style>{_STYLE}</style></head><body>",
        f"<header><h1>{_e(title)}</h1>",
        f"<p class='caution'>{_e(RESEARCH_CAUTION)}</p>",
        f"<p class='muted'>Made {_e(now)} by voxelscope {_e(__version__)}.</p></header>",
    ]
    if len(sections) > 1:
        out.append("<nav><ol>")
        for s in sections:
            out.append(f"<li><a href='#sec-{s.number}'>{_e(s.title)}</a></li>")
        out.append("<li><a href='#model'>Model</a></li><li><a href='#inputs'>Input files</a></li>")
        out.append("</ol></nav>")
    return "\n".join(out) + "\n"


def _model_inputs_warnings_html(
    rows: Iterable[tuple[str, str]],
    inputs: list[tuple[str, Path, str, int]],
    warnings: Iterable[str],
) -> list[str]:
    """The Model, Input files and Warnings sections of a report page, as HTML lines
    (shared by the one-run and the several-run reports)."""
    out = ["<section id='model'><h2>Model</h2><table class='settings'>"]
    out += [f"<tr><th>{_e(k)}</th><td>{_e(v)}</td></tr>" for k, v in rows]
    out.append("</table></section>")
    out.append("<section id='inputs'><h2>Input files</h2><table class='inputs'>")
    out.append("<tr><th>role</th><th>file</th><th>bytes</th><th>SHA-256</th></tr>")
    for role, path, digest, size in inputs:
        out.append(
            f"<tr><td>{_e(role)}</td><td>{_e(path.name)}</td><td class='num'>{size}</td>"
            f"<td><code class='sha256'>{_e(digest)}</code></td></tr>"
        )
    out.append("</table></section>")
    warnings = list(warnings)
    if warnings:
        out.append("<section id='warnings'><h2>Warnings</h2><ul>")
        out += [f"<li class='warn'>{_e(w)}</li>" for w in warnings]
        out.append("</ul></section>")
    return out


def _page_tail(
    settings: ModelSettings,
    analysis: Analysis,
    inputs: list[tuple[str, Path, str, int]],
    warnings: list[str],
) -> str:
    from voxelscope import RESEARCH_CAUTION, __version__

    out = _model_inputs_warnings_html(_settings_rows(settings, analysis), inputs, warnings)
    out.append(
        f"<footer><p class='caution'>{_e(RESEARCH_CAUTION)}</p>"
        f"<p class='muted'>voxelscope {_e(__version__)}</p></footer>"
    )
    out.append("</body></html>")
    return "\n".join(out) + "\n"


# ------------------------------------------------------------------------------ writing

#: Reports with more sections than this keep no fits in the returned sections.
_KEEP_SECTIONS = 50


def write_report(
    out_dir: str | os.PathLike[str],
    run: Any,
    analysis: Analysis,
    settings: ModelSettings,
    *,
    voxel: Sequence[int] | None = None,
    marks: Iterable[Mark] | None = None,
    inputs: Mapping[str, str | os.PathLike[str] | None] | None = None,
    force: bool = False,
    scale: float = 2.0,
    size: tuple[float, float] = (900.0, 560.0),
    checks: bool = True,
    title: str | None = None,
    warnings: Sequence[str] = (),
    progress: Callable[[float], bool | None] | None = None,
    atlas: Any = None,
) -> ReportResult:
    """Write a report for one voxel or for every mark.

    Sections are computed and written one at a time (memory stays bounded for any number of
    marks; with more than 50, the returned sections keep no fits); everything goes into a
    staging folder that is moved into place at the end, so an interrupted report (error,
    full disk, cancel) leaves no partial folder.

    Parameters
    ----------
    out_dir : path-like
        Output folder, created when missing.
    run : Run
        Gives ``timeseries(ijk)``, ``voxel_to_mm``, ``mm_to_voxel``, ``check_voxel`` and
        ``path`` (see :mod:`voxelscope.core.run`).
    analysis : Analysis
    settings : ModelSettings
    voxel : (i, j, k), optional
        One voxel. Give exactly one of ``voxel`` and ``marks``.
    marks : iterable of Mark, optional
        One section per mark; a mark outside the grid gets a section saying so.
    inputs : mapping role -> path, optional
        Input files listed with their SHA-256 (default: the run). None values are skipped.
    force : bool
        Overwrite existing outputs (each written atomically). Without it nothing is written
        when any output exists.
    scale : float
        PNG pixels per figure unit; the PNG is ``round(size * scale)`` pixels.
    size : (width, height)
        Figure size in units (CSS pixels).
    checks : bool
        Add the diagnostics and flags of :func:`voxelscope.core.checks.voxel_checks`.
    title : str, optional
    warnings : sequence of str
        Extra warnings to list (for example from loading the inputs).
    progress : callable, optional
        ``progress(fraction)`` after each section; returning False cancels
        (:class:`voxelscope.core.errors.Cancelled`), leaving nothing behind.
    atlas : Atlas, optional
        Name each section's region (:mod:`voxelscope.core.atlas`, at the voxel's centre).

    Returns
    -------
    ReportResult
    """
    if (voxel is None) == (marks is None):
        raise InputError("a report needs either one voxel or a list of marks")
    if not (isinstance(scale, (int, float)) and 0 < scale <= 16 and math.isfinite(scale)):
        raise InputError(f"the figure scale must be between 0 and 16, not {scale}")
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InputError(f"{out} is a file, not a folder; give a folder for the report")

    run_path = Path(getattr(run, "path", "run"))
    input_paths = {"run": run_path, **{k: v for k, v in (inputs or {}).items() if v is not None}}
    all_warnings = list(warnings) + [w for w in analysis.warnings if w not in warnings]

    # what to report
    sections: list[ReportSection] = []
    if voxel is not None:
        ijk = tuple(int(v) for v in run.check_voxel(tuple(int(v) for v in voxel)))
        sec = ReportSection(1, f"voxel ({ijk[0]}, {ijk[1]}, {ijk[2]})", "", ijk, _mm(run, ijk))
        sec.csv, sec.png, sec.svg = (
            out / "timeseries.csv",
            out / "figure.png",
            out / "figure.svg",
        )
        sections.append(sec)
    else:
        for n, m in enumerate(marks or (), start=1):
            title_n = m.title or f"Mark {n}"
            sec = ReportSection(n, title_n, m.note, None, m.xyz_mm)
            try:
                sec.ijk = tuple(int(v) for v in run.mm_to_voxel(m.xyz_mm))
            except InputError as err:
                sec.error = f"mark {n} '{title_n}' cannot be reported: {err}"
                all_warnings.append(sec.error)
                sections.append(sec)
                continue
            stem = f"{n:02d}-{slugify(title_n)}"
            sec.csv, sec.png, sec.svg = (
                out / f"{stem}.csv",
                out / f"{stem}.png",
                out / f"{stem}.svg",
            )
            sections.append(sec)
        if not sections:
            raise InputError("the marks list is empty; add marks or report one voxel")
    if atlas is not None:  # the region at each voxel's centre, as the window's readout
        for sec in sections:
            at = _mm(run, sec.ijk) if sec.ijk is not None else sec.xyz_mm
            if at is not None:
                sec.region = f"{atlas.region_at(at).text} ({atlas.name})"

    html_path = out / "report.html"
    outputs = [html_path] + [p for s in sections for p in (s.csv, s.png, s.svg) if p is not None]
    # the one output guard: never an input (after links), existing files only with force
    check_outputs(outputs, force=force, inputs=list(input_paths.values()))

    inputs_rows = []
    for role, p in input_paths.items():
        path = Path(p)
        if path.is_file():
            inputs_rows.append((role, path, file_digest(path), path.stat().st_size))
        elif path.is_dir():  # a run given as a folder: list it without a digest
            inputs_rows.append((role, path, "(folder)", 0))
    page_title = title or f"voxelscope report: {run_path.name}"

    from .figure import kernel_colours

    colours = kernel_colours()
    conditions = shift_conditions(analysis.conditions, settings.onset_shift_s)
    keep = len(sections) <= _KEEP_SECTIONS  # large reports: nothing kept once written

    def write_section(sec: ReportSection, folder: Path) -> list[Path]:
        y = run.timeseries(sec.ijk)
        noise = analysis.noise_at(run, sec.ijk, settings)  # the map's whitening (AR(p))
        sec.fits = analysis.fit_voxel(y, settings, noise)
        all_warnings.extend(f"{sec.title}: {w}" for w in sec.fits.warnings)
        if checks:
            sec.checks, sec.checks_note = _checks_for(analysis, settings, sec.fits, run, sec.ijk)
        else:
            sec.checks_note = "checks were not asked for"
        fig_title = sec.title
        if sec.ijk is not None and voxel is None:
            fig_title += " - voxel ({}, {}, {})".format(*sec.ijk)
        fig = signal_figure(
            sec.fits.fits[0].design.volume_times,
            sec.fits.y,
            [(f.kernel, f.fitted, f.residuals) for f in sec.fits.fits],
            conditions,
            title=fig_title,
            width=size[0],
            height=size[1],
            run_length_s=analysis.n_volumes * analysis.tr,
            colours=colours,
        )
        sec.png_bytes = fig.to_png(scale=scale)
        sec.responses = _response_pngs(analysis, settings, sec, colours, size, scale)
        names = (sec.csv.name, sec.png.name, sec.svg.name)  # type: ignore[union-attr]
        return [
            write_text(folder / names[0], format_csv(sec.fits)),
            write_bytes(folder / names[1], sec.png_bytes),
            write_text(folder / names[2], fig.to_svg()),
        ]

    # Everything is written into a staging folder beside the report and moved into place
    # at the end: a report stopped by an error, a full disk or Ctrl+C leaves nothing behind.
    def fill(staging: Path) -> list[Path]:
        staged: list[Path] = []
        with open(staging / html_path.name, "w", encoding="utf-8", newline="\n") as page:
            page.write(_page_head(page_title, sections))
            for n, sec in enumerate(sections):
                if progress is not None and progress(n / len(sections)) is False:
                    from .errors import Cancelled

                    raise Cancelled("the report was cancelled")
                if not sec.error:
                    staged += write_section(sec, staging)
                page.write(_section_html(sec, settings, colours) + "\n")
                sec.png_bytes = b""  # written: bounded memory however many marks
                sec.responses = []
                if not keep:
                    sec.fits, sec.checks = None, {}
            page.write(
                _page_tail(settings, analysis, inputs_rows, list(dict.fromkeys(all_warnings)))
            )
            page.flush()
            os.fsync(page.fileno())
        return [*staged, staging / html_path.name]

    written = publish_folder(out, fill, force=force)
    if progress is not None:
        progress(1.0)
    return ReportResult(out, html_path, written, sections, list(dict.fromkeys(all_warnings)))
