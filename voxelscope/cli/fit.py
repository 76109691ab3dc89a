"""``voxelscope fit``: fit one voxel under every kernel and print the numbers."""

from __future__ import annotations

import argparse
import csv
import io
import sys

import numpy as np

from ..core.model import KernelFit, VoxelFits
from .common import (
    Loaded,
    add_model_args,
    add_voxel_args,
    analysis_from_args,
    dump_json,
    print_warnings,
    voxel_from_args,
)

__all__ = ["fit_to_json", "format_table", "register"]


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "fit",
        help="fit one voxel under every kernel",
        description=(
            "Fit the GLM at one voxel under each kernel and print beta, variance, t, df, p and R²."
        ),
    )
    add_model_args(p)
    add_voxel_args(p)
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


def _fmt(v, spec: str) -> str:
    if v is None or (isinstance(v, float) and not np.isfinite(v)):
        return "-"
    return format(v, spec)


def format_table(fits: VoxelFits, noise: str) -> str:
    """Aligned, human-readable table, one row per kernel."""
    head = ["kernel", "beta", "variance", "t", "df", "p", "R2"]
    if noise == "ar1":
        head.append("rho")
    rows = [head]
    for f in fits.fits:
        row = [
            f.kernel,
            _fmt(f.beta, ".5g"),
            _fmt(f.variance, ".5g"),
            _fmt(f.t, ".3f"),
            str(f.df),
            _fmt(f.p, ".3g"),
            _fmt(f.r2, ".3f"),
        ]
        if noise == "ar1":
            row.append(_fmt(f.rho, ".3f"))
        rows.append(row)
    widths = [max(len(r[i]) for r in rows) for i in range(len(head))]
    lines = []
    for n, r in enumerate(rows):
        cells = [r[0].ljust(widths[0])] + [c.rjust(w) for c, w in zip(r[1:], widths[1:])]
        lines.append("  ".join(cells).rstrip())
        if n == 0:
            lines.append("  ".join("-" * w for w in widths))
    return "\n".join(lines)


def fit_to_json(f: KernelFit, checks: dict | None = None) -> dict:
    """One kernel's fit as the documented JSON object."""
    d = f.design
    out = {
        "kernel": f.kernel,
        "contrast": f.contrast,
        "columns": list(d.names),
        "design": d.X.tolist(),
        "weights": f.result.weights.tolist(),
        "beta": f.beta,
        "variance": f.variance,
        "t": f.t,
        "df": f.df,
        "p": f.p,
        "r2": f.r2,
        "noise": f.result.noise,
        "rho": f.rho,
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


def run_fit(args: argparse.Namespace) -> int:
    loaded: Loaded = analysis_from_args(args)
    run = loaded.run
    ijk = voxel_from_args(args, run)
    y = run.timeseries(ijk)
    fits = loaded.analysis.fit_voxel(y, loaded.settings)
    warnings = list(loaded.warnings) + list(fits.warnings)

    checks_by_kernel: dict[str, dict] = {}
    if args.checks:
        from ..core.checks import voxel_checks

        for f in fits.fits:
            c = voxel_checks(loaded.analysis, loaded.settings, f.kernel, y, run=run, ijk=ijk)
            checks_by_kernel[f.kernel] = c.to_json()

    mm = [float(v) for v in np.asarray(run.voxel_to_mm(ijk)).reshape(-1)]
    if args.format == "json":
        doc = {
            "voxel": list(ijk),
            "mm": mm,
            "tr": run.tr,
            "n_volumes": run.n_volumes,
            "y": y.tolist(),
            "fits": [fit_to_json(f, checks_by_kernel.get(f.kernel)) for f in fits.fits],
            "warnings": list(dict.fromkeys(warnings)),
        }
        sys.stdout.write(dump_json(doc) + "\n")
        return 0
    print_warnings(warnings)
    if args.format == "csv":
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow(["kernel", "contrast", "beta", "variance", "t", "df", "p", "r2", "noise", "rho"])
        for f in fits.fits:
            w.writerow(
                [f.kernel, f.contrast]
                + ["" if v is None else repr(float(v)) for v in (f.beta, f.variance, f.t)]
                + [f.df]
                + ["" if v is None else repr(float(v)) for v in (f.p, f.r2)]
                + [f.result.noise, "" if f.rho is None else repr(float(f.rho))]
            )
        sys.stdout.write(buf.getvalue())
        return 0
    print(
        f"voxel {tuple(int(v) for v in ijk)}  mm ({mm[0]:.1f}, {mm[1]:.1f}, {mm[2]:.1f})  "
        f"TR {run.tr:g} s  {run.n_volumes} volumes  contrast {fits.fits[0].contrast}  "
        f"noise {loaded.settings.noise}"
    )
    print(format_table(fits, loaded.settings.noise))
    for kernel, c in checks_by_kernel.items():
        for flag in c.get("flags", []):
            text = flag.get("text") if isinstance(flag, dict) else str(flag)
            print(f"[{kernel}] {text}")
    return 0
