"""``voxelscope fit``: fit one voxel under every kernel and print the numbers."""

from __future__ import annotations

import argparse
import csv
import io
import sys
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:  # imported where used: --help and start-up stay short
    from ..core.combine import CombinedFit

from ..core.jsonsafe import finite_or_none
from ..core.model import KernelFit, VoxelFits
from ..core.numfmt import count, format_seconds, format_value, format_xyz
from .common import (
    Loaded,
    add_atlas_args,
    add_model_args,
    add_voxel_args,
    companions_text,
    dump_json,
    excluded_json,
    print_warnings,
    voxel_from_args,
)
from .helptext import help_args
from .multirun import load_runs, run_paths, voxels_from_args

__all__ = [
    "checks_lines",
    "combine_voxel_fits",
    "fit_to_json",
    "format_combined_table",
    "format_table",
    "register",
]


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "fit",
        **help_args("fit"),
        help="fit one voxel under every kernel",
        description=(
            "Fit the GLM at one voxel under each kernel and print the contrast estimate, "
            "variance, t, df, p and R². With several runs of one subject, each run is fitted "
            "on its own and the runs are combined per kernel by fixed effects, with Cochran's Q "
            "for their agreement."
        ),
    )
    add_model_args(p, several_runs=True)
    add_voxel_args(p)
    add_atlas_args(p)
    p.add_argument(
        "--format",
        choices=("table", "json", "csv"),
        default="table",
        help="output format (default table)",
    )
    p.add_argument(
        "--checks", action="store_true", help="add diagnostics and plain-language flags to each fit"
    )
    p.set_defaults(handler=run_fit)


def _fmt(v, kind: str) -> str:
    return format_value(kind, v)


_TAIL_HEAD = {"two": "p(2-sided)", "positive": "p(t>0)", "negative": "p(t<0)"}
#: Header of the estimate's CSV column: its earlier name, kept for the scripts that read it.
_CSV_ESTIMATE = "beta"


def _tail_p(f: KernelFit, tail: str) -> float | None:
    return f.p if tail == "two" else finite_or_none(f.result.p_tail(tail))


def _neglog10p(f: KernelFit, tail: str) -> float | None:
    return finite_or_none(f.result.neglog10p(tail))


def _z(f: KernelFit) -> float | None:
    return finite_or_none(f.result.z) if f.t is not None else None


def format_table(fits: VoxelFits, noise: str, tail: str = "two") -> str:
    """Aligned, human-readable table, one row per kernel (p for ``tail``)."""
    head = ["kernel", "estimate", "variance", "t", "df", _TAIL_HEAD[tail], "R2"]
    if noise == "ar1":
        head.append("rho")
    rows = [head]
    for f in fits.fits:
        row = [
            f.kernel,
            _fmt(f.estimate, "estimate"),
            _fmt(f.variance, "variance"),
            _fmt(f.t, "t"),
            _fmt(f.df, "df"),
            _fmt(_tail_p(f, tail), "p"),
            _fmt(f.r2, "r"),
        ]
        if noise == "ar1":
            row.append(_fmt(f.rho, "r"))
        rows.append(row)
    widths = [max(len(r[i]) for r in rows) for i in range(len(head))]
    lines = []
    for n, r in enumerate(rows):
        cells = [r[0].ljust(widths[0])] + [c.rjust(w) for c, w in zip(r[1:], widths[1:])]
        lines.append("  ".join(cells).rstrip())
        if n == 0:
            lines.append("  ".join("-" * w for w in widths))
    return "\n".join(lines)


def fit_to_json(f: KernelFit, checks: dict | None = None, tail: str = "two") -> dict:
    """One kernel's fit as the documented JSON object (``p`` and ``neglog10p`` for
    ``tail``, named in ``tail``; ``z`` exact at any t)."""
    d = f.design
    out = {
        "kernel": f.kernel,
        "contrast": f.contrast,
        "columns": list(d.names),
        "design": d.X.tolist(),
        "weights": f.result.weights.tolist(),
        "estimate": f.estimate,
        "beta": f.estimate,  # the earlier key of the estimate, kept for older scripts
        "variance": f.variance,
        "t": f.t,
        "df": f.df,
        "df_kind": f.df_kind,
        "df_residual": int(f.result.df),
        "p": _tail_p(f, tail),
        "tail": tail,
        "neglog10p": _neglog10p(f, tail),
        "z": _z(f),
        "r2": f.r2,
        "noise": f.result.noise,
        "noise_model": f.noise_text,
        "rho": f.rho,
        "ar": None if f.result.ar is None else [float(v) for v in f.result.ar[:, 0]],
        "noise_estimate": None if f.noise_estimate is None else f.noise_estimate.to_json(),
        "betas": f.betas,
        "fitted": f.fitted.tolist(),
        "residuals": f.residuals.tolist(),
    }
    if f.f is not None or f.f_df is not None:
        out["f"] = f.f
        out["f_p"] = f.f_p
        out["f_df"] = list(f.f_df) if f.f_df else None
    if checks is not None:
        out["checks"] = checks
    return out


def _left_out(loaded: Loaded) -> str:
    """`` (3 left out: 0, 1, 57)`` or nothing."""
    ex = loaded.analysis.excluded_volumes(loaded.settings)
    if not ex:
        return ""
    vols = list(ex)
    shown = ", ".join(str(v) for v in vols[:8]) + (" ..." if len(vols) > 8 else "")
    return f" ({len(vols)} left out: {shown})"


def _fit_one(loaded: Loaded, ijk: tuple[int, int, int], checks: bool, tail: str = "two"):
    """Fit one run at one voxel: the fits, the checks per kernel and the JSON object."""
    run = loaded.run
    y = run.timeseries(ijk)
    # the default model: this voxel's AR(p) coefficients from its neighbourhood, as in maps
    noise = loaded.analysis.noise_at(run, ijk, loaded.settings)
    fits = loaded.analysis.fit_voxel(y, loaded.settings, noise)
    warnings = list(loaded.warnings) + list(fits.warnings)
    checks_by_kernel: dict[str, dict] = {}
    if checks:
        from ..core.checks import voxel_checks

        for f in fits.fits:
            c = voxel_checks(
                loaded.analysis,
                loaded.settings,
                f.kernel,
                y,
                run=run,
                ijk=ijk,
                ar=None if f.result.ar is None else f.result.ar[:, 0],
            )
            checks_by_kernel[f.kernel] = c.to_json()
    warnings += list(run.warnings)  # what the run said while read (a rebuilt cache)
    mm = [float(v) for v in np.asarray(run.voxel_to_mm(ijk)).reshape(-1)]
    doc = {
        "voxel": list(ijk),
        "mm": mm,
        "tr": run.tr,
        "n_volumes": run.n_volumes,
        "reference_time_s": run.reference_time_s,
        "companions": loaded.inputs.used_files() if loaded.inputs is not None else None,
        "confounds": loaded.confounds_path,
        "confound_columns": list(loaded.settings.confound_columns or ()),
        "excluded_volumes": excluded_json(loaded),
        "region": _region(loaded, mm),
        "y": y.tolist(),
        "fits": [fit_to_json(f, checks_by_kernel.get(f.kernel), tail) for f in fits.fits],
        "warnings": list(dict.fromkeys(warnings)),
    }
    return fits, checks_by_kernel, doc, warnings


def _region(loaded: Loaded, mm) -> dict | None:
    """The atlas region at the voxel's centre (``--atlas``), or None without an atlas."""
    atlas = getattr(loaded.inputs, "atlas", None)
    if atlas is None:
        return None
    return {**atlas.region_at(mm).to_json(), "atlas": str(atlas.path)}


def combine_voxel_fits(
    all_fits: list[VoxelFits], labels: list[str], tail: str = "two"
) -> list[CombinedFit]:
    """Per kernel, the fixed-effects combination of the runs' fits at their voxels."""
    from ..core.combine import combine_fits

    out = []
    for i, first in enumerate(all_fits[0].fits):
        per_run = [vf.fits[i] for vf in all_fits]
        out.append(
            combine_fits(
                first.kernel,
                first.contrast,
                labels,
                [f.estimate for f in per_run],
                [f.variance for f in per_run],
                [f.df for f in per_run],
                tail=tail,
            )
        )
    return out


def format_combined_table(combined: list[CombinedFit], tail: str = "two") -> str:
    """Aligned table of the combined rows, one per kernel (p for ``tail``), then the flags."""
    head = ["kernel", "estimate", "variance", "t", "df", _TAIL_HEAD[tail], "Q", "Q p"]
    rows = [head]
    for c in combined:
        rows.append(
            [
                c.kernel,
                _fmt(c.estimate, "estimate"),
                _fmt(c.variance, "variance"),
                _fmt(c.t, "t"),
                _fmt(c.df, "df"),
                _fmt(c.p if tail == "two" else c.p_tail, "p"),
                _fmt(c.q, "Q"),
                _fmt(c.q_p, "p"),
            ]
        )
    widths = [max(len(r[i]) for r in rows) for i in range(len(head))]
    lines = []
    for n, r in enumerate(rows):
        cells = [r[0].ljust(widths[0])] + [c.rjust(w) for c, w in zip(r[1:], widths[1:])]
        lines.append("  ".join(cells).rstrip())
        if n == 0:
            lines.append("  ".join("-" * w for w in widths))
    for c in combined:
        for flag in c.flags:
            lines.append(f"[{c.kernel}] {flag.text}")
    return "\n".join(lines)


def _run_fit_several(args: argparse.Namespace) -> int:
    loads, labels = load_runs(args, summarize=bool(args.checks))
    places = voxels_from_args(args, loads)
    results = [_fit_one(ld, ijk, args.checks, args.tail) for ld, ijk in zip(loads, places)]
    combined = combine_voxel_fits([r[0] for r in results], labels, args.tail)
    warnings: list[str] = []
    for r in results:
        warnings.extend(r[3])
    if args.format == "json":
        runs = []
        for label, ld, r in zip(labels, loads, results):
            runs.append({"run": label, "path": str(ld.run.path), **r[2]})
        doc = {
            "runs": runs,
            "combined": [c.to_json() for c in combined],
            "warnings": list(dict.fromkeys(warnings)),
        }
        sys.stdout.write(dump_json(doc) + "\n")
        return 0
    print_warnings(warnings)
    noise = loads[0].settings.noise
    if args.format == "csv":
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow(
            [
                "run",
                "kernel",
                "contrast",
                _CSV_ESTIMATE,
                "variance",
                "t",
                "df",
                "p",
                "r2",
                "noise",
                "rho",
                "q",
                "q_p",
            ]
        )

        def num(v):
            return "" if v is None else repr(float(v))

        for label, r in zip(labels, results):
            for f in r[0].fits:
                w.writerow(
                    [label, f.kernel, f.contrast]
                    + [num(v) for v in (f.estimate, f.variance, f.t)]
                    + [f.df]
                    + [num(v) for v in (_tail_p(f, args.tail), f.r2)]
                    + [f.result.noise, num(f.rho), "", ""]
                )
        for c in combined:
            w.writerow(
                ["combined", c.kernel, c.contrast]
                + [num(v) for v in (c.estimate, c.variance, c.t)]
                + [f"{c.df:g}", num(c.p if args.tail == "two" else c.p_tail), ""]
                + [noise, "", num(c.q), num(c.q_p)]
            )
        sys.stdout.write(buf.getvalue())
        return 0
    for label, ld, ijk, r in zip(labels, loads, places, results):
        mm = r[2]["mm"]
        region = r[2]["region"]
        print(
            f"{label}: voxel {tuple(int(v) for v in ijk)}  mm {format_xyz(mm)}  "
            f"TR {format_seconds(ld.run.tr)}  {ld.run.n_volumes} volumes"
            + (f"  region {region['text']}" if region is not None else "")
        )
        print(format_table(r[0], noise))
        for line in checks_lines(r[1], args.checks):
            print(line)
        print()
    print(
        f"combined: fixed effects over {len(loads)} runs  contrast {combined[0].contrast}  "
        f"noise {noise}"
    )
    print(format_combined_table(combined, args.tail))
    return 0


def run_fit(args: argparse.Namespace) -> int:
    if len(run_paths(args)) > 1:
        return _run_fit_several(args)
    loaded: Loaded = load_runs(args, summarize=bool(args.checks))[0][0]
    run = loaded.run
    ijk = voxel_from_args(args, run)
    fits, checks_by_kernel, doc, warnings = _fit_one(loaded, ijk, args.checks, args.tail)
    mm = doc["mm"]
    if args.format == "json":
        sys.stdout.write(dump_json(doc) + "\n")
        return 0
    print_warnings(warnings)
    if args.format == "csv":
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow(
            [
                *("kernel", "contrast", _CSV_ESTIMATE, "variance", "t", "df", "p", "r2"),
                *("noise", "rho"),
                *("tail", "neglog10p", "z"),
            ]
        )
        for f in fits.fits:
            w.writerow(
                [f.kernel, f.contrast]
                + ["" if v is None else repr(float(v)) for v in (f.estimate, f.variance, f.t)]
                + [f.df]
                + ["" if v is None else repr(float(v)) for v in (_tail_p(f, args.tail), f.r2)]
                + [f.result.noise, "" if f.rho is None else repr(float(f.rho))]
                + [args.tail]
                + ["" if v is None else repr(float(v)) for v in (_neglog10p(f, args.tail), _z(f))]
            )
        sys.stdout.write(buf.getvalue())
        return 0
    print(
        f"voxel {tuple(int(v) for v in ijk)}  mm {format_xyz(mm)}  "
        f"TR {format_seconds(run.tr)}  {run.n_volumes} volumes{_left_out(loaded)}  "
        f"contrast {fits.fits[0].contrast}  noise {loaded.settings.noise}"
    )
    if doc["region"] is not None:
        print(f"region {doc['region']['text']} ({Path(doc['region']['atlas']).name})")
    print(format_table(fits, loaded.settings.noise, args.tail))
    for line in companions_text(loaded):
        print(line)
    if loaded.settings.noise == "arp":
        for f in fits.fits:
            print(f"[{f.kernel}] noise: {f.noise_text}")
    for line in checks_lines(checks_by_kernel, args.checks):
        print(line)
    return 0


def checks_lines(checks_by_kernel: dict[str, dict], asked: bool) -> list[str]:
    """``[kernel] flag`` lines, or one line saying there is nothing to flag (``--checks``).

    >>> checks_lines({"gamma": {"flags": []}}, True)
    ['checks: no warning signs at this voxel (1 kernel checked)']
    >>> checks_lines({"gamma": {"flags": [{"text": "residuals autocorrelated"}]}}, True)
    ['[gamma] residuals autocorrelated']
    >>> checks_lines({}, False)
    []
    """
    lines = []
    for kernel, c in checks_by_kernel.items():
        for flag in c.get("flags", []):
            text = flag.get("text") if isinstance(flag, dict) else str(flag)
            lines.append(f"[{kernel}] {text}")
    if asked and not lines:
        lines.append(
            "checks: no warning signs at this voxel "
            f"({count(len(checks_by_kernel), 'kernel')} checked)"
        )
    return lines
