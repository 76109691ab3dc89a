"""``voxelscope sweep``: every run of a study, every subject's combined map, and the
findings that deserve a look, on a Dask cluster.

Examples
--------
``voxelscope sweep /data/study -o sweep-out --workers 4``
``voxelscope sweep /data/study -o sweep-out --scheduler tcp://10.0.0.5:8786``
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

from ..core.errors import InputError
from .common import _names, add_model_args, check_model_args, parse_threshold

__all__ = ["register", "run_sweep_command"]


def _kernel(text: str) -> str:
    from ..core.hrf import get_kernel

    try:
        return get_kernel(str(text).strip().lower()).name
    except Exception as exc:  # InputError with the list of kernels
        raise argparse.ArgumentTypeError(str(exc)) from None


def _count(name: str, low: int, high: int):
    def parse(text: str) -> int:
        try:
            v = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{name} takes a whole number, not '{text}'") from None
        if not low <= v <= high:
            raise argparse.ArgumentTypeError(f"{name} must be between {low} and {high}")
        return v

    return parse


def _address(text: str) -> str:
    text = str(text).strip()
    if "://" not in text or not text.split("://", 1)[1]:
        raise argparse.ArgumentTypeError(
            f"--scheduler takes an address such as tcp://HOST:8786, not '{text}'"
        )
    return text


def register(sub: argparse._SubParsersAction) -> None:
    """Add the ``sweep`` subcommand."""
    from ..core.sweep import DEFAULT_THRESHOLD, MAX_PEAKS, MIN_VOXELS
    from .helptext import help_args

    p = sub.add_parser(
        "sweep",
        **help_args("sweep"),
        help="map every run of a study, combine each subject's runs and list what deserves a look",
        description=(
            "Find every run with events in a BIDS study, map each run under one kernel, "
            "combine each subject's runs by fixed effects, check every cluster's peak "
            "(the voxel checks, closeness to the brain edge, motion locked to the task, "
            "agreement between runs) and write OUT/findings.tsv (flagged first), one "
            "session per finding and OUT/index.html. Runs are tasks on Dask: a local "
            "cluster (--workers) or a running scheduler (--scheduler). Rerunning into the "
            "same OUT reuses finished runs. Research software: not for clinical diagnosis."
        ),
    )
    p.add_argument("dataset", metavar="DATASET", help="BIDS study folder (raw or derivatives)")
    p.add_argument("-o", "--output", required=True, metavar="OUT", help="folder of the sweep")
    p.add_argument("--task", metavar="T", help="only runs of this task (the task- label)")
    p.add_argument(
        "--kernel",
        type=_kernel,
        default="double-gamma",
        metavar="K",
        help="kernel of the maps: boxcar, gaussian, gamma, double-gamma or fir "
        "(default double-gamma)",
    )
    p.add_argument(
        "--threshold",
        type=parse_threshold,
        default=DEFAULT_THRESHOLD,
        metavar="T",
        help=f"clusters are voxels with |t| > T (default {DEFAULT_THRESHOLD:g})",
    )
    p.add_argument(
        "--min-voxels",
        type=_count("--min-voxels", 1, 10**6),
        default=MIN_VOXELS,
        metavar="N",
        help=f"smallest cluster (default {MIN_VOXELS})",
    )
    p.add_argument("--connectivity", type=int, choices=(6, 18, 26), default=26, help="default 26")
    p.add_argument(
        "--max-peaks",
        type=_count("--max-peaks", 1, 1000),
        default=MAX_PEAKS,
        metavar="N",
        help=f"check the peaks of at most N clusters per map, the largest (default {MAX_PEAKS})",
    )
    add_model_args(p, kernels=False, run_files=False)
    g = p.add_mutually_exclusive_group()
    g.add_argument(
        "--workers",
        type=_count("--workers", 1, 4096),
        metavar="N",
        help="local cluster of N worker processes, one run each at a time (default: cores)",
    )
    g.add_argument(
        "--scheduler",
        type=_address,
        metavar="ADDRESS",
        help="use a running Dask scheduler, e.g. tcp://HOST:8786 (workers must see "
        "DATASET and OUT at the same paths)",
    )
    p.set_defaults(handler=run_sweep_command)


def _settings(args: argparse.Namespace):
    from ..core.model import ModelSettings
    from ..core.sweep import SweepSettings

    if getattr(args, "amplitude_column", None) or getattr(args, "fir_bins", None):
        raise InputError(
            "--amplitude-column and --fir-bins were replaced: use --modulators and "
            "--fir-window SECONDS"
        )
    check_model_args(args)
    model = ModelSettings(
        kernels=(args.kernel,),
        contrast=args.contrast,
        noise=args.noise,
        highpass_s=args.highpass,
        onset_shift_s=float(args.onset_shift),
        derivatives=int(args.derivatives),
        fir_window_s=float(args.fir_window),
        fir_bin_s=args.fir_bin,
        drop_volumes=int(args.drop_volumes or 0),
        censor_fd_mm=args.censor_fd,
        modulators=_names(args.modulators),
        orthogonalize=bool(args.orthogonalize),
    )
    mask = args.mask
    if mask is not None and str(mask).strip().lower() != "auto":
        mask = str(Path(mask).expanduser().resolve())
    return SweepSettings(
        model=model,
        kernel=args.kernel,
        threshold=float(args.threshold),
        min_voxels=int(args.min_voxels),
        connectivity=int(args.connectivity),
        max_peaks=int(args.max_peaks),
        task=args.task,
        condition_column=args.condition_column,
        onset_unit=args.onset_unit,
        confound_columns=args.confound_columns,
        mask=mask,
        bids_root=None if args.bids_root is None else str(Path(args.bids_root).resolve()),
        tr=args.tr,
        use_cache=not args.no_cache,
        tail=args.tail,
    )


def _check_out(out: Path, root: Path) -> None:
    if out.exists() and not out.is_dir():
        raise InputError(f"{out}: is a file; give a folder for the sweep (-o OUT)")
    if out.is_dir() and any(out.iterdir()):
        if not (out / "runs").is_dir() and not (out / "findings.tsv").is_file():
            raise InputError(
                f"{out}: the folder holds other files; give a new or empty folder, or the "
                "folder of an earlier sweep to resume it"
            )
    try:
        rel = out.resolve().relative_to(root.resolve())
    except ValueError:
        return
    if any(part.startswith("sub-") for part in rel.parts):
        raise InputError(
            f"{out}: inside a subject's folder of the study; write the sweep elsewhere "
            "(for example DATASET/derivatives/sweep or a folder outside the study)"
        )


class _Bar:
    """Runs done / total, combinations done / total and the time left, on one line of
    stderr (terminals only).

    >>> import io
    >>> from voxelscope.core.sweep import SweepProgress
    >>> out = io.StringIO()
    >>> bar = _Bar(out)
    >>> bar.tty = True
    >>> bar(SweepProgress(3, 12, 0, 4, 75.0))
    >>> out.getvalue().strip()
    'sweep [####....................] runs 3/12, combined 0/4, about 1 min 15 s left'
    """

    def __init__(self, stream=None) -> None:
        self.out = stream or sys.stderr
        try:
            self.tty = bool(self.out.isatty())
        except (AttributeError, ValueError):
            self.tty = False
        self.drawn = False

    def __call__(self, p) -> None:
        if not self.tty:
            return
        width = 24
        fill = round(width * p.fraction)
        text = f"\rsweep [{'#' * fill}{'.' * (width - fill)}] runs {p.runs_done}/{p.runs}"
        if p.subjects:
            text += f", combined {p.subjects_done}/{p.subjects}"
        if p.seconds_left is not None:
            text += f", about {_duration(p.seconds_left)} left"
        self.out.write(text + " " * 8)
        self.out.flush()
        self.drawn = True

    def end(self) -> None:
        if self.drawn:
            self.out.write("\n")
            self.out.flush()
            self.drawn = False


def _duration(s: float) -> str:
    s = max(0.0, float(s))
    if s < 60:
        return f"{s:.0f} s"
    if s < 3600:
        return f"{int(s // 60)} min {int(s % 60):02d} s"
    return f"{int(s // 3600)} h {int(s % 3600 // 60):02d} min"


def run_sweep_command(args: argparse.Namespace) -> int:
    """Handler of ``voxelscope sweep``."""
    from ..core.sweep import plan_sweep, run_sweep
    from ..core.sweep_out import write_outputs

    settings = _settings(args)
    root = Path(args.dataset).expanduser()
    out = Path(args.output).expanduser()
    _check_out(out, root)
    plan = plan_sweep(root, settings)
    bar = _Bar()
    started = time.perf_counter()
    try:
        result = run_sweep(
            root,
            out,
            settings,
            workers=args.workers,
            scheduler=args.scheduler,
            progress=bar,
            plan=plan,
        )
    except KeyboardInterrupt:
        bar.end()
        done = len(list((out / "runs").glob("*.json"))) if (out / "runs").is_dir() else 0
        print(
            f"voxelscope: interrupted; {done} of {len(plan.runs)} runs finished are kept in "
            f"{out} (run the same command to resume)",
            file=sys.stderr,
        )
        return 130
    finally:
        bar.end()
    rows = write_outputs(result, settings)
    failed = sum(1 for r in rows if r["flags"] == "failed")
    flagged = sum(1 for r in rows if r["flags"]) - failed
    for note in plan.skipped:
        print(f"voxelscope: note: {note}", file=sys.stderr)
    print(
        f"wrote {out / 'findings.tsv'}: {len(rows) - failed} findings ({flagged} flagged) from "
        f"{len(result.runs)} runs and {len(result.subjects)} combined maps"
        + (f"; {failed} failed (see the reason column)" if failed else "")
    )
    reused = len(result.runs) + len(result.subjects) - len(result.computed)
    print(
        f"wrote {out / 'index.html'} ({len(result.computed)} tasks computed, {reused} reused, "
        f"{_duration(time.perf_counter() - started)})"
    )
    return 0
