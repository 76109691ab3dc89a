"""``voxelscope report``: a standalone HTML report, CSVs and figures for a voxel or marks."""

from __future__ import annotations

import argparse
import math
from pathlib import Path

from .common import (
    add_atlas_args,
    add_model_args,
    add_voxel_args,
    print_warnings,
    voxel_from_args,
)
from .helptext import help_args
from .multirun import load_runs, run_paths

__all__ = ["register", "run_report"]


def _scale(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"--scale takes a number, not '{text}'") from None
    if not (math.isfinite(v) and 0 < v <= 16):
        raise argparse.ArgumentTypeError("--scale must be between 0 and 16 (2 gives 1800x1120)")
    return v


def register(sub: argparse._SubParsersAction) -> None:
    """Add the ``report`` subcommand."""
    p = sub.add_parser(
        "report",
        **help_args("report"),
        help="write an HTML report, CSVs and figures for a voxel or a marks file",
        description=(
            "Fit every kernel at one voxel (--voxel or --mm) or at every mark of a marks TSV "
            "(--marks) and write DIR/report.html (standalone, images embedded), one CSV of "
            "the time series, fitted signals and residuals per voxel, and the figures as PNG "
            "and SVG. Existing files are kept unless --force is given. With several runs of "
            "one subject: each run's fits, figures and checks, and the runs combined by fixed "
            "effects with their agreement (Cochran's Q)."
        ),
    )
    add_model_args(p, several_runs=True)
    add_atlas_args(p)
    g = add_voxel_args(p)
    g.add_argument(
        "--marks",
        metavar="TSV",
        help="marks file (x_mm, y_mm, z_mm, title, note): one section each",
    )
    p.add_argument("-o", "--output", metavar="DIR", required=True, help="report folder")
    p.add_argument("--force", action="store_true", help="overwrite existing report files")
    p.add_argument(
        "--scale",
        type=_scale,
        default=2.0,
        metavar="N",
        help="PNG pixels per figure unit (default 2: 1800x1120 pixels)",
    )
    p.add_argument("--title", metavar="TEXT", help="report title (default: from the run name)")
    p.add_argument("--no-checks", action="store_true", help="leave out the diagnostics")
    p.set_defaults(handler=run_report)


def run_report(args: argparse.Namespace) -> int:
    """Handler of ``voxelscope report``."""
    from ..core.cache import terminal_progress
    from ..core.marks import read_marks_tsv
    from ..core.report import write_report

    marks = read_marks_tsv(args.marks) if args.marks else None  # fail early on a bad file
    if len(run_paths(args)) > 1:
        return _run_report_several(args, marks)
    loaded = load_runs(args)[0][0]
    run = loaded.run
    voxel = None if marks is not None else voxel_from_args(args, run)
    sidecar = run.sidecar
    inputs = {
        "run": Path(args.run),
        "events": loaded.events_path,
        "confounds": loaded.confounds_path,
        "sidecar": sidecar,
        "mask": loaded.inputs.mask_path if loaded.inputs is not None else None,
        "marks": Path(args.marks) if args.marks else None,
        "atlas": Path(args.atlas) if getattr(args, "atlas", None) else None,
    }
    for i, inherited in enumerate(tuple(getattr(run, "sidecars", ()))[:-1], start=1):
        inputs[f"sidecar (inherited {i})"] = inherited  # BIDS inheritance, farthest first
    result = write_report(
        args.output,
        run,
        loaded.analysis,
        loaded.settings,
        voxel=voxel,
        marks=marks,
        inputs=inputs,
        force=args.force,
        scale=args.scale,
        checks=not args.no_checks,
        title=args.title,
        warnings=loaded.warnings,
        progress=terminal_progress("writing report"),
        atlas=loaded.inputs.atlas if loaded.inputs is not None else None,
    )
    print_warnings(result.warnings)
    print(f"wrote {result.html} and {len(result.files) - 1} more file(s) in {result.directory}")
    return 0


def _run_report_several(args: argparse.Namespace, marks) -> int:
    """``report RUN RUN ...``: per-run and combined tables and figures."""
    from ..core.companions import find_companions
    from ..core.runs_report import write_runs_report

    loads, labels = load_runs(args)
    inputs: list[tuple[str, Path | None]] = []
    warnings: list[str] = []
    for label, ld in zip(labels, loads):
        inputs.append((f"events {label}", ld.events_path))
        inputs.append((f"confounds {label}", ld.confounds_path))
        inputs.append((f"sidecar {label}", find_companions(Path(ld.run.path)).sidecar))
        warnings += [f"{label}: {w}" for w in ld.warnings]
    if args.marks:
        inputs.append(("marks", Path(args.marks)))
    atlas = loads[0].inputs.atlas if loads[0].inputs is not None else None
    if getattr(args, "atlas", None):
        inputs.append(("atlas", Path(args.atlas)))
    result = write_runs_report(
        args.output,
        [ld.run for ld in loads],
        [ld.analysis for ld in loads],
        loads[0].settings,
        labels,
        voxel=tuple(args.voxel) if marks is None and args.voxel is not None else None,
        mm=tuple(args.mm) if marks is None and args.mm is not None else None,
        marks=marks,
        inputs=inputs,
        force=args.force,
        scale=args.scale,
        checks=not args.no_checks,
        title=args.title,
        warnings=warnings,
        atlas=atlas,
    )
    print_warnings(result.warnings)
    print(f"wrote {result.html} and {len(result.files) - 1} more file(s) in {result.directory}")
    return 0
