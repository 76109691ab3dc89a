"""``voxelscope map``: fit one kernel at every voxel and write a statistic map as NIfTI.

The map is float32 on the run's grid, with the run's affine and spatial header, written
atomically (temporary file in the same folder, then a rename); the run and every other
input are only read. Optionally the command also writes a cluster table and compares the
map with an outside map.

Examples
--------
``voxelscope map run_bold.nii.gz --kernel double-gamma --contrast "tap - tone" -o tap.nii.gz``
"""

from __future__ import annotations

import argparse
from pathlib import Path

from ..core.errors import InputError
from ..core.hrf import get_kernel
from ..core.maps import EARLIER_STAT_NAMES, STAT_NAMES
from ..core.numfmt import count, format_value
from .common import (
    Loaded,
    add_model_args,
    analysis_from_args,
    parse_threshold,
    print_warnings,
)
from .helptext import help_args
from .multirun import load_runs, run_paths

__all__ = ["register", "run_map"]

_STATS = STAT_NAMES
#: With several runs the combined map also has Cochran's Q and its p.
_RUN_STATS = ("q", "q_p")


def _stat(text: str) -> str:
    """``--stat``: a statistic's name; ``beta``, the earlier name of ``estimate`` (the
    contrast's ``c'b``), is still accepted and not listed.

    >>> _stat("t"), _stat("beta")
    ('t', 'estimate')
    """
    text = str(text).strip()
    return EARLIER_STAT_NAMES.get(text, text)


def _kernel(text: str) -> str:
    try:
        return get_kernel(str(text).strip().lower()).name
    except Exception as exc:  # InputError with the list of kernels
        raise argparse.ArgumentTypeError(str(exc)) from None


def _rho_step(text: str) -> float | None:
    if str(text).strip().lower() == "exact":
        return None
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"--rho-step takes a step such as 0.01 or 'exact', not '{text}'"
        ) from None
    if not (0 < v <= 0.5):
        raise argparse.ArgumentTypeError("--rho-step must be above 0 and at most 0.5, or 'exact'")
    return v


def register(sub: argparse._SubParsersAction) -> None:
    """Add the ``map`` subcommand."""
    p = sub.add_parser(
        "map",
        **help_args("map"),
        help="fit one kernel at every voxel and write a statistic map",
        description=(
            "Fit the GLM at every voxel of the mask under one kernel and write one statistic "
            "of the contrast as a float32 NIfTI map on the run's grid (written atomically; "
            "inputs are never modified). With several runs of one subject, every run is "
            "mapped on its own and the runs are combined by fixed effects on the first run's "
            "grid (runs on other grids are sampled at its voxel centres, nearest voxel). "
            "Research software: not for clinical diagnosis."
        ),
    )
    add_model_args(p, kernels=False, several_runs=True)
    p.add_argument(
        "--kernel",
        type=_kernel,
        default="double-gamma",
        metavar="K",
        help="kernel: boxcar, gaussian, gamma, double-gamma or fir (default double-gamma)",
    )
    p.add_argument(
        "--stat",
        type=_stat,
        choices=_STATS + _RUN_STATS,
        default="t",
        help="statistic to write (default t; estimate is the contrast's c'b); with several "
        "runs also q (Cochran's Q) and q_p (its chi-square p)",
    )
    p.add_argument(
        "--rho-step",
        type=_rho_step,
        default=None,
        metavar="STEP|exact",
        help="AR(1) only: round each voxel's rho to this step before prewhitening "
        "(default 'exact': every voxel's own rho)",
    )
    p.add_argument("-o", "--output", required=True, metavar="OUT.nii[.gz]", help="map to write")
    p.add_argument(
        "--force", action="store_true", help="replace OUT (or the cluster table) if it exists"
    )
    g = p.add_argument_group("clusters")
    g.add_argument(
        "--clusters", metavar="FILE.tsv", help="also write a table of clusters of the map"
    )
    g.add_argument(
        "--threshold",
        type=parse_threshold,
        metavar="T",
        help="cluster threshold on |stat| (needed with --clusters)",
    )
    g.add_argument(
        "--connectivity",
        type=int,
        choices=(6, 18, 26),
        default=26,
        help="neighbourhood (default 26)",
    )
    g.add_argument(
        "--min-voxels", type=int, default=1, metavar="N", help="drop smaller clusters (default 1)"
    )
    g.add_argument(
        "--cluster-sign",
        choices=("signed", "abs", "positive", "negative"),
        default="signed",
        help="positive and negative clusters apart (signed, default), together (abs), or one side",
    )
    g = p.add_argument_group("agreement with an outside map")
    g.add_argument(
        "--compare", metavar="THEIRS.nii[.gz]", help="print how well THEIRS agrees with the map"
    )
    g.add_argument(
        "--tolerance",
        type=parse_threshold,
        default=1.0,
        metavar="D",
        help="a voxel disagrees when the maps differ by more than D (default 1)",
    )
    g.add_argument(
        "--explain",
        action="store_true",
        help="with --compare: test kernels, onset shifts of one TR and the noise model as causes",
    )
    p.set_defaults(handler=run_map)


def run_map(args: argparse.Namespace) -> int:
    """Handler of ``voxelscope map``."""
    from ..core.atomic import check_outputs, write_text
    from ..core.niftiout import check_output_path, write_map

    if args.clusters and args.threshold is None:
        raise InputError("--clusters needs --threshold T (clusters are voxels with |stat| > T)")
    if args.explain and not args.compare:
        raise InputError("--explain needs --compare THEIRS.nii (the map to explain)")
    if args.min_voxels < 1:
        raise InputError("--min-voxels must be at least 1")
    if len(run_paths(args)) > 1:
        return _run_map_several(args)
    if args.stat in _RUN_STATS:
        raise InputError(f"--stat {args.stat} needs several runs (Cochran's Q compares runs)")
    inputs = [args.run, args.events, args.confounds, args.compare]
    if args.mask is not None and str(args.mask).strip().lower() != "auto":
        inputs.append(args.mask)
    out = check_output_path(args.output, inputs, force=args.force)
    if args.clusters:
        clusters_path = Path(args.clusters)
        if clusters_path.resolve() == out.resolve():
            raise InputError(f"{clusters_path}: the cluster table and the map need different names")
        check_outputs([clusters_path], force=args.force)

    from ..core.cache import terminal_progress
    from ..core.maps import compute_map

    # no summary pass at load: the map reads a plain .nii once for its mask and its fit,
    # and the run's notes (NaN voxels) are printed with the map's
    loaded: Loaded = analysis_from_args(args, summarize=False)
    run, analysis = loaded.run, loaded.analysis
    settings = loaded.settings.with_(kernels=(args.kernel,))
    warnings = list(loaded.warnings)
    stats = (args.stat,) if args.stat == "t" else ("t", args.stat)
    result = compute_map(
        run,
        analysis,
        settings,
        args.kernel,
        mask=None,  # the run's mask (file or rule); a plain .nii is read once for both
        rho_step=args.rho_step,
        progress=terminal_progress("fitting map"),
        stats=stats,
        tail=args.tail,
    )
    mask = run.mask()  # decided by now: the run's brain mask file, --mask FILE or the rule
    data = result.stat(args.stat)
    tail = f" tail={args.tail}" if args.stat in ("p", "neglog10p") else ""
    desc = (
        f"voxelscope {args.stat} {args.kernel} noise={result.noise} {_df_tag(result)}{tail} "
        f"{result.contrast}"
    )
    write_map(out, data, run=run, inputs=inputs, force=args.force, description=desc, notes=warnings)
    print_warnings(warnings + list(run.warnings))  # + what the run said while read
    left = len(analysis.excluded_volumes(settings))
    left_text = f", {left} of {run.n_volumes} volumes left out" if left else ""
    print(f"wrote {out}: {args.stat} map, {result.describe()}{left_text}")

    if args.clusters:
        from ..core.clusters import find_clusters

        table = find_clusters(
            data,
            args.threshold,
            affine=run.affine,
            mask=result.mask,
            mode=args.cluster_sign,
            connectivity=args.connectivity,
            min_voxels=args.min_voxels,
        )
        write_text(args.clusters, table.to_tsv(), force=args.force)
        print(
            f"wrote {args.clusters}: {len(table)} clusters with |{args.stat}| > {args.threshold:g} "
            f"({args.connectivity}-connected, at least {count(args.min_voxels, 'voxel')})"
        )

    if args.compare:
        from ..core.agreement import compare_maps, explain, load_their_map

        notes: list[str] = []
        theirs = load_their_map(Path(args.compare), run, warnings=notes)
        print_warnings(notes)
        agr = compare_maps(result, theirs, tolerance=args.tolerance, stat=args.stat)
        print(f"agreement with {args.compare}: {agr.describe()}")
        if args.explain:
            ex = explain(
                run,
                analysis,
                settings,
                theirs,
                kernel=args.kernel,
                mask=mask,
                stat=args.stat,
                ours=result,
                progress=terminal_progress("testing alternatives"),
            )
            for line in explain_lines(ex):
                print(line)
            print(ex.statement)
    return 0


def _df_tag(result) -> str:
    """The df for a map's header description: ``df=188``, or ``df=eff160.4`` (the effective
    df's median) under the default AR(p) model."""
    import numpy as np

    if result.df_eff is None or not result.mask.any():
        return f"df={result.df}"
    return f"df=eff{format_value('df', float(np.median(result.df_eff[result.mask])))}"


def explain_lines(ex) -> list[str]:
    """The alternatives of ``map --explain``, each round under a heading; a later round
    says which kept change it builds on, so a repeated label is not read as a repeat."""
    lines: list[str] = []
    shown = None
    for alt in ex.alternatives:
        if alt.round != shown:
            shown = alt.round
            if alt.round == 0:
                lines.append("our map as given:")
            elif not alt.builds_on:
                lines.append(f"round {alt.round}: one change at a time:")
            else:
                kept = " and ".join(alt.builds_on)
                lines.append(
                    f"round {alt.round}: keeping the best change so far (when {kept}), "
                    "one more change on top:"
                )
        r, slope = format_value("r", alt.r), format_value("value", alt.slope)
        lines.append(f"  r {r:>6}  slope {slope:>8}  {alt.label}")
    return lines


def _write_clusters(args: argparse.Namespace, data, run, result) -> None:
    from ..core.atomic import write_text
    from ..core.clusters import find_clusters

    table = find_clusters(
        data,
        args.threshold,
        affine=run.affine,
        mask=result.mask,
        mode=args.cluster_sign,
        connectivity=args.connectivity,
        min_voxels=args.min_voxels,
    )
    write_text(args.clusters, table.to_tsv(), force=args.force)
    print(
        f"wrote {args.clusters}: {len(table)} clusters with |{args.stat}| > {args.threshold:g} "
        f"({args.connectivity}-connected, at least {count(args.min_voxels, 'voxel')})"
    )


def _run_map_several(args: argparse.Namespace) -> int:
    """``map RUN RUN ...``: the fixed-effects map across runs on the first run's grid."""
    from ..core.atomic import check_outputs
    from ..core.cache import terminal_progress
    from ..core.combine import compute_combined_map
    from ..core.niftiout import check_output_path, write_map

    if args.explain:
        raise InputError(
            "--explain works on one run; give one run to test which change explains a map"
        )
    paths = run_paths(args)
    inputs = [*paths, *(getattr(args, "events_each", None) or [])]
    inputs += [*(getattr(args, "confounds_each", None) or []), args.compare]
    if args.mask is not None and str(args.mask).strip().lower() != "auto":
        inputs.append(args.mask)
    out = check_output_path(args.output, inputs, force=args.force)
    if args.clusters:
        clusters_path = Path(args.clusters)
        if clusters_path.resolve() == out.resolve():
            raise InputError(f"{clusters_path}: the cluster table and the map need different names")
        check_outputs([clusters_path], force=args.force)
    loads, labels = load_runs(args)
    runs = [ld.run for ld in loads]
    settings = loads[0].settings.with_(kernels=(args.kernel,))
    warnings: list[str] = []
    for ld in loads:
        warnings.extend(ld.warnings)
    mask = None  # each run keeps its own mask (mask file or intensity rule), set by the loader
    stats = (args.stat,) if args.stat == "t" else ("t", args.stat)
    result = compute_combined_map(
        runs,
        [ld.analysis for ld in loads],
        settings,
        args.kernel,
        labels=labels,
        stats=stats,
        mask=mask,
        rho_step=args.rho_step,
        progress=terminal_progress(f"fitting {len(runs)} runs"),
        tail=args.tail,
    )
    data = result.stat(args.stat)
    tail = f" tail={args.tail}" if args.stat in ("p", "neglog10p") else ""
    desc = (
        f"voxelscope fixed-effects {args.stat} {args.kernel} df={result.df}{tail} {result.contrast}"
    )
    write_map(
        out,
        data,
        run=runs[0],
        inputs=inputs,
        force=args.force,
        description=desc[:79],
        notes=warnings,
    )
    print_warnings(warnings)
    print(f"wrote {out}: {args.stat} map, {result.describe()}")
    if args.clusters:
        _write_clusters(args, data, runs[0], result)
    if args.compare:
        from ..core.agreement import compare_maps, load_their_map

        notes: list[str] = []
        theirs = load_their_map(Path(args.compare), runs[0], warnings=notes)
        print_warnings(notes)
        agr = compare_maps(result, theirs, tolerance=args.tolerance, stat=args.stat)
        print(f"agreement with {args.compare}: {agr.describe()}")
    return 0
