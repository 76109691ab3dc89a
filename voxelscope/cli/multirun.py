"""Several runs on the command line: one load per run, the same as for one run.

``voxelscope fit|map|report RUN [RUN ...]`` loads each run exactly as the one-run command
does (:func:`voxelscope.cli.common.analysis_from_args`, so every run finds its own
companions beside it), then combines the runs (:mod:`voxelscope.core.combine`).
``--events`` and ``--confounds`` are either left out (each run finds its own), given once
per run in order, or, for ``--events`` only, given once for every run (said in a warning).
"""

from __future__ import annotations

import argparse
import copy
from pathlib import Path

from ..core.errors import InputError, VoxelscopeError
from .common import Loaded, analysis_from_args

__all__ = ["load_runs", "run_paths", "voxels_from_args"]


def run_paths(args: argparse.Namespace) -> list[str]:
    """Every run given on the command line, in order."""
    runs = getattr(args, "runs", None)
    return list(runs) if runs else [args.run]


def _per_run(args: argparse.Namespace, name: str, n: int, shared_ok: bool) -> list:
    each = getattr(args, f"{name}_each", None) or []
    option = f"--{name}"
    if not each:
        return [None] * n
    if len(each) == n:
        return list(each)
    if len(each) == 1 and shared_ok:
        return [each[0]] * n
    if len(each) == 1 and n > 1:
        raise InputError(
            f"{option} names one file but {n} runs were given; give {option} once per run, "
            "in the order of the runs, or leave it out so each run finds its own beside it"
        )
    raise InputError(
        f"{option} was given {len(each)} times for {n} run(s); give it once per run, in "
        "the order of the runs"
    )


def load_runs(
    args: argparse.Namespace, progress: bool = True, summarize: bool = True
) -> tuple[list[Loaded], list[str]]:
    """Load every run as the one-run commands do; returns the loads and the run labels.

    ``summarize`` is passed to :func:`~voxelscope.cli.common.analysis_from_args`.

    Raises
    ------
    InputError
        A run that cannot be loaded (the message names it), mismatched ``--events`` /
        ``--confounds`` counts, or the same run twice.
    """
    from ..core.bids import run_labels

    paths = run_paths(args)
    n = len(paths)
    events = _per_run(args, "events", n, shared_ok=True)
    confounds = _per_run(args, "confounds", n, shared_ok=False)
    if n == 1:
        return [analysis_from_args(args, progress=progress, summarize=summarize)], run_labels(paths)
    seen: dict[str, str] = {}
    for p in paths:
        key = str(Path(p).resolve())
        if key in seen:
            raise InputError(f"{p}: the same run is given twice; give each run once")
        seen[key] = p
    loads: list[Loaded] = []
    for path, ev, conf in zip(paths, events, confounds):
        one = copy.copy(args)
        one.run, one.runs, one.events, one.confounds = path, [path], ev, conf
        try:
            loaded = analysis_from_args(one, progress=progress, summarize=summarize)
        except VoxelscopeError as exc:
            text = str(exc)
            if str(path) in text or Path(path).name in text:
                raise
            named = copy.copy(exc)  # the same error and remedy, naming the run
            named.message = f"{path}: {exc.message}"
            named.args = (named.message,)
            raise named from None
        loads.append(loaded)
    labels = run_labels(paths)
    if len(getattr(args, "events_each", None) or []) == 1:
        loads[0].warnings.append(
            f"one events file ({args.events_each[0]}) is used for all {n} runs; give "
            "--events once per run when their timings differ"
        )
    return loads, labels


def voxels_from_args(args: argparse.Namespace, loads: list[Loaded]) -> list[tuple[int, int, int]]:
    """Each run's voxel for ``--voxel`` (runs on one grid) or ``--mm`` (any grids)."""
    from ..core.combine import voxel_in_runs

    runs = [ld.run for ld in loads]
    if getattr(args, "voxel", None) is not None:
        return voxel_in_runs(runs, voxel=tuple(args.voxel))
    return voxel_in_runs(runs, mm=tuple(args.mm))
