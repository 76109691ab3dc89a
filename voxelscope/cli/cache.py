"""``voxelscope cache info`` and ``voxelscope cache clear [RUN]``: the fast-access copies.

A compressed run is copied once into a form that serves any voxel's time series at once
(``core/cache.py``); these commands list and remove those copies.
"""

from __future__ import annotations

import argparse
import time

from .helptext import help_args

__all__ = ["register"]


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "cache",
        **help_args("cache"),
        help="list or remove the fast-access copies of compressed runs",
        description=(
            "The first time a compressed run (.nii.gz) is opened, voxelscope writes a "
            "fast-access copy of it, so any voxel's time series is read at once. A copy "
            "keeps the brain voxels of its run, and all copies stay under a size limit (20 GB "
            "unless the environment variable VOXELSCOPE_CACHE_LIMIT says otherwise, e.g. "
            "50GB); the least recently used make room for new ones."
        ),
    )
    s = p.add_subparsers(dest="cache_command", metavar="ACTION", required=True)
    i = s.add_parser(
        "info",
        **help_args("cache info"),
        help="list the copies: size, last use and the run each was made from",
        description="List the fast-access copies: size, last use and the run of each.",
    )
    i.set_defaults(handler=run_info)
    c = s.add_parser(
        "clear",
        **help_args("cache clear"),
        help="remove every copy, or the copy of one run",
        description="Remove fast-access copies (they are made again when a run is opened).",
    )
    c.add_argument("run", nargs="?", metavar="RUN", help="only the copy of this run file")
    c.add_argument("--stale", action="store_true", help="only copies whose run changed or is gone")
    c.set_defaults(handler=run_clear)


def _human(n: float) -> str:
    for unit in ("B", "KB", "MB", "GB"):
        if n < 1024 or unit == "GB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1024
    return f"{n:.1f} GB"


def _when(t: float) -> str:
    return time.strftime("%Y-%m-%d %H:%M", time.localtime(t)) if t > 0 else "-"


def run_info(args: argparse.Namespace) -> int:
    from ..core import cache

    info = cache.cache_info()
    print(f"cache folder: {info.directory}")
    if len(info):
        print(f"  {'size':>9}  {'last use':<16}  run")
    for e in sorted(info.entries, key=lambda e: -e.last_used):
        note = "  (stale: the source changed or is gone)" if e.stale else ""
        print(f"  {_human(e.size_bytes):>9}  {_when(e.last_used):<16}  {e.source}{note}")
    print(
        f"{len(info)} cached run(s), {_human(info.total_bytes)} in all "
        f"(limit {_human(info.limit_bytes)})"
    )
    return 0


def run_clear(args: argparse.Namespace) -> int:
    from ..core import cache

    removed = cache.cache_clear(stale_only=args.stale, source=args.run)
    print(f"removed {len(removed)} cached run(s), {_human(removed.total_bytes)}")
    return 0
