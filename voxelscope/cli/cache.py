"""``voxelscope cache info`` and ``voxelscope cache clear [RUN]``: the voxel-major cache."""

from __future__ import annotations

import argparse
import time

__all__ = ["register"]


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "cache",
        help="show or clear the voxel-major cache of compressed runs",
        description=(
            "The cache makes voxel time series of compressed runs instant. It keeps the "
            "brain voxels of each run and stays under a size limit (20 GB unless the "
            "environment variable VOXELSCOPE_CACHE_LIMIT says otherwise, e.g. 50GB); the "
            "least recently used runs make room for new ones."
        ),
    )
    s = p.add_subparsers(dest="cache_command", metavar="ACTION", required=True)
    i = s.add_parser("info", help="list cached runs, their size and last use")
    i.set_defaults(handler=run_info)
    c = s.add_parser("clear", help="delete every cached run, or those of one run")
    c.add_argument("run", nargs="?", metavar="RUN", help="only the cache of this run file")
    c.add_argument(
        "--stale", action="store_true", help="only entries whose source changed or is gone"
    )
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
