"""Reports for several runs of one subject: per-run and combined tables and figures.

:func:`write_runs_report` is the several-run counterpart of
:func:`voxelscope.core.report.write_report` (``voxelscope report RUN RUN ...`` and the
window). For one place (a voxel, a position in mm, or each mark) it writes::

    DIR/report.html           standalone page (images embedded), per-run and combined
    DIR/combined.csv          one row per run and kernel, then one combined row per kernel
    DIR/runs.png, runs.svg    each run's estimate with its 95 % interval, and the combined one
    DIR/<run>.csv/.png/.svg   each run's time series, fitted signals and residuals

For marks every file name starts with ``NN-<slug>-``. Every number comes from
:meth:`voxelscope.core.model.Analysis.fit_voxel` per run and
:func:`voxelscope.core.combine.combine_fits`; inputs are never modified, existing outputs
are kept unless ``force=True``, and every file is written atomically.
"""

from __future__ import annotations

import base64
import datetime as _dt
import math
import os
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .atomic import check_outputs, publish_folder, write_bytes, write_text
from .combine import CombinedFit, combine_fits, voxel_in_runs
from .errors import InputError
from .events import shift_conditions
from .figure import Figure, Polyline, Rect, Text, kernel_colours, nice_ticks, signal_figure
from .marks import Mark
from .model import Analysis, ModelSettings, VoxelFits
from .numfmt import format_value, format_xyz
from .report import (
    _STYLE,
    ReportSection,
    _checks_for,
    _checks_html,
    _e,
    _fits_table,
    _fmt,
    _model_inputs_warnings_html,
    _settings_rows,
    _value_attr,
    format_csv,
    slugify,
)
from .session import file_digest

__all__ = ["RunsReportResult", "RunsSection", "combined_csv", "runs_figure", "write_runs_report"]

#: Two-sided 95 % normal quantile for the intervals in the runs figure (from memory;
#: scipy.stats.norm.ppf(0.975) = 1.959963984540054).
_Z95 = 1.959963984540054


@dataclass
class RunsSection:
    """One place of a several-run report: each run's voxel and fits, and the combination."""

    number: int
    title: str
    note: str
    xyz_mm: tuple[float, float, float] | None
    voxels: list[tuple[int, int, int]] = field(default_factory=list)
    fits: list[VoxelFits] = field(default_factory=list)
    combined: list[CombinedFit] = field(default_factory=list)
    checks: list[ReportSection] = field(default_factory=list)
    error: str = ""
    prefix: str = ""
    png: dict[str, bytes] = field(default_factory=dict)
    region: str = ""  # the atlas region at the place (empty without an atlas)


@dataclass
class RunsReportResult:
    """What :func:`write_runs_report` wrote."""

    directory: Path
    html: Path
    files: list[Path]
    sections: list[RunsSection]
    warnings: list[str]


def combined_csv(labels: Sequence[str], fits: Sequence[VoxelFits], combined) -> str:
    """Rows ``run, kernel, contrast, beta, variance, t, df, p, q, q_p``: every run's fit,
    then the combined row per kernel (``run`` = ``combined``); full precision. The column
    ``beta`` holds the contrast estimate: a column's name is kept for the scripts that read it.

    >>> from voxelscope.core.events import Condition
    >>> a = Analysis([Condition("tone", [5.0], [10.0])], n_volumes=30, tr=2.0)
    >>> s = ModelSettings(kernels=("gamma",))
    >>> f = [a.fit_voxel(np.sin(np.arange(30.0) * k), s) for k in (1, 2)]
    >>> c = [combine_fits("gamma", "tone", ["a", "b"], [x.fits[0].estimate for x in f],
    ...      [x.fits[0].variance for x in f], [x.fits[0].df for x in f])]
    >>> combined_csv(["a", "b"], f, c).splitlines()[-1].split(",")[:2]
    ['combined', 'gamma']
    """

    def num(v: Any) -> str:
        return "" if v is None or not math.isfinite(float(v)) else repr(float(v))

    lines = ["run,kernel,contrast,beta,variance,t,df,p,q,q_p"]
    for label, vf in zip(labels, fits):
        for f in vf.fits:
            lines.append(
                ",".join(
                    [_csv_cell(label), f.kernel, _csv_cell(f.contrast)]
                    + [num(v) for v in (f.estimate, f.variance, f.t)]
                    + [str(f.df), num(f.p), "", ""]
                )
            )
    for c in combined:
        lines.append(
            ",".join(
                ["combined", c.kernel, _csv_cell(c.contrast)]
                + [num(v) for v in (c.estimate, c.variance, c.t)]
                + [f"{c.df:g}", num(c.p), num(c.q), num(c.q_p)]
            )
        )
    return "\n".join(lines) + "\n"


def _csv_cell(text: str) -> str:
    s = str(text)
    if any(ch in s for ch in ',"\n'):
        return '"' + s.replace('"', '""') + '"'
    return s


def runs_figure(
    labels: Sequence[str],
    combined: Sequence[CombinedFit],
    title: str = "",
    width: float = 900.0,
    colours: Mapping[str, str] | None = None,
) -> Figure:
    """Each run's contrast estimate with its 95 % interval (``estimate +- 1.96 sqrt(v)``) per
    kernel, one row per run and a last row for the combined estimate.

    >>> c = combine_fits("gamma", "tone", ["a", "b"], [1.0, 2.0], [0.1, 0.2], [50, 50])
    >>> "combined" in runs_figure(["a", "b"], [c]).to_svg()
    True
    """
    colours = {**kernel_colours(), **(colours or {})}
    rows = [*labels, "combined"]
    font = 11.0
    left = 24.0 + max(len(r) for r in rows) * 0.6 * font + 12
    right = 24.0
    top = 16.0
    row_h = 14.0 * max(1, len(combined)) + 16
    head = 24.0 if title else 0.0
    legend_h = 22.0
    plot_h = row_h * len(rows)
    fig_h = top + head + legend_h + plot_h + 44
    fig = Figure(width, fig_h)
    if title:
        fig.add(Text(16, top + 8, title, 13.0, "#111111", "start"))
    y0 = top + head
    # legend
    x = left
    for c in combined:
        col = colours.get(c.kernel, "#777777")
        fig.add(Polyline([(x, y0 + 8), (x + 20, y0 + 8)], col, 2.5))
        fig.add(Text(x + 26, y0 + 8, c.kernel, font, "#222222", "start"))
        x += 26 + 0.6 * font * len(c.kernel) + 18
    y0 += legend_h
    lo_hi: list[float] = [0.0]
    for c in combined:
        for r in c.runs:
            if r["estimate"] is not None and r["variance"] is not None:
                s = math.sqrt(r["variance"])
                lo_hi += [r["estimate"] - _Z95 * s, r["estimate"] + _Z95 * s]
        if c.estimate is not None and c.variance is not None:
            s = math.sqrt(c.variance)
            lo_hi += [c.estimate - _Z95 * s, c.estimate + _Z95 * s]
    lo, hi = min(lo_hi), max(lo_hi)
    if hi - lo < 1e-12:
        lo, hi = lo - 1, hi + 1
    pad = 0.05 * (hi - lo)
    lo, hi = lo - pad, hi + pad
    pw = width - left - right

    def px(v: float) -> float:
        return left + (v - lo) / (hi - lo) * pw

    fig.add(Rect(left, y0, pw, plot_h, "#ffffff"))
    ticks = nice_ticks(lo, hi, target=7)
    for v in ticks:
        xx = px(v)
        fig.add(Polyline([(xx, y0), (xx, y0 + plot_h)], "#eeeeee", 0.8))
        fig.add(Text(xx, y0 + plot_h + 13, f"{v:g}", font, "#333333", "middle"))
    fig.add(Polyline([(px(0.0), y0), (px(0.0), y0 + plot_h)], "#999999", 1.0))
    for i, row in enumerate(rows):
        ry = y0 + i * row_h
        if row == "combined":
            fig.add(Polyline([(left, ry), (left + pw, ry)], "#555555", 1.0))
        fig.add(Text(left - 8, ry + row_h / 2, row, font, "#222222", "end"))
        for k, c in enumerate(combined):
            if row == "combined":
                b, v = c.estimate, c.variance
            else:
                b, v = c.runs[i]["estimate"], c.runs[i]["variance"]
            yy = ry + 8 + 14.0 * k + 4
            col = colours.get(c.kernel, "#777777")
            if b is None or v is None:
                fig.add(Text(left + 4, yy, "undefined", 9.0, "#8a4b00", "start"))
                continue
            s = math.sqrt(v)
            fig.add(Polyline([(px(b - _Z95 * s), yy), (px(b + _Z95 * s), yy)], col, 2.0))
            size = 8.0 if row == "combined" else 6.0
            fig.add(Rect(px(b) - size / 2, yy - size / 2, size, size, col))
    border = [(left, y0), (left + pw, y0), (left + pw, y0 + plot_h), (left, y0 + plot_h)]
    fig.add(Polyline([*border, (left, y0)], "#555555", 1.0))
    fig.add(
        Text(
            left + pw / 2,
            fig_h - 12,
            "contrast estimate with 95 % interval",
            font + 1,
            "#222222",
            "middle",
        )
    )
    return fig


def _combined_table(combined: Sequence[CombinedFit], colours: Mapping[str, str]) -> str:
    head = ["kernel", "contrast", "estimate", "variance", "t", "df", "p", "Q", "Q p"]
    out = ["<table class='combined'><thead><tr>" + "".join(f"<th>{_e(h)}</th>" for h in head)]
    out.append("</tr></thead><tbody>")
    for c in combined:
        colour = colours.get(c.kernel, "#777777")
        cells = [
            f"<td class='kernel'><span class='swatch' style='background:{colour}'></span>"
            f"{_e(c.kernel)}</td>",
            f"<td class='contrast'>{_e(c.contrast)}</td>",
            f"<td class='num estimate'{_value_attr(c.estimate)}>"
            f"{_fmt(c.estimate, 'estimate')}</td>",
            f"<td class='num variance'{_value_attr(c.variance)}>"
            f"{_fmt(c.variance, 'variance')}</td>",
            f"<td class='num t'{_value_attr(c.t)}>{_fmt(c.t, 't')}</td>",
            f"<td class='num df' data-value='{c.df:g}'>{_fmt(c.df, 'df')}</td>",
            f"<td class='num p'{_value_attr(c.p)}>{_fmt(c.p, 'p')}</td>",
            f"<td class='num q'{_value_attr(c.q)}>{_fmt(c.q, 'Q')}</td>",
            f"<td class='num q_p'{_value_attr(c.q_p)}>{_fmt(c.q_p, 'p')}</td>",
        ]
        out.append(f"<tr data-kernel='{_e(c.kernel)}'>" + "".join(cells) + "</tr>")
    out.append("</tbody></table>")
    flags = [(c.kernel, f.text) for c in combined for f in c.flags]
    if flags:
        out.append("<ul class='flags'>")
        out += [f"<li>[{_e(k)}] {_e(t)}</li>" for k, t in flags]
        out.append("</ul>")
    else:
        out.append("<p class='muted'>The runs agree at this place; no flags.</p>")
    return "\n".join(out)


def _img(png: bytes, alt: str) -> str:
    b64 = base64.b64encode(png).decode("ascii")
    return f"<img alt='{_e(alt)}' src='data:image/png;base64,{b64}'>"


def _section_html(sec: RunsSection, labels: Sequence[str], settings: ModelSettings, colours) -> str:
    out = [f"<section id='sec-{sec.number}'>", f"<h2>{sec.number}. {_e(sec.title)}</h2>"]
    if sec.note:
        out.append(f"<p class='note'>{_e(sec.note)}</p>")
    where = [] if sec.xyz_mm is None else [f"world {format_xyz(sec.xyz_mm)} mm"]
    if sec.region:
        where.append(f"region: {sec.region}")
    if where:
        out.append(f"<p>{_e(', '.join(where))}</p>")
    if sec.error:
        out.append(f"<p class='warn'>{_e(sec.error)}</p></section>")
        return "\n".join(out)
    out.append("<h3>Combined across runs (fixed effects)</h3>")
    out.append(
        "<p class='muted'>Inverse-variance weighted estimate, variance 1/&Sigma;(1/v), "
        "t on &Sigma; df; Q is Cochran's heterogeneity statistic on (runs &minus; 1) df.</p>"
    )
    out.append(_combined_table(sec.combined, colours))
    out.append(
        f"<figure>{_img(sec.png['runs'], 'each run and the combined estimate')}"
        "<figcaption>Each run's contrast estimate with its 95 % interval, per kernel, and "
        "the combined estimate in the last row.</figcaption></figure>"
    )
    for label, ijk, vf, chk in zip(labels, sec.voxels, sec.fits, sec.checks):
        out.append(f"<h3 class='run'>{_e(label)}: voxel ({ijk[0]}, {ijk[1]}, {ijk[2]})</h3>")
        for w in vf.warnings:
            out.append(f"<p class='warn'>{_e(w)}</p>")
        out.append(f"<figure>{_img(sec.png[label], f'signal of {label}')}</figure>")
        out.append(_fits_table(vf, settings.noise, colours))
        if chk.checks or chk.checks_note:
            out.append(_checks_html(chk))
    out.append("</section>")
    return "\n".join(out)


def write_runs_report(
    out_dir: str | os.PathLike[str],
    runs: Sequence[Any],
    analyses: Sequence[Analysis],
    settings: ModelSettings,
    labels: Sequence[str],
    *,
    voxel: Sequence[int] | None = None,
    mm: Sequence[float] | None = None,
    marks: Iterable[Mark] | None = None,
    inputs: Sequence[tuple[str, str | os.PathLike[str] | None]] = (),
    force: bool = False,
    scale: float = 2.0,
    size: tuple[float, float] = (900.0, 560.0),
    checks: bool = True,
    title: str | None = None,
    warnings: Sequence[str] = (),
    atlas: Any = None,
) -> RunsReportResult:
    """Write a report of several runs for one place (``voxel`` or ``mm``) or every mark.

    Parameters
    ----------
    runs, analyses, labels : sequences, one entry per run
    settings : ModelSettings
    voxel : (i, j, k), optional
        The same index in every run (the runs must share a grid).
    mm : (x, y, z), optional
        A position; each run's nearest voxel.
    marks : iterable of Mark, optional
        One section per mark (by its position in mm).
    inputs : sequence of (role, path)
        Input files listed with their SHA-256 (the runs are always listed).
    force, scale, size, checks, title, warnings
        As for :func:`voxelscope.core.report.write_report`.
    atlas : Atlas, optional
        Name each section's region (:mod:`voxelscope.core.atlas`), at the section's
        position in mm (the first run's voxel centre for a voxel).

    Returns
    -------
    RunsReportResult
    """
    if sum(x is not None for x in (voxel, mm, marks)) != 1:
        raise InputError("a report needs one voxel, one position in mm or a list of marks")
    if not (isinstance(scale, (int, float)) and 0 < scale <= 16 and math.isfinite(scale)):
        raise InputError(f"the figure scale must be between 0 and 16, not {scale}")
    if not (len(runs) == len(analyses) == len(labels)) or not runs:
        raise InputError("give one analysis and one label per run")
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InputError(f"{out} is a file, not a folder; give a folder for the report")
    labels = list(labels)
    slugs = [slugify(lab, 30) for lab in labels]
    if len(set(slugs)) != len(slugs):
        slugs = [f"run{i + 1}-{s}" for i, s in enumerate(slugs)]
    input_rows: list[tuple[str, Path]] = [
        (f"run {lab}", Path(getattr(r, "path", "run"))) for lab, r in zip(labels, runs)
    ]
    input_rows += [(role, Path(p)) for role, p in inputs if p is not None]
    all_warnings = list(warnings)
    for lab, a in zip(labels, analyses):
        all_warnings += [f"{lab}: {w}" for w in a.warnings if w not in warnings]

    sections: list[RunsSection] = []
    if voxel is not None or mm is not None:
        places = voxel_in_runs(runs, voxel=voxel, mm=mm)
        ijk0 = places[0]
        xyz = tuple(float(v) for v in np.asarray(runs[0].voxel_to_mm(ijk0)).reshape(-1))
        name = (
            "voxel ({}, {}, {})".format(*ijk0)
            if voxel is not None
            else (
                f"position {format_xyz(mm)} mm"  # type: ignore[arg-type]
            )
        )
        sec = RunsSection(1, name, "", xyz, list(places))  # type: ignore[arg-type]
        sections.append(sec)
    else:
        for n, m in enumerate(marks or (), start=1):
            title_n = m.title or f"Mark {n}"
            sec = RunsSection(n, title_n, m.note, m.xyz_mm)
            sec.prefix = f"{n:02d}-{slugify(title_n)}-"
            try:
                sec.voxels = voxel_in_runs(runs, mm=m.xyz_mm)
            except InputError as err:
                sec.error = f"mark {n} '{title_n}' cannot be reported: {err}"
                all_warnings.append(sec.error)
            sections.append(sec)
        if not sections:
            raise InputError("the marks list is empty; add marks or report one voxel")

    if atlas is not None:  # the region at each place, as the window's readout
        for sec in sections:
            if sec.xyz_mm is not None:
                sec.region = f"{atlas.region_at(sec.xyz_mm).text} ({atlas.name})"

    html_path = out / "report.html"
    outputs = [html_path]
    for sec in sections:
        if sec.error:
            continue
        outputs += [out / f"{sec.prefix}combined.csv", out / f"{sec.prefix}runs.png"]
        outputs.append(out / f"{sec.prefix}runs.svg")
        for s in slugs:
            outputs += [out / f"{sec.prefix}{s}.{ext}" for ext in ("csv", "png", "svg")]
    resolved_inputs = {Path(os.path.abspath(p)) for _r, p in input_rows}
    for p in outputs:
        if Path(os.path.abspath(p)) in resolved_inputs:
            raise InputError(f"{p} is an input file; choose another output folder")
    check_outputs(outputs, force=force)

    colours = kernel_colours()
    texts: dict[Path, str] = {}
    blobs: dict[Path, bytes] = {}
    for sec in sections:
        if sec.error:
            continue
        for run, a, ijk, lab, slug in zip(runs, analyses, sec.voxels, labels, slugs):
            vf = a.fit_voxel(run.timeseries(ijk), settings, a.noise_at(run, ijk, settings))
            sec.fits.append(vf)
            all_warnings += [f"{sec.title}, {lab}: {w}" for w in vf.warnings]
            chk = ReportSection(sec.number, lab, "", tuple(ijk), None)
            if checks:
                chk.checks, chk.checks_note = _checks_for(a, settings, vf, run, ijk)
            sec.checks.append(chk)
            fig = signal_figure(
                vf.fits[0].design.volume_times,
                vf.y,
                [(f.kernel, f.fitted, f.residuals) for f in vf.fits],
                shift_conditions(a.conditions, settings.onset_shift_s),
                title=f"{sec.title} - {lab}, voxel ({ijk[0]}, {ijk[1]}, {ijk[2]})",
                width=size[0],
                height=size[1],
                run_length_s=a.n_volumes * a.tr,
                colours=colours,
            )
            sec.png[lab] = fig.to_png(scale=scale)
            blobs[out / f"{sec.prefix}{slug}.png"] = sec.png[lab]
            texts[out / f"{sec.prefix}{slug}.svg"] = fig.to_svg()
            texts[out / f"{sec.prefix}{slug}.csv"] = format_csv(vf)
        for i, first in enumerate(sec.fits[0].fits):
            per_run = [vf.fits[i] for vf in sec.fits]
            sec.combined.append(
                combine_fits(
                    first.kernel,
                    first.contrast,
                    labels,
                    [f.estimate for f in per_run],
                    [f.variance for f in per_run],
                    [f.df for f in per_run],
                )
            )
        fig = runs_figure(labels, sec.combined, title=f"{sec.title}: runs", width=size[0])
        sec.png["runs"] = fig.to_png(scale=scale)
        blobs[out / f"{sec.prefix}runs.png"] = sec.png["runs"]
        texts[out / f"{sec.prefix}runs.svg"] = fig.to_svg()
        texts[out / f"{sec.prefix}combined.csv"] = combined_csv(labels, sec.fits, sec.combined)

    rows = []
    for role, path in input_rows:
        if path.is_file():
            rows.append((role, path, file_digest(path), path.stat().st_size))
    page_title = title or f"voxelscope report: {len(runs)} runs"
    page = _page(page_title, sections, labels, runs, analyses, settings, rows, all_warnings)

    def fill(staging: Path) -> list[Path]:  # all or nothing (atomic.publish_folder)
        staged = [write_bytes(staging / p.name, b) for p, b in blobs.items()]
        staged += [write_text(staging / p.name, t) for p, t in texts.items()]
        return [*staged, write_text(staging / html_path.name, page)]

    written = publish_folder(out, fill, force=force)
    return RunsReportResult(out, html_path, written, sections, list(dict.fromkeys(all_warnings)))


def _page(
    title: str,
    sections: list[RunsSection],
    labels: Sequence[str],
    runs: Sequence[Any],
    analyses: Sequence[Analysis],
    settings: ModelSettings,
    inputs: list[tuple[str, Path, str, int]],
    warnings: list[str],
) -> str:
    from voxelscope import RESEARCH_CAUTION, __version__

    colours = kernel_colours()
    now = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
    out = [
        "<!DOCTYPE html>",
        "<html lang='en'><head><meta charset='utf-8'>",
        "<meta name='viewport' content='width=device-width, initial-scale=1'>",
        f"<title>{_e(title)}</title><style>{_STYLE}</style></head><body>",
        f"<header><h1>{_e(title)}</h1>",
        f"<p class='caution'>{_e(RESEARCH_CAUTION)}</p>",
        f"<p class='muted'>Made {_e(now)} by voxelscope {_e(__version__)}; "
        f"{len(runs)} runs fitted each on its own and combined by fixed effects.</p></header>",
    ]
    out.append("<section id='runs'><h2>Runs</h2><table class='runs'>")
    out.append(
        "<tr><th>run</th><th>file</th><th>TR (s)</th><th>volumes</th><th>conditions</th></tr>"
    )
    for lab, r, a in zip(labels, runs, analyses):
        out.append(
            f"<tr><td>{_e(lab)}</td><td>{_e(Path(str(getattr(r, 'path', ''))).name)}</td>"
            f"<td class='num'>{format_value('s', a.tr)}</td><td class='num'>{a.n_volumes}</td>"
            f"<td>{_e(', '.join(a.condition_names))}</td></tr>"
        )
    out.append("</table></section>")
    out += [_section_html(s, labels, settings, colours) for s in sections]
    out += _model_inputs_warnings_html(
        _settings_rows(settings, analyses[0])[3:], inputs, dict.fromkeys(warnings)
    )
    out.append(
        f"<footer><p class='caution'>{_e(RESEARCH_CAUTION)}</p>"
        f"<p class='muted'>voxelscope {_e(__version__)}</p></footer>"
    )
    out.append("</body></html>")
    return "\n".join(out) + "\n"
